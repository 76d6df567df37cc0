"""Throw-away identities for two nodes: a private CA's TLS certificates and Ed25519 log-signing keys.

``Pair.fresh()`` makes a CA and, for each of two node names, a TLS key and certificate issued by it and a signing
key; each node's ``NodeTLS`` pins the other's certificate. Nothing is written to disk.
"""

from __future__ import annotations

from dataclasses import dataclass

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat.harness.scenario import NODE_NAME, PEER_NAME
from jointstat.transport.pki import Issued, issue, new_ca, node_tls
from jointstat.transport.tls import NodeTLS


@dataclass(frozen=True)
class Identity:
    """One node's name, TLS certificate and key, and Ed25519 log-signing key."""

    name: str
    issued: Issued
    signing_key: Ed25519PrivateKey

    @property
    def public_key(self) -> Ed25519PublicKey:
        return self.signing_key.public_key()


@dataclass(frozen=True)
class Pair:
    """Two nodes' identities (each pins the other's certificate)."""

    node: Identity
    peer: Identity

    @classmethod
    def fresh(cls, node: str = NODE_NAME, peer: str = PEER_NAME) -> Pair:
        ca = new_ca("bicycle schemes trial CA")
        return cls(
            Identity(node, issue(ca, f"{node}.test"), Ed25519PrivateKey.generate()),
            Identity(peer, issue(ca, f"{peer}.test"), Ed25519PrivateKey.generate()),
        )

    def node_tls(self) -> NodeTLS:
        return node_tls(self.node.issued, self.peer.issued)

    def peer_tls(self) -> NodeTLS:
        return node_tls(self.peer.issued, self.node.issued)
