"""The session server: accepts a peer's stream over mutual TLS and runs the session it was told to expect, and the
streams that resume it after a cut.

Theory of operation: the node registers each session it will serve with ``expect(session)`` and gets a future
for its result. When a peer opens ``jointstat.v1.Session/Exchange`` — which it can only do with a pinned
certificate, since the pinned certificates are the TLS trust anchors — the handler first checks the connection once
more (TLS 1.3, pinned fingerprint; ``tls.check_peer``) and refuses the call with PERMISSION_DENIED before reading
anything. It then reads the first frame, which must be a hello, and looks up its session id: an id used before, or
one nobody expects, is refused with an abort frame; a session expected from another peer certificate likewise.
Otherwise the id is claimed (it can never run again) and a driver runs the session in a task of its own, to its
end; the future gets the result. The stream's handler lasts as long as the session uses its stream.

Resume: a stream whose first frame is ``resume`` names a session this server runs. It is refused (an abort frame
``resume_refused``, and a line in ``refused``) when no session of that id is running here — it ended, its grace
period passed, or it never ran — or when the stream's client certificate is not the one the session started with
(even another pinned peer's); otherwise the stream is handed to the session's driver, which checks the resume frame
itself (proof, attempt, counts: ``protocol.session``) and refuses or resumes (``transport.driver``).

``shutdown`` (``driver.Shutdown``) lets the node end the sessions it serves with ``peer_shutdown`` before it stops
the server. ``services`` lets the node register more services on the same port before it starts (its run proposals and the
standard health service): each is called with the ``grpc.aio.Server``. ``expect`` takes the ``counters`` and the
``on_progress`` callback of ``driver.drive``, so the node can follow a session it serves.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections import deque
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import grpc

from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason, ProtocolError
from jointstat.protocol.sides import Session
from jointstat.transport.channel import (
    MESSAGE_OPTIONS,
    METHOD_NAME,
    SERVICE_NAME,
    ServerStream,
    SessionIds,
    SessionRefused,
)
from jointstat.transport.driver import (
    REFUSED,
    Driver,
    Limits,
    SessionResult,
    Shutdown,
    StreamLost,
    WireCounters,
    new_driver,
    result_of,
    run_driver,
)
from jointstat.transport.tls import NodeTLS, PeerRefused, check_peer

REFUSALS_KEPT = 1000


@dataclass
class _Expected:
    session: Session
    limits: Limits
    peer: bytes | None
    future: asyncio.Future[SessionResult]
    counters: WireCounters = field(default_factory=WireCounters)
    on_progress: Callable[[], None] | None = None


@dataclass
class _Running:
    driver: Driver
    peer: bytes
    task: asyncio.Task[SessionResult]


class SessionServer:
    """A grpc.aio server for sessions; bind to ``address`` (port 0 picks a free port), then ``start()``."""

    def __init__(
        self,
        tls: NodeTLS,
        *,
        address: str = "127.0.0.1:0",
        limits: Limits | None = None,
        session_ids: SessionIds | None = None,
        services: Sequence[Callable[[grpc.aio.Server], None]] = (),
        shutdown: Shutdown | None = None,
    ) -> None:
        self._tls = tls
        self._shutdown = shutdown
        self._services = tuple(services)
        self._address = address
        self._limits = limits or Limits()
        self._ids = session_ids if session_ids is not None else SessionIds()
        self._expected: dict[bytes, _Expected] = {}
        self._running: dict[bytes, _Running] = {}
        self._server: grpc.aio.Server | None = None
        self._port: int | None = None
        self._stopping = False
        # Why streams were refused, for the node's log (no secrets): the latest REFUSALS_KEPT only, so a peer that
        # keeps opening bad streams cannot grow the node's memory.
        self.refused: deque[str] = deque(maxlen=REFUSALS_KEPT)

    @property
    def port(self) -> int:
        if self._port is None:
            raise RuntimeError("the server has not been started")
        return self._port

    async def start(self) -> int:
        """Bind and start serving; returns the bound port."""
        if self._server is not None:
            raise RuntimeError("the server has already been started")
        server = grpc.aio.server(options=[*MESSAGE_OPTIONS, ("grpc.so_reuseport", 0)])
        handler: grpc.RpcMethodHandler[bytes, bytes] = grpc.stream_stream_rpc_method_handler(self._exchange)
        server.add_generic_rpc_handlers(
            [grpc.method_handlers_generic_handler(SERVICE_NAME, {METHOD_NAME: handler})]
        )
        for add_service in self._services:
            add_service(server)
        port = server.add_secure_port(self._address, self._tls.server_credentials())
        if port == 0:
            raise OSError(f"could not bind the session server to {self._address}")
        await server.start()
        self._server = server
        self._port = port
        return port

    async def stop(self, grace: float | None = None) -> None:
        """Stop serving; running sessions get ``grace`` seconds, then they are cancelled (their peers are told)."""
        self._stopping = True
        tasks = [running.task for running in self._running.values()]
        if tasks and grace:
            await asyncio.wait(tasks, timeout=grace)
        for task in tasks:
            task.cancel()
        for task in tasks:
            with contextlib.suppress(BaseException):
                await task
        if self._server is not None:
            await self._server.stop(grace)
            self._server = None
        for entry in self._expected.values():
            if not entry.future.done():
                entry.future.cancel()
        self._expected.clear()

    async def __aenter__(self) -> SessionServer:
        await self.start()
        return self

    async def __aexit__(self, *_exc: object) -> None:
        await self.stop(None)

    def expect(
        self,
        session: Session,
        *,
        peer_fingerprint: bytes | None = None,
        limits: Limits | None = None,
        counters: WireCounters | None = None,
        on_progress: Callable[[], None] | None = None,
    ) -> asyncio.Future[SessionResult]:
        """Serve ``session`` to the peer that opens it; ``peer_fingerprint`` restricts which pinned peer may."""
        sid = session.session_id
        if sid in self._ids or sid in self._expected:
            raise SessionRefused(f"session id {sid.hex()[:32]} is already used or expected; refused")
        if peer_fingerprint is not None and peer_fingerprint not in self._tls.pinned_fingerprints:
            raise ValueError("peer_fingerprint is not one of this server's pinned certificates")
        future: asyncio.Future[SessionResult] = asyncio.get_running_loop().create_future()
        self._expected[sid] = _Expected(
            session,
            limits or self._limits,
            peer_fingerprint,
            future,
            counters if counters is not None else WireCounters(),
            on_progress,
        )
        return future

    def withdraw(self, session_id: bytes) -> bool:
        """Stop expecting a session that has not started; True if it was waiting."""
        entry = self._expected.pop(session_id, None)
        if entry is None:
            return False
        entry.future.cancel()
        return True

    async def _refuse(self, stream: ServerStream, reason: AbortReason, message: str) -> None:
        self.refused.append(message)
        with contextlib.suppress(StreamLost):
            await stream.write(fr.abort_frame(reason, message))

    async def _exchange(self, _requests: object, context: grpc.aio.ServicerContext) -> None:
        try:
            peer = check_peer(context.auth_context(), self._tls.pinned_fingerprints)
        except PeerRefused as exc:
            self.refused.append(str(exc))
            await context.abort(grpc.StatusCode.PERMISSION_DENIED, str(exc))
            return
        stream = ServerStream(context, lambda: self._stopping)
        try:
            first = await asyncio.wait_for(stream.read(), timeout=self._limits.idle_timeout_s)
        except (TimeoutError, StreamLost):
            return
        if first is None:
            return
        try:
            kind, frame = fr.decode(first)
        except ProtocolError as exc:
            await self._refuse(stream, exc.reason, f"first frame refused: {exc}")
            return
        if kind == fr.RESUME and not isinstance(frame, fr.TablesFrame):
            await self._resume(stream, first, bytes(frame.resume.session_id), peer)
            return
        if kind != fr.HELLO or isinstance(frame, fr.TablesFrame):
            await self._refuse(
                stream, AbortReason.UNEXPECTED_FRAME, f"the first frame must be hello or resume, got {kind!r}"
            )
            return
        sid = bytes(frame.hello.session_id)
        if sid in self._ids:
            await self._refuse(
                stream, AbortReason.SESSION_REFUSED, "this session id has been used before; refused"
            )
            return
        entry = self._expected.get(sid)
        if entry is None:
            await self._refuse(
                stream, AbortReason.SESSION_REFUSED, "no session with this id is expected here"
            )
            return
        if entry.peer is not None and entry.peer != peer:
            await self._refuse(
                stream, AbortReason.SESSION_REFUSED, "this session is expected from another pinned peer"
            )
            return
        del self._expected[sid]
        try:
            self._ids.claim(sid)
        except SessionRefused as exc:
            await self._refuse(stream, AbortReason.SESSION_REFUSED, str(exc))
            entry.future.cancel()
            return
        driver = new_driver(
            entry.session,
            entry.limits,
            counters=entry.counters,
            on_progress=entry.on_progress,
            shutdown=self._shutdown,
        )
        task = asyncio.create_task(run_driver(driver, None, None), name="jointstat-session")
        self._running[sid] = _Running(driver, peer, task)
        task.add_done_callback(lambda done: self._session_ended(sid, entry, done))
        await self._hand_over(driver, stream, first, resuming=False)
        await self._after_link(driver, task)

    def _session_ended(self, sid: bytes, entry: _Expected, task: asyncio.Task[SessionResult]) -> None:
        self._running.pop(sid, None)
        if entry.future.done():
            return
        if task.cancelled() or task.exception() is not None:
            entry.future.set_result(result_of(entry.session, entry.counters))
        else:
            entry.future.set_result(task.result())

    async def _hand_over(self, driver: Driver, stream: ServerStream, first: bytes, *, resuming: bool) -> None:
        """Give the stream to the session's driver and keep the call open while the session uses it."""
        seen = len(driver.events)
        over = driver.offer(stream, first, resuming=resuming)
        try:
            await over
        except asyncio.CancelledError:
            driver.stream_gone(stream, "the call was cancelled (the peer went away, or the server stops)")
            raise
        finally:
            for event in driver.events[seen:]:
                if event.kind == REFUSED:  # the driver refused this resume (proof, attempt or counts)
                    self.refused.append(event.detail)

    async def _resume(self, stream: ServerStream, first: bytes, sid: bytes, peer: bytes) -> None:
        running = self._running.get(sid)
        if running is None:
            await self._refuse(
                stream,
                AbortReason.RESUME_REFUSED,
                f"resume of session {sid.hex()[:32]} refused: no such session is running here (it ended, its grace "
                "period passed, or it never ran)",
            )
            return
        if running.peer != peer:
            await self._refuse(
                stream,
                AbortReason.RESUME_REFUSED,
                f"resume of session {sid.hex()[:32]} refused: the client certificate is not the one the session "
                "started with",
            )
            return
        await self._hand_over(running.driver, stream, first, resuming=True)
        await self._after_link(running.driver, running.task)

    @staticmethod
    async def _after_link(driver: Driver, task: asyncio.Task[SessionResult]) -> None:
        """The driver is done with this call's stream: if the session has ended or cannot be resumed, the call ends
        once the session's result is known (so whoever sees the call end sees the result); if it may await a
        resume, at once."""
        if (driver.session.ended or not driver.can_resume) and not task.done():
            with contextlib.suppress(Exception, asyncio.CancelledError):
                await asyncio.shield(task)
