"""Running jobs: each run is one straight pipeline — prepare → propose → session → conclude — carrying one ``Run``.

Theory of operation
-------------------
Roles: each node's job config says which of the manifest's two parties it is (``role: garbler`` or
``evaluator``) — that decides the table its input is read against, the session it runs and the outputs it
decodes. Which node opens the session (``initiate``) is a separate setting: the initiator connects as the
session's client and the acceptor serves, whatever their roles (the transport lets either party serve). The
proposal carries the proposer's role and the acceptor refuses it (``role_mismatch``) unless its own role is
the other one, so two nodes claiming the same party never start a session, and neither node's role is ever
inferred from who proposes.

Every run is a ``runs.Run`` record, and every step of it is told to its observers (``runs.RunRecorders``: the job
store, progress, metrics, the session log), which keep their accounts of it; the steps here decide and act.

*Initiating* (``JobRunner.run_job``, one ``attempt`` after another), each attempt with a fresh random session id,
hence fresh Δ, labels and OT secrets:

1. open — the run is stored (``running``). A node that is stopping ends it ``aborted`` (``cancelled``), one that
   already runs ``max_sessions`` sessions ``failed`` (``busy``); otherwise operators can follow it from here.
2. prepare — compile the manifest (cached per file) and read and encode this node's input (CSV or SQL, identifier
   keys hashed with the key-hashing secret) in a worker thread (``node.prepare``); failing, ``failed``
   (``input_unavailable`` when the source cannot be opened, ``input_invalid`` when the records break the manifest,
   ``manifest_unusable``; ``node.prepare.failure_code``).
3. propose — log ``session_started``, then call ``Session/Propose`` on the peer over pinned mutual TLS
   (``transport.proposals``) with the job, the manifest digest, the session id, the scheduled time and the role.
   Not delivered: ``aborted`` (``peer_unreachable``); refused: ``refused`` with the peer's reason (e.g.
   ``outside_window``).
4. session — run it over ``Session/Exchange`` as the client (``transport.client``). Its ``sign`` callback is the
   session log's ``transcript`` (the log records the transcript digest and this node's signature over it as the
   finish frame is made; the hello is signed with the same key), ``verify`` checks the peer's signatures
   (``keys.session_signing``).
5. conclude — a session that ended without a result is ``aborted`` with the abort's reason (``cancelled`` when this
   node was stopping). Otherwise the node decodes its outputs, closes and logs the phases, logs the peer's
   attestation (refused: ``aborted``, ``bad_signature``), writes the result file and ends the run ``completed``.

``run_job`` repeats a failed attempt after the configured backoff (``schedule.Planner.retry_at``) while the window
is open; failures and refusals that retrying cannot cure (``NOT_RETRIED``: bad data, an unusable manifest, a
configuration the two nodes disagree on, an exhausted budget) are not retried. An attempt whose connection was cut
before this node's OT had ended (``SessionResult.restartable``: no output can have been released on either side)
is restarted at once, up to ``node.resume.restarts`` times per run, as a new attempt with a fresh session id; the
restarts do not use up the configured retries.

Cuts after OT: the session is resumed within ``node.resume.grace_seconds`` (``session_limits``: the transport's
reconnection backoff and grace period; the garbler's replay buffer is ``node.resume.replay_buffer_mib``). A resumed
session is one session in the log, with a ``link_event`` for each cut, resume and refused attempt
(``runs.RunRecorders.linked``).

*Accepting* (``JobRunner.on_proposal``, called by the peer-facing server with the authenticated peer): the pure
decision ``acceptance.decide`` says refuse, prepare (compile the manifest, read the input, then ask again) or
accept; see there for the checks and their order. A refusal it says to record is a run opened, followed and
announced, then ended ``refused`` (phase ``proposal``) before the answer goes out. An accepted run is followed at
once (so it takes its slot before anything else awaits), opened and announced; the server is told to ``expect``
that session id from that peer's pinned certificate; the answer is *accepted*; and a task waits for the session and
concludes it as above. A peer that never opens the accepted session is given ``CONNECT_TIMEOUT_S`` or the session
deadline, whichever is shorter (``aborted``, ``peer_never_connected``).

Results: the node's own outputs, decoded by the compiled manifest (``withheld`` and the named values, or
nothing but ``withheld`` when the disclosure rule withheld them), are written as JSON to
``<job results>/<UTC time>-<session id>.json`` owner-only and atomically (``results.write_result``). The other
party's inputs, labels, Δ and results never reach this node's logs or store.

Stopping: the node first asks its running sessions to end (``NodeState.shutdown``, ``transport.driver.Shutdown``):
each sends its peer an abort frame with the reason ``peer_shutdown``, which the peer logs, and ends here
``aborted`` (``cancelled``). Attempts still preparing, proposing or waiting are then cancelled and end the same
way. An outcome is recorded in a shielded task, so a cancellation never leaves a run half-recorded; a failure of
the node's own machinery (the log, the store, the disk) ends the run ``failed`` (``internal``).
"""

from __future__ import annotations

import asyncio
import logging
import secrets
import time
from collections.abc import Callable, Coroutine
from dataclasses import dataclass, field, replace
from datetime import datetime
from typing import Any, Literal, TypeVar

import grpc
import numpy as np

from jointstat.audit.log import SessionLog
from jointstat.audit.records import AuditError, plain_detail
from jointstat.circuit.compile import CompiledStatistic
from jointstat.node.acceptance import USED_BEFORE, Prepare, Refuse, Situation, Terms, decide
from jointstat.node.budget import BUDGET_EXHAUSTED, BudgetError, BudgetExhausted
from jointstat.node.clock import Clock
from jointstat.node.config import JobConfig, NodeConfig, NodeSection
from jointstat.node.keys import NodeKeys, PeerIdentity, session_signing
from jointstat.node.metrics import NodeMetrics
from jointstat.node.prepare import (
    INPUT_INVALID,
    MANIFEST_UNUSABLE,
    Prepared,
    Preparer,
    describe_failure,
    failure_code,
)
from jointstat.node.progress import ABORTED, COMPLETED, FAILED, REFUSED, SessionTracker
from jointstat.node.results import write_result
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
from jointstat.node.schedule import Planner
from jointstat.node.spending import Budgets
from jointstat.node.store import JobStore
from jointstat.protocol.frames import AbortReason
from jointstat.protocol.sides import Session, new_session
from jointstat.transport.channel import SessionIds, describe_rpc_error
from jointstat.transport.client import run_client
from jointstat.transport.driver import Limits, SessionResult, Shutdown
from jointstat.transport.proposals import PROTOCOL_VERSION, Answer, Proposal, propose
from jointstat.transport.server import SessionServer
from jointstat.units import plural

log = logging.getLogger("jointstat.node")

CONNECT_TIMEOUT_S = 60.0
SESSION_ID_BYTES = 16
NOT_RETRIED = frozenset(
    {
        "job_not_configured",
        "digest_mismatch",
        "outside_window",
        "role_mismatch",
        "both_initiate",
        "malformed",
        "protocol_version",
        INPUT_INVALID,
        MANIFEST_UNUSABLE,
        "budget_exhausted",
    }
)  # failures no retry can cure: the configuration, the manifest or the data must change first
CANCELLED = Outcome(ABORTED, "cancelled", "the node is stopping")

T = TypeVar("T")


def new_session_id() -> bytes:
    return secrets.token_bytes(SESSION_ID_BYTES)


def session_limits(node: NodeSection) -> Limits:
    """The transport's limits for this node's sessions: the deadline, and resuming after a cut (``node.resume``)."""
    resume = node.resume
    return Limits(
        deadline_s=float(node.session_deadline_seconds),
        resume_grace_s=float(resume.grace_seconds),
        reconnect_initial_s=float(resume.reconnect_first_seconds),
        reconnect_max_s=float(resume.reconnect_max_seconds),
    )


def abort_code(reason: AbortReason) -> str:
    """``AbortReason.MANIFEST_MISMATCH`` → ``manifest_mismatch`` (the session log's reason words)."""
    return AbortReason(reason).name.lower()


@dataclass
class NodeState:
    """What the runner shares with the daemon."""

    config: NodeConfig
    keys: NodeKeys
    store: JobStore
    session_log: SessionLog
    clock: Clock
    metrics: NodeMetrics
    limits: Limits
    session_ids: SessionIds = field(default_factory=SessionIds)
    server: SessionServer | None = None
    sessions: dict[str, SessionTracker] = field(default_factory=dict)
    stopping: bool = False
    shutdown: Shutdown = field(default_factory=Shutdown)  # ends running sessions with peer_shutdown on stop
    new_session: Callable[..., Session] = new_session  # makes each session (``protocol.session.new_session``)
    # the jobs' privacy budgets (``node.spending``); made from the store by the runner if not given
    budgets: Budgets | None = None

    def running_sessions(self) -> int:
        return sum(1 for t in self.sessions.values() if not t.ended)


@dataclass(frozen=True)
class _Found:
    """What preparing a proposed run has found so far (``acceptance.Prepare``)."""

    compiled: CompiledStatistic | None = None
    manifest_problem: str | None = None
    inputs: np.ndarray | None = None
    input_problem: str | None = None
    input_code: str | None = None  # input_invalid or input_unavailable, with input_problem
    seconds: float = 0.0


async def _finish_despite_cancel(coro: Coroutine[Any, Any, T]) -> T:
    """Run ``coro`` to its end even if the caller is cancelled meanwhile (then re-raise the cancellation)."""
    task = asyncio.ensure_future(coro)
    try:
        return await asyncio.shield(task)
    except asyncio.CancelledError:
        await task
        raise


class JobRunner:
    """Runs the node's side of jobs; see the module docstring."""

    def __init__(self, state: NodeState) -> None:
        self.state = state
        self.preparer = Preparer(state.keys.key_secret, state.config.node.session_memory_bytes)
        self.planner = Planner(
            [j.timing() for j in state.config.jobs if j.initiate], started_at=state.clock.now()
        )
        self.served: set[asyncio.Task[Any]] = set()  # tasks waiting for sessions this node accepted
        if state.budgets is None:
            state.budgets = Budgets(state.config.jobs, state.store)
        self.budgets = state.budgets
        self.recorders = RunRecorders(
            store=StoreRecorder(state.store, state.clock),
            progress=Progress(state.sessions, state.clock),
            metrics=MetricsRecorder(state.metrics, state.running_sessions, state.clock),
            log=LogRecorder(state.session_log),
            budget=BudgetRecorder(self.budgets, state.store, state.session_log, state.clock),
        )

    # -- initiating ------------------------------------------------------------------------------------------------

    async def run_job(
        self, job: JobConfig, scheduled_for: datetime, trigger: str, first_session_id: bytes | None = None
    ) -> str:
        """All attempts at one scheduled (or operator-triggered) run; returns the last attempt's status."""
        attempt, sid = 1, first_session_id or new_session_id()
        restarts = 0
        while True:
            outcome = await self.attempt(job, scheduled_for, attempt, trigger, sid)
            if outcome.status == COMPLETED or self.state.stopping or outcome.reason in NOT_RETRIED:
                return outcome.status
            if outcome.restart and restarts < self.state.config.node.resume.restarts:
                restarts += 1
                self.recorders.metrics.restarted(job.name)
                log.info(
                    "job %s: attempt %d was cut before its OT had ended; starting a fresh session",
                    job.name,
                    attempt,
                )
                attempt, sid = attempt + 1, new_session_id()
                continue
            at = self.planner.retry_at(job.name, scheduled_for, attempt - restarts, self.state.clock.now())
            if at is None:
                return outcome.status
            log.info(
                "job %s: attempt %d %s; next attempt at %s", job.name, attempt, outcome.status, at.isoformat()
            )
            await self.state.clock.sleep_until(at)
            if self.state.stopping:
                return outcome.status
            attempt, sid = attempt + 1, new_session_id()

    async def attempt(
        self, job: JobConfig, scheduled_for: datetime, attempt: int, trigger: str, session_id: bytes
    ) -> Outcome:
        """One attempt as the initiating node: open, then prepare → propose → session → conclude."""
        state = self.state
        run = Run(
            job=job.name,
            scheduled_for=scheduled_for,
            attempt=attempt,
            trigger=trigger,
            session_id=session_id,
            party=job.party,
            peer=state.keys.peers[job.peer],
            started_at=state.clock.now(),
            config=job,
        )
        await self.recorders.opened(run)
        if state.stopping:
            return await self.recorders.ended(run, CANCELLED)
        limit = state.config.node.max_sessions
        if state.running_sessions() >= limit:
            busy = f"this node already runs {plural(limit, 'session')} (node.max_sessions)"
            return await self.recorders.ended(run, Outcome(FAILED, "busy", busy))
        self.recorders.followed(run)
        return await self._carry(run, self._initiate(run, job))

    async def _initiate(self, run: Run, job: JobConfig) -> Outcome:
        try:
            prepared = await asyncio.to_thread(self.preparer.prepare, job)
        except Exception as exc:
            code = failure_code(exc)
            log.warning(
                "job %s: cannot prepare this node's input (%s): %s", job.name, code, describe_failure(exc)
            )
            return Outcome(FAILED, code, describe_failure(exc))
        self.recorders.progress.measured(run, "prepare", prepared.seconds)
        run.digest = prepared.digest
        await _finish_despite_cancel(self.recorders.announced(run))
        try:
            run.held = self.budgets.reserve(job, run.sid, prepared.compiled.epsilon(), self.state.clock.now())
        except (BudgetExhausted, BudgetError) as exc:
            log.warning("job %s: not run: the privacy budget: %s", job.name, exc)
            detail = f"this node's privacy budget of job {job.name}: {exc}"
            return Outcome(REFUSED, BUDGET_EXHAUSTED, detail, phase="proposal")
        await _finish_despite_cancel(self.recorders.budget.reserved(run))
        refused = await self._propose(run)
        if refused is not None:
            return refused
        session = self._session(run, prepared)
        assert run.tracker is not None
        result = await run_client(
            session,
            run.peer.address,
            run.peer.tls,
            peer_fingerprint=run.peer.fingerprint,
            limits=self.state.limits,
            session_ids=self.state.session_ids,
            counters=run.tracker.counters,
            on_progress=run.tracker.on_progress,
            shutdown=self.state.shutdown,
        )
        return await _finish_despite_cancel(self._conclude(run, result, prepared))

    async def _propose(self, run: Run) -> Outcome | None:
        """Ask the peer to run the session; the outcome if the run ends here (not delivered, refused), else None."""
        progress = self.recorders.progress
        progress.proposing(run)
        assert run.digest is not None
        proposal = Proposal(
            protocol_version=PROTOCOL_VERSION,
            job=run.job,
            manifest_digest=run.digest,
            session_id=run.session_id,
            scheduled_for_us=round(run.scheduled_for.timestamp() * 1_000_000),
            role=run.party,
            attempt=run.attempt,
            trigger=run.trigger,
        )
        t0 = time.monotonic()
        try:
            answer = Answer.from_wire(await propose(run.peer, proposal.to_wire()))
        except grpc.aio.AioRpcError as exc:
            progress.measured(run, "proposal", time.monotonic() - t0)
            detail = f"the proposal did not reach the peer ({describe_rpc_error(exc)})"
            return Outcome(ABORTED, "peer_unreachable", detail)
        progress.measured(run, "proposal", time.monotonic() - t0)
        if answer.accepted:
            return None
        code = answer.code or "refused"
        message = plain_detail(answer.message) or code
        log.warning("job %s: the peer %s refused the run: %s (%s)", run.job, run.peer.name, code, message)
        stored = f"node {run.peer.name} refused the run: {message}"
        return Outcome(REFUSED, code, message, by="peer", phase="proposal", stored_detail=stored)

    # -- both sides: the session and its conclusion ----------------------------------------------------------------

    def _session(self, run: Run, prepared: Prepared) -> Session:
        state = self.state
        sign, verify = session_signing(
            state.session_log, state.keys.signing_key, run.peer.signing_key, run.sid
        )
        session = state.new_session(
            run.party,
            session_id=run.session_id,
            program=prepared.compiled.as_program(),
            manifest_digest=prepared.digest,
            inputs=prepared.inputs,
            sign=sign,
            verify=verify,
            replay_limit_bytes=state.config.node.resume.replay_buffer_bytes,
        )
        self.recorders.progress.attached(run, session)
        return session

    async def _conclude(self, run: Run, result: SessionResult, prepared: Prepared) -> Outcome:
        """The session is over: record its abort, or check and keep its result (see the module docstring)."""
        await self.recorders.linked(run, result.events)
        if not result.completed or result.peer_signature is None:
            abort = result.abort
            reason = abort_code(abort.reason) if abort is not None else "internal"
            by: Literal["self", "peer"] = "peer" if abort is not None and abort.by_peer else "self"
            detail = abort.message if abort is not None else "the session ended without a result"
            if self.state.stopping and by == "self":
                # The transport may see this node's own stop as a lost stream; the log says what happened.
                reason, detail = "cancelled", "the node was stopped during the session"
            log.warning("job %s: session %s aborted: %s", run.job, run.sid, reason)
            restart = result.restartable and run.trigger != "peer" and not self.state.stopping
            return await self.recorders.ended(run, Outcome(ABORTED, reason, detail, by=by, restart=restart))
        finished = self.state.clock.now()
        outputs = prepared.compiled.decode(prepared.party, result.outputs)
        await self.recorders.exchange_over(run)
        try:
            await self.recorders.log.attested(run, result.peer_signature)
        except AuditError as exc:
            refused = "the peer's attestation was refused"
            outcome = Outcome(ABORTED, "bad_signature", str(exc), phase="finish", stored_detail=refused)
            return await self.recorders.ended(run, outcome)
        assert run.config is not None
        await self.recorders.budget.settled(run, spent=True)  # recorded before the result is released
        path = await asyncio.to_thread(
            write_result,
            run.config,
            session_id=run.sid,
            party=prepared.party,
            digest=prepared.digest,
            scheduled_for=run.scheduled_for,
            finished_at=finished,
            outputs=outputs,
        )
        outcome = await self.recorders.ended(run, Outcome(COMPLETED, result_path=path))
        log.info("job %s: session %s completed; result in %s", run.job, run.sid, path)
        return outcome

    async def _carry(self, run: Run, steps: Coroutine[Any, Any, Outcome]) -> Outcome:
        """Run a run's steps and record the outcome they reach: cancelled (the node stopping), the run ends
        ``cancelled``; a failure of the node's own machinery ends it ``failed`` (``internal``)."""
        try:
            outcome = await steps
            return await _finish_despite_cancel(self.recorders.ended(run, outcome))
        except asyncio.CancelledError:
            await _finish_despite_cancel(self.recorders.ended(run, CANCELLED))
            raise
        except Exception as exc:  # the log, the store, the disk
            log.exception("job %s: attempt %d failed inside the node", run.job, run.attempt)
            internal = Outcome(FAILED, "internal", f"{type(exc).__name__}: {describe_failure(exc)}")
            return await self.recorders.failed(run, internal)

    # -- accepting -------------------------------------------------------------------------------------------------

    async def on_proposal(self, proposal: Proposal, peer: PeerIdentity) -> Answer:
        """Answer a peer's proposal (``acceptance.decide``); a refusal to record is logged and stored first."""
        now = self.state.clock.now()
        found = _Found()
        while isinstance(decision := decide(proposal, self._situation(proposal, peer, now, found)), Prepare):
            found = await self._prepare_for(decision, found)
        if isinstance(decision, Refuse):
            return await self._refuse(proposal, peer, now, decision)
        return await self._accept(proposal, peer, now, decision.terms, found)

    def _situation(self, proposal: Proposal, peer: PeerIdentity, now: datetime, found: _Found) -> Situation:
        state = self.state
        return Situation(
            node=state.config.node.name,
            peer=peer.name,
            jobs=state.config.jobs,
            now=now,
            stopping=state.stopping,
            session_used=proposal.session_id in state.session_ids
            or proposal.session_id.hex() in state.sessions,
            running=state.running_sessions(),
            max_sessions=state.config.node.max_sessions,
            own_digest=None if found.compiled is None else bytes.fromhex(found.compiled.digest),
            manifest_problem=found.manifest_problem,
            input_ready=found.inputs is not None,
            input_problem=found.input_problem,
            input_code=found.input_code,
            budget_problem=self._budget_problem(proposal, peer, now, found),
        )

    def _budget_problem(
        self, proposal: Proposal, peer: PeerIdentity, now: datetime, found: _Found
    ) -> str | None:
        if found.compiled is None:
            return None
        job = next(
            (j for j in self.state.config.jobs if j.name == proposal.job and j.peer == peer.name), None
        )
        if job is None:
            return None
        return self.budgets.problem(job, found.compiled.epsilon(), now)

    async def _prepare_for(self, step: Prepare, found: _Found) -> _Found:
        """Compile the job's manifest or read its input, as ``decide`` asked; a failure is what it found."""
        if step.step == "manifest":
            try:
                return replace(found, compiled=await asyncio.to_thread(self.preparer.compiled, step.job))
            except Exception as exc:
                return replace(found, manifest_problem=describe_failure(exc))
        assert found.compiled is not None
        t0 = time.monotonic()
        try:
            bits = await asyncio.to_thread(self.preparer.inputs, step.job, found.compiled)
        except Exception as exc:
            code = failure_code(exc)
            log.warning(
                "job %s: cannot prepare this node's input (%s): %s",
                step.job.name,
                code,
                describe_failure(exc),
            )
            return replace(found, input_problem=describe_failure(exc), input_code=code)
        return replace(found, inputs=bits, seconds=time.monotonic() - t0)

    def _proposed_run(self, proposal: Proposal, peer: PeerIdentity, now: datetime, terms: Terms) -> Run:
        return Run(
            job=proposal.job,
            scheduled_for=terms.scheduled_for,
            attempt=proposal.attempt,
            trigger=f"peer_{proposal.trigger}",
            session_id=proposal.session_id,
            party=terms.party,
            peer=peer,
            started_at=now,
            config=terms.job,
            digest=terms.digest,
        )

    async def _refuse(self, proposal: Proposal, peer: PeerIdentity, now: datetime, refusal: Refuse) -> Answer:
        code, message = refusal.code, refusal.message
        if refusal.terms is None:
            if code == "malformed":
                log.warning("peer %s: malformed proposal refused: %s", peer.name, message)
            return Answer.refused(code, plain_detail(message))
        log.warning("job %s: refused the run proposed by %s: %s (%s)", proposal.job, peer.name, code, message)
        run = self._proposed_run(proposal, peer, now, refusal.terms)
        await self.recorders.opened(run)
        self.recorders.followed(run)
        try:
            await self.recorders.announced(run)
        except AuditError:  # the log has seen this session id: nothing of it is logged again
            await self.recorders.ended(run, Outcome(REFUSED, code, message))
            return Answer.refused("malformed", USED_BEFORE)
        outcome = Outcome(REFUSED, code, message, phase="proposal", stored_detail=refusal.local_message)
        await self.recorders.ended(run, outcome)
        return Answer.refused(code, plain_detail(message))

    async def _accept(
        self, proposal: Proposal, peer: PeerIdentity, now: datetime, terms: Terms, found: _Found
    ) -> Answer:
        state, job = self.state, terms.job
        assert job is not None and found.compiled is not None and found.inputs is not None
        prepared = Prepared(found.compiled, terms.party, terms.digest, found.inputs, found.seconds)
        try:  # in memory and before any await, so the check ``decide`` made still holds
            held = self.budgets.reserve(job, proposal.session_id.hex(), found.compiled.epsilon(), now)
        except (BudgetExhausted, BudgetError) as exc:
            refusal = Refuse(
                BUDGET_EXHAUSTED,
                f"node {state.config.node.name} refuses job {job.name}: {exc}",
                terms,
                local=f"this node's privacy budget: {exc}",
            )
            return await self._refuse(proposal, peer, now, refusal)
        run = self._proposed_run(proposal, peer, now, terms)
        run.held = held
        self.recorders.followed(run)  # takes its slot before the next await
        self.recorders.progress.measured(run, "prepare", prepared.seconds)
        await self.recorders.opened(run)
        try:
            await self.recorders.announced(run)
        except AuditError:  # the log has seen this session id
            await self.recorders.ended(run, Outcome(REFUSED, "malformed", USED_BEFORE))
            return Answer.refused("malformed", USED_BEFORE)
        await self.recorders.budget.reserved(run)
        session = self._session(run, prepared)
        assert state.server is not None and run.tracker is not None
        future = state.server.expect(
            session,
            peer_fingerprint=peer.fingerprint,
            limits=state.limits,
            counters=run.tracker.counters,
            on_progress=run.tracker.on_progress,
        )
        task = asyncio.create_task(self._carry(run, self._served(run, session, future, prepared)))
        self.served.add(task)
        task.add_done_callback(self.served.discard)
        log.info("job %s: accepted the run proposed by %s (session %s)", job.name, peer.name, run.sid)
        return Answer(accepted=True)

    async def _served(
        self, run: Run, session: Session, future: asyncio.Future[SessionResult], prepared: Prepared
    ) -> Outcome:
        server = self.state.server
        assert server is not None
        # The peer opens an accepted session at once; waiting longer than the session's own deadline is pointless.
        wait_s = min(CONNECT_TIMEOUT_S, float(self.state.config.node.session_deadline_seconds))
        done, _ = await asyncio.wait({future}, timeout=wait_s)
        if not done and server.withdraw(session.session_id):
            detail = f"the peer did not open the accepted session within {wait_s:g} s"
            return Outcome(ABORTED, "peer_never_connected", detail)
        result = await future
        return await _finish_despite_cancel(self._conclude(run, result, prepared))


__all__ = [
    "CONNECT_TIMEOUT_S",
    "JobRunner",
    "NodeState",
    "abort_code",
    "new_session_id",
    "session_limits",
]
