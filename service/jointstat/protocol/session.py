"""The two-party session as sans-I/O state machines: what both sides share, and the one transition table.

The garbler's side is ``protocol.garbler``, the evaluator's ``protocol.evaluator``; ``protocol.sides`` makes either.

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

Acknowledgements and the replay buffer: after each ``garbler_input_labels`` and ``garbled_tables`` frame it has
taken (the tables evaluated), E sends ``tables_ack`` with the number of G's logical frames it has taken
(``frames``); each acknowledges more than the last (a repeated or older count is malformed). From the end of its
OT on, each side keeps every logical frame it sends in its *replay buffer* until
the peer has acknowledged it — G drops frames as the acknowledgements come; E's buffer holds only its output labels
and finish. ``replay_bytes`` is what G's buffer holds; ``can_stream`` says whether ``produce()`` may hand out the
next frame without the buffer passing ``replay_limit_bytes`` (the transport waits for acknowledgements otherwise;
``produce()`` refuses to pass the limit). So the tables in flight are bounded by the replay limit, and the
transport sizes its window within it (``transport.flow``).

Resume after a cut: when the connection drops after this side's OT has ended (``resumable``), the transport keeps
the session. The initiator of the new stream sends ``resume_frame(attempt)`` — the logical frames it has taken and
its Ed25519 signature over the resume statement (``frames.resume_digest``: the session id, the attempt, the count
and the transcript digest through OT) — and the other side, after checking it (``receive`` raises
``ResumeRefused`` and changes nothing when the version, session id, role, attempt, count or signature is wrong),
answers with its own resume frame followed by the frames the initiator lacks; the initiator checks the answer the
same way and resends what the other side lacks. Frames are resent from the replay buffer, the very bytes sent
before: nothing is garbled twice, no randomness is drawn again, and the transcript (``frames.Transcript``) takes
each logical frame once. A session that is done still answers a resume, without changing state, with the frames
the peer lacks (its finish): the one event a done session takes. Before OT has ended there is nothing to resume:
the transport fails the session and the node starts a fresh one.

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
``failed``; a ``resume`` in ``done`` is answered without a change of state, as said above)

| session   | state                  | event                      | sends                                  | next |
|-----------|------------------------|----------------------------|----------------------------------------|------|
| garbler   | new                    | start()                    | hello                                  | awaiting hello |
| garbler   | awaiting hello         | hello                      | — (as after the OT when E has no inputs) | base OT, streaming, awaiting output labels, awaiting finish (the last three: E has no inputs, as after the OT) |
| garbler   | base OT                | base_ot (A)                | base_ot (128 points)                   | OT extension |
| garbler   | OT extension           | ot_extension (columns)     | ot_extension (corrections); after the last batch, when nothing is to be streamed, what tables sent sends | OT extension, streaming (after the last batch), awaiting output labels, awaiting finish (after the last batch when G has no inputs and the program no AND gates: nothing to stream, as after tables sent) |
| garbler   | streaming              | tables sent (from produce) | input labels and tables (produce); decoding and finish if G has no outputs | awaiting output labels, awaiting finish (G has no outputs) |
| garbler   | streaming              | tables_ack                 | — (drops acknowledged frames)          | streaming |
| garbler   | streaming              | resume                     | resume (if E initiated), resent frames | streaming |
| garbler   | awaiting output labels | garbler_output_labels      | when all arrived: decoding, finish     | awaiting output labels, awaiting finish (all arrived) |
| garbler   | awaiting output labels | tables_ack                 | — (drops acknowledged frames)          | awaiting output labels |
| garbler   | awaiting output labels | resume                     | resume (if E initiated), resent frames | awaiting output labels |
| garbler   | awaiting finish        | finish                     | —                                      | done |
| garbler   | awaiting finish        | tables_ack                 | — (drops acknowledged frames)          | awaiting finish |
| garbler   | awaiting finish        | resume                     | resume (if E initiated), resent frames | awaiting finish |
| evaluator | new                    | start()                    | hello                                  | awaiting hello |
| evaluator | awaiting hello         | hello                      | base_ot (A)                            | base OT, awaiting input labels, evaluating, awaiting decoding, awaiting finish (all but base OT: E has no inputs, as after the OT) |
| evaluator | base OT                | base_ot (128 points)       | ot_extension (first window)            | OT extension |
| evaluator | OT extension           | ot_extension (corrections) | ot_extension (next batch, if any)      | OT extension, awaiting input labels, evaluating, awaiting decoding, awaiting finish (after the last batch; the last three when G has no inputs, as after the input labels) |
| evaluator | awaiting input labels  | garbler_input_labels       | tables_ack (after the last: runs the program) | awaiting input labels, evaluating, awaiting decoding, awaiting finish (the last two when the program has no AND gates, as after the last table) |
| evaluator | awaiting input labels  | resume                     | resume (if G initiated), resent frames | awaiting input labels |
| evaluator | evaluating             | garbled_tables             | tables_ack; after the last: garbler_output_labels; finish if E has no outputs | evaluating, awaiting decoding, awaiting finish (E has no outputs) |
| evaluator | evaluating             | resume                     | resume (if G initiated), resent frames | evaluating |
| evaluator | awaiting decoding      | evaluator_output_decoding  | when all arrived: finish               | awaiting decoding, awaiting finish (all arrived) |
| evaluator | awaiting decoding      | resume                     | resume (if G initiated), resent frames | awaiting decoding |
| evaluator | awaiting finish        | finish                     | —                                      | done |
| evaluator | awaiting finish        | resume                     | resume (if G initiated), resent frames | awaiting finish |
"""

from __future__ import annotations

import os
from abc import abstractmethod
from collections import deque
from collections.abc import Callable, Mapping
from typing import Any, ClassVar, NoReturn, NotRequired, TypedDict

import numpy as np

from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.garble.halfgates import GarbleError
from jointstat.machine import DONE, FAILED, NEW, START, TableMachine, Transition
from jointstat.ot import (
    CorrelatedOTReceiver,
    CorrelatedOTSender,
    OTError,
    OTMessage,
)
from jointstat.ot.messages import (
    BASE_OT_RECEIVER_POINTS,
    BASE_OT_SENDER_POINT,
    EXTENSION_COLUMNS,
    EXTENSION_CORRECTIONS,
)
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortInfo, AbortReason, ProtocolError, Transcript
from jointstat.statements import HELLO, RESUME, TRANSCRIPT, Statement, session_text
from jointstat.wire.jointstat.v1 import session_pb2 as pb

# ``sign(statement) -> signature`` with this node's key; ``verify(signature, statement)`` against the peer's key
# (``protocol.signing`` builds both from keys; the node plugs in its own, which also logs the transcript).
Sign = Callable[[Statement], bytes]
Verify = Callable[[bytes, Statement], bool]
RandomBytes = Callable[[int], bytes]


class SessionArgs(TypedDict):
    """The keyword arguments of ``SessionBase``, as the garbler's constructor and ``new_session`` pass them on."""

    session_id: bytes
    program: Program
    manifest_digest: bytes
    inputs: object
    sign: Sign
    verify: Verify
    random_bytes: NotRequired[RandomBytes]


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


def _with_resume(
    table: dict[tuple[str, str], Transition], states: tuple[str, ...], acks: bool = False
) -> dict[tuple[str, str], Transition]:
    """The table plus, in each of ``states`` (those after OT), the peer's ``resume`` and, if ``acks``, its
    ``tables_ack``, both keeping the state."""
    more: dict[tuple[str, str], Transition] = {(s, fr.RESUME): ("_on_resume", (s,)) for s in states}
    if acks:
        more.update({(s, fr.TABLES_ACK): ("_on_ack", (s,)) for s in states})
    return {**table, **more}


GARBLER_TABLE: Mapping[tuple[str, str], Transition] = _with_abort(
    _with_resume(
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
        },
        (STREAMING, AWAITING_OUTPUT_LABELS, AWAITING_FINISH),
        acks=True,
    )
)

EVALUATOR_TABLE: Mapping[tuple[str, str], Transition] = _with_abort(
    _with_resume(
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
        },
        (AWAITING_INPUT_LABELS, EVALUATING, AWAITING_DECODING, AWAITING_FINISH),
    )
)


# The OT message each OT frame carries, by the party that receives the frame: the evaluator is the sender of the
# Chou–Orlandi base OTs and the receiver of the IKNP extension, the garbler the other way round (``ot.messages``).
OT_MESSAGE_OF: Mapping[Party, Mapping[str, str]] = {
    Party.GARBLER: {fr.BASE_OT: BASE_OT_SENDER_POINT, fr.OT_EXTENSION: EXTENSION_COLUMNS},
    Party.EVALUATOR: {fr.BASE_OT: BASE_OT_RECEIVER_POINTS, fr.OT_EXTENSION: EXTENSION_CORRECTIONS},
}

CorrelatedOT = CorrelatedOTSender | CorrelatedOTReceiver


DEFAULT_REPLAY_LIMIT_BYTES = (
    64 * 2**20
)  # the garbler's replay buffer: 2 × BDP of 1 Gbit/s at 200 ms (common practice)


class NoOutputError(RuntimeError):
    """Asked for the output of a session that has not completed (it is released only in ``done``)."""


class ResumeRefused(ProtocolError):
    """A resume this session cannot accept; the session itself is unchanged (``frame``: the abort for that stream)."""

    def __init__(self, message: str) -> None:
        super().__init__(
            AbortReason.RESUME_REFUSED, message, fr.abort_frame(AbortReason.RESUME_REFUSED, message)
        )


class Accumulator:
    """Collects a payload of known total size that arrives split over frames of one type."""

    def __init__(self, kind: str, total: int, unit: str) -> None:
        self.kind = kind
        self.total = total
        self.unit = unit
        self._buf = bytearray()

    @property
    def complete(self) -> bool:
        return len(self._buf) == self.total

    def add(self, payload: bytes | memoryview) -> None:
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


def check_inputs(program: Program, party: Party, inputs: object) -> np.ndarray:
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


class SessionBase(TableMachine[fr.AnyFrame | None, list[bytes]]):
    """What both sessions share: how they fail, hello checks, transcript, replay buffer, resume, finish and output
    release.

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
        self._inputs = check_inputs(program, self.PARTY, inputs)
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
        # Resume (module docstring): the logical frames sent since this side's OT ended and not yet acknowledged.
        self._replay: deque[bytes] = deque()
        self._replay_first = 0  # the number of the first frame in the replay buffer
        self._replay_bytes = 0
        self._keeping = False  # True once this side's OT has ended: the session can be resumed from then on
        self._anchor: bytes | None = None  # the transcript digest through OT, which a resume statement names
        self._peer_acked = 0  # own logical frames the peer has acknowledged (tables_ack or resume)
        self._last_attempt = 0  # the latest resume attempt accepted
        self._offered_attempt = 0  # the attempt of the resume frame this side sent and awaits an answer to
        self.resumes = 0  # resumes completed on this side
        self._resent_upto = 0  # every logical frame numbered below this has been handed out by a resume
        self._setup()

    @abstractmethod
    def _setup(self) -> None:
        """Make this side's own state, once the shared state above is made (overridden by each side)."""

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

    @property
    def logical_sent(self) -> int:
        """Logical frames sent so far (``frames``: every frame but tables_ack, resume and abort), each once."""
        return self._transcript.logical_sent

    @property
    def logical_received(self) -> int:
        """Logical frames taken from the peer so far: what this side acknowledges and names in a resume."""
        return self._transcript.logical_received

    @property
    def peer_acked(self) -> int:
        """This side's logical frames the peer has acknowledged (by tables_ack or in a resume)."""
        return self._peer_acked

    @property
    def replay_bytes(self) -> int:
        """Bytes of the frames held in the replay buffer (sent, not yet acknowledged)."""
        return self._replay_bytes

    @property
    def resumable(self) -> bool:
        """True once this side's OT has ended, until the session fails: a cut can then be resumed."""
        return self._keeping and self._state != FAILED

    # -- driving --------------------------------------------------------------------------------------------------
    def use_hash_factory(self, factory: Callable[[], Any]) -> None:
        """Hash the transcript with objects from ``factory`` (``update``/``digest``, SHA-256); before ``start``."""
        if self._state != NEW:
            raise ValueError(
                f"{self._who} in state {self._state!r}: the transcript hash is chosen before start()"
            )
        self._transcript = Transcript(self.PARTY, self.session_id, factory)

    def release(self) -> None:
        """Drop the engines, the replay buffer (and stop a program paused in its greenlet) once the session has
        ended; a done session can no longer answer a resume afterwards."""
        if self.ended:
            self._release_engines()
            self._drop_replay()

    def start(self) -> list[bytes]:
        """The frames this side sends first (its hello)."""
        return self._dispatch(START, None)

    def receive(self, data: bytes) -> list[bytes]:
        """Take one frame from the peer; returns the frames to send in reply (possibly none).

        Raises ``ProtocolError`` when the frame ends the session in failure; send its ``frame`` (if any) to the peer.
        After a peer's ``abort`` the session is ``failed`` and the list is empty.
        """
        if self._state == DONE and self._keeping:  # a done session still answers a resume (module docstring)
            kind, frame = fr.decode(data)
            if kind == fr.RESUME:
                self._check_resume(frame)
                self._transcript.received(kind, data)
                return self._resume_replies(frame)
        if self.ended:
            raise ProtocolError(
                AbortReason.UNEXPECTED_FRAME, f"{self._who} has ended ({self._state}); frame refused"
            )
        try:
            kind, frame = fr.decode(data)
        except ProtocolError as exc:
            raise self._failure(exc.reason, f"{self._who} in state {self._state!r}: {exc}") from None
        if kind == fr.RESUME:
            self._check_resume(frame)  # a refused resume leaves the session as it was
        self._transcript.received(kind, data)
        return self._dispatch(kind, frame)

    def check_resume(self, data: bytes) -> None:
        """Check a peer's resume frame without taking it: raises ``ResumeRefused`` when ``receive`` would."""
        kind, frame = fr.decode(data)
        if kind != fr.RESUME:
            raise ResumeRefused(f"{self._who}: a {kind!r} frame is not a resume")
        self._check_resume(frame)

    def resume_frame(self, attempt: int) -> bytes:
        """The resume frame this side opens a new stream with, for reconnection ``attempt`` (1, 2, … increasing).

        Raises ``ResumeRefused`` when there is nothing to resume (before OT has ended, or after a failure).
        """
        if not self.resumable:
            raise ResumeRefused(
                f"{self._who} in state {self._state!r}: nothing to resume before OT has ended"
            )
        if not isinstance(attempt, int) or attempt <= self._last_attempt:
            raise ValueError(f"resume attempt must be above {self._last_attempt}, got {attempt!r}")
        self._offered_attempt = attempt
        return self._own_resume(attempt)

    def _own_resume(self, attempt: int) -> bytes:
        assert self._anchor is not None
        data = fr.resume_frame(
            party=self.PARTY,
            session_id=self.session_id,
            attempt=attempt,
            frames_received=self._transcript.logical_received,
            anchor=self._anchor,
            sign=lambda digest: self._signature(RESUME, digest),
        )
        self._transcript.sent(fr.RESUME, data)
        return data

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
        self._drop_replay()
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
        """Record an outgoing frame in the transcript (and, after OT, the replay buffer) and hand it out."""
        self._transcript.sent(kind, data)
        if self._keeping and kind not in fr.UNNUMBERED:
            self._replay.append(data)
            self._replay_bytes += len(data)
        return data

    # -- replay buffer and resume ----------------------------------------------------------------------------------
    def _start_keeping(self) -> None:
        """This side's OT has ended: take the anchor and keep every logical frame sent from now on."""
        self._anchor = self._transcript.digest()
        self._keeping = True
        self._replay_first = self._transcript.logical_sent
        self._peer_acked = max(self._peer_acked, self._replay_first)

    def _drop_replay(self) -> None:
        self._replay.clear()
        self._replay_bytes = 0
        self._keeping = False

    def _acknowledged(self, count: int, what: str) -> None:
        """The peer has taken this side's first ``count`` logical frames: drop them from the replay buffer."""
        sent = self._transcript.logical_sent
        if count > sent:
            raise ProtocolError(
                AbortReason.MALFORMED_FRAME, f"{what} acknowledges {count} frames; only {sent} were sent"
            )
        if count < self._peer_acked:
            raise ProtocolError(
                AbortReason.MALFORMED_FRAME,
                f"{what} acknowledges {count} frames after {self._peer_acked} were acknowledged",
            )
        self._peer_acked = count
        while self._replay and self._replay_first < count:
            self._replay_bytes -= len(self._replay.popleft())
            self._replay_first += 1

    def _check_resume(self, frame: fr.AnyFrame) -> None:
        """Check a peer's resume before anything changes; raises ``ResumeRefused`` (module docstring)."""
        assert isinstance(frame, pb.Frame)
        r = frame.resume
        where = f"{self._who} in state {self._state!r}: resume refused"
        if not self._keeping or self._anchor is None or self._state == FAILED:
            raise ResumeRefused(f"{where}: nothing to resume (OT has not ended here, or the session failed)")
        if r.protocol_version != fr.PROTOCOL_VERSION:
            raise ResumeRefused(f"{where}: protocol version {r.protocol_version}, not {fr.PROTOCOL_VERSION}")
        if bytes(r.session_id) != self.session_id or r.role != fr.role_to_wire(self.PEER):
            raise ResumeRefused(f"{where}: it names another session or role")
        expected = self._offered_attempt if self._offered_attempt else None
        if expected is not None and r.attempt != expected:
            raise ResumeRefused(f"{where}: the answer is for attempt {r.attempt}, this side sent {expected}")
        if expected is None and r.attempt <= self._last_attempt:
            raise ResumeRefused(
                f"{where}: attempt {r.attempt} is not above the last accepted ({self._last_attempt})"
            )
        if not self._signature_ok(RESUME, bytes(r.signature), fr.resume_digest_of(r, self._anchor)):
            raise ResumeRefused(
                f"{where}: the resume proof does not verify against the peer's signing key and this session's "
                "transcript"
            )
        sent = self._transcript.logical_sent
        if not self._replay_first <= r.frames_received <= sent or r.frames_received < self._peer_acked:
            raise ResumeRefused(
                f"{where}: the peer has taken {r.frames_received} frames; this side sent {sent}, acknowledged "
                f"{self._peer_acked} and can resend from {self._replay_first}"
            )

    def _resume_replies(self, frame: fr.AnyFrame) -> list[bytes]:
        """After a checked resume: (the answering resume, when the peer initiated, then) the frames it lacks."""
        assert isinstance(frame, pb.Frame)
        r = frame.resume
        answer = [] if self._offered_attempt else [self._own_resume(r.attempt)]
        self._offered_attempt = 0
        self._last_attempt = r.attempt
        self.resumes += 1
        self._acknowledged(r.frames_received, "the peer's resume")
        self._resent_upto = self._transcript.logical_sent
        return answer + list(self._replay)

    def _on_resume(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None
        return self._state, self._resume_replies(frame)

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
    @abstractmethod
    def _new_ot(self) -> CorrelatedOT:
        """This side's correlated OT party (overridden: the garbler's sender, the evaluator's receiver)."""

    @abstractmethod
    def _after_ot(self, ot: CorrelatedOT, replies: list[bytes]) -> tuple[str, list[bytes]]:
        """Take the labels of a finished OT; the next state and the frames to send (overridden)."""

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
        assert isinstance(frame, pb.Frame) and self._ot is not None  # OT frames are always protobuf-decoded
        payload = bytes(fr.payload_of(kind, frame))  # already bytes: the same object, not a copy
        message = OTMessage(OT_MESSAGE_OF[self.PARTY][kind], payload)
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
        self._start_keeping()
        return self._after_ot(ot, replies)

    def _finish_frame(self) -> bytes:
        digest = self._transcript.digest()
        signature = self._signature(TRANSCRIPT, digest)
        self._digest = digest
        return self._emit(fr.FINISH, fr.finish_frame(digest, signature))

    def _on_finish(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert isinstance(frame, pb.Frame) and self._digest is not None
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
        self._drop_replay()
        return FAILED, []
