"""Frames of the session stream: encoding, decoding, size limits, abort reasons and the transcript digest.

Theory of operation
-------------------
A frame is one ``jointstat.v1.Frame`` protobuf message (``proto/jointstat/v1/session.proto``) whose ``body`` oneof
names its type. Sessions exchange frames as their serialised bytes: the transcript is computed over exactly the
bytes that cross the wire, so both sides hash the same thing whatever protobuf library either one runs. No frame
is larger than ``MAX_FRAME_BYTES`` (4 MiB); a payload larger than ``MAX_PAYLOAD_BYTES`` is split over consecutive
frames of one type, each carrying the next bytes.

Garbled tables are nearly all the bytes of a session, so their frames skip the protobuf library in both
directions: ``payload_frame`` writes the protobuf encoding of ``Frame{garbled_tables{tables: payload}}`` directly
(field 5, length-delimited, holding field 1, length-delimited: two tags and two varint lengths, then the payload —
the encoding the protobuf library itself produces for that message, see the protobuf encoding guide), and
``decode`` recognises exactly that layout and hands out a view of the payload inside the received bytes, with no
copy. Any other layout goes through the protobuf library as before.

Logical frames and the transcript (protocol version 4). A session's *logical frames* are every frame but
``tables_ack``, ``resume`` and ``abort``; each direction numbers its logical frames 0, 1, 2… from the hello on.
Acknowledgements (``tables_ack``: "I have taken your first n logical frames"), resume frames and aborts are about
the connection, not the computation: they are not numbered, never resent, and not hashed. After a cut each side
resends, byte for byte, its logical frames from the number the peer's ``resume`` names, so each logical frame is
taken by the receiver exactly once however often the connection was cut, and both sides hash the same sequence.

Transcript: each side keeps two running SHA-256 hashes (FIPS 180-4), one per direction, over every logical frame
except ``finish`` (so over hello, the OT frames, the input labels, the tables, the output labels and the decoding),
each frame hashed once — when it is first sent and when it is taken — as its 8-byte little-endian length followed
by its bytes; a resent frame is not hashed again. A gRPC stream keeps each direction in order but the
interleaving of the two directions is seen differently at the two ends, so the digest is taken per direction and
combined as SHA-256("jointstat transcript v1" ‖ len(sid) ‖ sid ‖ H(garbler → evaluator) ‖ H(evaluator → garbler)).
Both sides therefore compute the same 32 bytes exactly when they sent and took the same logical frames in the same
order, whether or not the session was resumed: a resumed session is one session with one transcript.

Resume: the resume statement (``jointstat.statements``) signs ``resume_digest`` = SHA-256("jointstat resume v1" ‖
version ‖ role ‖ attempt ‖ frames received (8 bytes) ‖ anchor ‖ len(sid) ‖ sid), numbers 4 bytes big-endian unless
said, where the *anchor* is the transcript digest through the oblivious transfer: taken by each side when its OT
ends (the garbler after sending the last corrections, the evaluator after taking them), it covers the same frames
on both sides — the hellos and every OT frame — and a session resumes only after that point, so both sides hold it.

Hello: each side signs its hello (since protocol version 2). The signed digest is
SHA-256("jointstat hello v1" ‖ version ‖ role ‖ len(sid) ‖ sid ‖ len(m) ‖ m ‖ len(c) ‖ c), with m and c the
manifest and circuit digests and every number 4 bytes big-endian — every field but the signature, each of fixed
size or length-prefixed — and the signature is over the ``hello`` statement of ``jointstat.statements`` for it.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass
from enum import IntEnum
from typing import Any, Union, cast

from google.protobuf.message import DecodeError

from jointstat.circuit.model import Party
from jointstat.wire.jointstat.v1 import session_pb2 as pb

# 2: hellos are signed; 3: programs instead of circuit lists (program digest, no constants); 4: acknowledgements,
# a replay buffer and resume after a cut
PROTOCOL_VERSION = 4
MAX_FRAME_BYTES = 4 * 1024 * 1024
MAX_PAYLOAD_BYTES = MAX_FRAME_BYTES - 64  # room for the frame's field tags and length prefixes
MAX_SESSION_ID_BYTES = 64
DIGEST_BYTES = 32
MAX_MESSAGE_CHARS = 1000  # abort messages are cut to this length

HELLO = "hello"
BASE_OT = "base_ot"
OT_EXTENSION = "ot_extension"
GARBLER_INPUT_LABELS = "garbler_input_labels"
GARBLED_TABLES = "garbled_tables"
GARBLER_OUTPUT_LABELS = "garbler_output_labels"
EVALUATOR_OUTPUT_DECODING = "evaluator_output_decoding"
FINISH = "finish"
ABORT = "abort"
TABLES_ACK = "tables_ack"
RESUME = "resume"

FRAME_TYPES = (
    HELLO,
    BASE_OT,
    OT_EXTENSION,
    GARBLER_INPUT_LABELS,
    GARBLED_TABLES,
    GARBLER_OUTPUT_LABELS,
    EVALUATOR_OUTPUT_DECODING,
    FINISH,
    ABORT,
    TABLES_ACK,
    RESUME,
)
# The bytes field of each payload-carrying frame type.
PAYLOAD_FIELD = {
    BASE_OT: "payload",
    OT_EXTENSION: "payload",
    GARBLER_INPUT_LABELS: "labels",
    GARBLED_TABLES: "tables",
    GARBLER_OUTPUT_LABELS: "labels",
    EVALUATOR_OUTPUT_DECODING: "decoding",
}
UNNUMBERED = frozenset({TABLES_ACK, RESUME, ABORT})  # not logical frames: never numbered, resent or hashed
_UNHASHED = UNNUMBERED | {FINISH}
_TABLES_TAG = (5 << 3) | 2  # Frame.garbled_tables, length-delimited
_TABLES_FIELD_TAG = (1 << 3) | 2  # GarbledTables.tables, length-delimited


@dataclass(frozen=True)
class TablesFrame:
    """A garbled_tables frame decoded without the protobuf library: ``payload`` is a view into the received bytes."""

    payload: memoryview


AnyFrame = Union[pb.Frame, TablesFrame]  # noqa: UP007  (a runtime alias)


def _varint(n: int) -> bytes:
    out = bytearray()
    while True:
        byte = n & 0x7F
        n >>= 7
        if n:
            out.append(byte | 0x80)
        else:
            out.append(byte)
            return bytes(out)


def _read_varint(data: memoryview, at: int) -> tuple[int, int]:
    """(value, next position) of the varint at ``at``; (-1, at) if it is cut off or longer than 5 bytes."""
    value = shift = 0
    for i in range(at, min(at + 5, len(data))):
        byte = data[i]
        value |= (byte & 0x7F) << shift
        if not byte & 0x80:
            return value, i + 1
        shift += 7
    return -1, at


def _tables_header(n: int) -> bytes:
    inner = bytes([_TABLES_FIELD_TAG]) + _varint(n)
    return bytes([_TABLES_TAG]) + _varint(len(inner) + n) + inner


def _tables_payload(data: memoryview) -> memoryview | None:
    """The payload of a garbled_tables frame in exactly the layout ``payload_frame`` writes, else None."""
    if len(data) < 4 or data[0] != _TABLES_TAG:
        return None
    outer, at = _read_varint(data, 1)
    if outer != len(data) - at or at >= len(data) or data[at] != _TABLES_FIELD_TAG:
        return None
    inner, start = _read_varint(data, at + 1)
    if inner <= 0 or inner != len(data) - start:
        return None
    return data[start:]


_TRANSCRIPT_LABEL = b"jointstat transcript v1"
_HELLO_LABEL = b"jointstat hello v1"
_RESUME_LABEL = b"jointstat resume v1"


class AbortReason(IntEnum):
    """Why a session ended without output; the values are those of ``jointstat.v1.AbortReason``."""

    UNSPECIFIED = pb.ABORT_REASON_UNSPECIFIED
    PROTOCOL_VERSION = pb.ABORT_REASON_PROTOCOL_VERSION
    MANIFEST_MISMATCH = pb.ABORT_REASON_MANIFEST_MISMATCH
    SESSION_MISMATCH = pb.ABORT_REASON_SESSION_MISMATCH
    SESSION_REFUSED = pb.ABORT_REASON_SESSION_REFUSED
    UNEXPECTED_FRAME = pb.ABORT_REASON_UNEXPECTED_FRAME
    MALFORMED_FRAME = pb.ABORT_REASON_MALFORMED_FRAME
    OT_FAILURE = pb.ABORT_REASON_OT_FAILURE
    INVALID_OUTPUT = pb.ABORT_REASON_INVALID_OUTPUT
    TRANSCRIPT_MISMATCH = pb.ABORT_REASON_TRANSCRIPT_MISMATCH
    BAD_SIGNATURE = pb.ABORT_REASON_BAD_SIGNATURE
    DEADLINE = pb.ABORT_REASON_DEADLINE
    CANCELLED = pb.ABORT_REASON_CANCELLED
    CONNECTION_LOST = pb.ABORT_REASON_CONNECTION_LOST
    INTERNAL = pb.ABORT_REASON_INTERNAL
    PEER_SHUTDOWN = pb.ABORT_REASON_PEER_SHUTDOWN
    RESUME_REFUSED = pb.ABORT_REASON_RESUME_REFUSED


def role_to_wire(party: Party) -> pb.Role:
    return pb.ROLE_GARBLER if Party(party) == Party.GARBLER else pb.ROLE_EVALUATOR


class ProtocolError(ValueError):
    """The session cannot go on: ``reason`` says why, the text says where (state, frame) and what.

    ``frame`` is the abort frame to send to the peer (None when the peer aborted or the session had already
    ended). The text never contains labels, Δ, keys or input values.
    """

    def __init__(self, reason: AbortReason, message: str, frame: bytes | None = None) -> None:
        super().__init__(message)
        self.reason = AbortReason(reason)
        self.frame = frame


@dataclass(frozen=True)
class AbortInfo:
    """How a session ended without output: the reason, the message, and whether the peer sent the abort."""

    reason: AbortReason
    message: str
    by_peer: bool


def encode(frame: pb.Frame) -> bytes:
    """The wire bytes of ``frame``; raises ``ProtocolError`` if they exceed ``MAX_FRAME_BYTES``."""
    data = frame.SerializeToString()
    if len(data) > MAX_FRAME_BYTES:
        raise ProtocolError(
            AbortReason.INTERNAL,
            f"outgoing {frame.WhichOneof('body')} frame of {len(data)} bytes exceeds {MAX_FRAME_BYTES}",
        )
    return data


def decode(data: bytes | bytearray | memoryview) -> tuple[str, AnyFrame]:
    """Parse one frame: ``(type, frame)``; raises ``ProtocolError`` (malformed frame) naming the problem."""
    if not isinstance(data, bytes | bytearray | memoryview):
        raise ProtocolError(AbortReason.MALFORMED_FRAME, f"a frame must be bytes, got {type(data).__name__}")
    if len(data) > MAX_FRAME_BYTES:
        raise ProtocolError(
            AbortReason.MALFORMED_FRAME,
            f"frame of {len(data)} bytes exceeds the limit of {MAX_FRAME_BYTES} bytes",
        )
    fast = _tables_payload(memoryview(data).cast("B"))
    if fast is not None:
        return GARBLED_TABLES, TablesFrame(fast)
    frame = pb.Frame()
    try:
        frame.ParseFromString(bytes(data))
    except DecodeError as exc:
        raise ProtocolError(
            AbortReason.MALFORMED_FRAME, f"frame of {len(data)} bytes is not a jointstat.v1.Frame ({exc})"
        ) from None
    kind = frame.WhichOneof("body")
    if kind is None:
        raise ProtocolError(
            AbortReason.MALFORMED_FRAME,
            f"frame of {len(data)} bytes has no body of a known type (unknown frame type)",
        )
    return kind, frame


def payload_frame(kind: str, payload: bytes | memoryview) -> bytes:
    """The wire bytes of a payload-carrying frame of type ``kind``."""
    if kind == GARBLED_TABLES and len(payload):
        header = _tables_header(len(payload))
        if len(header) + len(payload) > MAX_FRAME_BYTES:
            raise ProtocolError(
                AbortReason.INTERNAL,
                f"outgoing garbled_tables frame of {len(payload)} bytes exceeds the limit",
            )
        return b"".join((header, payload))
    frame = pb.Frame()
    setattr(getattr(frame, kind), PAYLOAD_FIELD[kind], bytes(payload))
    return encode(frame)


def payload_of(kind: str, frame: AnyFrame) -> bytes | memoryview:
    if isinstance(frame, TablesFrame):
        return frame.payload
    return getattr(getattr(frame, kind), PAYLOAD_FIELD[kind])


def chunked_frames(kind: str, payload: bytes, chunk: int = MAX_PAYLOAD_BYTES) -> list[bytes]:
    """``payload`` split into frames of type ``kind`` of at most ``chunk`` payload bytes (none if it is empty)."""
    return [payload_frame(kind, payload[i : i + chunk]) for i in range(0, len(payload), chunk)]


def hello_digest(
    *, version: int, role: int, session_id: bytes, manifest_digest: bytes, program_digest: bytes
) -> bytes:
    """The digest a hello's signature covers: every field of the hello but the signature (module docstring).

    ``role`` is the wire value (``pb.Role``). Each field has a fixed size or a length prefix, so two different
    hellos never share a digest.
    """
    h = hashlib.sha256(_HELLO_LABEL)
    h.update(int(version).to_bytes(4, "big"))
    h.update(int(role).to_bytes(4, "big", signed=True))
    for value in (session_id, manifest_digest, program_digest):
        h.update(len(value).to_bytes(4, "big"))
        h.update(bytes(value))
    return h.digest()


def hello_digest_of(hello: pb.Hello) -> bytes:
    """``hello_digest`` of a hello's own fields, as they came."""
    return hello_digest(
        version=hello.protocol_version,
        role=hello.role,
        session_id=bytes(hello.session_id),
        manifest_digest=bytes(hello.manifest_digest),
        program_digest=bytes(hello.program_digest),
    )


def hello_frame(
    *,
    party: Party,
    session_id: bytes,
    manifest_digest: bytes,
    program_digest: bytes,
    sign: Callable[[bytes], bytes] | None = None,
    version: int = PROTOCOL_VERSION,
) -> bytes:
    """A hello; ``sign(digest) -> signature`` signs its ``hello_digest`` (without it the hello is unsigned)."""
    frame = pb.Frame()
    frame.hello.protocol_version = version
    frame.hello.manifest_digest = manifest_digest
    frame.hello.session_id = session_id
    frame.hello.role = role_to_wire(party)
    frame.hello.program_digest = program_digest
    if sign is not None:
        frame.hello.signature = sign(hello_digest_of(frame.hello))
    return encode(frame)


def tables_ack_frame(frames: int) -> bytes:
    """An acknowledgement of the peer's first ``frames`` logical frames."""
    frame = pb.Frame()
    frame.tables_ack.frames = frames
    return encode(frame)


def resume_digest(
    *, version: int, role: int, session_id: bytes, attempt: int, frames_received: int, anchor: bytes
) -> bytes:
    """The digest a resume's signature covers (module docstring): its fields and the transcript through OT."""
    h = hashlib.sha256(_RESUME_LABEL)
    h.update(int(version).to_bytes(4, "big"))
    h.update(int(role).to_bytes(4, "big", signed=True))
    h.update(int(attempt).to_bytes(4, "big"))
    h.update(int(frames_received).to_bytes(8, "big"))
    h.update(bytes(anchor))
    h.update(len(session_id).to_bytes(4, "big"))
    h.update(bytes(session_id))
    return h.digest()


def resume_digest_of(resume: pb.Resume, anchor: bytes) -> bytes:
    """``resume_digest`` of a resume frame's own fields, with the anchor the checking side holds."""
    return resume_digest(
        version=resume.protocol_version,
        role=resume.role,
        session_id=bytes(resume.session_id),
        attempt=resume.attempt,
        frames_received=resume.frames_received,
        anchor=anchor,
    )


def resume_frame(
    *,
    party: Party,
    session_id: bytes,
    attempt: int,
    frames_received: int,
    anchor: bytes,
    sign: Callable[[bytes], bytes],
    version: int = PROTOCOL_VERSION,
) -> bytes:
    """A resume frame signed over its ``resume_digest`` by ``sign(digest) -> signature``."""
    frame = pb.Frame()
    r = frame.resume
    r.protocol_version = version
    r.session_id = session_id
    r.role = role_to_wire(party)
    r.attempt = attempt
    r.frames_received = frames_received
    r.signature = sign(resume_digest_of(r, anchor))
    return encode(frame)


def finish_frame(transcript_digest: bytes, signature: bytes) -> bytes:
    frame = pb.Frame()
    frame.finish.transcript_digest = transcript_digest
    frame.finish.signature = signature
    return encode(frame)


def abort_frame(reason: AbortReason, message: str) -> bytes:
    frame = pb.Frame()
    frame.abort.reason = cast("pb.AbortReason", int(reason))  # AbortReason's values are the wire enum's
    frame.abort.message = message[:MAX_MESSAGE_CHARS]
    return encode(frame)


def abort_of(frame: AnyFrame) -> AbortInfo:
    """The peer's abort as ``AbortInfo`` (an unknown reason code becomes ``UNSPECIFIED``)."""
    assert isinstance(frame, pb.Frame)
    code = frame.abort.reason
    reason = AbortReason(code) if code in AbortReason._value2member_map_ else AbortReason.UNSPECIFIED
    return AbortInfo(reason=reason, message=frame.abort.message[:MAX_MESSAGE_CHARS], by_peer=True)


def check_session_id(session_id: object) -> bytes:
    if not isinstance(session_id, bytes | bytearray):
        raise ValueError(f"session id must be bytes, got {type(session_id).__name__}")
    if not 1 <= len(session_id) <= MAX_SESSION_ID_BYTES:
        raise ValueError(f"session id must be 1 to {MAX_SESSION_ID_BYTES} bytes, got {len(session_id)}")
    return bytes(session_id)


def check_digest(digest: object, what: str) -> bytes:
    if not isinstance(digest, bytes | bytearray) or len(digest) != DIGEST_BYTES:
        raise ValueError(f"{what} must be {DIGEST_BYTES} bytes (a SHA-256 digest)")
    return bytes(digest)


class Transcript:
    """The running transcript of one session as seen by ``party`` (see the module docstring)."""

    def __init__(
        self, party: Party, session_id: bytes, hash_factory: Callable[[], Any] = hashlib.sha256
    ) -> None:
        self._party = Party(party)
        self._session_id = session_id
        self._sent = hash_factory()
        self._received = hash_factory()
        self.frames_sent = 0
        self.frames_received = 0
        self.logical_sent = 0  # logical frames (numbered, module docstring) sent for the first time
        self.logical_received = 0  # logical frames taken from the peer

    @staticmethod
    def _add(h: Any, data: bytes | memoryview) -> None:
        h.update(len(data).to_bytes(8, "little"))
        h.update(data)

    def sent(self, kind: str, data: bytes | memoryview) -> None:
        """A frame sent for the first time (a resent frame is not recorded again)."""
        self.frames_sent += 1
        if kind not in UNNUMBERED:
            self.logical_sent += 1
        if kind not in _UNHASHED:
            self._add(self._sent, data)

    def received(self, kind: str, data: bytes | memoryview) -> None:
        self.frames_received += 1
        if kind not in UNNUMBERED:
            self.logical_received += 1
        if kind not in _UNHASHED:
            self._add(self._received, data)

    def digest(self) -> bytes:
        if self._party == Party.GARBLER:
            g2e, e2g = self._sent.digest(), self._received.digest()
        else:
            g2e, e2g = self._received.digest(), self._sent.digest()
        h = hashlib.sha256(_TRANSCRIPT_LABEL)
        h.update(len(self._session_id).to_bytes(2, "big"))
        h.update(self._session_id)
        h.update(g2e)
        h.update(e2g)
        return h.digest()
