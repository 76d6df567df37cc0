"""What the session transport is made of: limits, streams, results, the node's shutdown, the background hash.

Theory of operation: ``driver`` runs a session over streams made of these parts. ``Limits`` bounds a session in
time and says how it resumes after a cut; a ``FrameStream`` is one gRPC stream as the driver sees it (``StreamLost``
when it fails under the session); ``WireCounters`` count the bytes each way (each frame plus gRPC's 5-byte message
prefix); ``SessionResult`` is how a session ended on one side, with its ``LinkEvent``s (cuts, resumes, refused
resume attempts) and what the flow window measured; ``Shutdown`` is a node's request to its sessions to end;
``BackgroundHasher`` hashes the transcript on a thread of its own so SHA-256 of every table byte stays off the
critical path.
"""

from __future__ import annotations

import asyncio
import hashlib
import queue
import threading
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from jointstat.circuit.model import Party
from jointstat.protocol.frames import AbortInfo
from jointstat.protocol.sides import Session

GRPC_MESSAGE_PREFIX = 5  # compressed flag and 4-byte length before every gRPC message


@dataclass(frozen=True)
class Limits:
    """Time and memory limits of one session on the transport, and how it resumes after a cut."""

    deadline_s: float = 3600.0  # the whole session
    idle_timeout_s: float = 60.0  # no frame sent and none received for this long
    send_window: int = 4  # frames of the outbox the writer may be behind before the producer waits for it
    abort_grace_s: float = 2.0  # time given to an abort frame (or the final frames) to leave
    resume_grace_s: float = 0.0  # after a cut past OT, how long both sides keep the session (0: no resume)
    reconnect_initial_s: float = 0.05  # the initiator's first wait between reconnection attempts
    reconnect_max_s: float = 2.0  # the longest wait, doubling from the first
    window_initial_bytes: int = 4 << 20  # the flow window before its first measurement (transport.flow)

    def __post_init__(self) -> None:
        for name in (
            "deadline_s",
            "idle_timeout_s",
            "abort_grace_s",
            "reconnect_initial_s",
            "reconnect_max_s",
        ):
            value = getattr(self, name)
            if not isinstance(value, int | float) or not value > 0:
                raise ValueError(f"limits: {name} must be a positive number of seconds, got {value!r}")
        if not isinstance(self.resume_grace_s, int | float) or not self.resume_grace_s >= 0:
            raise ValueError(f"limits: resume_grace_s must be 0 or more seconds, got {self.resume_grace_s!r}")
        if self.reconnect_max_s < self.reconnect_initial_s:
            raise ValueError("limits: reconnect_max_s must be at least reconnect_initial_s")
        if not isinstance(self.send_window, int) or self.send_window < 1:
            raise ValueError(f"limits: send_window must be a positive integer, got {self.send_window!r}")
        if not isinstance(self.window_initial_bytes, int) or self.window_initial_bytes < 1:
            raise ValueError(
                f"limits: window_initial_bytes must be a positive integer, got {self.window_initial_bytes!r}"
            )


class Shutdown:
    """A node's request to its running sessions to end because it is stopping (see the module docstring)."""

    def __init__(self) -> None:
        self._requested = asyncio.Event()
        self._idle = asyncio.Event()
        self._idle.set()
        self._running = 0

    def request(self) -> None:
        """Ask every session driven with this signal, now or later, to abort with ``peer_shutdown``."""
        self._requested.set()

    async def wait(self) -> None:
        await self._requested.wait()

    def _enter(self) -> None:
        self._running += 1
        self._idle.clear()

    def _leave(self) -> None:
        self._running -= 1
        if self._running == 0:
            self._idle.set()

    async def drained(self, timeout: float | None = None) -> bool:
        """Wait until no session driven with this signal runs (True), or ``timeout`` seconds pass (False)."""
        try:
            await asyncio.wait_for(self._idle.wait(), timeout=timeout)
        except TimeoutError:
            return False
        return True


class StreamLost(Exception):
    """The stream failed under the session (reset, cancelled, handshake refused…); the text says how."""


class FrameStream(Protocol):
    """What the driver needs of a gRPC stream (client call or server context)."""

    async def read(self) -> bytes | None:
        """The next frame, or None at the end of the stream; raises ``StreamLost``."""
        ...

    async def write(self, data: bytes) -> None:
        """Send one frame; raises ``StreamLost``."""
        ...

    async def close(self, completed: bool) -> None:
        """No more frames from this side; ``completed`` says whether the session completed."""
        ...

    def cancel(self) -> None:
        """Tear the stream down now (the peer sees it cancelled)."""
        ...

    def peer_gone(self) -> bool:
        """True if the stream was cancelled from the peer's side (so a cancellation here is the peer's doing)."""
        ...


@dataclass
class WireCounters:
    bytes_sent: int = 0
    bytes_received: int = 0
    frames_sent: int = 0
    frames_received: int = 0


@dataclass(frozen=True)
class LinkEvent:
    """Something that happened to the session's connection: a cut, a resume, a refused resume attempt.

    ``at_s`` is seconds since the session started; ``frames_sent``/``frames_received`` the logical frames this
    side had sent and taken then; ``detail`` says how (never a secret).
    """

    kind: str  # CUT, RESUMED, REFUSED or ATTEMPT_FAILED
    at_s: float
    frames_sent: int
    frames_received: int
    detail: str


CUT, RESUMED, REFUSED, ATTEMPT_FAILED = "cut", "resumed", "resume_refused", "resume_attempt_failed"


@dataclass(frozen=True)
class FlowFigures:
    """What the flow window measured (``transport.flow``): least round trip, delivery rate, window at the end."""

    rtt_min_s: float | None
    rate_bytes_per_s: float
    window_bytes: int
    samples: int


@dataclass(frozen=True)
class SessionResult:
    """How one session ended on this side. ``outputs`` (own output bits) is set only if it completed."""

    party: Party
    session_id: bytes
    outputs: np.ndarray | None
    abort: AbortInfo | None
    transcript_digest: bytes | None
    peer_signature: bytes | None
    counters: WireCounters = field(default_factory=WireCounters)
    events: tuple[LinkEvent, ...] = ()
    flow: FlowFigures | None = None
    cut_before_ot: bool = False  # it failed because its connection was cut before this side's OT had ended

    @property
    def restartable(self) -> bool:
        """Lost to a cut before this side's OT had ended: nothing can have been released on either side (this side
        had sent no finish), so the initiator starts a fresh session at once (a new id, fresh randomness)."""
        return not self.completed and self.cut_before_ot

    @property
    def cuts(self) -> int:
        return sum(1 for e in self.events if e.kind == CUT)

    @property
    def resumes(self) -> int:
        return sum(1 for e in self.events if e.kind == RESUMED)

    @property
    def completed(self) -> bool:
        return self.outputs is not None

    @property
    def bytes_on_wire(self) -> int:
        return self.counters.bytes_sent + self.counters.bytes_received


def result_of(
    session: Session,
    counters: WireCounters,
    events: tuple[LinkEvent, ...] = (),
    flow: FlowFigures | None = None,
    cut_before_ot: bool = False,
) -> SessionResult:
    done = session.done
    return SessionResult(
        party=session.party,
        session_id=session.session_id,
        outputs=session.outputs if done else None,
        abort=session.abort,
        transcript_digest=session.transcript_digest if done else None,
        peer_signature=session.peer_signature if done else None,
        counters=counters,
        events=events,
        flow=flow,
        cut_before_ot=cut_before_ot,
    )


class BackgroundHasher:
    """SHA-256 states updated in order on one background thread (hashlib releases the GIL on large buffers).

    ``new()`` gives an object with ``update`` (queues the bytes; they must not change afterwards) and ``digest``
    (waits until everything queued before it is hashed). It serves ``frames.Transcript`` as its hash factory.
    """

    def __init__(self) -> None:
        self._queue: queue.SimpleQueue[tuple[Any, Any] | None] = queue.SimpleQueue()
        self._thread = threading.Thread(target=self._run, name="jointstat-transcript", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while True:
            item = self._queue.get()
            if item is None:
                return
            target, data = item
            if isinstance(target, threading.Event):
                target.set()
            else:
                target.update(data)

    def new(self) -> _QueuedHash:
        return _QueuedHash(self)

    def close(self) -> None:
        self._queue.put(None)


class _QueuedHash:
    def __init__(self, owner: BackgroundHasher) -> None:
        self._owner = owner
        self._hash = hashlib.sha256()

    def update(self, data: bytes | memoryview) -> None:
        self._owner._queue.put((self._hash, data))

    def digest(self) -> bytes:
        done = threading.Event()
        self._owner._queue.put((done, None))
        done.wait()
        return self._hash.digest()
