"""Ed25519 signatures of a session's statements (RFC 8032, through ``cryptography``) from a node's keys.

Theory of operation: a session signs its hello and its transcript digest with the node's long-term Ed25519 key and
checks the peer's with the peer's public key from the node's configuration. What exactly is signed — a context
string per kind of statement and the session id, so a signature of one kind or session is never accepted as
another — is defined once, in ``jointstat.statements``, which the session log uses too. ``signer`` and
``verifier`` build the two callables a session takes from plain keys (the node builds its own, whose ``sign`` also
records the transcript in its session log).
"""

from __future__ import annotations

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat import statements
from jointstat.protocol.session import Sign, Verify
from jointstat.statements import Statement


def signer(private_key: Ed25519PrivateKey) -> Sign:
    """``sign(statement) -> signature`` with this node's key."""
    if not isinstance(private_key, Ed25519PrivateKey):
        raise TypeError(f"expected an Ed25519PrivateKey, got {type(private_key).__name__}")

    def sign(statement: Statement) -> bytes:
        return statements.sign(private_key, statement)

    return sign


def verifier(peer_public_key: Ed25519PublicKey) -> Verify:
    """``verify(peer_signature, statement) -> bool`` against the peer's configured public key."""
    if not isinstance(peer_public_key, Ed25519PublicKey):
        raise TypeError(f"expected an Ed25519PublicKey, got {type(peer_public_key).__name__}")

    def verify(peer_signature: bytes, statement: Statement) -> bool:
        return statements.signature_ok(peer_public_key, statement, peer_signature)

    return verify
