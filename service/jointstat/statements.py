"""The statements a node signs with its Ed25519 key in a session: its hello, each resume and the transcript digest.

Theory of operation
-------------------
A node's long-term signing key (Ed25519, RFC 8032, through ``cryptography``) signs these statements in a session,
and nothing else of the session:

* ``hello`` — at the first frame, over the SHA-256 of the hello's fields (``protocol.frames.hello_digest``): it
  proves that the peer holds the signing key this node has configured for it, before any oblivious transfer and
  before any decoding information moves;
* ``resume`` — at the first frame of a stream that resumes the session after a cut, over the SHA-256 of the resume
  frame's fields and of the transcript digest through the oblivious transfer (``protocol.frames.resume_digest``):
  it proves that the node resuming the session is the one that ran it (it holds the peer's signing key and the
  transcript so far), for this attempt only;
* ``transcript`` — at the last frame, over the transcript digest (``protocol.frames.Transcript``): both nodes
  attest to the same run; the session log records both signatures and an auditor checks them again.

The signed message is a context string naming the kind of statement followed by the canonical JSON (RFC 8785) of
``{"session": <session id>, <kind>: <hex digest>}``. The context keeps a signature of one kind from being taken
for another kind or for a session-log record (those have their own context, ``audit.records``); the session id
binds it to one session, and as a session id is never used twice a signature cannot be replayed into another.
The protocol's session id (bytes) appears as its lower-case hex, which is also how the session log names it.

This is the one definition of what is signed. The protocol (which sends and checks the signatures in its hello and
finish frames) and the audit log (which records them and re-verifies them) are siblings under the node and may not
import each other, so it sits below both, beside ``canonical.py`` whose encoding it uses.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final, Literal

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat.canonical import canonicalize

HELLO: Final = "hello"
RESUME: Final = "resume"
TRANSCRIPT: Final = "transcript"
CONTEXTS: dict[str, bytes] = {
    HELLO: b"jointstat hello v1\x00",
    RESUME: b"jointstat resume v1\x00",
    TRANSCRIPT: b"jointstat transcript v1\x00",
}
DIGEST_BYTES = 32
MAX_SESSION_CHARS = 128
SIGNATURE_BYTES = 64

StatementKind = Literal["hello", "resume", "transcript"]


@dataclass(frozen=True)
class Statement:
    """What a node signs: the kind of statement, the session (as text) and a 32-byte digest."""

    kind: StatementKind
    session: str
    digest: bytes

    def __post_init__(self) -> None:
        if self.kind not in CONTEXTS:
            raise ValueError(f"statement kind must be one of {', '.join(CONTEXTS)}, got {self.kind!r}")
        if not isinstance(self.session, str) or not 1 <= len(self.session) <= MAX_SESSION_CHARS:
            raise ValueError(f"statement session must be 1 to {MAX_SESSION_CHARS} characters of text")
        if not isinstance(self.digest, bytes) or len(self.digest) != DIGEST_BYTES:
            raise ValueError(f"statement digest must be {DIGEST_BYTES} bytes (a SHA-256 digest)")

    def message(self) -> bytes:
        """The exact bytes signed (see the module docstring)."""
        return CONTEXTS[self.kind] + canonicalize({"session": self.session, self.kind: self.digest.hex()})


def session_text(session_id: bytes) -> str:
    """How a protocol session id (bytes) appears in statements and in the session log: lower-case hex."""
    return bytes(session_id).hex()


def sign(key: Ed25519PrivateKey, statement: Statement) -> bytes:
    """``key``'s 64-byte Ed25519 signature over ``statement``."""
    return key.sign(statement.message())


def signature_ok(key: Ed25519PublicKey, statement: Statement, signature: bytes) -> bool:
    """Whether ``signature`` is ``key``'s signature over ``statement``."""
    if not isinstance(signature, bytes | bytearray) or len(signature) != SIGNATURE_BYTES:
        return False
    try:
        key.verify(bytes(signature), statement.message())
    except InvalidSignature:
        return False
    return True


def sign_transcript(key: Ed25519PrivateKey, session_id: str, digest: bytes) -> bytes:
    """This node's signature over the transcript statement of ``session_id`` and ``digest``."""
    return sign(key, Statement(TRANSCRIPT, session_id, digest))


def transcript_signature_ok(key: Ed25519PublicKey, session_id: str, digest: bytes, signature: bytes) -> bool:
    """Whether ``signature`` is ``key``'s signature over the transcript statement (False for malformed input)."""
    try:
        statement = Statement(TRANSCRIPT, session_id, digest)
    except ValueError:
        return False
    return signature_ok(key, statement, signature)


__all__ = [
    "CONTEXTS",
    "HELLO",
    "RESUME",
    "TRANSCRIPT",
    "Statement",
    "session_text",
    "sign",
    "sign_transcript",
    "signature_ok",
    "transcript_signature_ok",
]
