"""One run on this node as a record, and the four observers that keep its accounts: progress, metrics, log, store.

Theory of operation
-------------------
A ``Run`` is one attempt at one job on this node — initiated here or accepted from the peer — from its job-store row
to its ``Outcome``. The pipeline (``node.jobs``) carries it through prepare → propose → session → conclude and tells
``RunRecorders`` at each step. The recorders read the record and keep their own accounts; none of them decides
anything about the run:

================  =================================================================================================
step              who hears of it, in this order
================  =================================================================================================
``opened``        the job store: the run's row (``running``)
``followed``      progress: a ``SessionTracker`` operators see; metrics: sessions running
``announced``     the session log: ``session_started`` (a session id it has seen is refused: ``AuditError``, and
                  nothing else hears of it); metrics: sessions started
``linked``        the session log: a ``link_event`` per cut of the session's connection, resume and resume
                  attempt refused or failed, in order (a resumed session stays one session); metrics: cuts,
                  resumes, refused resumes
``exchange_over`` progress: the open phase closed; the session log: a ``phase_finished`` per phase
``reserved``      the job's privacy budget (``node.spending``), if the job has one and the run spends ε: the store's
                  ``budget_spends`` row, then the session log's ``privacy_budget reserved``
``released``      the budget: the spend is dated (``spent``) in memory, the store and the log — before the result
                  file is written
``ended``         the budget, if still held: ``spent`` when the session ended in a phase that may have released
                  outputs, else ``returned``; the session log: ``session_aborted`` or ``session_completed``; the job
                  store: the row's outcome;
                  then — even if those failed — progress: the session's status; metrics: completed or aborted by
                  reason, bytes, AND gates per second, sessions running
================  =================================================================================================

So the live view and the metrics show an outcome once the log and the store hold it. A run ends once: a later
outcome (a cancellation arriving after the conclusion) is ignored. A run ended before it was followed (the node
stopping, or busy, as it began) is only stored; one ended before it was announced (its input could not be read)
is not logged, as the log never heard of it. ``failed`` is for a failure of the node's own machinery (the log, the
store, the disk): the store and the live view say ``internal``, the log is left as it is, since it may be what
failed. The session log is written here alone, the transcript signature apart (``keys.session_signing``).
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import Callable
from dataclasses import dataclass, replace
from datetime import datetime
from pathlib import Path
from typing import Literal

from jointstat.audit.log import SessionLog
from jointstat.audit.records import AuditError, plain_detail
from jointstat.circuit.model import Party
from jointstat.node.clock import Clock
from jointstat.node.config import JobConfig
from jointstat.node.keys import PeerIdentity
from jointstat.node.metrics import NodeMetrics
from jointstat.node.prepare import MAX_MESSAGE
from jointstat.node.progress import COMPLETED, PROPOSING, SessionTracker
from jointstat.node.spending import RELEASING_PHASES, Budgets, Held, epsilon_text
from jointstat.node.store import JobStore
from jointstat.protocol.sides import Session
from jointstat.transport.stream import CUT, REFUSED, RESUMED, LinkEvent

LINK_EVENT_WORDS: dict[str, Literal["cut", "resumed", "resume_refused", "resume_attempt_failed"]] = {
    "cut": "cut",
    "resumed": "resumed",
    "resume_refused": "resume_refused",
    "resume_attempt_failed": "resume_attempt_failed",
}


@dataclass(frozen=True)
class Outcome:
    """How a run ended."""

    status: str  # completed, aborted, refused or failed (``node.progress``'s words, and the job store's)
    reason: str | None = None  # a code: an abort or refusal reason, busy, input_unavailable, internal, …
    detail: str = ""  # why, in words without secrets: the log's ``detail`` and the store's reason
    by: Literal["self", "peer"] = "self"  # which node ended it
    phase: str | None = None  # the phase the log names; None: the phase the session was in
    stored_detail: str | None = None  # the store's words, where they differ from the log's
    result_path: Path | None = None
    restart: bool = False  # lost to a cut before OT had ended: the initiator starts a fresh session at once

    @property
    def stored_reason(self) -> str | None:
        """The job store's ``reason``: ``<code>: <words>``, at most ``MAX_MESSAGE`` characters."""
        if self.reason is None:
            return None
        return f"{self.reason}: {self.stored_detail or self.detail}"[:MAX_MESSAGE]


@dataclass(eq=False)
class Run:
    """One attempt at one job on this node (see the module docstring)."""

    job: str
    scheduled_for: datetime
    attempt: int
    trigger: str  # schedule or operator (initiated here), peer (accepted)
    session_id: bytes
    party: Party  # the manifest party this node plays
    peer: PeerIdentity
    started_at: datetime
    config: JobConfig | None = None  # None only for a refused proposal of a job this node does not have
    digest: bytes | None = None  # the manifest digest this node logs, once known
    row: int | None = None  # its job-store row, once opened
    tracker: SessionTracker | None = None  # what operators see of it, once followed
    announced: bool = False  # its session_started is in the session log
    phases_closed: bool = False
    links_recorded: bool = False
    outcome: Outcome | None = None
    held: Held | None = None  # its hold on the job's privacy budget, once reserved
    budget_logged: bool = False  # the reservation is in the session log
    budget_settled: bool = False

    @property
    def sid(self) -> str:
        return self.session_id.hex()


class StoreRecorder:
    """The job store's account of runs: one row each, opened ``running`` and closed once with the outcome."""

    def __init__(self, store: JobStore, clock: Clock) -> None:
        self._store = store
        self._clock = clock

    async def opened(self, run: Run) -> None:
        run.row = await asyncio.to_thread(
            self._store.start,
            run.job,
            run.scheduled_for,
            run.attempt,
            started_at=run.started_at,
            trigger=run.trigger,
            session_id=run.sid,
            role=run.party.role_name,
        )

    async def ended(self, run: Run, outcome: Outcome) -> None:
        if run.row is None:
            return
        await asyncio.to_thread(
            self._store.finish,
            run.row,
            outcome.status,
            finished_at=self._clock.now(),
            reason=outcome.stored_reason,
            result_path=None if outcome.result_path is None else str(outcome.result_path),
        )


class Progress:
    """The live view of runs: a ``SessionTracker`` per followed run, kept in ``sessions`` for operators."""

    def __init__(self, sessions: dict[str, SessionTracker], clock: Clock) -> None:
        self._sessions = sessions
        self._clock = clock

    def followed(self, run: Run) -> None:
        run.tracker = SessionTracker(
            session_id=run.sid,
            job=run.job,
            role=run.party,
            peer=run.peer.name,
            trigger=run.trigger,
            started_at=self._clock.now(),
        )
        self._sessions[run.sid] = run.tracker

    def measured(self, run: Run, phase: str, seconds: float) -> None:
        """A phase the node measured itself (``prepare``, ``proposal``)."""
        assert run.tracker is not None
        run.tracker.add_phase(phase, seconds)

    def proposing(self, run: Run) -> None:
        assert run.tracker is not None
        run.tracker.status = PROPOSING

    def attached(self, run: Run, session: Session) -> None:
        assert run.tracker is not None
        run.tracker.attach(session)

    def exchange_over(self, run: Run) -> None:
        if run.tracker is not None:
            run.tracker.close_phases()

    def ended(self, run: Run) -> None:
        outcome = run.outcome
        if run.tracker is None or outcome is None:
            return
        if outcome.result_path is not None:
            run.tracker.result_path = str(outcome.result_path)
        run.tracker.end(outcome.status, outcome.reason)


class MetricsRecorder:
    """The Prometheus account of runs (``node.metrics``): started, ended by outcome and reason, bytes, rate."""

    def __init__(self, metrics: NodeMetrics, running: Callable[[], int], clock: Clock) -> None:
        self._metrics = metrics
        self._running = running
        self._clock = clock

    def followed(self, run: Run) -> None:
        self._metrics.running.set(self._running())

    def announced(self, run: Run) -> None:
        self._metrics.started.labels(run.job, run.party.role_name).inc()

    def restarted(self, job: str) -> None:
        self._metrics.restarts.labels(job).inc()

    def linked(self, run: Run, events: tuple[LinkEvent, ...]) -> None:
        self._metrics.link_events(
            job=run.job,
            role=run.party.role_name,
            cuts=sum(1 for e in events if e.kind == CUT),
            resumes=sum(1 for e in events if e.kind == RESUMED),
            refused=sum(1 for e in events if e.kind == REFUSED),
        )

    def ended(self, run: Run) -> None:
        tracker, outcome = run.tracker, run.outcome
        if tracker is None or outcome is None:
            return
        self._metrics.session_ended(
            job=run.job,
            role=run.party.role_name,
            outcome=outcome.status,
            reason=outcome.reason,
            bytes_sent=tracker.counters.bytes_sent,
            bytes_received=tracker.counters.bytes_received,
            rate=tracker.snapshot()["and_gates_per_s"],
            finished_at=self._clock.now(),
        )
        self._metrics.running.set(self._running())


class LogRecorder:
    """The signed session log's account of runs: started, phases, the peer's attestation, completed or aborted."""

    def __init__(self, session_log: SessionLog) -> None:
        self._log = session_log

    async def announced(self, run: Run) -> None:
        """``session_started``; raises ``AuditError`` for a session id the log has seen."""
        assert run.digest is not None
        await asyncio.to_thread(
            self._log.session_started,
            run.sid,
            job=run.job,
            manifest_digest=run.digest,
            role=run.party.role_name,
            peer=run.peer.name,
            peer_key=run.peer.signing_key,
            peer_certificate_der=run.peer.certificate_der,
        )
        run.announced = True

    async def linked(self, run: Run, events: tuple[LinkEvent, ...]) -> None:
        """A ``link_event`` per cut, resume and refused or failed resume attempt of the session."""
        if not run.announced:
            return
        for e in events:
            try:
                await asyncio.to_thread(self._link_event, run, e, plain_detail(e.detail))
            except AuditError:  # a detail the log will not take: keep the event, drop the words
                await asyncio.to_thread(self._link_event, run, e, "")

    def _link_event(self, run: Run, e: LinkEvent, detail: str) -> None:
        self._log.link_event(
            run.sid,
            event=LINK_EVENT_WORDS[e.kind],
            at_us=max(0, round(e.at_s * 1e6)),
            frames_sent=e.frames_sent,
            frames_received=e.frames_received,
            detail=detail,
        )

    async def exchange_over(self, run: Run) -> None:
        if not run.announced or run.tracker is None:
            return
        for p in run.tracker.phases:
            await asyncio.to_thread(
                self._log.phase_finished,
                run.sid,
                phase=p.name,
                duration_us=p.duration_us,
                bytes_sent=p.bytes_sent,
                bytes_received=p.bytes_received,
            )

    async def attested(self, run: Run, signature: bytes) -> None:
        """The peer's signature over the transcript; raises ``AuditError`` if the log refuses it."""
        await asyncio.to_thread(self._log.peer_attestation, run.sid, signature)

    async def ended(self, run: Run) -> None:
        outcome = run.outcome
        if not run.announced or outcome is None:
            return
        if outcome.status == COMPLETED:
            assert run.tracker is not None
            duration = round(run.tracker.elapsed_s() * 1e6)
            await asyncio.to_thread(self._log.session_completed, run.sid, duration_us=max(0, duration))
            return
        aborted = self._log.session_aborted
        reason, by, phase = outcome.reason or "internal", outcome.by, outcome.phase
        try:
            await asyncio.to_thread(
                aborted, run.sid, reason=reason, by=by, phase=phase, detail=plain_detail(outcome.detail)
            )
        except AuditError:  # a detail the log will not take: keep the reason, drop the words
            await asyncio.to_thread(aborted, run.sid, reason=reason, by=by, phase=phase, detail="")


class BudgetRecorder:
    """The privacy budget's account of runs: reserved, then spent or returned — in memory, the store and the log."""

    def __init__(self, budgets: Budgets, store: JobStore, session_log: SessionLog, clock: Clock) -> None:
        self.budgets = budgets
        self._store = store
        self._log = session_log
        self._clock = clock

    async def reserved(self, run: Run) -> None:
        """Record the hold ``run.held`` (taken in memory by ``Budgets.reserve``) in the store, then the log."""
        held = run.held
        if held is None:
            return
        try:
            await asyncio.to_thread(
                self._store.budget_reserve, held.job, held.run_id, held.epsilon, self._clock.now()
            )
        except BaseException:  # not recorded, so not held: the run cannot go on and must not keep the ε
            run.budget_settled = True
            self.budgets.settle(held, spent=False, now=self._clock.now())
            raise
        if run.announced:
            await asyncio.to_thread(
                self._log.privacy_budget, run.sid, epsilon=epsilon_text(held.epsilon), action="reserved"
            )
            run.budget_logged = True

    async def settled(self, run: Run, *, spent: bool) -> None:
        """The run released its result (``spent``) or ended without (returned); once."""
        held = run.held
        if held is None or run.budget_settled:
            return
        run.budget_settled = True
        now = self._clock.now()
        self.budgets.settle(held, spent=spent, now=now)
        await asyncio.to_thread(self._store.budget_settle, held.job, held.run_id, spent=spent, at=now)
        if run.budget_logged:
            action = "spent" if spent else "returned"
            await asyncio.to_thread(
                self._log.privacy_budget, run.sid, epsilon=epsilon_text(held.epsilon), action=action
            )


def releases(outcome: Outcome) -> bool:
    """Whether a run that ended so may have released outputs (and so spends its ε)."""
    return outcome.status == COMPLETED or (outcome.phase in RELEASING_PHASES)


class RunRecorders:
    """The observers of runs, told of each step in pipeline order: who hears what, and when, is said here."""

    def __init__(
        self,
        *,
        store: StoreRecorder,
        progress: Progress,
        metrics: MetricsRecorder,
        log: LogRecorder,
        budget: BudgetRecorder,
    ) -> None:
        self.store = store
        self.progress = progress
        self.metrics = metrics
        self.log = log
        self.budget = budget

    async def opened(self, run: Run) -> None:
        await self.store.opened(run)

    def followed(self, run: Run) -> None:
        """Operators can follow the run (synchronous: a slot is taken before the caller awaits anything)."""
        self.progress.followed(run)
        self.metrics.followed(run)

    async def announced(self, run: Run) -> None:
        await self.log.announced(run)
        self.metrics.announced(run)

    async def linked(self, run: Run, events: tuple[LinkEvent, ...]) -> None:
        """The session is over: the cuts, resumes and refused attempts of its connection are logged and counted
        (once)."""
        if run.links_recorded:
            return
        run.links_recorded = True
        self.metrics.linked(run, events)
        await self.log.linked(run, events)

    async def exchange_over(self, run: Run) -> None:
        """The session's frames are over: its phases are closed and logged (once)."""
        if run.phases_closed:
            return
        run.phases_closed = True
        self.progress.exchange_over(run)
        await self.log.exchange_over(run)

    async def ended(self, run: Run, outcome: Outcome) -> Outcome:
        """Record how the run ended (once; a later outcome is ignored); returns the outcome recorded."""
        if run.outcome is not None:
            return run.outcome
        if outcome.phase is None and run.tracker is not None:
            outcome = replace(outcome, phase=run.tracker.phase)
        run.outcome = outcome
        try:
            await self.exchange_over(run)
            await self.budget.settled(run, spent=releases(outcome))
            await self.log.ended(run)
            await self.store.ended(run, outcome)
        finally:
            self.progress.ended(run)
            self.metrics.ended(run)
        return outcome

    async def failed(self, run: Run, outcome: Outcome) -> Outcome:
        """The node's own machinery failed during the run: the store (as far as it can) and, unless the run had
        already ended, the live view and the metrics record ``outcome``; the log is left as it is."""
        first = run.outcome is None
        if first:
            run.outcome = outcome
        try:
            phase = outcome.phase or (run.tracker.phase if run.tracker is not None else None)
            with contextlib.suppress(Exception):
                await self.budget.settled(run, spent=releases(replace(outcome, phase=phase)))
            with contextlib.suppress(Exception):
                await self.store.ended(run, outcome)
        finally:
            if first:
                self.progress.ended(run)
                self.metrics.ended(run)
        return outcome
