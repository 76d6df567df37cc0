"""The evaluator's side of a session: OT for its input labels, evaluation of the table stream, acknowledgements.

Theory of operation
-------------------
The evaluator obtains the labels of its input bits by correlated OT extension (IKNP, Crypto 2003, in the form of
Asharov–Lindell–Schneider–Zohner, CCS 2013) on Chou–Orlandi base OTs (Latincrypt 2015), keeping ``ot_window``
batches of columns in flight (the transport sizes it from the link it measures). It then runs the program on the
evaluating backend, which takes the garbled tables as they arrive, and acknowledges every frame of input labels
and tables once taken (``tables_ack``), so the garbler can drop them from its replay buffer. It returns the
garbler's output labels and decodes its own outputs (``protocol.session`` for the flow, the table and resume).
"""

from __future__ import annotations

import numpy as np

from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.garble.backends import EvaluatorBackend
from jointstat.garble.halfgates import TABLE_BYTES, GarbleError
from jointstat.garble.outputs import OutputDecoding, decode
from jointstat.garble.streams import Source, TableConsumer
from jointstat.ot import CorrelatedOTReceiver
from jointstat.ot.extension import DEFAULT_BATCH, DEFAULT_WINDOW, KAPPA, MAX_WINDOW
from jointstat.primitives.blocks import BLOCK_BYTES, BLOCK_DTYPE
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason, ProtocolError
from jointstat.protocol.session import (
    AWAITING_DECODING,
    AWAITING_FINISH,
    AWAITING_INPUT_LABELS,
    EVALUATING,
    EVALUATOR_TABLE,
    Accumulator,
    CorrelatedOT,
    SessionBase,
)


class EvaluatorSession(SessionBase):
    """The evaluator's side of one session: OT for its input labels, evaluation of the table stream.

    ``inputs`` are the evaluator's input bits (its choice bits in OT). After ``done``, ``outputs`` holds the
    evaluator's output bits.
    """

    PARTY = Party.EVALUATOR
    PEER = Party.GARBLER
    TABLE = EVALUATOR_TABLE

    def _setup(self) -> None:
        self._own_labels: np.ndarray | None = None
        self._ot_window = DEFAULT_WINDOW
        self._consumer: TableConsumer | None = None
        self._backend: EvaluatorBackend | None = None
        self._table_bytes_total = TABLE_BYTES * self.program.size.and_gates
        self._table_bytes_left = self._table_bytes_total
        self._given = Accumulator(
            fr.GARBLER_INPUT_LABELS,
            BLOCK_BYTES * self._n_in[Party.GARBLER],
            "16 bytes for each garbler input",
        )
        n = self._n_out[Party.EVALUATOR]
        self._decoding = Accumulator(
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

    # -- the window of OT batches in flight (set by the transport from the link it measures) ---------------------
    @property
    def ot_window(self) -> int:
        """How many batches of OT extension columns may be in flight before their corrections come back."""
        return self._ot_window

    @ot_window.setter
    def ot_window(self, batches: int) -> None:
        if isinstance(batches, bool) or not isinstance(batches, int) or not 1 <= batches <= MAX_WINDOW:
            raise ValueError(f"ot_window must be an integer from 1 to {MAX_WINDOW}, got {batches!r}")
        self._ot_window = batches
        ot = self._ot
        if isinstance(ot, CorrelatedOTReceiver):
            ot.set_window(batches)

    @property
    def ot_batch_bytes(self) -> int:
        """Bytes of columns one OT extension batch sends (the unit of ``ot_window``)."""
        return KAPPA * DEFAULT_BATCH // 8

    @property
    def ot_batches(self) -> tuple[int, int]:
        """(batches whose columns were sent, batches whose corrections came back) of the OT extension so far."""
        ot = self._ot
        if isinstance(ot, CorrelatedOTReceiver):
            return ot.batches_sent, ot.batches_done
        return 0, 0

    def _new_ot(self) -> CorrelatedOTReceiver:
        return CorrelatedOTReceiver(
            self.session_id, self._inputs, window=self._ot_window, random_bytes=self._random_bytes
        )

    def _after_ot(self, ot: CorrelatedOT, replies: list[bytes]) -> tuple[str, list[bytes]]:
        assert isinstance(ot, CorrelatedOTReceiver)
        self._own_labels = ot.labels  # K ⊕ x·Δ of its own inputs ((0, 2) when it has none)
        if self._given.total == 0:  # the garbler has no inputs: nothing to wait for
            state, more = self._start_program(np.zeros((0, 2), dtype=BLOCK_DTYPE))
            return state, replies + more
        return AWAITING_INPUT_LABELS, replies

    def _ack(self) -> bytes:
        """``tables_ack`` of every logical frame taken from the garbler so far."""
        return self._emit(fr.TABLES_ACK, fr.tables_ack_frame(self._transcript.logical_received))

    def _on_input_labels(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert frame is not None
        self._given.add(fr.payload_of(fr.GARBLER_INPUT_LABELS, frame))
        if not self._given.complete:
            return AWAITING_INPUT_LABELS, [self._ack()]
        ack = self._ack()
        state, out = self._start_program(np.frombuffer(self._given.take(), dtype=BLOCK_DTYPE).reshape(-1, 2))
        return state, [ack, *out]

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
        ack = self._ack()  # after the tables are evaluated
        if self._consumer.finished:
            state, out = self._after_tables()
            return state, [ack, *out]
        return EVALUATING, [ack]

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
