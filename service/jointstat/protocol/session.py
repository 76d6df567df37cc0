"""The two-party session as sans-I/O state machines: a garbler session and an evaluator session.

Theory of operation
-------------------
Yao's protocol (semi-honest) with half-gates garbling (Zahur–Rosulek–Evans, Eurocrypt 2015), free-XOR and
point-and-permute, the evaluator's input labels obtained by correlated OT extension (IKNP, Crypto 2003, in the
correlated form of Asharov–Lindell–Schneider–Zohner, CCS 2013) on Chou–Orlandi base OTs (Latincrypt 2015). Both
sides run the same *program* (``jointstat.circuit.program``) — the garbler against its garbling backend, the
evaluator against its evaluating backend — so the circuit is garbled and evaluated while the program runs and is
never written down (pipelined garbling, Huang–Evans–Katz–Malka, USENIX Security 2011). A session object never
touches a socket, a clock or a thread: it takes frames in (``receive(bytes)``) and gives frames out (the returned
list, as wire bytes). The transport only moves the bytes.

Flow (G garbler, E evaluator; every arrow is one or more frames, see ``proto/jointstat/v1/session.proto``):

1. Both send ``hello`` at ``start()``, signed with the node's Ed25519 key (the ``hello`` statement of
   ``jointstat.statements``). Each checks the peer's protocol version, role and session id, then the signature
   against the key it has configured for the peer (so an impostor, even one holding a TLS certificate the
   transport accepted, is refused before any OT and before any decoding information moves), then the manifest
   digest and the program digest (the structure digest of ``Program``); any difference aborts before anything
   secret moves.
2. OT: E → G ``base_ot`` (point A), G → E ``base_ot`` (128 points), then E → G ``ot_extension`` columns and
   G → E ``ot_extension`` corrections, batch by batch (E keeps a bounded window of batches in flight). G ends with
   the zero labels K of E's input wires, E with K ⊕ x·Δ for its input bits x.
3. G *streams*: the labels of its own input bits (``garbler_input_labels``), then the garbled tables
   (``garbled_tables``) chunk by chunk as ``produce()`` runs the program on the garbling backend from Δ, its own
   fresh input labels and the K of E's inputs. E, holding those labels and its own, runs the same program on the
   evaluating backend, which takes the tables as they arrive; neither side holds more than a chunk of tables.
   The program runs in a greenlet (``jointstat.garble.streams``) that pauses whenever a chunk is full (G) or the
   tables received so far are used up (E).
4. E returns the labels of G's output wires (``garbler_output_labels``); G checks each is one of its two valid
   labels (else it aborts) and decodes them. G then sends the decoding bits and check tags of E's outputs only
   (``evaluator_output_decoding``); E checks every tag and decodes.
5. Each side sends ``finish`` with its transcript digest (``frames.Transcript``) and its signature over it (the
   ``transcript`` statement), and checks the peer's: same digest, valid signature. Only then is the output
   released (``outputs``).

Any error — an unexpected frame, a malformed one, an OT or output check that fails, a local failure reported by
``fail()`` — moves the session to ``failed``, raises ``ProtocolError`` whose ``frame`` is the abort frame for the
peer, and releases no output. A peer's ``abort`` moves the session to ``failed`` likewise.

Progress: ``and_gates_total`` is the program's AND gate count and ``and_gates_done`` how many of them the garbler
has garbled, or the evaluator has evaluated (tables of 32 bytes per AND gate; XOR and NOT gates cost nothing), for
a node to show how far a session is.

Threads: none here. A session, and the greenlet its program runs in, must be driven from one thread at a time —
the same thread for its whole life (the transport gives each session one worker thread). The state moves past
``streaming`` before the last streamed frame is handed out, so the evaluator's reply can never find the garbler
still in ``streaming``. No lock either: the driver that owns the worker thread serialises the calls.

Randomness: every random draw — Δ and the garbler's input labels, the base-OT scalars of both sides and the
garbler's base-OT choice bits (the IKNP seeds follow from them) — comes from the ``random_bytes`` given to the
session, the operating system's CSPRNG by default. Replaying the bytes one run drew gives the same session byte for
byte (``tests/test_session_replay.py``): a recorded session is a test vector. A node never injects anything else.

States and transitions (the two ``TABLE`` dictionaries below are the single source, run by the table dispatch of
``jointstat.machine``, and ``tests/test_machine.py`` checks this table against them: "next" lists every state the
dictionary allows, a parenthesis says when; every (state, event) pair not listed raises ``ProtocolError`` naming the
state and the frame; ``abort`` from the peer is accepted in every state before ``done``/``failed`` and leads to
``failed``)

| session   | state                  | event                      | sends                                  | next |
|-----------|------------------------|----------------------------|----------------------------------------|------|
| garbler   | new                    | start()                    | hello                                  | awaiting hello |
| garbler   | awaiting hello         | hello                      | — (as after the OT when E has no inputs) | base OT, streaming, awaiting output labels, awaiting finish (the last three: E has no inputs, as after the OT) |
| garbler   | base OT                | base_ot (A)                | base_ot (128 points)                   | OT extension |
| garbler   | OT extension           | ot_extension (columns)     | ot_extension (corrections); after the last batch, when nothing is to be streamed, what tables sent sends | OT extension, streaming (after the last batch), awaiting output labels, awaiting finish (after the last batch when G has no inputs and the program no AND gates: nothing to stream, as after tables sent) |
| garbler   | streaming              | tables sent (from produce) | input labels and tables (produce); decoding and finish if G has no outputs | awaiting output labels, awaiting finish (G has no outputs) |
| garbler   | awaiting output labels | garbler_output_labels      | when all arrived: decoding, finish     | awaiting output labels, awaiting finish (all arrived) |
| garbler   | awaiting finish        | finish                     | —                                      | done |
| evaluator | new                    | start()                    | hello                                  | awaiting hello |
| evaluator | awaiting hello         | hello                      | base_ot (A)                            | base OT, awaiting input labels, evaluating, awaiting decoding, awaiting finish (all but base OT: E has no inputs, as after the OT) |
| evaluator | base OT                | base_ot (128 points)       | ot_extension (first window)            | OT extension |
| evaluator | OT extension           | ot_extension (corrections) | ot_extension (next batch, if any)      | OT extension, awaiting input labels, evaluating, awaiting decoding, awaiting finish (after the last batch; the last three when G has no inputs, as after the input labels) |
| evaluator | awaiting input labels  | garbler_input_labels       | — (after the last: runs the program)   | awaiting input labels, evaluating, awaiting decoding, awaiting finish (the last two when the program has no AND gates, as after the last table) |
| evaluator | evaluating             | garbled_tables             | after the last: garbler_output_labels; finish if E has no outputs | evaluating, awaiting decoding, awaiting finish (E has no outputs) |
| evaluator | awaiting decoding      | evaluator_output_decoding  | when all arrived: finish               | awaiting decoding, awaiting finish (all arrived) |
| evaluator | awaiting finish        | finish                     | —                                      | done |
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator, Mapping
from typing import Any, ClassVar, NoReturn

import numpy as np

from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.garble.backends import DEFAULT_CHUNK_BYTES, EvaluatorBackend, GarblerBackend
from jointstat.garble.halfgates import TABLE_BYTES, GarbleError, fresh_delta
from jointstat.garble.outputs import OutputDecoding, decode, decode_returned, make_decoding
from jointstat.garble.streams import Sink, Source, TableConsumer, TableProducer
from jointstat.machine import DONE, FAILED, NEW, START, TableMachine, Transition
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
from jointstat.wire.jointstat.v1 import session_pb2 as pb

# ``sign(statement) -> signature`` with this node's key; ``verify(signature, statement)`` against the peer's key
# (``protocol.signing`` builds both from keys; the node plugs in its own, which also logs the transcript).
Sign = Callable[[Statement], bytes]
Verify = Callable[[bytes, Statement], bool]
RandomBytes = Callable[[int], bytes]

TABLES_SENT = "tables sent"

AWAITING_HELLO = "awaiting hello"
BASE_OT = "base OT"
OT_EXTENSION = "OT extension"
STREAMING = "streaming"
AWAITING_OUTPUT_LABELS = "awaiting output labels"
AWAITING_INPUT_LABELS = "awaiting input labels"
EVALUATING = "evaluating"
AWAITING_DECODING = "awaiting decoding"
AWAITING_FINISH = "awaiting finish"


def _with_abort(table: dict[tuple[str, str], Transition]) -> dict[tuple[str, str], Transition]:
    """The table plus, for every state it names, the peer's ``abort`` leading to ``failed``."""
    states = {state for state, _ in table} | {s for _, nexts in table.values() for s in nexts}
    states -= {DONE, FAILED}
    return {**table, **{(state, fr.ABORT): ("_on_abort", (FAILED,)) for state in sorted(states)}}


GARBLER_TABLE: Mapping[tuple[str, str], Transition] = _with_abort(
    {
        (NEW, START): ("_on_start", (AWAITING_HELLO,)),
        (AWAITING_HELLO, fr.HELLO): (
            "_on_hello",
            (BASE_OT, STREAMING, AWAITING_OUTPUT_LABELS, AWAITING_FINISH),
        ),
        (BASE_OT, fr.BASE_OT): ("_on_base_ot", (OT_EXTENSION,)),
        (OT_EXTENSION, fr.OT_EXTENSION): (
            "_on_ot_extension",
            (OT_EXTENSION, STREAMING, AWAITING_OUTPUT_LABELS, AWAITING_FINISH),
        ),
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
        (AWAITING_HELLO, fr.HELLO): (
            "_on_hello",
            (BASE_OT, AWAITING_INPUT_LABELS, EVALUATING, AWAITING_DECODING, AWAITING_FINISH),
        ),
        (BASE_OT, fr.BASE_OT): ("_on_base_ot", (OT_EXTENSION,)),
        (OT_EXTENSION, fr.OT_EXTENSION): (
            "_on_ot_extension",
            (OT_EXTENSION, AWAITING_INPUT_LABELS, EVALUATING, AWAITING_DECODING, AWAITING_FINISH),
        ),
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


# The OT message each OT frame carries, by the party that receives the frame: the evaluator is the sender of the
# Chou–Orlandi base OTs and the receiver of the IKNP extension, the garbler the other way round (``ot.messages``).
OT_MESSAGE_OF: Mapping[Party, Mapping[str, str]] = {
    Party.GARBLER: {fr.BASE_OT: BASE_OT_SENDER_POINT, fr.OT_EXTENSION: EXTENSION_COLUMNS},
    Party.EVALUATOR: {fr.BASE_OT: BASE_OT_RECEIVER_POINTS, fr.OT_EXTENSION: EXTENSION_CORRECTIONS},
}

CorrelatedOT = CorrelatedOTSender | CorrelatedOTReceiver


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


def _check_inputs(program: Program, party: Party, inputs: object) -> np.ndarray:
    bits = np.asarray(inputs)
    expected = program.n_inputs(party)
    name = Party(party).role_name
    if bits.ndim != 1 or bits.shape[0] != expected:
        raise ValueError(
            f"{name} inputs: expected {expected} bits in a one-dimensional array, got shape {bits.shape}"
        )
    if bits.size and not np.issubdtype(bits.dtype, np.integer) and bits.dtype != np.bool_:
        raise ValueError(f"{name} inputs: bits must be integers 0 or 1, got dtype {bits.dtype}")
    if bits.size and (int(bits.min()) < 0 or int(bits.max()) > 1):
        raise ValueError(f"{name} inputs: bits must be 0 or 1")
    return np.ascontiguousarray(bits, dtype=np.uint8)


class _Session(TableMachine[fr.AnyFrame | None, list[bytes]]):
    """What both sessions share: how they fail, hello checks, transcript, finish and output release.

    The table dispatch itself is ``jointstat.machine``'s; the hooks below make every failure a ``ProtocolError``
    carrying the abort frame for the peer.
    """

    PARTY: ClassVar[Party]
    PEER: ClassVar[Party]
    ENDED: ClassVar[frozenset[str]] = frozenset({DONE, FAILED})

    def __init__(
        self,
        *,
        session_id: bytes,
        program: Program,
        manifest_digest: bytes,
        inputs: object,
        sign: Sign,
        verify: Verify,
        random_bytes: RandomBytes = os.urandom,
    ) -> None:
        if not isinstance(program, Program):
            raise ValueError(f"program must be a Program (see circuit.program), got {type(program).__name__}")
        if not callable(sign) or not callable(verify):
            raise ValueError("sign and verify must be callables (see protocol.signing)")
        self.session_id = fr.check_session_id(session_id)
        self.manifest_digest = fr.check_digest(manifest_digest, "manifest digest")
        self.program = program
        self.program_digest = program.digest
        self._inputs = _check_inputs(program, self.PARTY, inputs)
        self._sign = sign
        self._verify = verify
        self._random_bytes = random_bytes
        super().__init__()
        self._transcript = Transcript(self.PARTY, self.session_id)
        self._ot: CorrelatedOT | None = None
        self._result: np.ndarray | None = None  # decoded, held back until the peer's finish verifies
        self._outputs: np.ndarray | None = None
        self._abort: AbortInfo | None = None
        self._digest: bytes | None = None
        self._peer_signature: bytes | None = None
        self._who = f"{self.PARTY.role_name} session"
        self._n_in = {p: program.n_inputs(p) for p in Party}
        self._n_out = {p: program.n_outputs(p) for p in Party}

    # -- public view ----------------------------------------------------------------------------------------------
    @property
    def party(self) -> Party:
        return self.PARTY

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
        """AND gates of the program (each costs one 32-byte garbled table)."""
        return self.program.size.and_gates

    @property
    def and_gates_done(self) -> int:
        """AND gates garbled and handed out (garbler) or evaluated (evaluator) so far."""
        return 0

    @property
    def frames_received(self) -> int:
        return self._transcript.frames_received

    # -- driving --------------------------------------------------------------------------------------------------
    def use_hash_factory(self, factory: Callable[[], Any]) -> None:
        """Hash the transcript with objects from ``factory`` (``update``/``digest``, SHA-256); before ``start``."""
        if self._state != NEW:
            raise ValueError(
                f"{self._who} in state {self._state!r}: the transcript hash is chosen before start()"
            )
        self._transcript = Transcript(self.PARTY, self.session_id, factory)

    def release(self) -> None:
        """Drop the engines (and stop a program paused in its greenlet) once the session has ended."""
        if self.ended:
            self._release_engines()

    def start(self) -> list[bytes]:
        """The frames this side sends first (its hello)."""
        return self._dispatch(START, None)

    def receive(self, data: bytes) -> list[bytes]:
        """Take one frame from the peer; returns the frames to send in reply (possibly none).

        Raises ``ProtocolError`` when the frame ends the session in failure; send its ``frame`` (if any) to the peer.
        After a peer's ``abort`` the session is ``failed`` and the list is empty.
        """
        if self.ended:
            raise ProtocolError(
                AbortReason.UNEXPECTED_FRAME, f"{self._who} has ended ({self._state}); frame refused"
            )
        try:
            kind, frame = fr.decode(data)
        except ProtocolError as exc:
            raise self._failure(exc.reason, f"{self._who} in state {self._state!r}: {exc}") from None
        self._transcript.received(kind, data)
        return self._dispatch(kind, frame)

    def fail(self, reason: AbortReason, message: str) -> bytes | None:
        """End the session for a reason found outside it (deadline, lost connection, shutdown).

        Returns the abort frame to send to the peer, or None if the session had already ended.
        """
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

    def _unexpected_note(self, event: str) -> str:
        """More about an unexpected frame, for its message (the evaluator's says where the table stream stood)."""
        return ""

    # -- how a session fails (jointstat.machine) ----------------------------------------------------------------------
    def _refuse_ended(self, state: str, event: str) -> Exception:
        return ProtocolError(
            AbortReason.UNEXPECTED_FRAME, f"{self._who} has ended ({state}); {event!r} refused"
        )

    def _refuse_unexpected(self, state: str, event: str) -> Exception:
        accepted = [ev for ev in self.accepted_events(state) if ev != fr.ABORT]
        what = f"{event} called" if event in (START, TABLES_SENT) else f"unexpected {event!r} frame"
        return self._failure(
            AbortReason.UNEXPECTED_FRAME,
            f"{self._who} in state {state!r}: {what}; this state accepts {', '.join(accepted) or 'nothing'}"
            + self._unexpected_note(event),
        )

    def _handler_failed(self, state: str, event: str, exc: Exception) -> NoReturn:
        where = f"{self._who} in state {state!r}, {event!r}"
        if isinstance(exc, ProtocolError):
            if self._state == FAILED:
                raise exc
            raise self._failure(exc.reason, f"{where}: {exc}") from None
        if isinstance(exc, OTError):
            raise self._failure(
                AbortReason.OT_FAILURE, f"{where}: oblivious transfer failed: {exc}"
            ) from None
        if isinstance(exc, GarbleError):
            reason = AbortReason.MALFORMED_FRAME if event == fr.GARBLED_TABLES else AbortReason.INVALID_OUTPUT
            raise self._failure(reason, f"{where}: {exc}") from None
        raise self._failure(AbortReason.INTERNAL, f"{where}: internal error ({type(exc).__name__})") from exc

    def _refuse_next(self, state: str, event: str, next_state: str) -> Exception:
        return self._failure(
            AbortReason.INTERNAL,
            f"{self._who} in state {state!r}, {event!r}: handler chose {next_state!r}, not in the table",
        )

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

    def _on_start(self, _frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        hello = fr.hello_frame(
            party=self.PARTY,
            session_id=self.session_id,
            manifest_digest=self.manifest_digest,
            program_digest=self.program_digest,
            sign=lambda digest: self._signature(HELLO, digest),
        )
        return AWAITING_HELLO, [self._emit(fr.HELLO, hello)]

    def _check_hello(self, frame: fr.AnyFrame) -> None:
        assert isinstance(frame, pb.Frame)
        hello = frame.hello
        if hello.protocol_version != fr.PROTOCOL_VERSION:
            raise ProtocolError(
                AbortReason.PROTOCOL_VERSION,
                f"peer speaks protocol version {hello.protocol_version}, this node speaks {fr.PROTOCOL_VERSION}",
            )
        peer = self.PEER
        if hello.role != fr.role_to_wire(peer):
            claimed = pb.Role.Name(hello.role) if hello.role in pb.Role.values() else str(hello.role)
            raise ProtocolError(
                AbortReason.SESSION_MISMATCH, f"peer claims role {claimed}; expected the {peer.role_name}"
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
        if hello.program_digest != self.program_digest:
            raise ProtocolError(
                AbortReason.MANIFEST_MISMATCH,
                f"program digests differ (this node {self.program_digest.hex()[:16]}…, "
                f"peer {bytes(hello.program_digest).hex()[:16]}…): the nodes run different programs for the"
                " manifest (different jointstat versions?)",
            )

    # -- oblivious transfer: the same plumbing on both sides ------------------------------------------------------------
    def _new_ot(self) -> CorrelatedOT:
        """This side's correlated OT party (overridden: the garbler's sender, the evaluator's receiver)."""
        raise NotImplementedError

    def _after_ot(self, ot: CorrelatedOT, replies: list[bytes]) -> tuple[str, list[bytes]]:
        """Take the labels of a finished OT; the next state and the frames to send (overridden)."""
        raise NotImplementedError

    def _on_hello(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None
        self._check_hello(frame)
        ot = self._ot = self._new_ot()
        return self._ot_replies(ot, ot.start(), BASE_OT)

    def _on_base_ot(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        return self._on_ot(fr.BASE_OT, frame)

    def _on_ot_extension(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        return self._on_ot(fr.OT_EXTENSION, frame)

    def _on_ot(self, kind: str, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._ot is not None
        message = OTMessage(OT_MESSAGE_OF[self.PARTY][kind], fr.payload_of(kind, frame))
        return self._ot_replies(self._ot, self._ot.receive(message), OT_EXTENSION)

    def _ot_replies(
        self, ot: CorrelatedOT, messages: list[OTMessage], next_state: str
    ) -> tuple[str, list[bytes]]:
        """The OT's messages as frames, and ``next_state`` — or, once the OT is done, what ``_after_ot`` says."""
        frame_of = {message: kind for kind, message in OT_MESSAGE_OF[self.PEER].items()}
        replies = []
        for m in messages:
            kind = frame_of.get(m.kind)
            if kind is None:
                raise ProtocolError(AbortReason.INTERNAL, f"the OT party produced a {m.kind!r} message")
            replies.append(self._emit(kind, fr.payload_frame(kind, m.payload)))
        if not ot.done:
            return next_state, replies
        self._ot = None
        return self._after_ot(ot, replies)

    def _finish_frame(self) -> bytes:
        digest = self._transcript.digest()
        signature = self._signature(TRANSCRIPT, digest)
        self._digest = digest
        return self._emit(fr.FINISH, fr.finish_frame(digest, signature))

    def _on_finish(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
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

    def _on_abort(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None
        self._abort = fr.abort_of(frame)
        self._result = None
        self._release_engines()
        return FAILED, []


class GarblerSession(_Session):
    """The garbler's side of one session: fresh Δ and labels, garbled tables streamed by ``produce()``.

    ``inputs`` are the garbler's input bits (in the program's garbler input order). After ``done``, ``outputs``
    holds the garbler's output bits. ``chunk_bytes`` bounds the tables per frame.
    """

    PARTY = Party.GARBLER
    PEER = Party.EVALUATOR
    TABLE = GARBLER_TABLE

    def __init__(
        self,
        *,
        session_id: bytes,
        program: Program,
        manifest_digest: bytes,
        inputs: object,
        sign: Sign,
        verify: Verify,
        random_bytes: RandomBytes = os.urandom,
        chunk_bytes: int = DEFAULT_CHUNK_BYTES,
    ) -> None:
        if not isinstance(chunk_bytes, int) or not TABLE_BYTES <= chunk_bytes <= fr.MAX_PAYLOAD_BYTES:
            raise ValueError(f"chunk_bytes must be an integer from {TABLE_BYTES} to {fr.MAX_PAYLOAD_BYTES}")
        super().__init__(
            session_id=session_id,
            program=program,
            manifest_digest=manifest_digest,
            inputs=inputs,
            sign=sign,
            verify=verify,
            random_bytes=random_bytes,
        )
        self._chunk_bytes = chunk_bytes
        self._delta: np.ndarray | None = None
        self._evaluator_zero: np.ndarray | None = None
        self._backend: GarblerBackend | None = None
        self._producer: TableProducer | None = None
        self._gates_garbled = 0  # once the program has ended (the backend is gone)
        self._producing = False
        self._output_zero: dict[Party, np.ndarray] | None = None
        self._returned = _Accumulator(
            fr.GARBLER_OUTPUT_LABELS, BLOCK_BYTES * self._n_out[Party.GARBLER], "16 bytes per garbler output"
        )

    @property
    def and_gates_done(self) -> int:
        backend = self._backend
        return self._gates_garbled if backend is None else backend.next_gate

    @property
    def ready_to_stream(self) -> bool:
        """True once OT is done and ``produce()`` should be run (once)."""
        return self._state == STREAMING and not self._producing

    def _release_engines(self) -> None:
        self._ot = None
        if self._backend is not None:  # how far the program got, for the progress of a failed session
            self._gates_garbled = self._backend.next_gate
        self._backend = None
        self._delta = None
        self._evaluator_zero = None
        self._output_zero = None
        if self._producer is not None:
            self._producer.close()
            self._producer = None

    def _new_ot(self) -> CorrelatedOTSender:
        self._delta = fresh_delta(self._random_bytes)
        n = self._n_in[Party.EVALUATOR]
        return CorrelatedOTSender(self.session_id, self._delta, n, random_bytes=self._random_bytes)

    def _after_ot(self, ot: CorrelatedOT, replies: list[bytes]) -> tuple[str, list[bytes]]:
        assert isinstance(ot, CorrelatedOTSender)
        self._evaluator_zero = ot.zero_labels  # K of the evaluator's inputs ((0, 2) when it has none)
        if self._n_in[Party.GARBLER] or self.and_gates_total:
            return STREAMING, replies
        # Nothing to stream (no garbler input labels, no tables): the evaluator needs nothing more from us and may
        # answer at once, so the program runs here and the state leaves 'streaming' with this very reply.
        assert self._delta is not None
        self._producing = True
        for _ in self._payloads(self._delta, self._evaluator_zero):
            raise ProtocolError(AbortReason.INTERNAL, "a program with no AND gates streamed tables")
        self._evaluator_zero = None
        state, more = self._on_tables_sent(None)
        return state, replies + more

    def produce(self) -> Iterator[bytes]:
        """The streamed frames: the garbler's input labels, then the garbled tables, garbled as they are pulled.

        Valid once, in state ``streaming``. If the session fails meanwhile, the iterator stops. The state leaves
        ``streaming`` before the last frame is handed out (and, when the garbler has no outputs, the decoding and
        finish frames follow).
        """
        if self._state != STREAMING or self._producing or self._evaluator_zero is None or self._delta is None:
            raise ProtocolError(
                AbortReason.INTERNAL,
                f"{self._who} in state {self._state!r}: produce() is valid once, in streaming",
            )
        self._producing = True
        payloads = self._payloads(self._delta, self._evaluator_zero)
        self._evaluator_zero = None
        try:
            current = next(payloads, None)
            if current is None:  # no garbler inputs and no AND gates: nothing to stream
                yield from self._dispatch(TABLES_SENT, None)
                return
            while current is not None:
                # Pull the next chunk first: it runs the program further, and after the last one the program has
                # ended (its output labels are known) before the state may leave 'streaming'.
                upcoming = next(payloads, None)
                if self._state != STREAMING:
                    return
                kind, payload = current
                data = self._emit(kind, fr.payload_frame(kind, payload))
                extra = self._dispatch(TABLES_SENT, None) if upcoming is None else []
                yield data
                yield from extra
                current = upcoming
        except ProtocolError:
            raise
        except GarbleError as exc:
            raise self._failure(
                AbortReason.INTERNAL, f"{self._who} in state {self._state!r}: {exc}"
            ) from None
        except Exception as exc:
            raise self._failure(
                AbortReason.INTERNAL,
                f"{self._who} in state {self._state!r}: garbling failed ({type(exc).__name__})",
            ) from exc

    def _payloads(self, delta: np.ndarray, evaluator_zero: np.ndarray) -> Iterator[tuple[str, bytes]]:
        own_zero = np.frombuffer(
            bytearray(self._random_bytes(BLOCK_BYTES * self._n_in[Party.GARBLER])), dtype=BLOCK_DTYPE
        ).reshape(-1, 2)
        mask = (self._inputs.astype(np.uint64) * np.uint64(0xFFFFFFFFFFFFFFFF)).reshape(-1, 1)
        raw = (own_zero ^ (np.broadcast_to(delta, own_zero.shape) & mask)).tobytes()
        for i in range(0, len(raw), fr.MAX_PAYLOAD_BYTES):
            yield fr.GARBLER_INPUT_LABELS, raw[i : i + fr.MAX_PAYLOAD_BYTES]
        program = self.program

        def garble(sink: Sink) -> GarblerBackend:
            backend = GarblerBackend(
                delta=delta,
                input_labels={Party.GARBLER: own_zero, Party.EVALUATOR: evaluator_zero},
                sink=sink,
                chunk_bytes=self._chunk_bytes,
            )
            self._backend = backend
            program.run(Builder(backend))
            backend.check_inputs_used()
            backend.flush()
            return backend

        producer = self._producer = TableProducer(garble)
        while True:
            chunk = producer.next_chunk()
            if chunk is None:
                break
            yield fr.GARBLED_TABLES, chunk
        if self.ended:  # the session ended meanwhile and stopped the program: nothing more to stream
            return
        backend = producer.result
        if backend.and_gates != self.and_gates_total:
            raise GarbleError(
                f"the program garbled {backend.and_gates} AND gates but measured {self.and_gates_total}"
            )
        self._output_zero = {p: backend.output_labels(p) for p in Party}
        self._gates_garbled = backend.next_gate
        self._backend = None
        self._producer = None

    def _on_tables_sent(self, _frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        if self._n_out[Party.GARBLER] == 0:
            self._result = np.zeros(0, dtype=np.uint8)
            return AWAITING_FINISH, self._decoding_and_finish()
        return AWAITING_OUTPUT_LABELS, []

    def _on_output_labels(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._output_zero is not None and self._delta is not None
        self._returned.add(fr.payload_of(fr.GARBLER_OUTPUT_LABELS, frame))
        if not self._returned.complete:
            return AWAITING_OUTPUT_LABELS, []
        labels = np.frombuffer(self._returned.take(), dtype=BLOCK_DTYPE).reshape(-1, 2)
        self._result = decode_returned(self._output_zero[Party.GARBLER], self._delta, labels)
        return AWAITING_FINISH, self._decoding_and_finish()

    def _decoding_and_finish(self) -> list[bytes]:
        assert self._output_zero is not None and self._delta is not None
        decoding = make_decoding(self._output_zero[Party.EVALUATOR], self._delta).to_bytes()
        self._output_zero = None
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
    PEER = Party.GARBLER
    TABLE = EVALUATOR_TABLE

    def __init__(
        self,
        *,
        session_id: bytes,
        program: Program,
        manifest_digest: bytes,
        inputs: object,
        sign: Sign,
        verify: Verify,
        random_bytes: RandomBytes = os.urandom,
    ) -> None:
        super().__init__(
            session_id=session_id,
            program=program,
            manifest_digest=manifest_digest,
            inputs=inputs,
            sign=sign,
            verify=verify,
            random_bytes=random_bytes,
        )
        self._own_labels: np.ndarray | None = None
        self._consumer: TableConsumer | None = None
        self._backend: EvaluatorBackend | None = None
        self._table_bytes_total = TABLE_BYTES * program.size.and_gates
        self._table_bytes_left = self._table_bytes_total
        self._given = _Accumulator(
            fr.GARBLER_INPUT_LABELS,
            BLOCK_BYTES * self._n_in[Party.GARBLER],
            "16 bytes for each garbler input",
        )
        n = self._n_out[Party.EVALUATOR]
        self._decoding = _Accumulator(
            fr.EVALUATOR_OUTPUT_DECODING,
            OutputDecoding.size(n),
            "packed decoding bits and two 8-byte tags per output",
        )

    @property
    def and_gates_done(self) -> int:
        backend = self._backend
        if backend is not None:
            return backend.next_gate
        return (self._table_bytes_total - self._table_bytes_left) // TABLE_BYTES

    def _unexpected_note(self, event: str) -> str:
        total, left = self._table_bytes_total, self._table_bytes_left
        if self._state == EVALUATING:  # another frame type while tables are still due: the stream ended short
            return f"; the garbled tables stopped {left} bytes short of the {total} bytes the program needs"
        if event == fr.GARBLED_TABLES and total and not left:
            return f"; all {total} bytes of garbled tables the program needs had already arrived"
        return ""

    def _release_engines(self) -> None:
        self._ot = None
        self._own_labels = None
        self._backend = None
        if self._consumer is not None:
            self._consumer.close_quietly()
            self._consumer = None

    def _new_ot(self) -> CorrelatedOTReceiver:
        return CorrelatedOTReceiver(self.session_id, self._inputs, random_bytes=self._random_bytes)

    def _after_ot(self, ot: CorrelatedOT, replies: list[bytes]) -> tuple[str, list[bytes]]:
        assert isinstance(ot, CorrelatedOTReceiver)
        self._own_labels = ot.labels  # K ⊕ x·Δ of its own inputs ((0, 2) when it has none)
        if self._given.total == 0:  # the garbler has no inputs: nothing to wait for
            state, more = self._start_program(np.zeros((0, 2), dtype=BLOCK_DTYPE))
            return state, replies + more
        return AWAITING_INPUT_LABELS, replies

    def _on_input_labels(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None
        self._given.add(fr.payload_of(fr.GARBLER_INPUT_LABELS, frame))
        if not self._given.complete:
            return AWAITING_INPUT_LABELS, []
        return self._start_program(np.frombuffer(self._given.take(), dtype=BLOCK_DTYPE).reshape(-1, 2))

    def _start_program(self, given: np.ndarray) -> tuple[str, list[bytes]]:
        assert self._own_labels is not None
        own, self._own_labels = self._own_labels, None
        program = self.program

        def evaluate(source: Source) -> EvaluatorBackend:
            backend = EvaluatorBackend(
                input_labels={Party.GARBLER: given, Party.EVALUATOR: own}, source=source
            )
            self._backend = backend
            program.run(Builder(backend))
            backend.check_inputs_used()
            return backend

        self._consumer = TableConsumer(evaluate, total=self._table_bytes_total)
        self._consumer.start()
        if self._consumer.finished:
            return self._after_tables()
        return EVALUATING, []

    def _on_tables(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._consumer is not None
        tables = fr.payload_of(fr.GARBLED_TABLES, frame)
        if not len(tables):
            raise ProtocolError(AbortReason.MALFORMED_FRAME, "empty garbled_tables frame")
        if len(tables) > self._table_bytes_left:
            raise ProtocolError(
                AbortReason.MALFORMED_FRAME,
                f"garbled_tables frame of {len(tables)} bytes exceeds the {self._table_bytes_left} bytes of tables "
                "the program still needs",
            )
        self._table_bytes_left -= len(tables)
        self._consumer.feed(tables)
        if self._table_bytes_left == 0:
            self._consumer.close()  # a program that wants more tables than it declared fails here
        if self._consumer.finished:
            return self._after_tables()
        return EVALUATING, []

    def _after_tables(self) -> tuple[str, list[bytes]]:
        assert self._consumer is not None
        backend: EvaluatorBackend = self._consumer.result
        if self._table_bytes_left:
            raise GarbleError(
                f"the program ended with {self._table_bytes_left} bytes of tables still due from the garbler"
            )
        self._consumer = None
        self._backend = backend
        returned = backend.output_labels(Party.GARBLER).tobytes()
        out = self._emit_payload(fr.GARBLER_OUTPUT_LABELS, returned)
        if self._decoding.total == 0:
            self._result = np.zeros(0, dtype=np.uint8)
            self._backend = None
            out.append(self._finish_frame())
            return AWAITING_FINISH, out
        return AWAITING_DECODING, out

    def _on_decoding(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None and self._backend is not None
        self._decoding.add(fr.payload_of(fr.EVALUATOR_OUTPUT_DECODING, frame))
        if not self._decoding.complete:
            return AWAITING_DECODING, []
        decoding = OutputDecoding.from_bytes(self._decoding.take(), self._n_out[Party.EVALUATOR])
        self._result = decode(self._backend.output_labels(Party.EVALUATOR), decoding)
        self._backend = None
        return AWAITING_FINISH, [self._finish_frame()]


Session = GarblerSession | EvaluatorSession


def new_session(
    party: Party,
    *,
    session_id: bytes,
    program: Program,
    manifest_digest: bytes,
    inputs: object,
    sign: Sign,
    verify: Verify,
    random_bytes: RandomBytes = os.urandom,
    chunk_bytes: int = DEFAULT_CHUNK_BYTES,
) -> Session:
    """A session for ``party`` with the given program, digest and own inputs (``chunk_bytes``: garbler only)."""
    common = {
        "session_id": session_id,
        "program": program,
        "manifest_digest": manifest_digest,
        "inputs": inputs,
        "sign": sign,
        "verify": verify,
        "random_bytes": random_bytes,
    }
    if Party(party) == Party.GARBLER:
        return GarblerSession(chunk_bytes=chunk_bytes, **common)  # type: ignore[arg-type]
    return EvaluatorSession(**common)  # type: ignore[arg-type]
