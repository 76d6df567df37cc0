"""Transport: grpc.aio server and client moving session frames over mutual TLS with pinned certificates.

``SessionServer`` serves expected sessions, ``run_client`` runs one session against a server, ``NodeTLS`` holds a
node's certificate, key and pinned peers, ``Limits`` the deadlines and the send window; see ``driver`` for how a
session is run on a stream (flow control, garbling off the event loop, deadlines, cancellation).
"""

from __future__ import annotations

from typing import Any

_EXPORTS = {
    "Limits": "jointstat.transport.driver",
    "SessionResult": "jointstat.transport.driver",
    "WireCounters": "jointstat.transport.driver",
    "drive": "jointstat.transport.driver",
    "SessionIds": "jointstat.transport.channel",
    "SessionRefused": "jointstat.transport.channel",
    "SessionServer": "jointstat.transport.server",
    "run_client": "jointstat.transport.client",
    "NodeTLS": "jointstat.transport.tls",
    "PeerRefused": "jointstat.transport.tls",
    "fingerprint": "jointstat.transport.tls",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    # Lazy, so that importing the generated wire module (jointstat.transport.wire) does not import grpc or the
    # protocol layer, which itself imports the wire module.
    if name in _EXPORTS:
        import importlib

        return getattr(importlib.import_module(_EXPORTS[name]), name)
    raise AttributeError(f"module 'jointstat.transport' has no attribute {name!r}")
