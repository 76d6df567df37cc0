"""What a session-log record may contain, and the rules a log's records follow in order.

Theory of operation: a record is one canonical-JSON object (RFC 8785) on one line::

    {"body":{...},"kind":"...","prev":"<hex SHA-256>","seq":N,"session":"<id>"|null,"sig":"<base64>","time":"..."}

``prev`` is the SHA-256 (FIPS 180-4) of the previous line's exact bytes (without its newline); the first record's
``prev`` is :data:`GENESIS` (64 zeros). ``sig`` is an Ed25519 signature (RFC 8032) by the node's signing key over
``RECORD_CONTEXT`` followed by the canonical bytes of the record without ``sig``. Chaining every record to its
predecessor in the manner of RFC 6962's hash chains means no record can be changed, dropped, reordered or
inserted without breaking every later link; the signatures say who wrote it. ``log_opened`` and ``checkpoint``
records belong to no session (``session`` is null); a checkpoint states the size and head of the chain before it
(what it catches and what it does not: ``audit.verify``).

Bodies are pydantic models, one per record kind, strict and closed (no extra fields, no coercion): the writer can
only pass the whitelisted, typed fields below, which carry identifiers, digests, timings, byte counts and
signatures — never an input value, a wire label, Δ or a result value. Free text (an abort's ``detail``) is
bounded and refused when it contains something that looks like key material (a long hex or base64 token).

The session rules (:class:`SessionRules`) are shared by the writer, which refuses to break them, and the verifier,
which reports a log that does: a session starts once; phases may follow; one ``transcript`` record (the node's own
digest and its signature over it); then one ``peer_attestation`` (the peer's signature over the same digest, from
the finish frame); then ``session_completed``. ``session_aborted`` may end a session at any point before that.
``link_event`` records — a cut of the session's connection, a resume, a refused resume attempt — may come anywhere
while the session is open: a resumed session is one session with one transcript, and its cuts and resumes are
recorded inside it. A session of a job with a privacy budget also records its spend, anywhere while it is open:
``privacy_budget`` ``reserved`` (once, before anything can be released), then at most one ``spent`` (the result was
released) or ``returned`` (nothing was), of the same ε. Nothing follows a session's end.

The transcript statement both nodes sign (and send in their finish frames) is defined once, in
``jointstat.statements``, which the protocol and this package both use (``statements.sign_transcript`` and
``statements.transcript_signature_ok``).
"""

from __future__ import annotations

import base64
import binascii
import re
from dataclasses import dataclass, field
from datetime import UTC, datetime
from enum import StrEnum
from typing import Annotated, Any, Final, Literal

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey
from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat
from pydantic import BaseModel, ConfigDict, Field, StringConstraints, ValidationError, field_validator

from jointstat.canonical import MAX_SAFE_INTEGER, canonicalize
from jointstat.statements import transcript_signature_ok

FORMAT: Final = "jointstat-audit/1"
GENESIS = "0" * 64
CheckpointCause = Literal["opened", "session_ended", "closed", "recovered"]  # why a checkpoint was written
RECORD_CONTEXT = b"jointstat audit record v1\x00"
ENVELOPE_FIELDS = frozenset({"seq", "time", "kind", "session", "body", "prev", "sig"})
MAX_DETAIL = 300

NODE_NAME_PATTERN = r"^[a-z0-9](?:[a-z0-9-]{0,61}[a-z0-9])?(?:\.[a-z0-9](?:[a-z0-9-]{0,61}[a-z0-9])?)*$"
_NODE_NAME = re.compile(NODE_NAME_PATTERN)
_ID = r"^[A-Za-z0-9][A-Za-z0-9._:-]{0,127}$"
_SESSION_ID = re.compile(_ID)
_HEX32 = r"^[0-9a-f]{64}$"
_TIME = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}\.\d{6}Z$")
_HEXISH = re.compile(r"[0-9A-Fa-f]{32,}")
_B64ISH = re.compile(r"[A-Za-z0-9+/_=-]{20,}")


class AuditError(Exception):
    """A record that may not be written, or a log that may not be appended to; the message says why."""


class Kind(StrEnum):
    LOG_OPENED = "log_opened"
    SESSION_STARTED = "session_started"
    PHASE_FINISHED = "phase_finished"
    TRANSCRIPT = "transcript"
    PEER_ATTESTATION = "peer_attestation"
    SESSION_COMPLETED = "session_completed"
    SESSION_ABORTED = "session_aborted"
    LINK_EVENT = "link_event"
    CHECKPOINT = "checkpoint"
    PRIVACY_BUDGET = "privacy_budget"


NodeName = Annotated[str, StringConstraints(pattern=NODE_NAME_PATTERN, max_length=63)]
Identifier = Annotated[str, StringConstraints(pattern=_ID)]
Word = Annotated[str, StringConstraints(pattern=r"^[a-z][a-z0-9_]{0,63}$")]
HexDigest = Annotated[str, StringConstraints(pattern=_HEX32)]
Count = Annotated[int, Field(ge=0, le=MAX_SAFE_INTEGER)]
PublicKeyText = Annotated[str, StringConstraints(pattern=r"^[A-Za-z0-9+/]{43}=$")]
SignatureText = Annotated[str, StringConstraints(pattern=r"^[A-Za-z0-9+/]{86}==$")]


def plain_detail(text: str) -> str:
    """A message fit for a ``session_aborted`` record's ``detail``: one line, long hex or base64-like tokens (which
    could be key material or a label) replaced by ``…``, at most ``MAX_DETAIL`` characters."""
    line = " ".join(str(text).split())
    line = _HEXISH.sub("…", line)
    line = _B64ISH.sub("…", line)
    return line[:MAX_DETAIL]


def _looks_like_key_material(text: str) -> bool:
    if _HEXISH.search(text):
        return True
    for token in _B64ISH.findall(text):
        if (
            any(c.isdigit() for c in token)
            and any(c.isupper() for c in token)
            and any(c.islower() for c in token)
        ):
            return True
    return False


class RecordBody(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)


class LogOpened(RecordBody):
    format: Literal["jointstat-audit/1"]
    node: NodeName
    public_key: PublicKeyText


class SessionStarted(RecordBody):
    job: Identifier
    manifest_digest: HexDigest
    role: Literal["garbler", "evaluator"]
    peer: NodeName
    peer_key: PublicKeyText | None
    peer_certificate: HexDigest | None


class PhaseFinished(RecordBody):
    phase: Word
    duration_us: Count
    bytes_sent: Count
    bytes_received: Count


class Transcript(RecordBody):
    digest: HexDigest
    signature: SignatureText


class PeerAttestation(RecordBody):
    signature: SignatureText


class SessionCompleted(RecordBody):
    duration_us: Count


def _check_plain_detail(detail: str) -> str:
    if any(ord(c) < 0x20 for c in detail):
        raise ValueError("control characters are not allowed")
    if _looks_like_key_material(detail):
        raise ValueError(
            "contains a long hex or base64 token, which could be key material or a label; "
            "write a fixed message and put digests in their own fields"
        )
    return detail


class LinkEventRecord(RecordBody):
    """A cut of the session's connection, a resume on a new one, or a resume attempt refused or failed
    (``transport.driver.LinkEvent``): when (microseconds since the session started), the logical frames this node
    had sent and taken then, and how."""

    event: Literal["cut", "resumed", "resume_refused", "resume_attempt_failed"]
    at_us: Count
    frames_sent: Count
    frames_received: Count
    detail: Annotated[str, StringConstraints(max_length=MAX_DETAIL)]

    @field_validator("detail")
    @classmethod
    def _plain_detail(cls, detail: str) -> str:
        return _check_plain_detail(detail)


class SessionAborted(RecordBody):
    reason: Word
    by: Literal["self", "peer"]
    phase: Word | None
    detail: Annotated[str, StringConstraints(max_length=MAX_DETAIL)]

    @field_validator("detail")
    @classmethod
    def _plain_detail(cls, detail: str) -> str:
        return _check_plain_detail(detail)


class PrivacyBudget(RecordBody):
    """A session's spend of its job's privacy budget: ``reserved`` before anything can be released, then ``spent``
    (the result was released: the ε counts for one period from the record's time) or ``returned`` (nothing was
    released: the ε is given back). ``epsilon`` is the run's ε as exact decimal text (``0.5``), or ``p/q``."""

    epsilon: Annotated[str, StringConstraints(pattern=r"^(\d{1,30}(\.\d{1,30})?|\d{1,30}/\d{1,30})$")]
    action: Literal["reserved", "spent", "returned"]


class Checkpoint(RecordBody):
    """The writer's signed statement of the chain so far: ``records`` before this one, ``head`` the SHA-256 of the
    last of them (the size and root of RFC 6962's signed tree head, for a hash chain), sessions open, and why."""

    records: Count
    head: HexDigest
    open_sessions: Count
    cause: CheckpointCause


BODIES: dict[Kind, type[RecordBody]] = {
    Kind.LOG_OPENED: LogOpened,
    Kind.SESSION_STARTED: SessionStarted,
    Kind.PHASE_FINISHED: PhaseFinished,
    Kind.TRANSCRIPT: Transcript,
    Kind.PEER_ATTESTATION: PeerAttestation,
    Kind.SESSION_COMPLETED: SessionCompleted,
    Kind.SESSION_ABORTED: SessionAborted,
    Kind.LINK_EVENT: LinkEventRecord,
    Kind.CHECKPOINT: Checkpoint,
    Kind.PRIVACY_BUDGET: PrivacyBudget,
}


def describe_validation(exc: ValidationError) -> str:
    """Field names and rule violated, never the offending value (it might be a secret passed by mistake)."""
    parts = []
    for err in exc.errors(include_url=False, include_context=False, include_input=False):
        where = ".".join(str(p) for p in err["loc"]) or "body"
        parts.append(f"{where}: {err['msg']}")
    return "; ".join(parts)


def validate_body(kind: Kind, body: Any) -> RecordBody:
    """The typed body of a record of ``kind``; ``AuditError`` names the field and rule that failed."""
    try:
        return BODIES[kind].model_validate(body)
    except ValidationError as exc:
        raise AuditError(f"{kind.value} body: {describe_validation(exc)}") from None


def format_time(t: datetime) -> str:
    """RFC 3339 UTC with microseconds, e.g. ``2025-03-01T02:00:00.000000Z``; naive datetimes are refused."""
    if t.tzinfo is None or t.utcoffset() is None:
        raise AuditError("clock returned a datetime without a time zone; audit times are UTC")
    return t.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def time_ok(text: str) -> bool:
    if not _TIME.match(text):
        return False
    try:
        datetime.strptime(text, "%Y-%m-%dT%H:%M:%S.%fZ")
    except ValueError:
        return False
    return True


def session_id_ok(text: str) -> bool:
    return bool(_SESSION_ID.match(text))


def node_name_ok(text: str) -> bool:
    return len(text) <= 63 and bool(_NODE_NAME.match(text))


def encode_b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def decode_b64(text: str, length: int) -> bytes | None:
    """Strict base64: the only accepted spelling of ``length`` bytes, else ``None`` (no malleable padding bits)."""
    try:
        raw = base64.b64decode(text, validate=True)
    except (binascii.Error, ValueError):
        return None
    if len(raw) != length or encode_b64(raw) != text:
        return None
    return raw


def raw_public_key(key: Ed25519PublicKey | Ed25519PrivateKey) -> bytes:
    """The 32-byte RFC 8032 encoding of an Ed25519 public key (of a private key's public half)."""
    if isinstance(key, Ed25519PrivateKey):
        key = key.public_key()
    return key.public_bytes(Encoding.Raw, PublicFormat.Raw)


def public_key_text(key: Ed25519PublicKey | Ed25519PrivateKey) -> str:
    """How a public key appears in a log: base64 of its 32 raw bytes."""
    return encode_b64(raw_public_key(key))


def public_key_from_text(text: str) -> Ed25519PublicKey | None:
    raw = decode_b64(text, 32)
    if raw is None:
        return None
    try:
        return Ed25519PublicKey.from_public_bytes(raw)
    except ValueError:
        return None


def signing_input(record_without_sig: dict[str, Any]) -> bytes:
    return RECORD_CONTEXT + canonicalize(record_without_sig)


@dataclass
class SessionState:
    """What a log says about one session so far."""

    session_id: str
    line: int
    job: str
    manifest_digest: str
    role: str
    peer: str
    peer_key: str | None
    peer_certificate: str | None
    phases: list[dict[str, Any]] = field(default_factory=list)
    digest: str | None = None
    own_signature: str | None = None
    peer_signature: str | None = None
    outcome: str = "open"
    reason: str | None = None
    aborted_by: str | None = None
    budget: str | None = None  # the last privacy_budget action of the session, if any
    epsilon: str | None = None
    cuts: int = 0  # link_event records of cuts and resumes (a resumed session is still one session)
    resumes: int = 0

    def to_dict(self) -> dict[str, Any]:
        return {
            "session": self.session_id,
            "line": self.line,
            "job": self.job,
            "manifest_digest": self.manifest_digest,
            "role": self.role,
            "peer": self.peer,
            "transcript": self.digest,
            "outcome": self.outcome,
            "reason": self.reason,
            "aborted_by": self.aborted_by,
            "privacy_budget": self.budget,
            "epsilon": self.epsilon,
            "cuts": self.cuts,
            "resumes": self.resumes,
        }


class SessionRules:
    """The per-session order of records; :meth:`apply` raises ``AuditError`` naming the rule a record breaks."""

    def __init__(self) -> None:
        self.sessions: dict[str, SessionState] = {}

    def copy(self) -> SessionRules:
        twin = SessionRules()
        twin.sessions = {
            k: SessionState(**{**v.__dict__, "phases": list(v.phases)}) for k, v in self.sessions.items()
        }
        return twin

    def open_sessions(self) -> list[str]:
        return [s.session_id for s in self.sessions.values() if s.outcome == "open"]

    def _open(self, session_id: str, kind: Kind) -> SessionState:
        state = self.sessions.get(session_id)
        if state is None:
            raise AuditError(f"{kind.value} for session {session_id}, which was never started")
        if state.outcome != "open":
            raise AuditError(f"{kind.value} for session {session_id}, which already {state.outcome}")
        return state

    def check(self, kind: Kind, session_id: str, body: RecordBody, node_key: Ed25519PublicKey) -> None:
        """Raise ``AuditError`` if the record would break a rule; change nothing."""
        self._apply(kind, session_id, body, node_key, line=0, commit=False)

    def apply(
        self, kind: Kind, session_id: str, body: RecordBody, node_key: Ed25519PublicKey, line: int
    ) -> None:
        self._apply(kind, session_id, body, node_key, line=line, commit=True)

    def _apply(
        self,
        kind: Kind,
        session_id: str,
        body: RecordBody,
        node_key: Ed25519PublicKey,
        *,
        line: int,
        commit: bool,
    ) -> None:
        if kind is Kind.SESSION_STARTED:
            assert isinstance(body, SessionStarted)
            if session_id in self.sessions:
                raise AuditError(
                    f"session {session_id} was already started (line {self.sessions[session_id].line})"
                )
            if commit:
                self.sessions[session_id] = SessionState(
                    session_id=session_id,
                    line=line,
                    job=body.job,
                    manifest_digest=body.manifest_digest,
                    role=body.role,
                    peer=body.peer,
                    peer_key=body.peer_key,
                    peer_certificate=body.peer_certificate,
                )
            return
        state = self._open(session_id, kind)
        if kind is Kind.PHASE_FINISHED:
            assert isinstance(body, PhaseFinished)
            if commit:
                state.phases.append(body.model_dump())
        elif kind is Kind.LINK_EVENT:
            assert isinstance(body, LinkEventRecord)
            if commit and body.event == "cut":
                state.cuts += 1
            elif commit and body.event == "resumed":
                state.resumes += 1
        elif kind is Kind.TRANSCRIPT:
            assert isinstance(body, Transcript)
            if state.digest is not None:
                raise AuditError(f"session {session_id} already has a transcript record")
            signature = decode_b64(body.signature, 64)
            digest = bytes.fromhex(body.digest)
            if signature is None or not transcript_signature_ok(node_key, session_id, digest, signature):
                raise AuditError(f"session {session_id}: the node's own transcript signature does not verify")
            if commit:
                state.digest, state.own_signature = body.digest, body.signature
        elif kind is Kind.PEER_ATTESTATION:
            assert isinstance(body, PeerAttestation)
            if state.digest is None:
                raise AuditError(f"peer_attestation for session {session_id} before its transcript record")
            if state.peer_signature is not None:
                raise AuditError(f"session {session_id} already has a peer_attestation record")
            if state.peer_key is not None:
                peer_key = public_key_from_text(state.peer_key)
                signature = decode_b64(body.signature, 64)
                if (
                    peer_key is None
                    or signature is None
                    or not transcript_signature_ok(
                        peer_key, session_id, bytes.fromhex(state.digest), signature
                    )
                ):
                    raise AuditError(
                        f"session {session_id}: the peer's transcript signature does not verify under its key"
                    )
            if commit:
                state.peer_signature = body.signature
        elif kind is Kind.PRIVACY_BUDGET:
            assert isinstance(body, PrivacyBudget)
            if body.action == "reserved":
                if state.budget is not None:
                    raise AuditError(f"session {session_id} already reserved its privacy budget")
            else:
                if state.budget != "reserved":
                    raise AuditError(
                        f"privacy_budget {body.action} for session {session_id} without an open reservation"
                    )
                if body.epsilon != state.epsilon:
                    raise AuditError(
                        f"session {session_id}: privacy_budget {body.action} of another ε than reserved"
                    )
            if commit:
                state.budget, state.epsilon = body.action, body.epsilon
        elif kind is Kind.SESSION_COMPLETED:
            if state.peer_signature is None:
                raise AuditError(f"session {session_id} completed without the peer's attestation")
            if commit:
                state.outcome = "completed"
        elif kind is Kind.SESSION_ABORTED:
            assert isinstance(body, SessionAborted)
            if commit:
                state.outcome, state.reason, state.aborted_by = "aborted", body.reason, body.by
        else:
            raise AuditError(f"{kind.value} records do not belong to a session")
