"""A real node under injected faults: faulted sessions, each followed by its job's retry, as records to judge.

Theory of operation
-------------------
*The node under test* is a ``node.daemon.Node`` (the daemon of ``jointstat node run``, in this process, with its
job store, signed session log, result files and ``max_sessions``), configured with two jobs on the invented job of
``scenario``: one its peer proposes (the node evaluates and serves, as an accepting node does) and one it initiates
itself (it garbles, connects, and retries a failed attempt after a backoff with a new session — hence a fresh Δ and
fresh labels). Its sessions are made by ``recording_session`` (the node's ``session_factory``), so their secrets
are recorded too. Its session deadline is lowered to ``NODE_DEADLINE_S``; a peer that never opens a session the
node accepted is given the same time (``node.jobs``: the connect wait is at most the session deadline). *The peer*
is the harness (``harness.peer``): it proposes runs or accepts the node's proposals and plays its side of each
session with its own signed log.

*A faulted session* follows a ``FaultPlan`` (``harness.faultpoint``): ``cut`` and ``stall`` act on a
``FaultProxy`` between the nodes (before the node, when the peer initiates; the node's configured peer address,
when the node initiates), ``kill`` runs the peer in a process of its own (``harness.peer_process``) that kills
itself at the planned frame; when it is gone the peer's log is reopened, as a restarted node does. Each faulted
attempt is followed by its job's retry: proposed again by the peer, or retried by the node itself.

*The node's side* of each session is read from the node itself: its session tracker, its job store
(``JobStore.run_of_session``) and its result files. ``scan`` searches both session logs, the Python log lines, the
job store's rows and every abort message for every secret of the run (``harness.scanner``).
"""

from __future__ import annotations

import asyncio
import json
import os
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from jointstat.circuit.model import Party
from jointstat.harness.faultpoint import CUT, KILL, STALL, FaultPlan, make_plans
from jointstat.harness.outcome import Side, end_bound
from jointstat.harness.peer import HarnessAcceptor, LoggedNode, PeerKeys, run_initiator
from jointstat.harness.peer_process import PeerProcess, PeerSpec
from jointstat.harness.proxy import FaultProxy
from jointstat.harness.recording import recording_session
from jointstat.harness.scanner import Finding, Secrets, scan_for_secrets
from jointstat.harness.scenario import (
    JOB_ACCEPTED,
    JOB_INITIATED,
    METRE_BITS,
    NODE_METRES,
    NODE_NAME,
    PEER_METRES,
    PEER_NAME,
    peer_job,
    write_job_files,
)
from jointstat.harness.verdicts import judge
from jointstat.harness.watch import CrashWatch
from jointstat.node.store import JobStore, RunRecord
from jointstat.transport.driver import Limits

# The peer's limits: a stalled link is given up after two idle seconds; a whole session has four.
FAULT_LIMITS = Limits(deadline_s=4.0, idle_timeout_s=2.0, abort_grace_s=0.5)
NODE_DEADLINE_S = 4  # the node's session_deadline_seconds for the run (its idle timeout stays the default)
RETRY_BACKOFF_S = 1.0
Attempt = tuple[str, FaultPlan | None, Side, Side, str | None]  # session id, fault, node, peer, fault fired


@dataclass
class SessionRecord:
    """One session of a campaign: what was planned, what each side did, and the verdict."""

    session_id: str  # hex, as both logs name it
    attempt: Literal["fault", "retry"]
    plan: FaultPlan | None
    node: Side
    peer: Side
    fired: str | None = None
    retry_of: str | None = None
    problems: list[str] = field(default_factory=list)
    verdict: str = "unjudged"


class NodeCampaign:
    """A running node under test and the harness peer; faulted sessions, each followed by its job's retry."""

    def __init__(
        self,
        workdir: Path,
        *,
        seed: int = 2027,
        limits: Limits = FAULT_LIMITS,
        max_sessions: int = 4,
        node_deadline_s: int = NODE_DEADLINE_S,
    ) -> None:
        self.workdir = Path(workdir)
        self.seed = seed
        self.limits = limits  # the peer's
        self.max_sessions = max_sessions
        self.node_deadline_s = node_deadline_s
        self.secrets = Secrets(value_bits=METRE_BITS)
        self.records: list[SessionRecord] = []
        self.watch = CrashWatch()
        self.node: Any = None
        self._proxies: list[FaultProxy] = []

    # -- set-up ----------------------------------------------------------------------------------------------------

    async def __aenter__(self) -> NodeCampaign:
        from jointstat.node.config import load_node_config
        from jointstat.node.daemon import Node
        from jointstat.node.trial import free_port, job_entry, make_trial_keys, node_config, write_config

        self.workdir.mkdir(parents=True, exist_ok=True)
        self.watch.__enter__()
        self.files = write_job_files(self.workdir / "job")
        trial = make_trial_keys(self.workdir / "keys", (NODE_NAME, PEER_NAME))
        self.keys = PeerKeys.load(trial.directory)
        self.job = peer_job(self.files)
        (self.workdir / PEER_NAME).mkdir(mode=0o700, exist_ok=True)
        self.peer_log = self.workdir / PEER_NAME / "sessions.jsonl"
        self.logged = LoggedNode(self.keys, self.peer_log, self.secrets)
        self.outbound = FaultProxy(0)  # the node's peer address: the node's sessions to the peer pass it
        await self.outbound.start()
        self.acceptor = HarnessAcceptor(
            self.keys, self.job, self.logged, self.secrets, self._fire_outbound, self.limits
        )
        self.outbound.target = await self.acceptor.start()
        entry: dict[str, Any] = {
            "manifest": self.files.manifest,
            "peer": PEER_NAME,
            "csv": self.files.node_csv,
        }
        config = node_config(
            name=NODE_NAME,
            peer=PEER_NAME,
            keys=trial,
            data_dir=self.workdir / NODE_NAME,
            listen_port=free_port(),
            peer_port=self.outbound.port,
            metrics_port=0,
            admin=f"127.0.0.1:{free_port()}",
            jobs=[
                job_entry(name=JOB_ACCEPTED, initiate=False, role="evaluator", **entry),
                job_entry(
                    name=JOB_INITIATED,
                    initiate=True,
                    role="garbler",
                    attempts=3,
                    backoff_seconds=RETRY_BACKOFF_S,
                    **entry,
                ),
            ],
            max_sessions=self.max_sessions,
            session_deadline_seconds=self.node_deadline_s,
            # The campaign checks that a fault ends the attempt cleanly and the scheduled retry starts afresh;
            # resuming and restarting after a cut are checked by tests/test_node_resume.py.
            resume={"grace_seconds": 0, "restarts": 0},
        )
        path = write_config(self.workdir / f"{NODE_NAME}.yaml", config)
        self.node = Node(load_node_config(path), session_factory=recording_session(self.secrets))
        await self.node.start()
        self.node_port = int(self.node.peer_port)
        self.node_log = Path(self.node.config.node.session_log)
        self.job_store = Path(self.node.config.node.job_store)
        return self

    async def __aexit__(self, *_exc: object) -> None:
        if self.node is not None:
            await self.node.stop()
        await self.acceptor.stop(None)
        await self.outbound.close()
        self.logged.close()
        self.watch.__exit__()

    def _fire_outbound(self, plan: FaultPlan, _kind: str, _direction: str) -> None:
        if plan.kind == CUT:
            self.outbound.cut(plan.reset)
        elif plan.kind == STALL:
            self.outbound.stall()

    @property
    def node_bound(self) -> float:
        return end_bound(self.node.state.limits)

    # -- the node's side, read from the node itself ------------------------------------------------------------------

    def run_of(self, sid: str) -> RunRecord | None:
        """The node's job-store record of session ``sid`` (its latest run with that id)."""
        return self.node.state.store.run_of_session(sid)

    async def node_side(self, sid: str, party: Party, t0: float) -> Side:
        """The node's account of session ``sid``: its tracker, its job-store record and its result file."""
        state = self.node.state
        bound = self.node_bound
        while True:
            tracker = state.sessions.get(sid)
            run = await asyncio.to_thread(self.run_of, sid)
            if tracker is not None and tracker.ended and run is not None and run.status != "running":
                break
            if time.monotonic() - t0 > bound:
                side = Side(party=party, hung=True)
                status = None if run is None else run.status
                side.message = f"tracker {'missing' if tracker is None else tracker.status}, store {status}"
                return side
            await asyncio.sleep(0.02)
        side = Side(party=party, ended_after_s=time.monotonic() - t0)
        side.store_status = run.status
        if run.status != "completed":
            side.reason = tracker.reason or run.status
            side.message = run.reason or ""
        results = list(Path(self.node.config.job(tracker.job).results).glob(f"*-{sid}.json"))
        side.released = run.result_path is not None or bool(results)
        if run.result_path is not None:
            side.outputs = json.loads(Path(run.result_path).read_text(encoding="utf-8"))["outputs"]
        return side

    # -- one faulted session and its retry, the node accepting ---------------------------------------------------------

    async def _peer_initiates(
        self, plan: FaultPlan | None, attempt: int, sid: bytes
    ) -> tuple[Side, str | None]:
        if plan is not None and plan.kind == KILL:
            self.logged.close()  # the peer process takes the log (one writer at a time)
            process = await self._spawn("initiate", plan, sid, attempt)
            process.go()
            return await self._process_outcome(process, sid, Party.GARBLER)
        proxy = None
        if plan is not None:
            proxy = FaultProxy(self.node_port)
            await proxy.start()
            self._proxies.append(proxy)

        def fire(plan: FaultPlan, _kind: str, _direction: str) -> None:
            assert proxy is not None
            if plan.kind == CUT:
                proxy.cut(plan.reset)
            else:
                proxy.stall()

        return await run_initiator(
            self.keys,
            self.job,
            self.logged,
            self.secrets,
            node_port=self.node_port,
            target_port=self.node_port if proxy is None else proxy.port,
            session_id=sid,
            attempt=attempt,
            plan=plan,
            fire=fire if plan is not None else None,
            limits=self.limits,
        )

    async def run_accepted(self, plan: FaultPlan | None, attempt: int = 1) -> SessionRecord:
        """One session of the job the node accepts: proposed by the peer, broken by ``plan`` (if any)."""
        sid = os.urandom(16)
        t0 = time.monotonic()
        peer, fired = await self._peer_initiates(plan, attempt, sid)
        node = await self.node_side(sid.hex(), Party.EVALUATOR, t0)
        for proxy in self._proxies:
            await proxy.close()
        self._proxies.clear()
        return SessionRecord(sid.hex(), "fault" if plan is not None else "retry", plan, node, peer, fired)

    async def node_accepts(self, plan: FaultPlan) -> None:
        first = await self.run_accepted(plan, 1)
        retry = await self.run_accepted(None, 2)
        retry.retry_of = first.session_id
        self.records += [first, retry]

    # -- one faulted run with the node's own retry, the node initiating ------------------------------------------------

    async def node_initiates(self, plan: FaultPlan) -> None:
        process = None
        if plan.kind == KILL:
            self.logged.close()
            self.acceptor.ready.clear()
            process = await self._spawn("accept", plan, b"", 1)
            self.outbound.target = process.port
        else:
            self.acceptor.plans[1] = plan
        t0 = time.monotonic()
        started = await self.node.admin.run_job({"job": JOB_INITIATED})
        sid = str(started["session"])
        if process is not None:

            def back_in_process() -> None:  # the peer node is back: its in-process acceptor takes the retry
                self.outbound.target = self.acceptor.port
                self.acceptor.ready.set()

            peer, fired = await self._process_outcome(
                process, bytes.fromhex(sid), Party.EVALUATOR, back_in_process
            )
        else:
            acc = await self.acceptor.wait_for_attempt(1, self.node_bound)
            if acc is None:
                peer, fired = Side(party=Party.EVALUATOR, hung=True, message="no proposal came"), None
            else:
                peer = await self.acceptor.outcome(acc, plan.phase)
                fired = self.acceptor.points.pop(acc.session_id).fired
        node = await self.node_side(sid, Party.GARBLER, t0)
        self.outbound.clear()
        self.acceptor.plans.clear()
        attempts: list[Attempt] = [(sid, plan, node, peer, fired)]
        acc = await self.acceptor.wait_for_attempt(2, RETRY_BACKOFF_S * 2 + self.node_bound)
        if acc is None:
            missing = Side(party=Party.GARBLER, hung=True, message="the node did not retry the job")
            attempts.append((f"{sid}-retry", None, missing, Side(party=Party.EVALUATOR), None))
        else:
            t1 = time.monotonic()
            peer = await self.acceptor.outcome(acc, None)
            self.acceptor.points.pop(acc.session_id, None)
            node = await self.node_side(acc.session_id.hex(), Party.GARBLER, t1)
            attempts.append((acc.session_id.hex(), None, node, peer, None))
        self._add(attempts)

    def _add(self, attempts: list[Attempt]) -> None:
        first = attempts[0][0]
        for i, (sid, plan, node, peer, fired) in enumerate(attempts):
            kind: Literal["fault", "retry"] = "fault" if i == 0 else "retry"
            self.records.append(SessionRecord(sid, kind, plan, node, peer, fired, None if i == 0 else first))

    # -- the peer process ----------------------------------------------------------------------------------------------

    async def _spawn(
        self, mode: Literal["initiate", "accept"], plan: FaultPlan, sid: bytes, attempt: int
    ) -> PeerProcess:
        spec = PeerSpec(
            mode=mode,
            keys=self.keys.directory,
            files=self.files,
            log=self.peer_log,
            plan=plan,
            limits=self.limits,
            node_port=self.node_port,
            session_id=sid,
            attempt=attempt,
        )
        return await PeerProcess.spawn(spec)

    async def _process_outcome(
        self,
        process: PeerProcess,
        sid: bytes,
        party: Party,
        on_death: Callable[[], None] | None = None,
    ) -> tuple[Side, str | None]:
        report = await process.finish(party, end_bound(self.limits) + self.node_bound)
        self.secrets.merge(report.secrets)
        self.watch.crashes += report.errors
        left_open = await asyncio.to_thread(self.logged.reopen)  # the peer node comes back
        if on_death is not None:
            on_death()
        side = report.side
        if side.killed:
            side.reason = "node_restarted" if sid.hex() in left_open else side.reason
            side.message = "the peer process was killed; its log closed the session when it came back"
        return side, report.fired

    # -- the whole ------------------------------------------------------------------------------------------------------

    def store_text(self) -> str:
        """Every run in the node's job store, one line each (read through the store, whether the node runs or not)."""
        store = JobStore(self.job_store)
        try:
            runs = store.runs(limit=1 << 30)
        finally:
            store.close()
        return "\n".join(" ".join(str(v) for v in vars(run).values()) for run in runs)

    def scan(self) -> tuple[list[Finding], list[tuple[str, str]]]:
        """Search both session logs, the Python log, the node's job store and the abort messages for every secret
        the run made (Δs, labels, both schemes' input figures). Returns the findings and the texts searched."""
        for value in NODE_METRES + PEER_METRES:
            self.secrets.add_value(value)
        texts = [
            ("python log", "\n".join(self.watch.lines)),
            ("node job store", self.store_text()),
            ("abort messages", "\n".join(f"{r.node.message}\n{r.peer.message}" for r in self.records)),
        ]
        return scan_for_secrets(self.secrets, [self.node_log, self.peer_log], texts), texts

    async def run(self, sessions: int) -> list[SessionRecord]:
        """``sessions`` sessions: faulted ones, each followed by its job's retry (the last may have none)."""
        if sessions < 1:
            raise ValueError(f"sessions must be at least 1, got {sessions}")
        plans = make_plans(-(-sessions // 2), self.seed, self.job.program)
        for plan in plans:
            if plan.node_role == Party.GARBLER:
                await self.node_initiates(plan)
            else:
                await self.node_accepts(plan)
        del self.records[sessions:]
        return self.records


@dataclass
class CampaignReport:
    """The fault campaign: its records (judged), what went wrong outside them, the secret scan, the figures."""

    records: list[SessionRecord]
    problems: list[str]
    crashes: list[str]
    findings: list[Finding]
    figures: dict[str, Any]
    secrets: Secrets
    logs: list[Path]
    node_bound_s: float  # how long the node may take to end a session before it counts as hung


async def run_campaign(sessions: int, workdir: Path, *, seed: int = 2027) -> CampaignReport:
    """``sessions`` sessions against a node under test in ``workdir``, judged and scanned for secrets."""
    async with NodeCampaign(workdir, seed=seed) as campaign:
        await campaign.run(sessions)
        node_bound = campaign.node_bound
    problems = judge(campaign)
    findings, texts = campaign.scan()
    logs = [campaign.node_log, campaign.peer_log]
    verdicts = Counter(r.verdict for r in campaign.records)
    internal = [r for r in campaign.records for s in (r.node, r.peer) if s.reason == "internal"]
    crashes = campaign.watch.crashes + [f"session {r.session_id}: internal abort" for r in internal]
    problems += [
        f"{r.session_id} ({r.verdict}): {'; '.join(r.problems)}" for r in campaign.records if r.problems
    ]
    figures = {
        "sessions": len(campaign.records),
        "completed": verdicts["completed"],
        "aborted_cleanly": verdicts["aborted_cleanly"],
        "hung": verdicts["hung"],
        "outputs_released_wrongly": verdicts["released_wrongly"],
        "unclean": verdicts["unclean"],
        "crashes": len(crashes),
        "faults": dict(sorted(Counter(r.plan.kind for r in campaign.records if r.plan).items())),
        "phases": dict(sorted(Counter(r.plan.phase for r in campaign.records if r.plan).items())),
        "node_initiated_faults": sum(
            1 for r in campaign.records if r.plan and r.plan.node_role == Party.GARBLER
        ),
        "secrets_found_in_logs": len(findings),
        "log_lines_scanned": sum(len(p.read_text(encoding="utf-8").splitlines()) for p in logs)
        + sum(len(t.splitlines()) for _, t in texts),
    }
    return CampaignReport(
        campaign.records, problems, crashes, findings, figures, campaign.secrets, logs, node_bound
    )
