"""What the console may see of its node: plain, frozen records and one narrow interface the daemon implements.

Theory of operation
-------------------
The console never holds the daemon, its job runner, its store or its keys. It is given a ``NodeView`` — a
handful of coroutines answering with the records below — and renders only what those records carry: job
settings and run outcomes, session progress (counts, bytes, phases), this node's own results, the session log's
bytes and the *public* keys that verify them, and one action (``run_now``). No record has a field for an input
value, a wire label, Δ, a private key or any other secret, so a page cannot show one by mistake.

A daemon implements ``NodeView`` (``jointstat.node.nodeview.DaemonView``); the console's tests implement it with
fixed records. Adding something to the console means adding a field here and filling it there — nothing else in
the daemon is reachable from the console.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Protocol

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

ENDED = frozenset({"completed", "aborted", "refused", "failed"})


class RunRefused(Exception):
    """``run_now`` could not start the job; the message says why (an unknown job, one the peer starts, stopping)."""


@dataclass(frozen=True)
class RunView:
    """One recorded run (attempt) of a job, from the job store."""

    job: str
    status: str  # running, completed, aborted, refused or failed
    trigger: str  # schedule or operator
    scheduled_for: datetime
    started_at: datetime
    finished_at: datetime | None
    reason: str | None
    session: str | None
    attempt: int


@dataclass(frozen=True)
class PrivacyBudget:
    """What is left of a job's privacy budget, when the job has one (filled by the node once budgets exist)."""

    left: float
    total: float
    unit: str


@dataclass(frozen=True)
class JobView:
    """A configured job and where it stands."""

    name: str
    role: str  # the manifest party this node is: garbler or evaluator
    peer: str
    initiates: bool  # this node proposes its runs (so it can be run now from here)
    cron: str
    timezone: str
    window_minutes: int
    window_open: bool
    next_run: datetime | None  # only for jobs this node initiates
    last_run: RunView | None
    last_success: datetime | None
    privacy_budget: PrivacyBudget | None = None  # None: the job has no budget (or the node cannot tell yet)


@dataclass(frozen=True)
class PhaseView:
    name: str
    duration_s: float
    bytes_sent: int
    bytes_received: int


@dataclass(frozen=True)
class SessionView:
    """A session, live (the node follows it now) or from the job store."""

    session: str
    job: str
    role: str | None
    peer: str | None
    trigger: str | None
    status: str
    reason: str | None
    phase: str | None
    started_at: datetime
    live: bool
    and_gates_done: int = 0
    and_gates_total: int | None = None
    bytes_sent: int = 0
    bytes_received: int = 0
    and_gates_per_s: float | None = None
    seconds_left: float | None = None
    elapsed_s: float | None = None
    phases: tuple[PhaseView, ...] = ()
    has_result: bool = False

    @property
    def ended(self) -> bool:
        return self.status in ENDED

    def progress(self) -> dict[str, Any]:
        """The live fields as JSON for the page's updater (counts, bytes, rate, time left, phase, phases)."""
        return {
            "session": self.session,
            "live": self.live,
            "peer": self.peer,
            "status": self.status,
            "ended": self.ended,
            "reason": self.reason,
            "phase": self.phase,
            "and_gates_done": self.and_gates_done,
            "and_gates_total": self.and_gates_total,
            "bytes_sent": self.bytes_sent,
            "bytes_received": self.bytes_received,
            "and_gates_per_s": self.and_gates_per_s,
            "seconds_left": self.seconds_left,
            "elapsed_s": self.elapsed_s,
            "has_result": self.has_result,
            "phases": [
                {
                    "name": p.name,
                    "duration_s": p.duration_s,
                    "bytes_sent": p.bytes_sent,
                    "bytes_received": p.bytes_received,
                }
                for p in self.phases
            ],
        }


OutputValue = int | float | bool | str | list[Any] | None


@dataclass(frozen=True)
class ResultView:
    """This node's own result of one completed run (a damaged file has ``problem`` set and nothing else)."""

    job: str
    session: str | None
    finished_at: datetime | None
    withheld: bool | None  # None: this node receives no output of the job
    outputs: dict[str, OutputValue] = field(default_factory=dict)
    problem: str | None = None


@dataclass(frozen=True)
class LogKeys:
    """Public keys for checking logs: this node's own, and each configured peer's by node name."""

    own: Ed25519PublicKey
    peers: dict[str, Ed25519PublicKey]


class NodeView(Protocol):
    """What the console may see and do (see the module docstring); implemented by the daemon."""

    @property
    def node_name(self) -> str: ...

    async def jobs(self) -> list[JobView]:
        """Every configured job, in config order."""
        ...

    async def sessions(self, limit: int) -> list[SessionView]:
        """Live sessions and the most recent recorded ones, newest first."""
        ...

    async def session(self, session_id: str) -> SessionView | None:
        """One session with its progress and phases, or None if the node knows no such session."""
        ...

    async def results(self, job: str, limit: int) -> list[ResultView]:
        """The job's newest ``limit`` results, oldest first (``KeyError`` for an unknown job)."""
        ...

    async def run_now(self, job: str) -> str:
        """Start a run of an initiated job now; the first attempt's session id (``RunRefused`` if it cannot)."""
        ...

    async def session_log(self) -> bytes:
        """This node's signed session log as written so far (whole records)."""
        ...

    def log_keys(self) -> LogKeys:
        """The public keys the log checks pin."""
        ...
