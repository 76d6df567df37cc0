"""Runs one sans-I/O session over one or more frame streams: reading, writing, computing off the event loop,
flow control, deadlines, and resuming on a new stream after a cut.

Theory of operation
-------------------
Every call into the session object — ``start``, ``receive``, ``fail``, ``resume_frame`` and each step of the
garbler's ``produce()`` — runs on the session's own worker thread, one call at a time and always the same thread:
the session has no lock of its own, and the greenlet its program runs in belongs to that thread
(``jointstat.garble.streams``). OT, garbling and evaluation therefore never stall the event loop, and numpy and AES
release the GIL, so the worker overlaps with the network.

A *link* is one stream the session runs over. On each link three tasks share the session: the *reader* reads the
peer's frames into a short inbox (``READ_AHEAD`` frames), the *processor* hands each to ``session.receive`` on the
worker and puts the replies in the link's outbox, the *writer* writes the outbox in order. Across links, for the
session's whole life: the *producer* (garbler only) pulls the streamed frames of ``session.produce()`` on the
worker into the current link's outbox; the *watchdog* acts when nothing has been sent or received for
``idle_timeout_s``; the deadline (``deadline_s``) and a node's ``Shutdown`` end the session.

Flow control (``transport.flow``): the producer pulls the next frame only while the frames not yet acknowledged by
the evaluator (``session.replay_bytes``, the garbler's replay buffer) leave room for it in the window — twice the
bandwidth-delay product measured from the evaluator's ``tables_ack``s (round trip from when a frame was written to
its acknowledgement, delivery rate over that round trip), capped by the session's replay limit (the node's memory
cap) — and while the writer is fewer than ``send_window`` frames behind. On the evaluator the same measurement over
OT batches (columns written, corrections back) sets ``session.ot_window``. gRPC's ``write`` completes as HTTP/2
flow control lets the bytes out, so a slow link stops the producer and memory stays bounded by the window.

The session's transcript is hashed on a thread of its own (``BackgroundHasher``): SHA-256 of every table byte is
off the critical path, and the digest waits for the hashing to catch up only at ``finish`` (and at the end of OT,
for the resume anchor).

Ending. When the session is done every frame it produced leaves before the link closes: the garbler's session can
be completed by the evaluator's finish while its producer still holds its own last frames, so the driver waits
for the producer (up to ``idle_timeout_s``) and for the writer. The initiator (the side that connects) then
half-closes and waits for the end of the call; the other side, when it can resume (``resume_grace_s`` > 0), waits
for that half-close, which tells it the initiator is done too. On a local failure the abort frame jumps the queue
(frames still waiting are dropped), is given ``abort_grace_s`` to leave, then the stream is closed. Cancelling the
task that runs ``drive`` fails the session with ``cancelled`` (``connection lost`` if the peer went away), sends the
abort if it can and cancels the stream. ``Shutdown`` fails it with ``peer_shutdown``. A link whose write fails is
called lost only once the reader has had ``abort_grace_s`` to deliver a peer's abort frame that arrived before the
stream closed (or has found the stream lost itself), so the recorded reason is the peer's (``peer_shutdown``, say)
rather than the closed stream.

Cuts and resume. A link is *lost* when its stream fails, ends before the session did, or goes quiet for
``idle_timeout_s``. If the session cannot be resumed — ``resume_grace_s`` is 0, or this side's OT has not ended
(``session.resumable``) — it fails with ``connection lost``: a cut before OT restarts the session (the node's
retry, with fresh randomness). Otherwise the session is kept for ``resume_grace_s``: the initiator reconnects
(``connect``, the same pinned mutual TLS) with waits from ``reconnect_initial_s`` doubling to ``reconnect_max_s``,
opens the new stream with its signed resume frame and takes the peer's answer; the other side takes the streams
the server hands it (``offer``), answers a resume that checks and refuses (and records) one that does not. The
frames each side lacks are resent from the replay buffer before anything new; the producer waits meanwhile. A
session that is done still takes a resume (the peer may lack its finish). No resume within the grace period fails
a session that is not done with ``connection lost``. Each cut, resume and refused attempt is a ``LinkEvent`` of the
result.

Bytes on the wire are counted here, in both directions: each frame's length plus the 5-byte gRPC message prefix.
An optional ``on_progress`` callback is called on the event loop after every frame received and every frame
written, so a node can follow the session; an exception in the callback is swallowed.
"""

from __future__ import annotations

import asyncio
import contextlib
import math
from collections.abc import Awaitable, Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

from jointstat.protocol import frames as fr
from jointstat.protocol.evaluator import EvaluatorSession
from jointstat.protocol.frames import AbortReason, ProtocolError
from jointstat.protocol.garbler import FRAME_OVERHEAD_BYTES, GarblerSession
from jointstat.protocol.session import ResumeRefused
from jointstat.protocol.sides import Session
from jointstat.transport.flow import FlowWindow
from jointstat.transport.stream import (
    ATTEMPT_FAILED,
    CUT,
    GRPC_MESSAGE_PREFIX,
    REFUSED,
    RESUMED,
    BackgroundHasher,
    FlowFigures,
    FrameStream,
    Limits,
    LinkEvent,
    SessionResult,
    Shutdown,
    StreamLost,
    WireCounters,
    result_of,
)

# The least window, in table frames: a window of a few frames lets the garbler wait on every acknowledgement when the
# round trip is mostly the peer's own work (loopback, a fast LAN). Measured with `bench session --and-gates 16777216`
# on this machine: 3.45 s with 2 frames, 2.1–3.05 s with 8, 2.81 s with 16; 8 keeps each process's peak within 10 %
# from 2^22 to 2^26 AND gates (about 104 → 112 MiB), 16 did not (about 104 → 120 MiB).
WINDOW_FLOOR_FRAMES = 8
READ_AHEAD = 4  # frames read from the stream before the session has taken the ones before
MAX_OT_WINDOW = 64

Connect = Callable[[], Awaitable[FrameStream]]
_Item = tuple[bytes, int | None] | None  # (frame, its number if the producer made it); None ends the writer


async def _first_set(*events: asyncio.Event, timeout: float | None = None) -> None:
    """Wait until one of ``events`` is set, or ``timeout`` seconds have passed (None: no limit)."""
    waits = [asyncio.create_task(event.wait()) for event in events]
    try:
        await asyncio.wait(waits, timeout=timeout, return_when=asyncio.FIRST_COMPLETED)
    finally:
        for wait in waits:
            wait.cancel()


@dataclass
class Offer:
    """A stream the server hands a running session: its first frame (hello or resume) and when it is over."""

    stream: FrameStream
    first: bytes
    over: asyncio.Future[None]


@dataclass
class _Link:
    stream: FrameStream
    first: bytes | None = None
    over: asyncio.Future[None] | None = None
    outbox: asyncio.Queue[_Item] = field(default_factory=asyncio.Queue)
    inbox: asyncio.Queue[bytes | StreamLost | None] = field(default_factory=lambda: asyncio.Queue(READ_AHEAD))
    lost: asyncio.Event = field(default_factory=asyncio.Event)
    peer_closed: asyncio.Event = field(default_factory=asyncio.Event)
    why: str = ""
    tasks: list[asyncio.Task[None]] = field(default_factory=list)

    def lose(self, why: str) -> None:
        if not self.lost.is_set():
            self.why = why
            self.lost.set()


class _Driver:
    def __init__(
        self,
        session: Session,
        limits: Limits,
        counters: WireCounters,
        on_progress: Callable[[], None] | None = None,
        shutdown: Shutdown | None = None,
        connect: Connect | None = None,
    ) -> None:
        self.session = session
        self.limits = limits
        self.counters = counters
        self._on_progress = on_progress
        self._shutdown = shutdown
        self._connect = connect
        self._loop = asyncio.get_running_loop()
        self._offers: asyncio.Queue[Offer] = asyncio.Queue()
        self._stop = asyncio.Event()
        self._ended = asyncio.Event()
        self._connected = asyncio.Event()
        self._room = asyncio.Event()
        self._link_lock = asyncio.Lock()
        self._link: _Link | None = None
        self._last_progress = self._loop.time()
        self._started = self._loop.time()
        self._producer: asyncio.Task[None] | None = None
        self._worker = ThreadPoolExecutor(max_workers=1, thread_name_prefix="jointstat-session")
        self._hasher = BackgroundHasher()
        self._attempt = 0
        self.events: list[LinkEvent] = []
        cap = session.replay_limit_bytes if isinstance(session, GarblerSession) else 64 << 20
        unit = session.chunk_bytes + FRAME_OVERHEAD_BYTES if isinstance(session, GarblerSession) else 1 << 20
        self._flow = FlowWindow(
            cap_bytes=cap,
            floor_bytes=min(WINDOW_FLOOR_FRAMES * unit, cap),
            initial_bytes=limits.window_initial_bytes,
        )
        self._ot_flow_seen = (0, 0)
        self._checks: list[asyncio.Task[None]] = []
        self._finished = False
        self._cut_before_ot = False
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

    def _event(self, kind: str, detail: str) -> None:
        self.events.append(
            LinkEvent(
                kind=kind,
                at_s=round(self._loop.time() - self._started, 6),
                frames_sent=self.session.logical_sent,
                frames_received=self.session.logical_received,
                detail=detail[: fr.MAX_MESSAGE_CHARS],
            )
        )

    def _check_ended(self) -> None:
        if self.session.ended:
            self._ended.set()

    def _abort_first(self, frame: bytes | None) -> None:
        """The session failed here: its abort frame jumps the current link's queue."""
        self._stop.set()
        self._room.set()
        link = self._link
        if frame is not None and link is not None:
            while not link.outbox.empty():
                link.outbox.get_nowait()
            link.outbox.put_nowait((frame, None))
        self._ended.set()

    async def _local_fail(self, reason: AbortReason, message: str) -> None:
        """End the session for a reason found here; the abort frame jumps the queue."""
        self._stop.set()
        abort = await self._call(self.session.fail, reason, message)
        self._abort_first(abort)

    @property
    def can_resume(self) -> bool:
        """Whether a cut now would be followed by a wait for a resume (a grace period, and OT has ended)."""
        return self.limits.resume_grace_s > 0 and self.session.resumable

    def offer(self, stream: FrameStream, first: bytes, *, resuming: bool) -> asyncio.Future[None]:
        """A stream the server accepted for this session (server side): the first (``resuming`` False, its first
        frame the hello) or one resuming it; the future ends with that link."""
        over: asyncio.Future[None] = self._loop.create_future()
        offer = Offer(stream, first, over)
        link = self._link
        if self._finished:
            refused = ProtocolError(AbortReason.RESUME_REFUSED, "the session has ended here")
            self._checks.append(asyncio.create_task(self._refuse_offer(offer, refused)))
        elif resuming and link is not None and self._connected.is_set():
            # The peer reconnected before this side saw the cut: the running link gives way, but only to a resume
            # that checks (anyone else holding a pinned certificate could otherwise cut the session).
            self._checks.append(asyncio.create_task(self._supersede(link, offer)))
        else:
            self._offers.put_nowait(offer)
        return over

    async def _supersede(self, link: _Link, offer: Offer) -> None:
        try:
            await self._call(self.session.check_resume, offer.first)
        except ProtocolError as exc:
            await self._refuse_offer(offer, exc)
            return
        link.lose("the peer resumed the session on a new stream")
        self._offers.put_nowait(offer)

    async def _refuse_offer(self, offer: Offer, exc: ProtocolError) -> None:
        self._event(REFUSED, str(exc))
        with contextlib.suppress(Exception):
            frame = exc.frame or fr.abort_frame(AbortReason.RESUME_REFUSED, str(exc))
            await offer.stream.write(frame)
        if not offer.over.done():
            offer.over.set_result(None)

    def stream_gone(self, stream: FrameStream, why: str) -> None:
        """The server's handler of ``stream`` was cancelled: if it is the current link, it is lost."""
        link = self._link
        if link is not None and link.stream is stream:
            link.lose(why)

    # -- the flow window ------------------------------------------------------------------------------------------------
    def _room_for_next(self) -> bool:
        session = self.session
        if not isinstance(session, GarblerSession) or session.state != "streaming":
            return True
        need = session.replay_bytes + session.chunk_bytes + FRAME_OVERHEAD_BYTES
        link = self._link
        behind = link.outbox.qsize() if link is not None else 0
        return session.can_stream and need <= self._flow.window_bytes and behind < self.limits.send_window

    def _receive(self, data: bytes) -> tuple[list[bytes], int]:
        """On the worker: take one frame; on the evaluator during OT, size the OT window from the measurement."""
        session = self.session
        replies = session.receive(data)
        if isinstance(session, EvaluatorSession) and not session.ended:
            sent, done = session.ot_batches
            now = self._loop.time()
            seen_sent, seen_done = self._ot_flow_seen
            for batch in range(seen_sent, sent):
                self._flow.sent(batch, session.ot_batch_bytes, now)
            if done > seen_done:
                self._flow.acknowledged(done, now)
            self._ot_flow_seen = (sent, done)
            if self._flow.samples:
                batches = math.ceil(self._flow.window_bytes / session.ot_batch_bytes)
                session.ot_window = max(1, min(MAX_OT_WINDOW, batches))
        return replies, session.peer_acked

    def _next_frame(self, frames: Iterator[bytes]) -> _Item:
        """On the worker: the producer's next frame and its number, or None at the end."""
        data = next(frames, None)
        if data is None:
            return None
        assert isinstance(self.session, GarblerSession)
        return data, self.session.last_number

    # -- one link -------------------------------------------------------------------------------------------------------
    async def _deliver(self, link: _Link, data: bytes) -> None:
        self.counters.bytes_received += len(data) + GRPC_MESSAGE_PREFIX
        self.counters.frames_received += 1
        acked_before = self.session.peer_acked
        try:
            replies, acked = await self._call(self._receive, data)
        except ProtocolError as exc:
            if isinstance(
                exc, ResumeRefused
            ):  # a resume in the middle of a link: not from this peer's driver
                link.lose(f"an unexpected resume on a running stream: {exc}")
                return
            self._abort_first(exc.frame)
            return
        for reply in replies:
            link.outbox.put_nowait((reply, None))
        if acked > acked_before:
            self._flow.acknowledged(acked, self._loop.time())
            self._room.set()
        session = self.session
        if isinstance(session, GarblerSession) and session.ready_to_stream and self._producer is None:
            # The producer is a task of the session, not of this link, and is made here with no await before it:
            # a cut that cancels this link's processor cannot leave the session streaming with no producer. (With
            # nothing to stream the garbler never enters 'streaming': it leaves it with the reply that ends the OT.)
            self._producer = asyncio.create_task(self._produce(session.produce()), name="jointstat-producer")
        self._check_ended()
        self._notify()

    async def _read_loop(self, link: _Link) -> None:
        try:
            while True:
                data = await link.stream.read()
                self._progress()
                await link.inbox.put(data)
                if data is None:
                    return
        except StreamLost as exc:
            await link.inbox.put(exc)

    async def _process_loop(self, link: _Link) -> None:
        if link.first is not None:
            await self._deliver(link, link.first)
        while True:
            item = await link.inbox.get()
            if item is None:
                if self.session.done:
                    link.peer_closed.set()
                elif not self.session.ended:
                    link.lose("the peer closed the stream before the session ended")
                return
            if isinstance(item, StreamLost):
                link.lose(f"receiving failed: {item}")
                return
            if not self.session.ended:
                await self._deliver(link, item)

    async def _write_loop(self, link: _Link) -> None:
        while True:
            item = await link.outbox.get()
            if item is None:
                return
            data, number = item
            try:
                await link.stream.write(data)
            except StreamLost as exc:
                # The peer may have ended the stream right after an abort frame that says why (a node shutting
                # down, say): give the reader ``abort_grace_s`` to hand it over, or to find the stream lost itself,
                # before calling the link lost here.
                await self._reader_catches_up(link)
                link.lose(f"sending failed: {exc}")
                return
            self.counters.bytes_sent += len(data) + GRPC_MESSAGE_PREFIX
            self.counters.frames_sent += 1
            if number is not None:
                self._flow.sent(number, len(data), self._loop.time())
            self._room.set()
            self._progress()
            self._notify()

    async def _reader_catches_up(self, link: _Link) -> None:
        """Wait up to ``abort_grace_s`` until the session has ended or the reader has lost the link."""
        await _first_set(self._ended, link.lost, timeout=self.limits.abort_grace_s)

    async def _close_link(self, link: _Link, *, completed: bool) -> None:
        for task in link.tasks:
            if not task.done():
                task.cancel()
        for task in link.tasks:
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task
        if not completed:
            with contextlib.suppress(Exception):
                link.stream.cancel()
        release = getattr(link.stream, "release", None)
        if release is not None:
            with contextlib.suppress(Exception):
                await release()
        if link.over is not None and not link.over.done():
            link.over.set_result(None)

    async def _flush(self, link: _Link, grace: float) -> bool:
        """Let the writer send what is queued (up to ``grace`` s); False if the link was lost meanwhile."""
        link.outbox.put_nowait(None)
        writer = link.tasks[2]
        try:
            await asyncio.wait_for(asyncio.shield(writer), timeout=grace)
        except (TimeoutError, asyncio.CancelledError):
            writer.cancel()
            return False
        return not link.lost.is_set()

    async def _serve(self, link: _Link, first_frames: list[bytes]) -> bool:
        """Run the session on ``link`` until the session has ended (True) or the link is lost (False)."""
        self._link = link
        for data in first_frames:
            link.outbox.put_nowait((data, None))
        link.tasks = [
            asyncio.create_task(self._read_loop(link), name="jointstat-reader"),
            asyncio.create_task(self._process_loop(link), name="jointstat-processor"),
            asyncio.create_task(self._write_loop(link), name="jointstat-writer"),
        ]
        self._connected.set()
        self._room.set()
        self._progress()
        await _first_set(self._ended, link.lost)
        if not self._ended.is_set():
            self._connected.clear()
            await self._close_link(link, completed=False)
            return False
        if not self.session.done:  # failed: the abort (if any) goes first, then the stream closes
            await self._flush(link, self.limits.abort_grace_s)
            with contextlib.suppress(Exception):
                await link.stream.close(False)
            await self._close_link(link, completed=False)
            return True
        return await self._complete(link)

    async def _complete(self, link: _Link) -> bool:
        """The session is done: send its last frames, then end the call (module docstring)."""
        producer = self._producer
        if producer is not None and not producer.done():
            with contextlib.suppress(TimeoutError, Exception):
                await asyncio.wait_for(asyncio.shield(producer), timeout=self.limits.idle_timeout_s)
        if not await self._flush(link, self.limits.idle_timeout_s) and self.can_resume:
            await self._close_link(link, completed=False)
            return False
        if self._connect is not None or self.limits.resume_grace_s == 0:
            try:
                await link.stream.close(True)
            except (StreamLost, TimeoutError) as exc:
                if self._connect is not None and self.can_resume:
                    link.lose(f"the end of the call did not come back: {exc}")
                    await self._close_link(link, completed=False)
                    return False
            except Exception:
                pass
            await self._close_link(link, completed=True)
            return True
        await _first_set(link.peer_closed, link.lost, timeout=self.limits.idle_timeout_s)
        if link.lost.is_set() and not link.peer_closed.is_set():
            await self._close_link(link, completed=False)
            return False
        with contextlib.suppress(Exception):
            await link.stream.close(True)
        await self._close_link(link, completed=True)
        return True

    # -- across links -------------------------------------------------------------------------------------------------
    async def _produce(self, frames: Iterator[bytes]) -> None:
        """Pull the garbler's streamed frames on the worker while the window has room, until ``produce()`` ends."""
        try:
            while not self._stop.is_set():
                await self._connected.wait()
                if self._stop.is_set():
                    return
                if not self._room_for_next():
                    self._room.clear()
                    if not self._room_for_next():
                        await self._room.wait()
                    continue
                async with self._link_lock:
                    link = self._link
                    if not self._connected.is_set() or link is None:
                        continue
                    item = await self._call(self._next_frame, frames)
                    if item is None:
                        break
                    link.outbox.put_nowait(item)
            self._check_ended()
        except ProtocolError as exc:
            self._abort_first(exc.frame)
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
            link = self._link
            if idle >= limit and self._connected.is_set() and link is not None:
                if self.can_resume:
                    link.lose(f"nothing was sent or received for {limit:g} s")
                    self._progress()
                else:
                    await self._local_fail(
                        AbortReason.DEADLINE, f"nothing was sent or received for {limit:g} s"
                    )
                    return
            await asyncio.sleep(min(max(limit - idle, 0.0), 1.0) + 0.001)

    async def _deadline(self) -> None:
        await asyncio.sleep(self.limits.deadline_s)
        await self._local_fail(
            AbortReason.DEADLINE, f"the session deadline of {self.limits.deadline_s:g} s passed"
        )

    async def _first_link(self, stream: FrameStream | None, first: bytes | None) -> _Link:
        if stream is not None:
            return _Link(stream, first)
        if self._connect is not None:
            return _Link(await self._connect())
        offer = await self._offers.get()
        return _Link(offer.stream, offer.first, offer.over)

    async def _resume(self) -> tuple[_Link, list[bytes]] | None:
        """A new link to go on with, after the resume exchange; None if the grace period passed or it was refused."""
        deadline = self._loop.time() + self.limits.resume_grace_s
        if self._connect is not None:
            return await self._reconnect(deadline)
        while True:
            left = deadline - self._loop.time()
            try:
                offer = await asyncio.wait_for(self._offers.get(), timeout=max(left, 0.0))
            except TimeoutError:
                return None
            async with self._link_lock:
                try:
                    replies, _ = await self._call(self._receive, offer.first)
                except ResumeRefused as exc:
                    await self._refuse_offer(offer, exc)
                    continue
                except ProtocolError as exc:
                    self._event(REFUSED, str(exc))
                    if not offer.over.done():
                        offer.over.set_result(None)
                    return None
                self.counters.bytes_received += len(offer.first) + GRPC_MESSAGE_PREFIX
                self.counters.frames_received += 1
                self._flow.forget_unacknowledged()
                self._event(
                    RESUMED,
                    f"the peer resumed the session on a new stream ({len(replies) - 1} frames resent)",
                )
                return _Link(offer.stream, None, offer.over), replies

    async def _reconnect(self, deadline: float) -> tuple[_Link, list[bytes]] | None:
        assert self._connect is not None
        wait = self.limits.reconnect_initial_s
        while self._loop.time() < deadline and not self._stop.is_set():
            self._attempt += 1
            stream: FrameStream | None = None
            try:
                async with self._link_lock:
                    left = deadline - self._loop.time()
                    stream = await asyncio.wait_for(self._connect(), timeout=max(left, 0.001))
                    resume = await self._call(self.session.resume_frame, self._attempt)
                    await asyncio.wait_for(
                        stream.write(resume), timeout=max(deadline - self._loop.time(), 0.001)
                    )
                    self.counters.bytes_sent += len(resume) + GRPC_MESSAGE_PREFIX
                    self.counters.frames_sent += 1
                    left = min(deadline - self._loop.time(), self.limits.idle_timeout_s)
                    answer = await asyncio.wait_for(stream.read(), timeout=max(left, 0.001))
                    if answer is None:
                        raise StreamLost("the peer closed the new stream without answering the resume")
                    self.counters.bytes_received += len(answer) + GRPC_MESSAGE_PREFIX
                    self.counters.frames_received += 1
                    if fr.decode(answer)[0] == fr.ABORT:  # refused: the peer no longer has the session
                        message = fr.abort_of(fr.decode(answer)[1]).message
                        self._event(REFUSED, f"the peer refused the resume: {message}")
                        if not self.session.ended:
                            with contextlib.suppress(ProtocolError):
                                await self._call(self.session.receive, answer)
                        await self._discard(stream)
                        return None
                    try:
                        replies, _ = await self._call(self._receive, answer)
                    except ProtocolError as exc:
                        self._event(REFUSED, f"the peer's answer to the resume was refused: {exc}")
                        abort = await self._call(
                            self.session.fail, AbortReason.RESUME_REFUSED, f"the peer's resume answer: {exc}"
                        )
                        with contextlib.suppress(Exception):
                            if abort is not None:
                                await stream.write(abort)
                        await self._discard(stream)
                        return None
                    self._flow.forget_unacknowledged()
                    self._event(RESUMED, f"resumed on attempt {self._attempt} ({len(replies)} frames resent)")
                    return _Link(stream), replies
            except (StreamLost, TimeoutError, OSError) as exc:
                self._event(ATTEMPT_FAILED, f"attempt {self._attempt}: {type(exc).__name__}: {exc}")
                if stream is not None:
                    await self._discard(stream)
            left = deadline - self._loop.time()
            if left <= 0:
                break
            await asyncio.sleep(min(wait, left))
            wait = min(2 * wait, self.limits.reconnect_max_s)
        return None

    @staticmethod
    async def _discard(stream: FrameStream) -> None:
        with contextlib.suppress(Exception):
            stream.cancel()
        release = getattr(stream, "release", None)
        if release is not None:
            with contextlib.suppress(Exception):
                await release()

    # -- the whole ------------------------------------------------------------------------------------------------------
    async def run(self, stream: FrameStream | None, first: bytes | None) -> SessionResult:
        try:
            return await self._run(stream, first)
        finally:
            self._hasher.close()
            self._worker.shutdown(wait=False)

    async def _links(self, stream: FrameStream | None, first: bytes | None) -> None:
        pending = await self._call(self.session.start)
        link = await self._first_link(stream, first)
        while True:
            if await self._serve(link, pending):
                return
            self._connected.clear()
            self._event(CUT, link.why)
            if not self.can_resume:
                if not self.session.ended:
                    self._cut_before_ot = not self.session.resumable and self.session.state != "new"
                    await self._call(self.session.fail, AbortReason.CONNECTION_LOST, link.why)
                self._check_ended()
                return
            resumed = await self._resume()
            if resumed is None:
                if not self.session.ended:
                    await self._call(
                        self.session.fail,
                        AbortReason.CONNECTION_LOST,
                        f"{link.why}; not resumed within the grace period of {self.limits.resume_grace_s:g} s",
                    )
                self._check_ended()
                return
            link, pending = resumed

    async def _run(self, stream: FrameStream | None, first: bytes | None) -> SessionResult:
        watchers = [
            asyncio.create_task(self._watchdog(), name="jointstat-watchdog"),
            asyncio.create_task(self._deadline(), name="jointstat-deadline"),
        ]
        if self._shutdown is not None:
            watchers.append(asyncio.create_task(self._watch_shutdown(), name="jointstat-shutdown"))
        cancelled = False
        try:
            await self._links(stream, first)
        except asyncio.CancelledError:
            cancelled = True
            link = self._link
            if link is not None and link.stream.peer_gone():
                reason, why = (
                    AbortReason.CONNECTION_LOST,
                    "the peer cancelled the stream or the connection dropped",
                )
            else:
                reason, why = AbortReason.CANCELLED, "the local node cancelled the session"
            self._stop.set()
            abort = await asyncio.shield(self._call(self.session.fail, reason, why))
            if link is not None:
                self._abort_first(abort)
                with contextlib.suppress(BaseException):
                    await asyncio.shield(self._flush(link, self.limits.abort_grace_s))
                with contextlib.suppress(BaseException):
                    await asyncio.shield(self._close_link(link, completed=False))
        finally:
            self._stop.set()
            self._room.set()
            self._connected.set()  # a producer waiting for a link wakes up and sees the stop
            producer = self._producer
            others = [*watchers, *self._checks, *([producer] if producer is not None else [])]
            for task in others:
                task.cancel()
            for task in others:
                with contextlib.suppress(asyncio.CancelledError, Exception):
                    await task
            with contextlib.suppress(Exception):
                await self._call(self.session.release)
            self._finished = True
            ended = ProtocolError(AbortReason.RESUME_REFUSED, "the session has ended here")
            while not self._offers.empty():
                with contextlib.suppress(Exception):
                    await self._refuse_offer(self._offers.get_nowait(), ended)
        flow = FlowFigures(
            rtt_min_s=None if not math.isfinite(self._flow.rtt_min_s) else self._flow.rtt_min_s,
            rate_bytes_per_s=self._flow.rate_bytes_per_s,
            window_bytes=self._flow.window_bytes,
            samples=self._flow.samples,
        )
        result = result_of(self.session, self.counters, tuple(self.events), flow, self._cut_before_ot)
        self._notify()
        if cancelled:
            raise asyncio.CancelledError
        return result


def new_driver(
    session: Session,
    limits: Limits,
    *,
    counters: WireCounters | None = None,
    on_progress: Callable[[], None] | None = None,
    shutdown: Shutdown | None = None,
    connect: Connect | None = None,
) -> _Driver:
    """A driver for a new session; the server runs it with ``run(None, None)`` and hands it streams (``offer``)."""
    if session.state != "new":
        raise ValueError(f"drive() needs a new session, got one in state {session.state!r}")
    return _Driver(session, limits, counters or WireCounters(), on_progress, shutdown, connect)


async def run_driver(driver: _Driver, stream: FrameStream | None, first: bytes | None) -> SessionResult:
    """Run ``driver`` to the end, counted in its ``Shutdown`` if it has one."""
    shutdown = driver._shutdown
    if shutdown is None:
        return await driver.run(stream, first)
    shutdown._enter()
    try:
        return await driver.run(stream, first)
    finally:
        shutdown._leave()


async def drive(
    session: Session,
    stream: FrameStream | None,
    limits: Limits,
    *,
    counters: WireCounters | None = None,
    first_frame: bytes | None = None,
    on_progress: Callable[[], None] | None = None,
    shutdown: Shutdown | None = None,
    connect: Connect | None = None,
) -> SessionResult:
    """Run ``session`` over ``stream`` (or one ``connect`` opens) until it completes or fails; ``first_frame`` is a
    frame already read. With ``connect`` and ``limits.resume_grace_s`` the session is resumed after a cut.

    Returns the result in both cases; raises ``asyncio.CancelledError`` if the calling task was cancelled (after
    failing the session, telling the peer when possible and cancelling the stream). ``on_progress`` is called
    after each frame in or out and once at the end (see the module docstring); ``shutdown`` lets the node end
    the session with ``peer_shutdown``.
    """
    driver = new_driver(
        session, limits, counters=counters, on_progress=on_progress, shutdown=shutdown, connect=connect
    )
    return await run_driver(driver, stream, first_frame)


Driver = _Driver

__all__ = [
    "CUT",
    "GRPC_MESSAGE_PREFIX",
    "REFUSED",
    "RESUMED",
    "BackgroundHasher",
    "Driver",
    "FlowFigures",
    "FrameStream",
    "Limits",
    "LinkEvent",
    "Offer",
    "SessionResult",
    "Shutdown",
    "StreamLost",
    "WireCounters",
    "drive",
    "new_driver",
    "result_of",
    "run_driver",
]
