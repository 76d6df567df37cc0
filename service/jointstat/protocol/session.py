"""The two-party session as sans-I/O state machines: a garbler session and an evaluator session.

Theory of operation
-------------------
Yao's protocol (semi-honest) with half-gates garbling (Zahur–Rosulek–Evans, Eurocrypt 2015), free-XOR and
point-and-permute, the evaluator's input labels obtained by correlated OT extension (IKNP, Crypto 2003, in the
correlated form of Asharov–Lindell–Schneider–Zohner, CCS 2013) on Chou–Orlandi base OTs (Latincrypt 2015). A
session object never touches a socket, a clock or a thread: it takes frames in (``receive(bytes)``) and gives
frames out (the returned list, as wire bytes). The transport only moves the bytes.

Flow (G garbler, E evaluator; every arrow is one or more frames, see ``proto/jointstat/v1/session.proto``):

1. Both send ``hello`` at ``start()``, signed with the node's Ed25519 key (the ``hello`` statement of
   ``jointstat.statements``). Each checks the peer's protocol version, role and session id, then the signature
   against the key it has configured for the peer (so an impostor, even one holding a TLS certificate the
   transport accepted, is refused before any OT and before any decoding information moves), then the manifest
   and circuit digests; any difference aborts before anything secret moves.
2. OT: E → G ``base_ot`` (point A), G → E ``base_ot`` (128 points), then E → G ``ot_extension`` columns and
   G → E ``ot_extension`` corrections, batch by batch (E keeps a bounded window of batches in flight). G ends with
   the zero labels K of E's input wires, E with K ⊕ x·Δ for its input bits x.
3. G builds the garbling from Δ and K, then *streams*: the labels of the constants and of its own input bits
   (``garbler_input_labels``), then the garbled tables (``garbled_tables``) chunk by chunk as ``produce()``
   garbles them. E evaluates every chunk as it arrives, so neither side holds all tables.
4. E returns the labels of G's output wires (``garbler_output_labels``); G checks each is one of its two valid
   labels (else it aborts) and decodes them. G then sends the decoding bits and check tags of E's outputs only
   (``evaluator_output_decoding``); E checks every tag and decodes.
5. Each side sends ``finish`` with its transcript digest (``frames.Transcript``) and its signature over it (the
   ``transcript`` statement), and checks the peer's: same digest, valid signature. Only then is the output
   released (``outputs``).

Any error — an unexpected frame, a malformed one, an OT or output check that fails, a local failure reported by
``fail()`` — moves the session to ``failed``, raises ``ProtocolError`` whose ``frame`` is the abort frame for the
peer, and releases no output. A peer's ``abort`` moves the session to ``failed`` likewise.

Progress: ``and_gates_total`` is the circuit's AND gate count and ``and_gates_done`` how many of them the garbler
has garbled and handed out, or the evaluator has evaluated (tables of 32 bytes per AND gate; XOR and NOT gates cost
nothing), for a node to show how far a session is.

Threads: the transport may run ``GarblerSession.produce()`` (the garbling) in a worker thread while it passes
incoming frames to ``receive`` from another; a lock makes each step atomic, and the state moves past
``streaming`` before the last streamed frame is handed out, so the evaluator's reply can never find the garbler
still in ``streaming``.

States and transitions (the two ``TABLE`` dictionaries below are the single source; every (state, event) pair
not listed raises ``ProtocolError`` naming the state and the frame; ``abort`` from the peer is accepted in every
state before ``done``/``failed`` and leads to ``failed``)

| session   | state                    | event                       | sends                               | next |
|-----------|--------------------------|-----------------------------|-------------------------------------|------|
| garbler   | new                      | start()                     | hello                               | awaiting hello |
| garbler   | awaiting hello           | hello                       | —                                   | base OT; streaming if E has no inputs |
| garbler   | base OT                  | base_ot (A)                 | base_ot (128 points)                | OT extension |
| garbler   | OT extension             | ot_extension (columns)      | ot_extension (corrections)          | OT extension; streaming after the last batch |
| garbler   | streaming                | tables sent (from produce)  | input labels and tables (produce)   | awaiting output labels; awaiting finish if G has no outputs (then also decoding, finish) |
| garbler   | awaiting output labels   | garbler_output_labels       | when all arrived: decoding, finish  | awaiting output labels; awaiting finish |
| garbler   | awaiting finish          | finish                      | —                                   | done |
| evaluator | new                      | start()                     | hello                               | awaiting hello |
| evaluator | awaiting hello           | hello                       | base_ot (A)                         | base OT; awaiting input labels if E has no inputs |
| evaluator | base OT                  | base_ot (128 points)        | ot_extension (first window)         | OT extension |
| evaluator | OT extension             | ot_extension (corrections)  | ot_extension (next batch, if any)   | OT extension; awaiting input labels after the last |
| evaluator | awaiting input labels    | garbler_input_labels        | —                                   | awaiting input labels; evaluating (or as after the last table if no AND gates) |
| evaluator | evaluating               | garbled_tables              | after the last: garbler_output_labels | evaluating; awaiting decoding; awaiting finish if E has no outputs (then also finish) |
| evaluator | awaiting decoding        | evaluator_output_decoding   | when all arrived: finish            | awaiting decoding; awaiting finish |
| evaluator | awaiting finish          | finish                      | —                                   | done |
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator, Mapping
from typing import ClassVar

import numpy as np

from jointstat.circuit.layers import LayeredCircuit
from jointstat.circuit.model import Party
from jointstat.garble.halfgates import (
    DEFAULT_CHUNK_BYTES,
    TABLE_BYTES,
    Evaluator,
    GarbleError,
    Garbler,
    OutputDecoding,
    fresh_delta,
)
from jointstat.ot import (
    BASE_OT_RECEIVER_POINTS,
    BASE_OT_SENDER_POINT,
    EXTENSION_COLUMNS,
    EXTENSION_CORRECTIONS,
    CorrelatedOTReceiver,
    CorrelatedOTSender,
    OTError,
    OTMessage,
)
from jointstat.primitives.blocks import BLOCK_BYTES, BLOCK_DTYPE
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortInfo, AbortReason, ProtocolError, Transcript
from jointstat.statements import HELLO, TRANSCRIPT, Statement, session_text
from jointstat.transport.wire.jointstat.v1 import session_pb2 as pb

# ``sign(statement) -> signature`` with this node's key; ``verify(signature, statement)`` against the peer's key
# (``protocol.signing`` builds both from keys; the node plugs in its own, which also logs the transcript).
Sign = Callable[[Statement], bytes]
Verify = Callable[[bytes, Statement], bool]

START = "start()"
TABLES_SENT = "tables sent"

NEW = "new"
AWAITING_HELLO = "awaiting hello"
BASE_OT = "base OT"
OT_EXTENSION = "OT extension"
STREAMING = "streaming"
AWAITING_OUTPUT_LABELS = "awaiting output labels"
AWAITING_INPUT_LABELS = "awaiting input labels"
EVALUATING = "evaluating"
AWAITING_DECODING = "awaiting decoding"
AWAITING_FINISH = "awaiting finish"
DONE = "done"
FAILED = "failed"

Transition = tuple[str, tuple[str, ...]]


def _with_abort(table: dict[tuple[str, str], Transition]) -> dict[tuple[str, str], Transition]:
    """The table plus, for every state it names, the peer's ``abort`` leading to ``failed``."""
    states = {state for state, _ in table} | {s for _, nexts in table.values() for s in nexts}
    states -= {DONE, FAILED}
    return {**table, **{(state, fr.ABORT): ("_on_abort", (FAILED,)) for state in sorted(states)}}


GARBLER_TABLE: Mapping[tuple[str, str], Transition] = _with_abort(
    {
        (NEW, START): ("_on_start", (AWAITING_HELLO,)),
        (AWAITING_HELLO, fr.HELLO): ("_on_hello", (BASE_OT, STREAMING)),
        (BASE_OT, fr.BASE_OT): ("_on_base_ot", (OT_EXTENSION,)),
        (OT_EXTENSION, fr.OT_EXTENSION): ("_on_ot_extension", (OT_EXTENSION, STREAMING)),
        (STREAMING, TABLES_SENT): ("_on_tables_sent", (AWAITING_OUTPUT_LABELS, AWAITING_FINISH)),
        (AWAITING_OUTPUT_LABELS, fr.GARBLER_OUTPUT_LABELS): (
            "_on_output_labels",
            (AWAITING_OUTPUT_LABELS, AWAITING_FINISH),
        ),
        (AWAITING_FINISH, fr.FINISH): ("_on_finish", (DONE,)),
    }
)

EVALUATOR_TABLE: Mapping[tuple[str, str], Transition] = _with_abort(
    {
        (NEW, START): ("_on_start", (AWAITING_HELLO,)),
        (AWAITING_HELLO, fr.HELLO): ("_on_hello", (BASE_OT, AWAITING_INPUT_LABELS)),
        (BASE_OT, fr.BASE_OT): ("_on_base_ot", (OT_EXTENSION,)),
        (OT_EXTENSION, fr.OT_EXTENSION): ("_on_ot_extension", (OT_EXTENSION, AWAITING_INPUT_LABELS)),
        (AWAITING_INPUT_LABELS, fr.GARBLER_INPUT_LABELS): (
            "_on_input_labels",
            (AWAITING_INPUT_LABELS, EVALUATING, AWAITING_DECODING, AWAITING_FINISH),
        ),
        (EVALUATING, fr.GARBLED_TABLES): ("_on_tables", (EVALUATING, AWAITING_DECODING, AWAITING_FINISH)),
        (AWAITING_DECODING, fr.EVALUATOR_OUTPUT_DECODING): (
            "_on_decoding",
            (AWAITING_DECODING, AWAITING_FINISH),
        ),
        (AWAITING_FINISH, fr.FINISH): ("_on_finish", (DONE,)),
    }
)

Handler = Callable[[pb.Frame | None], tuple[str, list[bytes]]]


class NoOutputError(RuntimeError):
    """Asked for the output of a session that has not completed (it is released only in ``done``)."""


class _Accumulator:
    """Collects a payload of known total size that arrives split over frames of one type."""

    def __init__(self, kind: str, total: int, unit: str) -> None:
        self.kind = kind
        self.total = total
        self.unit = unit
        self._buf = bytearray()

    @property
    def complete(self) -> bool:
        return len(self._buf) == self.total

    def add(self, payload: bytes) -> None:
        if not payload:
            raise ProtocolError(AbortReason.MALFORMED_FRAME, f"empty {self.kind} frame")
        if len(self._buf) + len(payload) > self.total:
            raise ProtocolError(
                AbortReason.MALFORMED_FRAME,
                f"{self.kind} frames carry more than the {self.total} bytes expected ({self.unit}): "
                f"{len(self._buf)} received before this frame of {len(payload)}",
            )
        self._buf += payload

    def take(self) -> bytes:
        data = bytes(self._buf)
        self._buf = bytearray()
        return data


def _check_inputs(layered: LayeredCircuit, party: Party, inputs: object) -> np.ndarray:
    bits = np.asarray(inputs)
    expected = layered.circuit.n_inputs(party)
    name = fr.role_name(party)
    if bits.ndim != 1 or bits.shape[0] != expected:
        raise ValueError(
            f"{name} inputs: expected {expected} bits in a one-dimensional array, got shape {bits.shape}"
        )
    if bits.size and not np.issubdtype(bits.dtype, np.integer) and bits.dtype != np.bool_:
        raise ValueError(f"{name} inputs: bits must be integers 0 or 1, got dtype {bits.dtype}")
    if bits.size and (int(bits.min()) < 0 or int(bits.max()) > 1):
        raise ValueError(f"{name} inputs: bits must be 0 or 1")
    return np.ascontiguousarray(bits, dtype=np.uint8)


class _Session:
    """What both sessions share: table dispatch, hello checks, transcript, finish, failure and output release."""

    PARTY: ClassVar[Party]
    TABLE: ClassVar[Mapping[tuple[str, str], Transition]]

    def __init__(
        self,
        *,
        session_id: bytes,
        layered: LayeredCircuit,
        manifest_digest: bytes,
        inputs: object,
        sign: Sign,
        verify: Verify,
    ) -> None:
        if not isinstance(layered, LayeredCircuit):
            raise ValueError(
                f"layered must be a LayeredCircuit (see circuit.layers.schedule), got {type(layered)}"
            )
        if not callable(sign) or not callable(verify):
            raise ValueError("sign and verify must be callables (see protocol.signing)")
        self.session_id = fr.check_session_id(session_id)
        self.manifest_digest = fr.check_digest(manifest_digest, "manifest digest")
        self.layered = layered
        self.circuit_digest = layered.circuit.digest()
        self._inputs = _check_inputs(layered, self.PARTY, inputs)
        self._sign = sign
        self._verify = verify
        self._lock = threading.RLock()
        self._state = NEW
        self._transcript = Transcript(self.PARTY, self.session_id)
        self._result: np.ndarray | None = None  # decoded, held back until the peer's finish verifies
        self._outputs: np.ndarray | None = None
        self._abort: AbortInfo | None = None
        self._digest: bytes | None = None
        self._peer_signature: bytes | None = None
        self._who = f"{fr.role_name(self.PARTY)} session"
        c = layered.circuit
        self._n_in = {p: c.n_inputs(p) for p in Party}
        self._n_out = {p: int(layered.output_slots[p].size) for p in Party}

    # -- public view ----------------------------------------------------------------------------------------------
    @property
    def party(self) -> Party:
        return self.PARTY

    @property
    def state(self) -> str:
        return self._state

    @property
    def done(self) -> bool:
        return self._state == DONE

    @property
    def failed(self) -> bool:
        return self._state == FAILED

    @property
    def ended(self) -> bool:
        return self._state in (DONE, FAILED)

    @property
    def abort(self) -> AbortInfo | None:
        """Why the session failed (None unless ``failed``)."""
        return self._abort

    @property
    def outputs(self) -> np.ndarray:
        """This side's own output bits (uint8), released only once the session is ``done``."""
        if self._state != DONE or self._outputs is None:
            raise NoOutputError(f"{self._who} in state {self._state!r}: no output is released before 'done'")
        return self._outputs

    @property
    def transcript_digest(self) -> bytes:
        """The transcript digest both sides signed (only once ``done``)."""
        if self._state != DONE or self._digest is None:
            raise NoOutputError(
                f"{self._who} in state {self._state!r}: the transcript is final only when 'done'"
            )
        return self._digest

    @property
    def peer_signature(self) -> bytes:
        """The peer's verified signature over the transcript digest (only once ``done``)."""
        if self._state != DONE or self._peer_signature is None:
            raise NoOutputError(f"{self._who} in state {self._state!r}: no verified peer signature yet")
        return self._peer_signature

    @property
    def frames_sent(self) -> int:
        return self._transcript.frames_sent

    @property
    def and_gates_total(self) -> int:
        """AND gates in the circuit (each costs one 32-byte garbled table)."""
        return int(self.layered.n_and)

    @property
    def and_gates_done(self) -> int:
        """AND gates garbled and handed out (garbler) or evaluated (evaluator) so far."""
        return 0

    @property
    def frames_received(self) -> int:
        return self._transcript.frames_received

    # -- driving --------------------------------------------------------------------------------------------------
    def start(self) -> list[bytes]:
        """The frames this side sends first (its hello)."""
        with self._lock:
            return self._dispatch(START, None)

    def receive(self, data: bytes) -> list[bytes]:
        """Take one frame from the peer; returns the frames to send in reply (possibly none).

        Raises ``ProtocolError`` when the frame ends the session in failure; send its ``frame`` (if any) to the peer.
        After a peer's ``abort`` the session is ``failed`` and the list is empty.
        """
        with self._lock:
            if self.ended:
                raise ProtocolError(
                    AbortReason.UNEXPECTED_FRAME, f"{self._who} has ended ({self._state}); frame refused"
                )
            try:
                kind, frame = fr.decode(data)
            except ProtocolError as exc:
                raise self._failure(exc.reason, f"{self._who} in state {self._state!r}: {exc}") from None
            self._transcript.received(kind, bytes(data))
            return self._dispatch(kind, frame)

    def fail(self, reason: AbortReason, message: str) -> bytes | None:
        """End the session for a reason found outside it (deadline, lost connection, shutdown).

        Returns the abort frame to send to the peer, or None if the session had already ended.
        """
        with self._lock:
            if self.ended:
                return None
            return self._failure(reason, f"{self._who} in state {self._state!r}: {message}").frame

    # -- machinery --------------------------------------------------------------------------------------------------
    def _failure(self, reason: AbortReason, message: str) -> ProtocolError:
        self._state = FAILED
        self._abort = AbortInfo(reason=AbortReason(reason), message=message, by_peer=False)
        self._result = None
        self._release_engines()
        return ProtocolError(reason, message, fr.abort_frame(reason, message))

    def _release_engines(self) -> None:
        """Drop garbling, evaluation and OT state (overridden by each session)."""

    def _dispatch(self, event: str, frame: pb.Frame | None) -> list[bytes]:
        state = self._state
        if state in (DONE, FAILED):
            raise ProtocolError(
                AbortReason.UNEXPECTED_FRAME, f"{self._who} has ended ({state}); {event!r} refused"
            )
        transition = self.TABLE.get((state, event))
        if transition is None:
            accepted = sorted(ev for (st, ev) in self.TABLE if st == state and ev != fr.ABORT)
            what = f"{event} called" if event in (START, TABLES_SENT) else f"unexpected {event!r} frame"
            raise self._failure(
                AbortReason.UNEXPECTED_FRAME,
                f"{self._who} in state {state!r}: {what}; this state accepts {', '.join(accepted) or 'nothing'}",
            )
        handler_name, allowed = transition
        handler: Handler = getattr(self, handler_name)
        where = f"{self._who} in state {state!r}, {event!r}"
        try:
            next_state, replies = handler(frame)
        except ProtocolError as exc:
            if self._state == FAILED:
                raise
            raise self._failure(exc.reason, f"{where}: {exc}") from None
        except OTError as exc:
            raise self._failure(
                AbortReason.OT_FAILURE, f"{where}: oblivious transfer failed: {exc}"
            ) from None
        except GarbleError as exc:
            raise self._failure(AbortReason.INVALID_OUTPUT, f"{where}: {exc}") from None
        except Exception as exc:
            raise self._failure(
                AbortReason.INTERNAL, f"{where}: internal error ({type(exc).__name__})"
            ) from exc
        if next_state not in allowed:
            raise self._failure(
                AbortReason.INTERNAL, f"{where}: handler chose {next_state!r}, not in the table"
            )
        self._state = next_state
        return replies

    def _emit(self, kind: str, data: bytes) -> bytes:
        """Record an outgoing frame in the transcript and hand it out."""
        self._transcript.sent(kind, data)
        return data

    def _emit_payload(self, kind: str, payload: bytes) -> list[bytes]:
        return [self._emit(kind, f) for f in fr.chunked_frames(kind, payload)]

    def _signature(self, kind: str, digest: bytes) -> bytes:
        signature = self._sign(Statement(kind, session_text(self.session_id), digest))  # type: ignore[arg-type]
        if not isinstance(signature, bytes | bytearray):
            raise ProtocolError(
                AbortReason.INTERNAL, f"sign() returned {type(signature).__name__}, not bytes"
            )
        return bytes(signature)

    def _signature_ok(self, kind: str, signature: bytes, digest: bytes) -> bool:
        try:
            statement = Statement(kind, session_text(self.session_id), digest)  # type: ignore[arg-type]
            return self._verify(bytes(signature), statement) is True
        except Exception:
            return False

    def _on_start(self, _frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        hello = fr.hello_frame(
            party=self.PARTY,
            session_id=self.session_id,
            manifest_digest=self.manifest_digest,
            circuit_digest=self.circuit_digest,
            sign=lambda digest: self._signature(HELLO, digest),
        )
        return AWAITING_HELLO, [self._emit(fr.HELLO, hello)]

    def _check_hello(self, frame: pb.Frame) -> None:
        hello = frame.hello
        if hello.protocol_version != fr.PROTOCOL_VERSION:
            raise ProtocolError(
                AbortReason.PROTOCOL_VERSION,
                f"peer speaks protocol version {hello.protocol_version}, this node speaks {fr.PROTOCOL_VERSION}",
            )
        peer = Party.EVALUATOR if self.PARTY == Party.GARBLER else Party.GARBLER
        if hello.role != fr.role_to_wire(peer):
            claimed = pb.Role.Name(hello.role) if hello.role in pb.Role.values() else str(hello.role)
            raise ProtocolError(
                AbortReason.SESSION_MISMATCH, f"peer claims role {claimed}; expected the {fr.role_name(peer)}"
            )
        if hello.session_id != self.session_id:
            raise ProtocolError(AbortReason.SESSION_MISMATCH, "peer's hello names another session id")
        # Before the digests are compared and anything else moves: the hello must be signed by the key configured for
        # the peer (the version, role and session id checked above are public and only ever end the session).
        if not self._signature_ok(HELLO, bytes(hello.signature), fr.hello_digest_of(hello)):
            raise ProtocolError(
                AbortReason.BAD_SIGNATURE,
                "the peer's hello is not signed by the signing key configured for the peer "
                f"({'no signature' if not hello.signature else 'the signature does not verify'}): "
                "it is not the peer it claims to be, or the two nodes have different keys configured",
            )
        if hello.manifest_digest != self.manifest_digest:
            raise ProtocolError(
                AbortReason.MANIFEST_MISMATCH,
                f"manifest digests differ (this node {self.manifest_digest.hex()[:16]}…, "
                f"peer {bytes(hello.manifest_digest).hex()[:16]}…)",
            )
        if hello.circuit_digest != self.circuit_digest:
            raise ProtocolError(
                AbortReason.MANIFEST_MISMATCH,
                f"compiled circuit digests differ (this node {self.circuit_digest.hex()[:16]}…, "
                f"peer {bytes(hello.circuit_digest).hex()[:16]}…): the nodes compile the manifest differently",
            )

    def _finish_frame(self) -> bytes:
        digest = self._transcript.digest()
        signature = self._signature(TRANSCRIPT, digest)
        self._digest = digest
        return self._emit(fr.FINISH, fr.finish_frame(digest, signature))

    def _on_finish(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._digest is not None
        finish = frame.finish
        if bytes(finish.transcript_digest) != self._digest:
            raise ProtocolError(
                AbortReason.TRANSCRIPT_MISMATCH,
                "the peer's transcript digest differs from this node's: the two sides saw different frames",
            )
        if not self._signature_ok(TRANSCRIPT, bytes(finish.signature), self._digest):
            raise ProtocolError(
                AbortReason.BAD_SIGNATURE, "the peer's signature over the transcript does not verify"
            )
        self._peer_signature = bytes(finish.signature)
        self._outputs = self._result
        self._result = None
        return DONE, []

    def _on_abort(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None
        self._abort = fr.abort_of(frame)
        self._result = None
        self._release_engines()
        return FAILED, []


class GarblerSession(_Session):
    """The garbler's side of one session: fresh Δ and labels, garbled tables streamed by ``produce()``.

    ``inputs`` are the garbler's input bits (in the circuit's garbler input order). After ``done``, ``outputs``
    holds the garbler's output bits. ``chunk_bytes`` bounds the tables per frame (a multiple of 32 bytes).
    """

    PARTY = Party.GARBLER
    TABLE = GARBLER_TABLE

    def __init__(
        self,
        *,
        session_id: bytes,
        layered: LayeredCircuit,
        manifest_digest: bytes,
        inputs: object,
        sign: Sign,
        verify: Verify,
        chunk_bytes: int = DEFAULT_CHUNK_BYTES,
    ) -> None:
        if not isinstance(chunk_bytes, int) or not TABLE_BYTES <= chunk_bytes <= fr.MAX_PAYLOAD_BYTES:
            raise ValueError(f"chunk_bytes must be an integer from {TABLE_BYTES} to {fr.MAX_PAYLOAD_BYTES}")
        super().__init__(
            session_id=session_id,
            layered=layered,
            manifest_digest=manifest_digest,
            inputs=inputs,
            sign=sign,
            verify=verify,
        )
        self._chunk_bytes = chunk_bytes - chunk_bytes % TABLE_BYTES
        self._delta: np.ndarray | None = None
        self._ot: CorrelatedOTSender | None = None
        self._engine: Garbler | None = None
        self._producing = False
        self._tables_out = 0
        self._returned = _Accumulator(
            fr.GARBLER_OUTPUT_LABELS, BLOCK_BYTES * self._n_out[Party.GARBLER], "16 bytes per garbler output"
        )

    @property
    def and_gates_done(self) -> int:
        return self._tables_out

    @property
    def ready_to_stream(self) -> bool:
        """True once OT is done and ``produce()`` should be run (once)."""
        return self._state == STREAMING and not self._producing

    def _release_engines(self) -> None:
        self._ot = None
        self._engine = None
        self._delta = None

    def _ot_frames(self, messages: list[OTMessage]) -> list[bytes]:
        out = []
        for m in messages:
            kind = fr.BASE_OT if m.kind == BASE_OT_RECEIVER_POINTS else fr.OT_EXTENSION
            if m.kind not in (BASE_OT_RECEIVER_POINTS, EXTENSION_CORRECTIONS):
                raise ProtocolError(AbortReason.INTERNAL, f"OT sender produced a {m.kind!r} message")
            out.append(self._emit(kind, fr.payload_frame(kind, m.payload)))
        return out

    def _on_hello(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None
        self._check_hello(frame)
        self._delta = fresh_delta()
        self._ot = CorrelatedOTSender(self.session_id, self._delta, self._n_in[Party.EVALUATOR])
        replies = self._ot_frames(self._ot.start())
        if self._ot.done:
            self._build_garbling()
            return STREAMING, replies
        return BASE_OT, replies

    def _on_base_ot(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._ot is not None
        replies = self._ot.receive(OTMessage(BASE_OT_SENDER_POINT, fr.payload_of(fr.BASE_OT, frame)))
        return OT_EXTENSION, self._ot_frames(replies)

    def _on_ot_extension(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._ot is not None
        replies = self._ot_frames(
            self._ot.receive(OTMessage(EXTENSION_COLUMNS, fr.payload_of(fr.OT_EXTENSION, frame)))
        )
        if self._ot.done:
            self._build_garbling()
            return STREAMING, replies
        return OT_EXTENSION, replies

    def _build_garbling(self) -> None:
        assert self._ot is not None and self._delta is not None
        zero = self._ot.zero_labels if self._n_in[Party.EVALUATOR] else None
        self._engine = Garbler(self.layered, delta=self._delta, evaluator_zero_labels=zero)
        self._ot = None

    def produce(self) -> Iterator[bytes]:
        """The streamed frames: the garbler's input labels, then the garbled tables, garbled as they are pulled.

        Valid once, in state ``streaming``. Safe to run in a worker thread while ``receive`` runs in another; if
        the session fails meanwhile, the iterator stops. The state leaves ``streaming`` before the last frame is
        handed out (and, when the garbler has no outputs, the decoding and finish frames follow).
        """
        with self._lock:
            if self._state != STREAMING or self._producing or self._engine is None:
                raise ProtocolError(
                    AbortReason.INTERNAL,
                    f"{self._who} in state {self._state!r}: produce() is valid once, in streaming",
                )
            self._producing = True
            engine = self._engine
        payloads = self._payloads(engine)
        current = next(payloads)
        while current is not None:
            # Pull the next chunk first: it garbles outside the lock, and it finishes the trailing linear layers
            # (which fix the output labels) before the state may leave 'streaming'.
            upcoming = next(payloads, None)
            with self._lock:
                if self._state != STREAMING:
                    return
                kind, payload = current
                data = self._emit(kind, fr.payload_frame(kind, payload))
                if kind == fr.GARBLED_TABLES:
                    self._tables_out += len(payload) // TABLE_BYTES
                extra = self._dispatch(TABLES_SENT, None) if upcoming is None else []
            yield data
            yield from extra
            current = upcoming

    def _payloads(self, engine: Garbler) -> Iterator[tuple[str, bytes]]:
        labels = np.concatenate([engine.constant_labels(), engine.input_labels(Party.GARBLER, self._inputs)])
        raw = labels.astype(BLOCK_DTYPE, copy=False).tobytes()
        for i in range(0, len(raw), fr.MAX_PAYLOAD_BYTES):
            yield fr.GARBLER_INPUT_LABELS, raw[i : i + fr.MAX_PAYLOAD_BYTES]
        for chunk in engine.tables(self._chunk_bytes):
            yield fr.GARBLED_TABLES, chunk

    def _on_tables_sent(self, _frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        if self._n_out[Party.GARBLER] == 0:
            self._result = np.zeros(0, dtype=np.uint8)
            return AWAITING_FINISH, self._decoding_and_finish()
        return AWAITING_OUTPUT_LABELS, []

    def _on_output_labels(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._engine is not None
        self._returned.add(fr.payload_of(fr.GARBLER_OUTPUT_LABELS, frame))
        if not self._returned.complete:
            return AWAITING_OUTPUT_LABELS, []
        labels = np.frombuffer(self._returned.take(), dtype=BLOCK_DTYPE).reshape(-1, 2)
        self._result = self._engine.decode_returned(Party.GARBLER, labels)
        return AWAITING_FINISH, self._decoding_and_finish()

    def _decoding_and_finish(self) -> list[bytes]:
        assert self._engine is not None
        decoding = self._engine.output_decoding(Party.EVALUATOR).to_bytes()
        self._engine = None
        self._delta = None
        out = self._emit_payload(fr.EVALUATOR_OUTPUT_DECODING, decoding)
        out.append(self._finish_frame())
        return out


class EvaluatorSession(_Session):
    """The evaluator's side of one session: OT for its input labels, evaluation of the table stream.

    ``inputs`` are the evaluator's input bits (its choice bits in OT). After ``done``, ``outputs`` holds the
    evaluator's output bits.
    """

    PARTY = Party.EVALUATOR
    TABLE = EVALUATOR_TABLE

    def __init__(
        self,
        *,
        session_id: bytes,
        layered: LayeredCircuit,
        manifest_digest: bytes,
        inputs: object,
        sign: Sign,
        verify: Verify,
    ) -> None:
        super().__init__(
            session_id=session_id,
            layered=layered,
            manifest_digest=manifest_digest,
            inputs=inputs,
            sign=sign,
            verify=verify,
        )
        self._ot: CorrelatedOTReceiver | None = None
        self._own_labels: np.ndarray | None = None
        self._engine: Evaluator | None = None
        self._table_bytes_left = TABLE_BYTES * layered.n_and
        self._given = _Accumulator(
            fr.GARBLER_INPUT_LABELS,
            BLOCK_BYTES * (2 + self._n_in[Party.GARBLER]),
            "16 bytes for each constant and each garbler input",
        )
        n = self._n_out[Party.EVALUATOR]
        self._decoding = _Accumulator(
            fr.EVALUATOR_OUTPUT_DECODING,
            (n + 7) // 8 + 16 * n,
            "packed decoding bits and two 8-byte tags per output",
        )

    @property
    def and_gates_done(self) -> int:
        return (TABLE_BYTES * self.layered.n_and - self._table_bytes_left) // TABLE_BYTES

    def _release_engines(self) -> None:
        self._ot = None
        self._own_labels = None
        self._engine = None

    def _ot_frames(self, messages: list[OTMessage]) -> list[bytes]:
        out = []
        for m in messages:
            if m.kind not in (BASE_OT_SENDER_POINT, EXTENSION_COLUMNS):
                raise ProtocolError(AbortReason.INTERNAL, f"OT receiver produced a {m.kind!r} message")
            kind = fr.BASE_OT if m.kind == BASE_OT_SENDER_POINT else fr.OT_EXTENSION
            out.append(self._emit(kind, fr.payload_frame(kind, m.payload)))
        return out

    def _on_hello(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None
        self._check_hello(frame)
        self._ot = CorrelatedOTReceiver(self.session_id, self._inputs)
        replies = self._ot_frames(self._ot.start())
        if self._ot.done:
            self._own_labels = np.empty((0, 2), dtype=BLOCK_DTYPE)
            self._ot = None
            return AWAITING_INPUT_LABELS, replies
        return BASE_OT, replies

    def _on_base_ot(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._ot is not None
        replies = self._ot.receive(OTMessage(BASE_OT_RECEIVER_POINTS, fr.payload_of(fr.BASE_OT, frame)))
        return OT_EXTENSION, self._ot_frames(replies)

    def _on_ot_extension(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._ot is not None
        replies = self._ot_frames(
            self._ot.receive(OTMessage(EXTENSION_CORRECTIONS, fr.payload_of(fr.OT_EXTENSION, frame)))
        )
        if self._ot.done:
            self._own_labels = self._ot.labels
            self._ot = None
            return AWAITING_INPUT_LABELS, replies
        return OT_EXTENSION, replies

    def _on_input_labels(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._own_labels is not None
        self._given.add(fr.payload_of(fr.GARBLER_INPUT_LABELS, frame))
        if not self._given.complete:
            return AWAITING_INPUT_LABELS, []
        given = np.frombuffer(self._given.take(), dtype=BLOCK_DTYPE).reshape(-1, 2)
        self._engine = Evaluator(
            self.layered,
            constant_labels=given[:2],
            garbler_labels=given[2:],
            evaluator_labels=self._own_labels,
        )
        self._own_labels = None
        if self._engine.done:
            return self._after_tables()
        return EVALUATING, []

    def _on_tables(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._engine is not None
        tables = fr.payload_of(fr.GARBLED_TABLES, frame)
        if not tables or len(tables) % TABLE_BYTES:
            raise ProtocolError(
                AbortReason.MALFORMED_FRAME,
                f"garbled_tables frame of {len(tables)} bytes is not a positive whole number of "
                f"{TABLE_BYTES}-byte tables",
            )
        if len(tables) > self._table_bytes_left:
            raise ProtocolError(
                AbortReason.MALFORMED_FRAME,
                f"garbled_tables frame of {len(tables)} bytes exceeds the {self._table_bytes_left} bytes of tables "
                "the circuit still needs",
            )
        self._engine.feed(tables)
        self._table_bytes_left -= len(tables)
        if self._table_bytes_left == 0:
            return self._after_tables()
        return EVALUATING, []

    def _after_tables(self) -> tuple[str, list[bytes]]:
        assert self._engine is not None
        returned = self._engine.output_labels(Party.GARBLER).astype(BLOCK_DTYPE, copy=False).tobytes()
        out = self._emit_payload(fr.GARBLER_OUTPUT_LABELS, returned)
        if self._decoding.total == 0:
            self._result = np.zeros(0, dtype=np.uint8)
            self._engine = None
            out.append(self._finish_frame())
            return AWAITING_FINISH, out
        return AWAITING_DECODING, out

    def _on_decoding(self, frame: pb.Frame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._engine is not None
        self._decoding.add(fr.payload_of(fr.EVALUATOR_OUTPUT_DECODING, frame))
        if not self._decoding.complete:
            return AWAITING_DECODING, []
        decoding = OutputDecoding.from_bytes(self._decoding.take(), self._n_out[Party.EVALUATOR])
        self._result = self._engine.decode(decoding)
        self._engine = None
        return AWAITING_FINISH, [self._finish_frame()]


Session = GarblerSession | EvaluatorSession


def new_session(
    party: Party,
    *,
    session_id: bytes,
    layered: LayeredCircuit,
    manifest_digest: bytes,
    inputs: object,
    sign: Sign,
    verify: Verify,
    chunk_bytes: int = DEFAULT_CHUNK_BYTES,
) -> Session:
    """A session for ``party`` with the given circuit, digest and own inputs (``chunk_bytes``: garbler only)."""
    common = {
        "session_id": session_id,
        "layered": layered,
        "manifest_digest": manifest_digest,
        "inputs": inputs,
        "sign": sign,
        "verify": verify,
    }
    if Party(party) == Party.GARBLER:
        return GarblerSession(chunk_bytes=chunk_bytes, **common)  # type: ignore[arg-type]
    return EvaluatorSession(**common)  # type: ignore[arg-type]
