"""Runs one sans-I/O session over one frame stream: reading, writing, computing off the event loop, deadlines.

Theory of operation
-------------------
Every call into the session object — ``start``, ``receive``, ``fail`` and each step of the garbler's ``produce()``
— runs on the session's own worker thread, one call at a time and always the same thread: the session has no lock
of its own, and the greenlet its program runs in belongs to that thread (``jointstat.garble.streams``). OT,
garbling and evaluation therefore never stall the event loop, and numpy and AES release the GIL, so the worker
overlaps with the network. Four tasks on the event loop share the session:

- the *reader* reads the peer's frames into a short inbox (``READ_AHEAD`` frames), and the *processor* hands each
  to ``session.receive`` on the worker; replies go to the outbox. Reading the next frame thus overlaps evaluating
  the last one;
- the *producer* (garbler only) pulls the streamed frames of ``session.produce()`` one at a time on the worker.
  Before each it takes one of ``Limits.send_window`` slots, which the writer gives back once the frame is written.
  gRPC's ``write`` completes only as HTTP/2 flow control lets the bytes out, so a slow evaluator stops the garbler
  after at most ``send_window`` frames plus gRPC's own bounded buffers: memory stays bounded, and garbling overlaps
  sending. It pulls until ``produce()`` is exhausted, so every frame the session produced is sent, even when the
  peer's ``finish`` has already ended the session;
- the *writer* writes the outbox to the stream in order;
- the *watchdog* ends the session when nothing has been sent or received for ``idle_timeout_s``; the whole
  session is also bounded by ``deadline_s``.

The session's transcript is hashed on a thread of its own (``BackgroundHasher``): SHA-256 of every table byte is
off the critical path, and the digest waits for the hashing to catch up only at ``finish``.

The session ends when it is done, fails (a bad frame, the peer's abort) or a limit passes. When it is done, every
frame it produced leaves before the stream closes: the garbler's session can be completed by the evaluator's
finish while its producer still holds its own last frames (the decoding information and the finish come out of
``produce()`` after the last table), so the driver waits for the producer to pull everything (up to
``idle_timeout_s``) before it queues the end of the outbox. On a local failure the abort frame jumps the queue
(frames still waiting are dropped), is given ``abort_grace_s`` to leave, then the stream is closed. A lost stream
(end of stream, a transport error) fails the session with ``connection lost``.
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
import hashlib
import queue
import threading
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from jointstat.circuit.model import Party
from jointstat.protocol.frames import AbortInfo, AbortReason, ProtocolError
from jointstat.protocol.garbler import GarblerSession
from jointstat.protocol.sides import Session

GRPC_MESSAGE_PREFIX = 5  # compressed flag and 4-byte length before every gRPC message
READ_AHEAD = 4  # frames read from the stream before the session has taken the ones before


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
        self._inbox: asyncio.Queue[bytes | StreamLost | None] = asyncio.Queue(maxsize=READ_AHEAD)
        self._slots = asyncio.Semaphore(limits.send_window)
        self._stop = asyncio.Event()
        self._ended = asyncio.Event()
        self._last_progress = self._loop.time()
        self._producer: asyncio.Task[None] | None = None
        self._worker = ThreadPoolExecutor(max_workers=1, thread_name_prefix="jointstat-session")
        self._hasher = BackgroundHasher()
        session.use_hash_factory(self._hasher.new)

    # -- helpers ----------------------------------------------------------------------------------------------------
    async def _call(self, fn: Callable[..., Any], *args: Any) -> Any:
        """Run one step of the session on its worker thread."""
        return await self._loop.run_in_executor(self._worker, fn, *args)

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

    def _send_abort_first(self, frame: bytes | None) -> None:
        self._stop.set()
        if frame is not None:
            self._drop_queued()
            self._outbox.put_nowait((frame, False))
        self._ended.set()

    async def _local_fail(self, reason: AbortReason, message: str) -> None:
        """End the session for a reason found here; the abort frame jumps the queue."""
        self._stop.set()
        abort = await self._call(self.session.fail, reason, message)
        self._send_abort_first(abort)

    def _after_protocol_error(self, exc: ProtocolError) -> None:
        self._send_abort_first(exc.frame)

    # -- activities ---------------------------------------------------------------------------------------------------
    async def _deliver(self, data: bytes) -> None:
        self.counters.bytes_received += len(data) + GRPC_MESSAGE_PREFIX
        self.counters.frames_received += 1
        try:
            replies = await self._call(self.session.receive, data)
        except ProtocolError as exc:
            self._after_protocol_error(exc)
            return
        self._enqueue(replies)
        session = self.session
        if isinstance(session, GarblerSession) and session.ready_to_stream and self._producer is None:
            self._producer = asyncio.create_task(self._produce(session.produce()), name="jointstat-producer")
        self._check_ended()
        self._notify()

    async def _read_loop(self) -> None:
        try:
            while True:
                data = await self.stream.read()
                self._progress()
                await self._inbox.put(data)
                if data is None:
                    return
        except StreamLost as exc:
            await self._inbox.put(exc)

    async def _process_loop(self, first_frame: bytes | None) -> None:
        if first_frame is not None:
            await self._deliver(first_frame)
        while not self._ended.is_set():
            item = await self._inbox.get()
            if self._ended.is_set():
                return
            if item is None:
                await self._local_fail(
                    AbortReason.CONNECTION_LOST, "the peer closed the stream before the session ended"
                )
                return
            if isinstance(item, StreamLost):
                await self._local_fail(AbortReason.CONNECTION_LOST, f"receiving failed: {item}")
                return
            await self._deliver(item)

    async def _write_loop(self) -> None:
        while True:
            item = await self._outbox.get()
            if item is None:
                return
            data, slotted = item
            try:
                await self.stream.write(data)
            except StreamLost as exc:
                if slotted:
                    self._slots.release()
                await self._local_fail(AbortReason.CONNECTION_LOST, f"sending failed: {exc}")
                return
            if slotted:
                self._slots.release()
            self.counters.bytes_sent += len(data) + GRPC_MESSAGE_PREFIX
            self.counters.frames_sent += 1
            self._progress()
            self._notify()

    async def _produce(self, frames: Iterator[bytes]) -> None:
        """Pull the garbler's streamed frames on the worker, one send slot each, until ``produce()`` ends."""
        try:
            while not self._stop.is_set():
                await self._slots.acquire()
                if self._stop.is_set():
                    self._slots.release()
                    return
                data = await self._call(next, frames, None)
                if data is None:
                    self._slots.release()
                    break
                self._outbox.put_nowait((data, True))
            self._check_ended()
        except ProtocolError as exc:
            self._after_protocol_error(exc)
        except Exception as exc:
            await self._local_fail(AbortReason.INTERNAL, f"garbling failed ({type(exc).__name__})")

    async def _watch_shutdown(self) -> None:
        assert self._shutdown is not None
        await self._shutdown.wait()
        await self._local_fail(AbortReason.PEER_SHUTDOWN, "this node is shutting down")

    async def _watchdog(self) -> None:
        limit = self.limits.idle_timeout_s
        while not self._ended.is_set():
            idle = self._loop.time() - self._last_progress
            if idle >= limit:
                await self._local_fail(AbortReason.DEADLINE, f"nothing was sent or received for {limit:g} s")
                return
            await asyncio.sleep(min(limit - idle, 1.0) + 0.001)

    # -- the whole ------------------------------------------------------------------------------------------------------
    async def run(self, first_frame: bytes | None) -> SessionResult:
        try:
            return await self._run(first_frame)
        finally:
            self._hasher.close()
            self._worker.shutdown(wait=False)

    async def _run(self, first_frame: bytes | None) -> SessionResult:
        self._enqueue(await self._call(self.session.start))
        writer = asyncio.create_task(self._write_loop(), name="jointstat-writer")
        reader = asyncio.create_task(self._read_loop(), name="jointstat-reader")
        processor = asyncio.create_task(self._process_loop(first_frame), name="jointstat-processor")
        watchdog = asyncio.create_task(self._watchdog(), name="jointstat-watchdog")
        watchers = [watchdog]
        if self._shutdown is not None:
            watchers.append(asyncio.create_task(self._watch_shutdown(), name="jointstat-shutdown"))
        cancelled = False
        try:
            try:
                await asyncio.wait_for(self._ended.wait(), timeout=self.limits.deadline_s)
            except TimeoutError:
                await self._local_fail(
                    AbortReason.DEADLINE, f"the session deadline of {self.limits.deadline_s:g} s passed"
                )
        except asyncio.CancelledError:
            cancelled = True
            if self.stream.peer_gone():
                reason, why = (
                    AbortReason.CONNECTION_LOST,
                    "the peer cancelled the stream or the connection dropped",
                )
            else:
                reason, why = AbortReason.CANCELLED, "the local node cancelled the session"
            self._stop.set()
            abort = await asyncio.shield(self._call(self.session.fail, reason, why))
            self._send_abort_first(abort)
        finally:
            completed = self.session.done
            producer = self._producer
            if producer is not None and not producer.done():
                if completed:  # the last streamed frames (decoding, finish) are still to be pulled and sent
                    try:
                        await asyncio.wait_for(asyncio.shield(producer), timeout=self.limits.idle_timeout_s)
                    except asyncio.CancelledError:
                        cancelled = True
                    except (TimeoutError, Exception):
                        pass
                producer.cancel()
            self._stop.set()
            for watcher in watchers:
                watcher.cancel()
            self._outbox.put_nowait(None)
            grace = self.limits.idle_timeout_s if completed else self.limits.abort_grace_s
            try:
                await asyncio.wait_for(asyncio.shield(writer), timeout=grace)
            except (TimeoutError, asyncio.CancelledError):
                writer.cancel()
            for task in (reader, processor):
                if not task.done():
                    task.cancel()
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await self.stream.close(completed)
            if cancelled or not completed:
                self.stream.cancel()
            for task in (reader, processor, writer, *watchers, *([producer] if producer is not None else [])):
                with contextlib.suppress(asyncio.CancelledError, Exception):
                    await task
            with contextlib.suppress(Exception):
                await self._call(self.session.release)
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
