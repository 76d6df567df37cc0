"""Transport: grpc.aio server and client moving session frames over mutual TLS with pinned certificates.

``SessionServer`` serves expected sessions, ``run_client`` runs one session against a server, ``NodeTLS`` holds a
node's certificate, key and pinned peers, ``Limits`` the deadlines and the send window; see ``driver`` for how a
session is run on a stream (flow control, garbling off the event loop, deadlines, cancellation). The message code
of the wire format lives below this room and the protocol, in ``jointstat.wire``.
"""

from __future__ import annotations

from jointstat.transport.channel import SessionIds, SessionRefused
from jointstat.transport.client import run_client
from jointstat.transport.driver import Limits, SessionResult, WireCounters, drive
from jointstat.transport.server import SessionServer
from jointstat.transport.tls import NodeTLS, PeerRefused, fingerprint

__all__ = [
    "Limits",
    "NodeTLS",
    "PeerRefused",
    "SessionIds",
    "SessionRefused",
    "SessionResult",
    "SessionServer",
    "WireCounters",
    "drive",
    "fingerprint",
    "run_client",
]
