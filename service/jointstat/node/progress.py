"""Following one session as it runs: its phase, AND gates done of total, bytes, rate and time left.

Theory of operation
-------------------
A ``SessionTracker`` is made for every session the node runs or accepts. The transport calls its
``on_progress`` after every frame in or out (``transport.driver``); the tracker reads the session's state and
maps it to a *phase* — ``handshake`` (hellos), ``oblivious_transfer`` (base OT and OT extension), ``garbling``
or ``evaluation`` (input labels and the garbled tables), ``output`` (output labels and decoding), ``finish``
(signed transcript digests). When the phase changes it closes the previous one with its wall time (monotonic
clock, integer microseconds) and the bytes sent and received during it; the last phase is closed only by
``close_phases`` (or ``end``), after the transport has written the session's last frame, so the phases' bytes
add up to the session's. The node writes these to the session log as ``phase_finished`` records once the session
has ended. Phases the node measures itself (``prepare``: reading
and encoding its input; ``proposal``: asking the peer) are added with ``add_phase``.

``snapshot()`` gives what an operator sees: status, phase, AND gates done of total (from the session's own
count, see ``protocol.session``), bytes each way, the rate in AND gates per second since the tables began to
flow, and the time left at that rate. Nothing in a tracker is secret: no input, label or result passes through it.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from jointstat.circuit.model import Party
from jointstat.protocol.sides import Session
from jointstat.transport.driver import WireCounters

_PHASES: dict[str, str] = {
    "new": "handshake",
    "awaiting hello": "handshake",
    "base OT": "oblivious_transfer",
    "OT extension": "oblivious_transfer",
    "streaming": "garbling",
    "awaiting input labels": "evaluation",
    "evaluating": "evaluation",
    "awaiting output labels": "output",
    "awaiting decoding": "output",
    "awaiting finish": "finish",
}
TABLE_PHASES = frozenset({"garbling", "evaluation"})

# What a tracked session is doing, as operators see it.
PREPARING, PROPOSING, RUNNING, COMPLETED, ABORTED, REFUSED, FAILED = (
    "preparing",
    "proposing",
    "running",
    "completed",
    "aborted",
    "refused",
    "failed",
)
ENDED = frozenset({COMPLETED, ABORTED, REFUSED, FAILED})


def phase_of(state: str) -> str | None:
    """The phase a session state belongs to; None for ``done`` and ``failed``."""
    return _PHASES.get(state)


@dataclass(frozen=True)
class Phase:
    name: str
    duration_us: int
    bytes_sent: int
    bytes_received: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "phase": self.name,
            "duration_us": self.duration_us,
            "bytes_sent": self.bytes_sent,
            "bytes_received": self.bytes_received,
        }


class SessionTracker:
    """The live view of one session (see the module docstring)."""

    def __init__(
        self,
        *,
        session_id: str,
        job: str,
        role: Party,
        peer: str,
        trigger: str,
        started_at: datetime,
        monotonic: Callable[[], float] = time.monotonic,
    ) -> None:
        self.session_id = session_id
        self.job = job
        self.role = Party(role)
        self.peer = peer
        self.trigger = trigger
        self.started_at = started_at
        self.status = PREPARING
        self.reason: str | None = None
        self.result_path: str | None = None
        self.counters = WireCounters()
        self.session: Session | None = None
        self.phases: list[Phase] = []
        self._mono = monotonic
        self._t0 = monotonic()
        self._phase: str | None = None
        self._phase_start = 0.0
        self._phase_bytes = (0, 0)
        self._tables_start: float | None = None
        self._ended_at: float | None = None
        self._final_rate: float | None = None

    @property
    def ended(self) -> bool:
        return self.status in ENDED

    @property
    def phase(self) -> str | None:
        return self._phase

    def elapsed_s(self) -> float:
        """Seconds since the tracker was made (to its end, once ended)."""
        end = self._ended_at if self._ended_at is not None else self._mono()
        return end - self._t0

    def add_phase(self, name: str, duration_s: float, bytes_sent: int = 0, bytes_received: int = 0) -> None:
        """A phase measured outside the transport (``prepare``, ``proposal``)."""
        self.phases.append(Phase(name, max(0, round(duration_s * 1e6)), bytes_sent, bytes_received))

    def attach(self, session: Session) -> None:
        """The session is built and about to run: start following its phases."""
        self.session = session
        self.status = RUNNING
        self._enter(phase_of(session.state), self._mono())

    def on_progress(self) -> None:
        """Called by the transport after each frame; notes phase changes."""
        if self.session is None or self._ended_at is not None:
            return
        phase = phase_of(self.session.state)
        if phase is None:
            # The session is done or failed, but frames it produced on the way there (its own finish or
            # abort) may still be queued: the open phase stays open until ``close_phases``, which the node
            # calls once the transport has returned, so those bytes count in the phase that sent them.
            return
        if phase != self._phase:
            self._enter(phase, self._mono())

    def end(self, status: str, reason: str | None = None) -> None:
        """The session (or the attempt before it) has ended: close the open phase (once); set the status."""
        self.close_phases()
        self.status = status
        self.reason = reason

    def close_phases(self) -> None:
        """The session's exchange is over: close the open phase and stop the clock (the status is kept)."""
        if self._ended_at is None:
            now = self._mono()
            if self._phase is not None:
                self._enter(None, now)
            if self._final_rate is None:
                self._final_rate = self._rate(now)
            self._ended_at = now

    def _enter(self, phase: str | None, now: float) -> None:
        sent, received = self.counters.bytes_sent, self.counters.bytes_received
        if self._phase is not None:
            s0, r0 = self._phase_bytes
            self.phases.append(
                Phase(self._phase, max(0, round((now - self._phase_start) * 1e6)), sent - s0, received - r0)
            )
            if self._phase in TABLE_PHASES:
                self._final_rate = self._rate(now)
        if phase in TABLE_PHASES and self._tables_start is None:
            self._tables_start = now
        self._phase, self._phase_start, self._phase_bytes = phase, now, (sent, received)

    def _rate(self, now: float) -> float | None:
        if self.session is None or self._tables_start is None:
            return None
        elapsed = now - self._tables_start
        done = self.session.and_gates_done
        return done / elapsed if elapsed > 0 and done > 0 else None

    def snapshot(self) -> dict[str, Any]:
        """What the admin API shows for this session."""
        now = self._ended_at if self._ended_at is not None else self._mono()
        done = self.session.and_gates_done if self.session is not None else 0
        total = self.session.and_gates_total if self.session is not None else None
        tables_over = self._final_rate is not None and self._phase not in TABLE_PHASES
        rate = self._final_rate if self._ended_at is not None or tables_over else self._rate(now)
        eta = None
        if not self.ended and rate and total is not None:
            eta = max(0.0, (total - done) / rate)
        return {
            "session": self.session_id,
            "job": self.job,
            "role": self.role.role_name,
            "peer": self.peer,
            "trigger": self.trigger,
            "status": self.status,
            "reason": self.reason,
            "phase": self._phase,
            "started_at": self.started_at.isoformat(),
            "elapsed_s": round(now - self._t0, 3),
            "and_gates_done": done,
            "and_gates_total": total,
            "bytes_sent": self.counters.bytes_sent,
            "bytes_received": self.counters.bytes_received,
            "and_gates_per_s": None if rate is None else round(rate, 1),
            "eta_s": None if eta is None else round(eta, 1),
            "phases": [p.to_dict() for p in self.phases],
            "result_path": self.result_path,
        }
