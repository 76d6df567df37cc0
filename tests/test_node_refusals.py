"""Proposals the accepting node refuses: each refusal is logged and stored on both sides, and nothing runs.

Specification: the accepting node refuses a run of a job it does not have for that peer (``job_not_configured``),
of a job whose manifest digest differs from its own (``digest_mismatch``), outside its own run window
(``outside_window``), when it already runs ``max_sessions`` sessions (``busy``), and when both nodes' configs
name the same manifest party as their ``role`` (``role_mismatch``, whichever party that is). On both nodes the session log then shows the session started and aborted with
that reason (by the peer on the initiating node, by itself on the other), the job store a row with status
``refused``, and no result file exists; both logs still verify. The initiating node does not retry a refusal that
retrying cannot cure. A proposal for a job the accepting node initiates as well is refused (``both_initiate``): with both nodes
initiating, every scheduled time would run twice.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from jointstat.audit.verify import verify_log
from jointstat.node.clock import ManualClock
from jointstat.node.progress import SessionTracker
from jointstat.node.trial import job_entry

from tests.test_node_daemon import BATHS, DEMO, JOB, LIBRARY, Pair, make_pair, running, session_records, until

NOW = datetime(2026, 3, 2, 3, 30, tzinfo=UTC)  # an invented time, 30 minutes after the jobs' 03:00 schedule


def other_manifest(root: Path) -> Path:
    """The demo manifest with another threshold: the same job name, a different digest."""
    original = (DEMO / "manifest.yaml").read_text(encoding="utf-8")
    text = original.replace('threshold: {op: ">=", value: 10}', 'threshold: {op: ">=", value: 12}')
    assert text != original, "the demo manifest's threshold is no longer written as this test expects"
    path = root / "manifest-threshold-12.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def scenario(kind: str, root: Path) -> dict[str, Any]:
    timing = {"cron": "0 3 * * *", "window_minutes": 120, "attempts": 3, "backoff_seconds": 0}
    if kind == "job_not_configured":
        other = job_entry(
            name="another-job",
            manifest=DEMO / "manifest.yaml",
            peer=LIBRARY,
            csv=DEMO / "evaluator.csv",
            role="evaluator",
            initiate=False,
            **timing,
        )
        return {"library_job": timing, "baths_jobs": [other]}
    if kind == "digest_mismatch":
        other = job_entry(
            name=JOB,
            manifest=other_manifest(root),
            peer=LIBRARY,
            csv=DEMO / "evaluator.csv",
            role="evaluator",
            initiate=False,
            **timing,
        )
        return {"library_job": timing, "baths_jobs": [other]}
    if kind == "outside_window":
        return {"library_job": timing, "baths_job": {**timing, "window_minutes": 10}}
    if kind == "role_mismatch":  # the baths' config claims the library's party too
        return {"library_job": timing, "baths_job": {**timing, "role": "garbler"}}
    raise AssertionError(kind)


async def refused_run(pair: Pair, clock: ManualClock, busy: bool = False) -> tuple[str, dict[str, Any]]:
    async with running(pair, clock) as nodes:
        if busy:
            baths = nodes[BATHS].state
            assert baths is not None
            # The accepting node is already running as many sessions as it allows (one, in this config).
            baths.sessions["a-session-in-progress"] = SessionTracker(
                session_id="a-session-in-progress",
                job=JOB,
                role=1,
                peer=LIBRARY,
                trigger="peer",
                started_at=clock.now(),
            )
        started = await nodes[LIBRARY].admin.run_job({"job": JOB})
        sid = started["session"]
        library = nodes[LIBRARY].state
        assert library is not None
        await until(lambda: sid in library.sessions and library.sessions[sid].ended, "the refusal")
        await until(lambda: not nodes[LIBRARY]._jobs, "the run to finish its attempts")
        snap = (await nodes[LIBRARY].admin.show_session({"session": sid}))["session"]
    return sid, snap


def assert_refused_on_both_sides(pair: Pair, sid: str, reason: str) -> None:
    for name, by in ((LIBRARY, "peer"), (BATHS, "self")):
        report = verify_log(pair.log(name).read_bytes())
        assert report.ok, report.problem
        records = session_records(pair.log(name), sid)
        kinds = [r["kind"] for r in records if r["kind"] != "phase_finished"]
        assert kinds == ["session_started", "session_aborted"], name
        aborted = records[-1]["body"]
        assert (aborted["reason"], aborted["by"], aborted["phase"]) == (reason, by, "proposal"), name
        rows = [r for r in pair.store_rows(name) if r.session_id == sid]
        assert [r.status for r in rows] == ["refused"], name
        assert rows[0].reason is not None and rows[0].reason.startswith(reason)
        assert not (pair.data(name) / "results").exists() or not any(
            (pair.data(name) / "results").rglob("*.json")
        )


@pytest.mark.parametrize(
    "reason", ["job_not_configured", "digest_mismatch", "outside_window", "role_mismatch"]
)
async def test_a_refused_proposal_is_logged_and_stored_on_both_nodes(tmp_path: Path, reason: str) -> None:
    pair = make_pair(tmp_path, **scenario(reason, tmp_path))
    sid, snap = await refused_run(pair, ManualClock(NOW))
    assert (snap["status"], snap["reason"]) == ("refused", reason)
    assert_refused_on_both_sides(pair, sid, reason)
    assert len(pair.store_rows(LIBRARY)) == 1  # not retried: retrying cannot cure it


async def test_a_node_at_its_session_limit_refuses_as_busy_and_the_initiator_retries(tmp_path: Path) -> None:
    timing = {"cron": "0 3 * * *", "window_minutes": 120}
    pair = make_pair(
        tmp_path,
        library_job={**timing, "attempts": 2, "backoff_seconds": 0},
        baths_job=timing,
        baths_node={"max_sessions": 1},
    )
    sid, snap = await refused_run(pair, ManualClock(NOW), busy=True)
    assert (snap["status"], snap["reason"]) == ("refused", "busy")
    assert_refused_on_both_sides(pair, sid, "busy")
    attempts = sorted(r.attempt for r in pair.store_rows(LIBRARY))
    assert attempts == [1, 2]  # busy is worth another attempt; both were refused
    assert {r.status for r in pair.store_rows(BATHS)} == {"refused"}


async def test_the_digest_refusal_names_both_digests_without_the_manifest(tmp_path: Path) -> None:
    pair = make_pair(tmp_path, **scenario("digest_mismatch", tmp_path))
    sid, _ = await refused_run(pair, ManualClock(NOW))
    started = {
        name: session_records(pair.log(name), sid)[0]["body"]["manifest_digest"] for name in (LIBRARY, BATHS)
    }
    assert started[LIBRARY] != started[BATHS]  # each log records the digest its node holds
    detail = session_records(pair.log(BATHS), sid)[-1]["body"]["detail"]
    assert "manifests differ" in detail and started[BATHS][:16] in detail


async def test_inside_the_window_at_the_accepting_node_the_same_run_is_accepted(tmp_path: Path) -> None:
    timing = {"cron": "0 3 * * *", "window_minutes": 40}
    pair = make_pair(tmp_path, library_job=timing, baths_job=timing)
    async with running(pair, ManualClock(NOW - timedelta(minutes=20))) as nodes:
        started = await nodes[LIBRARY].admin.run_job({"job": JOB})
        library = nodes[LIBRARY].state
        assert library is not None
        await until(
            lambda: started["session"] in library.sessions and library.sessions[started["session"]].ended,
            "run",
        )
        assert library.sessions[started["session"]].status == "completed"


@pytest.mark.parametrize("shared", ["garbler", "evaluator"])
async def test_two_nodes_claiming_the_same_manifest_party_are_refused_as_role_mismatch_on_both_sides(
    tmp_path: Path, shared: str
) -> None:
    timing = {"cron": "0 3 * * *", "window_minutes": 120, "attempts": 3, "backoff_seconds": 0}
    csv = DEMO / f"{shared}.csv"  # each node's input fits the party it claims, so the proposal goes out
    pair = make_pair(
        tmp_path,
        library_job={**timing, "role": shared, "csv": csv},
        baths_job={**timing, "role": shared, "csv": csv},
    )
    sid, snap = await refused_run(pair, ManualClock(NOW))
    assert (snap["status"], snap["reason"]) == ("refused", "role_mismatch")
    assert_refused_on_both_sides(pair, sid, "role_mismatch")
    for name in (LIBRARY, BATHS):
        started = session_records(pair.log(name), sid)[0]
        assert started["body"]["role"] == shared, name  # each log says which party its node claimed
        assert [r.role for r in pair.store_rows(name)] == [shared], name
    detail = session_records(pair.log(BATHS), sid)[-1]["body"]["detail"]
    assert f"both nodes are configured as the {shared} of job {JOB}" in detail
    assert len(pair.store_rows(LIBRARY)) == 1  # not retried


async def test_a_proposal_for_a_job_this_node_initiates_too_is_refused_on_both_sides(tmp_path: Path) -> None:
    timing = {"cron": "0 3 * * *", "window_minutes": 120}
    pair = make_pair(tmp_path, library_job=timing, baths_job=timing, baths_initiates=True)
    sid, snap = await refused_run(pair, ManualClock(NOW))
    assert (snap["status"], snap["reason"]) == ("refused", "both_initiate")
    assert_refused_on_both_sides(pair, sid, "both_initiate")
    detail = session_records(pair.log(BATHS), sid)[-1]["body"]["detail"]
    assert f"initiates job {JOB} itself; exactly one of the two nodes may" in detail
    assert len(pair.store_rows(LIBRARY)) == 1  # not retried: only a config change cures it
