"""Runs one sans-I/O session over one frame stream: reading, writing, garbling off the event loop, deadlines.

Theory of operation
-------------------
Four activities share one session object (whose lock makes each of its steps atomic):

- the *reader* (a task) reads the peer's frames and passes each to ``session.receive`` in a worker thread
  (``asyncio.to_thread``), so OT and evaluation never stall the event loop; the replies go to the outbox;
- the *producer* (a thread, garbler only) runs ``session.produce()``, i.e. garbles chunk after chunk. Before
  handing a frame to the outbox it takes one of ``Limits.send_window`` slots, which the writer gives back once the
  frame is written. gRPC's ``write`` completes only as HTTP/2 flow control lets the bytes out, so a slow evaluator
  stops the garbler after at most ``send_window`` frames plus gRPC's own bounded buffers: memory stays bounded,
  and garbling overlaps sending (numpy and AES release the GIL, so the two use both cores);
- the *writer* (a task) writes the outbox to the stream in order;
- the *watchdog* (a task) ends the session when nothing has been sent or received for ``idle_timeout_s``; the whole
  session is also bounded by ``deadline_s``.

The session ends when it is done, fails (a bad frame, the peer's abort) or a limit passes. When it is done, every
frame it produced leaves before the stream closes: the garbler's session can be completed by the evaluator's
finish while its producer still holds its own last frames (the decoding information and the finish come out of
``produce()`` after the last table), so the driver waits for the producer to hand out everything (up to
``idle_timeout_s``) before it queues the end of the outbox, and the producer never drops a frame of a session
that is done. On a local failure the abort frame jumps the queue (frames still waiting are dropped), is given
``abort_grace_s`` to leave, then the stream is closed. A lost stream (end of stream, a transport error) fails the session with ``connection lost``.
Cancelling the task that runs ``drive`` fails the session with ``cancelled``, sends the abort if it can and
cancels the stream, so the peer ends too. A node that stops asks its sessions to end first through a
``Shutdown``: each fails with ``peer_shutdown`` — the abort frame tells the peer why — and ends as on any local
failure; ``Shutdown.drained`` says when no session driven with it is left. The result carries this side's own outputs only when it completed.

Bytes on the wire are counted here, in both directions: each frame's length plus the 5-byte gRPC message prefix
(HTTP/2 frame headers and TLS record overhead below gRPC are not visible to it). An optional ``on_progress``
callback is called on the event loop after every frame received (once the session has taken it) and every frame
written, so a node can follow the session's state, its counters and its AND gates done; an exception in the
callback is swallowed, since watching a session must never break it.
"""

from __future__ import annotations

import asyncio
import contextlib
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from jointstat.circuit.model import Party
from jointstat.protocol.frames import AbortInfo, AbortReason, ProtocolError
from jointstat.protocol.session import GarblerSession, Session

GRPC_MESSAGE_PREFIX = 5  # compressed flag and 4-byte length before every gRPC message


@dataclass(frozen=True)
class Limits:
    """Time and memory limits of one session on the transport."""

    deadline_s: float = 3600.0  # the whole session
    idle_timeout_s: float = 60.0  # no frame sent and none received for this long
    send_window: int = 4  # streamed frames allowed to wait for the network
    abort_grace_s: float = 2.0  # time given to an abort frame (or the final frames) to leave

    def __post_init__(self) -> None:
        for name in ("deadline_s", "idle_timeout_s", "abort_grace_s"):
            value = getattr(self, name)
            if not isinstance(value, int | float) or not value > 0:
                raise ValueError(f"limits: {name} must be a positive number of seconds, got {value!r}")
        if not isinstance(self.send_window, int) or self.send_window < 1:
            raise ValueError(f"limits: send_window must be a positive integer, got {self.send_window!r}")


class Shutdown:
    """A node's request to its running sessions to end because it is stopping (see the module docstring)."""

    def __init__(self) -> None:
        self._requested = asyncio.Event()
        self._idle = asyncio.Event()
        self._idle.set()
        self._running = 0

    @property
    def requested(self) -> bool:
        return self._requested.is_set()

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
class SessionResult:
    """How one session ended on this side. ``outputs`` (own output bits) is set only if it completed."""

    party: Party
    session_id: bytes
    outputs: np.ndarray | None
    abort: AbortInfo | None
    transcript_digest: bytes | None
    peer_signature: bytes | None
    counters: WireCounters = field(default_factory=WireCounters)

    @property
    def completed(self) -> bool:
        return self.outputs is not None

    @property
    def bytes_on_wire(self) -> int:
        return self.counters.bytes_sent + self.counters.bytes_received


def result_of(session: Session, counters: WireCounters) -> SessionResult:
    done = session.done
    return SessionResult(
        party=session.party,
        session_id=session.session_id,
        outputs=session.outputs if done else None,
        abort=session.abort,
        transcript_digest=session.transcript_digest if done else None,
        peer_signature=session.peer_signature if done else None,
        counters=counters,
    )


_Item = tuple[bytes, bool] | None  # (frame, took a send slot); None ends the writer


class _Driver:
    def __init__(
        self,
        session: Session,
        stream: FrameStream,
        limits: Limits,
        counters: WireCounters,
        on_progress: Callable[[], None] | None = None,
        shutdown: Shutdown | None = None,
    ) -> None:
        self.session = session
        self.stream = stream
        self.limits = limits
        self.counters = counters
        self._on_progress = on_progress
        self._shutdown = shutdown
        self._loop = asyncio.get_running_loop()
        self._outbox: asyncio.Queue[_Item] = asyncio.Queue()
        self._slots = threading.Semaphore(limits.send_window)
        self._stop = threading.Event()
        self._ended = asyncio.Event()
        self._produced_all = asyncio.Event()  # the producer has handed everything to the outbox, or given up
        self._last_progress = self._loop.time()
        self._producer: threading.Thread | None = None

    # -- helpers ----------------------------------------------------------------------------------------------------
    def _progress(self) -> None:
        self._last_progress = self._loop.time()

    def _notify(self) -> None:
        if self._on_progress is not None:
            with contextlib.suppress(Exception):
                self._on_progress()

    def _enqueue(self, frames: list[bytes]) -> None:
        for data in frames:
            self._outbox.put_nowait((data, False))

    def _check_ended(self) -> None:
        if self.session.ended:
            self._ended.set()

    def _drop_queued(self) -> None:
        while not self._outbox.empty():
            item = self._outbox.get_nowait()
            if item is not None and item[1]:
                self._slots.release()

    def _local_fail(self, reason: AbortReason, message: str) -> None:
        """End the session for a reason found here; the abort frame jumps the queue."""
        abort = self.session.fail(reason, message)
        self._stop.set()
        if abort is not None:
            self._drop_queued()
            self._outbox.put_nowait((abort, False))
        self._ended.set()

    def _after_protocol_error(self, exc: ProtocolError) -> None:
        self._stop.set()
        if exc.frame is not None:
            self._drop_queued()
            self._outbox.put_nowait((exc.frame, False))
        self._ended.set()

    # -- activities ---------------------------------------------------------------------------------------------------
    async def _deliver(self, data: bytes) -> None:
        self.counters.bytes_received += len(data) + GRPC_MESSAGE_PREFIX
        self.counters.frames_received += 1
        try:
            replies = await asyncio.to_thread(self.session.receive, data)
        except ProtocolError as exc:
            self._after_protocol_error(exc)
            return
        self._enqueue(replies)
        session = self.session
        if isinstance(session, GarblerSession) and session.ready_to_stream and self._producer is None:
            self._producer = threading.Thread(target=self._produce, name="jointstat-garbler", daemon=True)
            self._producer.start()
        self._check_ended()
        self._notify()

    async def _read_loop(self, first_frame: bytes | None) -> None:
        try:
            if first_frame is not None:
                await self._deliver(first_frame)
            while not self._ended.is_set():
                data = await self.stream.read()
                self._progress()
                if data is None:
                    self._local_fail(
                        AbortReason.CONNECTION_LOST, "the peer closed the stream before the session ended"
                    )
                    return
                await self._deliver(data)
        except StreamLost as exc:
            self._local_fail(AbortReason.CONNECTION_LOST, f"receiving failed: {exc}")

    async def _write_loop(self) -> None:
        while True:
            item = await self._outbox.get()
            if item is None:
                return
            data, slotted = item
            try:
                await self.stream.write(data)
            except StreamLost as exc:
                self._local_fail(AbortReason.CONNECTION_LOST, f"sending failed: {exc}")
                return
            finally:
                if slotted:
                    self._slots.release()
            self.counters.bytes_sent += len(data) + GRPC_MESSAGE_PREFIX
            self.counters.frames_sent += 1
            self._progress()
            self._notify()

    def _dropping(self) -> bool:
        """Whether the producer should give up its frames: the driver stops and the session is not done."""
        return self._stop.is_set() and not self.session.done

    def _produce(self) -> None:
        """Producer thread: garble and hand frames to the loop, one send slot each.

        Frames of a session that is done are always handed over (they are its last frames); the driver waits for
        them. Everything posted reaches the loop before ``_produced_all`` is set, in order.
        """
        assert isinstance(self.session, GarblerSession)
        post: Callable[..., object] = self._loop.call_soon_threadsafe
        try:
            for data in self.session.produce():
                while not self._slots.acquire(timeout=0.05):
                    if self._dropping():
                        return
                if self._dropping():
                    self._slots.release()
                    return
                post(self._outbox.put_nowait, (data, True))
            post(self._check_ended)
        except ProtocolError as exc:
            post(self._after_protocol_error, exc)
        except Exception as exc:
            post(self._local_fail, AbortReason.INTERNAL, f"garbling failed ({type(exc).__name__})")
        finally:
            post(self._produced_all.set)

    async def _watch_shutdown(self) -> None:
        assert self._shutdown is not None
        await self._shutdown.wait()
        self._local_fail(AbortReason.PEER_SHUTDOWN, "this node is shutting down")

    async def _watchdog(self) -> None:
        limit = self.limits.idle_timeout_s
        while not self._ended.is_set():
            idle = self._loop.time() - self._last_progress
            if idle >= limit:
                self._local_fail(AbortReason.DEADLINE, f"nothing was sent or received for {limit:g} s")
                return
            await asyncio.sleep(min(limit - idle, 1.0) + 0.001)

    # -- the whole ------------------------------------------------------------------------------------------------------
    async def run(self, first_frame: bytes | None) -> SessionResult:
        self._enqueue(self.session.start())
        writer = asyncio.create_task(self._write_loop(), name="jointstat-writer")
        reader = asyncio.create_task(self._read_loop(first_frame), name="jointstat-reader")
        watchdog = asyncio.create_task(self._watchdog(), name="jointstat-watchdog")
        watchers = [watchdog]
        if self._shutdown is not None:
            watchers.append(asyncio.create_task(self._watch_shutdown(), name="jointstat-shutdown"))
        cancelled = False
        try:
            try:
                await asyncio.wait_for(self._ended.wait(), timeout=self.limits.deadline_s)
            except TimeoutError:
                self._local_fail(
                    AbortReason.DEADLINE, f"the session deadline of {self.limits.deadline_s:g} s passed"
                )
        except asyncio.CancelledError:
            cancelled = True
            if self.stream.peer_gone():
                self._local_fail(
                    AbortReason.CONNECTION_LOST, "the peer cancelled the stream or the connection dropped"
                )
            else:
                self._local_fail(AbortReason.CANCELLED, "the local node cancelled the session")
        finally:
            completed = self.session.done
            if completed and self._producer is not None:
                # The session's last frames may still be in the producer: they must be queued before the end.
                try:
                    await asyncio.wait_for(self._produced_all.wait(), timeout=self.limits.idle_timeout_s)
                except TimeoutError:
                    pass
                except asyncio.CancelledError:
                    cancelled = True
            self._stop.set()
            for watcher in watchers:
                watcher.cancel()
            self._outbox.put_nowait(None)
            grace = self.limits.idle_timeout_s if completed else self.limits.abort_grace_s
            try:
                await asyncio.wait_for(asyncio.shield(writer), timeout=grace)
            except (TimeoutError, asyncio.CancelledError):
                writer.cancel()
            if not reader.done():
                reader.cancel()
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await self.stream.close(completed)
            if cancelled or not completed:
                self.stream.cancel()
            for task in (reader, writer, *watchers):
                with contextlib.suppress(asyncio.CancelledError, Exception):
                    await task
            if self._producer is not None:
                await asyncio.to_thread(self._producer.join)
        result = result_of(self.session, self.counters)
        self._notify()
        if cancelled:
            raise asyncio.CancelledError
        return result


async def drive(
    session: Session,
    stream: FrameStream,
    limits: Limits,
    *,
    counters: WireCounters | None = None,
    first_frame: bytes | None = None,
    on_progress: Callable[[], None] | None = None,
    shutdown: Shutdown | None = None,
) -> SessionResult:
    """Run ``session`` over ``stream`` until it completes or fails; ``first_frame`` is a frame already read.

    Returns the result in both cases; raises ``asyncio.CancelledError`` if the calling task was cancelled (after
    failing the session, telling the peer when possible and cancelling the stream). ``on_progress`` is called
    after each frame in or out and once at the end (see the module docstring); ``shutdown`` lets the node end
    the session with ``peer_shutdown``.
    """
    if session.state != "new":
        raise ValueError(f"drive() needs a new session, got one in state {session.state!r}")
    driver = _Driver(session, stream, limits, counters or WireCounters(), on_progress, shutdown)
    if shutdown is None:
        return await driver.run(first_frame)
    shutdown._enter()
    try:
        return await driver.run(first_frame)
    finally:
        shutdown._leave()


__all__ = [
    "GRPC_MESSAGE_PREFIX",
    "FrameStream",
    "Limits",
    "SessionResult",
    "Shutdown",
    "StreamLost",
    "WireCounters",
    "drive",
    "result_of",
]
