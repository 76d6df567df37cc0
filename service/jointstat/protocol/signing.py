"""Ed25519 signatures over the session transcript (RFC 8032, through ``cryptography``).

Theory of operation: at the end of a session each node signs the 32-byte transcript digest with its long-term
Ed25519 key and checks the peer's signature with the peer's public key from its configuration. The signed message
is a fixed context string followed by the digest, so a transcript signature can never be mistaken for a signature
the same key makes elsewhere (for instance over an audit log entry). ``signer`` and ``verifier`` build the two
callables a session takes; the node plugs in its configured keys.
"""

from __future__ import annotations

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat.protocol.session import Sign, Verify

TRANSCRIPT_CONTEXT = b"jointstat session transcript v1\x00"


def signer(private_key: Ed25519PrivateKey) -> Sign:
    """``sign(transcript_digest) -> signature`` with this node's key."""
    if not isinstance(private_key, Ed25519PrivateKey):
        raise TypeError(f"expected an Ed25519PrivateKey, got {type(private_key).__name__}")

    def sign(transcript_digest: bytes) -> bytes:
        return private_key.sign(TRANSCRIPT_CONTEXT + transcript_digest)

    return sign


def verifier(peer_public_key: Ed25519PublicKey) -> Verify:
    """``verify(peer_signature, transcript_digest) -> bool`` against the peer's configured public key."""
    if not isinstance(peer_public_key, Ed25519PublicKey):
        raise TypeError(f"expected an Ed25519PublicKey, got {type(peer_public_key).__name__}")

    def verify(peer_signature: bytes, transcript_digest: bytes) -> bool:
        try:
            peer_public_key.verify(peer_signature, TRANSCRIPT_CONTEXT + transcript_digest)
        except InvalidSignature:
            return False
        return True

    return verify
