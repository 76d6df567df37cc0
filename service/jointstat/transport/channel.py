"""What the gRPC client and server share: the method path, channel options, stream adapters, used session ids.

Theory of operation: the ``jointstat.v1.Session/Exchange`` method is registered and called with no serialiser, so
gRPC moves the frames' bytes untouched (the session layer encodes and decodes them and hashes exactly those bytes
into the transcript); its path is read from the descriptor generated from ``proto/``. Both ends limit messages to
``MAX_FRAME_BYTES`` in both directions, so a larger frame fails the stream at the transport. ``SessionIds`` holds
the ids a node has used; a second use of an id is refused, whichever side asks.
"""

from __future__ import annotations

import asyncio
import threading
from collections.abc import Callable

import grpc

from jointstat.protocol.frames import MAX_FRAME_BYTES
from jointstat.transport.driver import StreamLost
from jointstat.wire.jointstat.v1 import session_pb2 as pb

_SERVICE = pb.DESCRIPTOR.services_by_name["Session"]
SERVICE_NAME = _SERVICE.full_name
METHOD_NAME = _SERVICE.methods_by_name["Exchange"].name
METHOD_PATH = f"/{SERVICE_NAME}/{METHOD_NAME}"

MESSAGE_OPTIONS: list[tuple[str, int]] = [
    ("grpc.max_send_message_length", MAX_FRAME_BYTES),
    ("grpc.max_receive_message_length", MAX_FRAME_BYTES),
]


class SessionRefused(Exception):
    """A session id that this node has already used (or expects already) was offered again."""


class SessionIds:
    """The session ids this node has used; each may be claimed once (thread-safe)."""

    def __init__(self) -> None:
        self._used: set[bytes] = set()
        self._lock = threading.Lock()

    def __contains__(self, session_id: object) -> bool:
        with self._lock:
            return session_id in self._used

    def claim(self, session_id: bytes) -> None:
        with self._lock:
            if session_id in self._used:
                raise SessionRefused(f"session id {session_id.hex()[:32]} has been used before; refused")
            self._used.add(bytes(session_id))


def describe_rpc_error(exc: grpc.aio.AioRpcError) -> str:
    code = exc.code()
    name = code.name if code is not None else "UNKNOWN"
    return f"{name}: {exc.details() or 'no details'}"


class ClientStream:
    """``FrameStream`` over a client-side stream-stream call."""

    def __init__(
        self, call: grpc.aio.StreamStreamCall, grace_s: float, channel: grpc.aio.Channel | None = None
    ) -> None:
        self._call = call
        self._grace_s = grace_s
        self._closed = False
        self._channel = channel  # closed by ``release`` when this stream owns its channel

    async def read(self) -> bytes | None:
        try:
            data = await self._call.read()
        except grpc.aio.AioRpcError as exc:
            raise StreamLost(describe_rpc_error(exc)) from None
        if data is grpc.aio.EOF:
            code = await self._call.code()
            if code != grpc.StatusCode.OK:
                raise StreamLost(f"{code.name}: {await self._call.details() or 'no details'}")
            return None
        assert isinstance(data, bytes)  # no deserializer: frames arrive as bytes
        return data

    async def write(self, data: bytes) -> None:
        try:
            await self._call.write(data)
        except grpc.aio.AioRpcError as exc:
            raise StreamLost(describe_rpc_error(exc)) from None
        except (asyncio.InvalidStateError, grpc.aio.UsageError) as exc:
            raise StreamLost(await self._why_closed(type(exc).__name__)) from None

    async def _why_closed(self, error: str) -> str:
        """The call's own status when it has ended (a failed TLS handshake, say), so a write that finds the call
        closed reports the same reason a read would."""
        if self._call.done():
            code = await self._call.code()
            if code != grpc.StatusCode.OK:
                return f"{code.name}: {await self._call.details() or 'no details'}"
        return f"the stream has closed ({error})"

    async def close(self, completed: bool) -> None:
        if self._closed:
            return
        self._closed = True
        try:
            await self._call.done_writing()
        except (grpc.aio.AioRpcError, asyncio.InvalidStateError, grpc.aio.UsageError):
            return
        # Wait for the server to end the call, so the last frames (the finish, or an abort) are through before the
        # channel closes or the call is cancelled; a server that has gone quiet gets ``grace_s``. A call that does
        # not end well means the server may lack the last frames: ``StreamLost`` (the driver may resume).
        try:
            code = await asyncio.wait_for(self._call.code(), timeout=self._grace_s)
        except TimeoutError:
            raise StreamLost(f"the server did not end the call within {self._grace_s:g} s") from None
        if completed and code != grpc.StatusCode.OK:
            raise StreamLost(f"the call ended with {code.name}")

    def cancel(self) -> None:
        self._call.cancel()

    async def release(self) -> None:
        """Close the channel this stream owns (one per connection attempt), if any."""
        channel, self._channel = self._channel, None
        if channel is not None:
            await channel.close()

    def peer_gone(self) -> bool:
        return False


class ServerStream:
    """``FrameStream`` over the server-side context of a stream-stream call.

    Only gRPC cancels a handler's task: when the peer cancels or drops the call, or when the server stops.
    ``stopping`` tells the two apart.
    """

    def __init__(self, context: grpc.aio.ServicerContext, stopping: Callable[[], bool]) -> None:
        self._context = context
        self._stopping = stopping

    @staticmethod
    def _cancelled_here() -> bool:
        """Whether the running task itself is being cancelled (else gRPC cancelled the call under it)."""
        task = asyncio.current_task()
        return task is not None and task.cancelling() > 0

    async def read(self) -> bytes | None:
        try:
            data = await self._context.read()
        except asyncio.CancelledError:
            if self._cancelled_here():
                raise
            raise StreamLost("the call was cancelled (the peer went away)") from None
        except Exception as exc:
            raise StreamLost(f"reading the stream failed ({type(exc).__name__}: {exc})") from None
        if data is grpc.aio.EOF:
            return None
        return bytes(data)

    async def write(self, data: bytes) -> None:
        if self._context.done():
            raise StreamLost("the stream has ended")
        try:
            await self._context.write(data)
        except asyncio.CancelledError:
            if self._cancelled_here():
                raise
            raise StreamLost("the call was cancelled (the peer went away)") from None
        except Exception as exc:
            raise StreamLost(f"writing to the stream failed ({type(exc).__name__})") from None

    async def close(self, completed: bool) -> None:
        """Nothing to do: the call ends when the handler returns."""

    def cancel(self) -> None:
        """Nothing to do: the call ends when the handler returns."""

    def peer_gone(self) -> bool:
        return self._context.cancelled() or not self._stopping()
