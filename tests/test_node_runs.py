"""A run's observers (``node.runs.RunRecorders``): the job store, progress, metrics and the session log, no network.

Specification: a run ended before operators could follow it is only stored; one ended before its start was logged
is stored, followed and counted but not logged; a logged run's end writes its phases, then ``session_aborted``
with the reason, who ended it and the phase, and the store's reason reads ``<code>: <words>``. A run ends once: a
later outcome (a cancellation after the conclusion) changes nothing. The live view and the metrics show the outcome
only once the log and the store hold it. A detail the log will not take keeps its reason with no words; long hex
tokens are cut from a detail. A failure of the node's own machinery is stored as ``failed`` (``internal``) and
leaves the log as it was. The cuts, resumes and refused resume attempts of a session's connection are logged as
``link_event`` records inside the one session, in order, once, and counted in the metrics.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.audit.log import SessionLog
from jointstat.audit.verify import verify_log
from jointstat.circuit.model import Party
from jointstat.node.clock import ManualClock
from jointstat.node.keys import PeerIdentity
from jointstat.node.metrics import NodeMetrics
from jointstat.node.progress import ABORTED, FAILED, REFUSED, SessionTracker
from jointstat.node.runs import (
    BudgetRecorder,
    LogRecorder,
    MetricsRecorder,
    Outcome,
    Progress,
    Run,
    RunRecorders,
    StoreRecorder,
)
from jointstat.node.spending import Budgets
from jointstat.node.store import JobStore
from jointstat.transport import pki
from jointstat.transport import stream as link

NODE, PEER, JOB = "saltmarsh-gauges", "teal-valley-weather", "rainfall-totals"  # invented
NOW = datetime(2026, 4, 1, 3, 5, tzinfo=UTC)
DIGEST = bytes(range(32))


@dataclass
class Bench:
    recorders: RunRecorders
    store: JobStore
    log: SessionLog
    log_path: Path
    metrics: NodeMetrics
    sessions: dict[str, SessionTracker]
    peer: PeerIdentity

    def run(self, n: int) -> Run:
        return Run(
            job=JOB,
            scheduled_for=NOW.replace(minute=0),
            attempt=1,
            trigger="peer",
            session_id=bytes([n]) * 16,
            party=Party.EVALUATOR,
            peer=self.peer,
            started_at=NOW,
            config=None,
            digest=DIGEST,
        )

    def logged(self, run: Run) -> list[dict[str, Any]]:
        lines = self.log_path.read_text(encoding="utf-8").splitlines()
        return [r for r in map(json.loads, lines) if r["session"] == run.sid]

    def stored(self, run: Run) -> Any:
        (row,) = [r for r in self.store.runs() if r.session_id == run.sid]
        return row

    def aborted_count(self, reason: str) -> float | None:
        labels = {"job": JOB, "role": "evaluator", "reason": reason}
        return self.metrics.registry.get_sample_value("jointstat_sessions_aborted_total", labels)

    def started_count(self) -> float | None:
        labels = {"job": JOB, "role": "evaluator"}
        return self.metrics.registry.get_sample_value("jointstat_sessions_started_total", labels)


@pytest.fixture
def bench(tmp_path: Path) -> Iterator[Bench]:
    clock = ManualClock(NOW)
    store = JobStore(tmp_path / "jobs.sqlite3")
    log = SessionLog(tmp_path / "sessions.jsonl", Ed25519PrivateKey.generate(), NODE, clock=clock.now)
    metrics = NodeMetrics()
    sessions: dict[str, SessionTracker] = {}
    ca = pki.new_ca("trial CA")
    own, theirs = pki.issue(ca, NODE), pki.issue(ca, PEER)
    cert = theirs.load_certificate()
    peer = PeerIdentity(
        name=PEER,
        address="127.0.0.1:7300",
        tls=pki.node_tls(own, theirs),
        fingerprint=b"\x00" * 32,
        certificate_der=cert.public_bytes(serialization.Encoding.DER),
        signing_key=Ed25519PrivateKey.generate().public_key(),
    )

    def running() -> int:
        return sum(1 for t in sessions.values() if not t.ended)

    recorders = RunRecorders(
        store=StoreRecorder(store, clock),
        progress=Progress(sessions, clock),
        metrics=MetricsRecorder(metrics, running, clock),
        log=LogRecorder(log),
        budget=BudgetRecorder(Budgets([], store), store, log, clock),
    )
    try:
        yield Bench(recorders, store, log, tmp_path / "sessions.jsonl", metrics, sessions, peer)
    finally:
        log.close()
        store.close()


async def test_a_run_ended_before_it_was_followed_is_only_stored(bench: Bench) -> None:
    run = bench.run(1)
    await bench.recorders.opened(run)
    await bench.recorders.ended(run, Outcome(FAILED, "busy", "this node already runs 4 sessions"))
    row = bench.stored(run)
    assert (row.status, row.reason, row.role) == (
        "failed",
        "busy: this node already runs 4 sessions",
        "evaluator",
    )
    assert bench.sessions == {} and bench.logged(run) == []
    assert bench.aborted_count("busy") is None


async def test_a_run_ended_before_its_start_was_logged_is_stored_followed_and_counted_but_not_logged(
    bench: Bench,
) -> None:
    run = bench.run(2)
    await bench.recorders.opened(run)
    bench.recorders.followed(run)
    bench.recorders.progress.measured(run, "prepare", 0.25)
    await bench.recorders.ended(run, Outcome(FAILED, "input_unavailable", "gauges.csv: row 3: not a number"))
    assert bench.logged(run) == []
    assert bench.stored(run).reason == "input_unavailable: gauges.csv: row 3: not a number"
    tracker = bench.sessions[run.sid]
    assert (tracker.status, tracker.reason) == ("failed", "input_unavailable")
    assert bench.aborted_count("input_unavailable") == 1.0 and bench.started_count() is None


async def test_a_logged_runs_end_writes_its_phases_then_the_abort_with_reason_side_and_phase(
    bench: Bench,
) -> None:
    run = bench.run(3)
    await bench.recorders.opened(run)
    bench.recorders.followed(run)
    bench.recorders.progress.measured(run, "prepare", 0.5)
    await bench.recorders.announced(run)
    bench.recorders.progress.measured(run, "proposal", 0.125)
    refusal = Outcome(REFUSED, "outside_window", "outside the run window there", by="peer", phase="proposal")
    await bench.recorders.ended(run, refusal)
    records = bench.logged(run)
    assert [r["kind"] for r in records] == [
        "session_started",
        "phase_finished",
        "phase_finished",
        "session_aborted",
    ]
    assert [r["body"]["phase"] for r in records[1:3]] == ["prepare", "proposal"]
    assert records[1]["body"]["duration_us"] == 500_000
    body = records[-1]["body"]
    assert (body["reason"], body["by"], body["phase"], body["detail"]) == (
        "outside_window",
        "peer",
        "proposal",
        "outside the run window there",
    )
    assert records[0]["body"]["role"] == "evaluator" and records[0]["body"]["manifest_digest"] == DIGEST.hex()
    row = bench.stored(run)
    assert (row.status, row.reason) == ("refused", "outside_window: outside the run window there")
    assert (bench.started_count(), bench.aborted_count("outside_window")) == (1.0, 1.0)
    assert bench.sessions[run.sid].status == REFUSED
    bench.log.close()
    assert verify_log(bench.log_path.read_bytes()).ok


async def test_a_run_ends_once_and_a_later_cancellation_changes_nothing(bench: Bench) -> None:
    run = bench.run(4)
    await bench.recorders.opened(run)
    bench.recorders.followed(run)
    await bench.recorders.announced(run)
    first = Outcome(ABORTED, "connection_lost", "the stream was reset")
    assert await bench.recorders.ended(run, first) is not first  # the phase it was in is filled in
    again = await bench.recorders.ended(run, Outcome(ABORTED, "cancelled", "the node is stopping"))
    assert (again.reason, bench.stored(run).reason) == (
        "connection_lost",
        "connection_lost: the stream was reset",
    )
    assert [r["kind"] for r in bench.logged(run)].count("session_aborted") == 1
    assert bench.aborted_count("cancelled") is None and bench.aborted_count("connection_lost") == 1.0


async def test_the_live_view_and_metrics_show_the_outcome_only_once_the_log_and_store_hold_it(
    bench: Bench,
) -> None:
    seen: list[tuple[bool, list[str], float | None]] = []

    class Watched(StoreRecorder):
        async def ended(self, run: Run, outcome: Outcome) -> None:
            assert run.tracker is not None
            kinds = [r["kind"] for r in bench.logged(run)]
            seen.append((run.tracker.ended, kinds, bench.aborted_count("peer_shutdown")))
            await super().ended(run, outcome)

    recorders = bench.recorders
    recorders.store = Watched(bench.store, ManualClock(NOW))
    run = bench.run(5)
    await recorders.opened(run)
    recorders.followed(run)
    await recorders.announced(run)
    await recorders.ended(run, Outcome(ABORTED, "peer_shutdown", "the peer is stopping", by="peer"))
    assert seen == [(False, ["session_started", "session_aborted"], None)]
    assert bench.sessions[run.sid].ended and bench.aborted_count("peer_shutdown") == 1.0


async def test_a_detail_the_log_refuses_keeps_its_reason_and_long_hex_is_cut_from_details(
    bench: Bench,
) -> None:
    refused, cut = bench.run(6), bench.run(7)
    for run in (refused, cut):
        await bench.recorders.opened(run)
        bench.recorders.followed(run)
        await bench.recorders.announced(run)
    await bench.recorders.ended(refused, Outcome(ABORTED, "internal", "a bell \x07 in the words"))
    await bench.recorders.ended(cut, Outcome(ABORTED, "internal", f"label {'ab' * 20} leaked?"))
    assert bench.logged(refused)[-1]["body"]["detail"] == ""
    assert bench.logged(refused)[-1]["body"]["reason"] == "internal"
    assert bench.logged(cut)[-1]["body"]["detail"] == "label … leaked?"


async def test_a_failure_of_the_nodes_machinery_is_stored_as_internal_and_leaves_the_log_as_it_was(
    bench: Bench,
) -> None:
    run = bench.run(8)
    await bench.recorders.opened(run)
    bench.recorders.followed(run)
    await bench.recorders.announced(run)
    await bench.recorders.failed(run, Outcome(FAILED, "internal", "OSError: no space left on device"))
    assert [r["kind"] for r in bench.logged(run)] == ["session_started"]
    assert bench.stored(run).reason == "internal: OSError: no space left on device"
    assert (bench.sessions[run.sid].status, bench.aborted_count("internal")) == ("failed", 1.0)


async def test_a_sessions_cuts_resumes_and_refused_attempts_are_logged_inside_it_once_and_counted(
    bench: Bench,
) -> None:
    run = bench.run(9)
    await bench.recorders.opened(run)
    bench.recorders.followed(run)
    await bench.recorders.announced(run)
    events = (
        link.LinkEvent(link.CUT, 1.25, 40, 38, "receiving failed: UNAVAILABLE: Socket closed"),
        link.LinkEvent(link.REFUSED, 1.5, 40, 38, f"the resume proof does not verify ({'cd' * 20})"),
        link.LinkEvent(link.RESUMED, 1.75, 40, 38, "resumed on attempt 1 (3 frames resent)"),
    )
    await bench.recorders.linked(run, events)
    await bench.recorders.linked(run, events)  # once only
    await bench.recorders.ended(run, Outcome(ABORTED, "deadline", "the session deadline passed"))
    records = [r for r in bench.logged(run) if r["kind"] == "link_event"]
    assert [(r["body"]["event"], r["body"]["at_us"]) for r in records] == [
        ("cut", 1_250_000),
        ("resume_refused", 1_500_000),
        ("resumed", 1_750_000),
    ]
    assert records[1]["body"]["detail"] == "the resume proof does not verify (…)"
    labels = {"job": JOB, "role": "evaluator"}
    counted = [
        bench.metrics.registry.get_sample_value(f"jointstat_link_{name}_total", labels)
        for name in ("cuts", "resumes", "resumes_refused")
    ]
    assert counted == [1.0, 1.0, 1.0]
    bench.log.close()
    report = verify_log(bench.log_path.read_bytes())
    assert report.ok and (report.sessions[run.sid].cuts, report.sessions[run.sid].resumes) == (1, 1)
