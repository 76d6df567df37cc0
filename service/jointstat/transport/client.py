"""The session client: opens the stream to the peer's server over mutual TLS and runs one session on it.

Theory of operation: the client claims the session id in its ``SessionIds`` (a second use is refused before any
connection), opens a TLS channel whose only trust anchor is the pinned peer certificate, checked against the
fingerprint the caller expects (so any other server certificate fails the handshake and no frame is ever sent),
calls ``jointstat.v1.Session/Exchange`` with a gRPC deadline a little beyond what is left of the session's own, and
lets the driver run the session. A handshake that fails shows as a stream lost before the first frame: the result
has no output and its abort says what gRPC reported. The client is the session's initiator: after a cut (with
``limits.resume_grace_s``) the driver reconnects through the same function — a new channel each time, the same
credentials, so the same pinned certificate and the same client certificate — and resumes the session.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import grpc

from jointstat.protocol.sides import Session
from jointstat.transport.channel import MESSAGE_OPTIONS, METHOD_PATH, ClientStream, SessionIds
from jointstat.transport.driver import FrameStream, Limits, SessionResult, Shutdown, WireCounters, drive
from jointstat.transport.tls import NodeTLS


async def run_client(
    session: Session,
    target: str,
    tls: NodeTLS,
    *,
    limits: Limits | None = None,
    server_name: str | None = None,
    peer_fingerprint: bytes | None = None,
    session_ids: SessionIds | None = None,
    counters: WireCounters | None = None,
    on_progress: Callable[[], None] | None = None,
    shutdown: Shutdown | None = None,
) -> SessionResult:
    """Run ``session`` against the server at ``target`` (``host:port``); returns this side's result.

    ``server_name`` is the name expected in the server's certificate (default: the DNS name of the single pinned
    peer certificate); ``peer_fingerprint`` the SHA-256 of the certificate the server must present (checked against
    the pinned one, ``NodeTLS.channel_credentials``). Raises ``SessionRefused`` if the session id was used before
    by this node. ``counters`` and ``on_progress`` let the caller follow the session, ``shutdown`` end it when the
    node stops (``driver.drive``).
    """
    limits = limits or Limits()
    ids = session_ids if session_ids is not None else SessionIds()
    credentials = tls.channel_credentials(peer_fingerprint)
    ids.claim(session.session_id)
    name = server_name or tls.server_name()
    options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", name)]
    end = time.monotonic() + limits.deadline_s + 2 * limits.abort_grace_s

    async def connect() -> FrameStream:
        channel = grpc.aio.secure_channel(target, credentials, options=options)
        method: grpc.aio.StreamStreamMultiCallable[bytes, bytes] = channel.stream_stream(
            METHOD_PATH, request_serializer=None, response_deserializer=None
        )
        call = method(timeout=max(end - time.monotonic(), 1.0))
        return ClientStream(call, grace_s=limits.abort_grace_s, channel=channel)

    return await drive(
        session, None, limits, counters=counters, on_progress=on_progress, shutdown=shutdown, connect=connect
    )
