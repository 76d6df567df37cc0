"""The garbler's side of a session: fresh Δ and labels, garbled tables streamed and kept until acknowledged.

Theory of operation
-------------------
Half-gates garbling (Zahur–Rosulek–Evans, Eurocrypt 2015) with free-XOR, run while the program runs on the
garbling backend (pipelined garbling, Huang–Evans–Katz–Malka, USENIX Security 2011): after OT, ``produce()`` hands
out the labels of the garbler's own inputs and then the garbled tables chunk by chunk, each frame kept in the replay
buffer until the evaluator's ``tables_ack`` says it has been taken. A frame is garbled once: after a cut the frames
are resent from the buffer, byte for byte (``protocol.session`` for the flow, the table and resume). The garbler
then checks and decodes the output labels the evaluator returns, and sends the decoding of the evaluator's outputs.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Unpack

import numpy as np

from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.garble.backends import DEFAULT_CHUNK_BYTES, GarblerBackend
from jointstat.garble.halfgates import TABLE_BYTES, GarbleError, fresh_delta
from jointstat.garble.outputs import decode_returned, make_decoding
from jointstat.garble.streams import Sink, TableProducer
from jointstat.ot import CorrelatedOTSender
from jointstat.primitives.blocks import BLOCK_BYTES, BLOCK_DTYPE
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason, ProtocolError
from jointstat.protocol.session import (
    AWAITING_FINISH,
    AWAITING_OUTPUT_LABELS,
    DEFAULT_REPLAY_LIMIT_BYTES,
    GARBLER_TABLE,
    STREAMING,
    TABLES_SENT,
    Accumulator,
    CorrelatedOT,
    SessionArgs,
    SessionBase,
)
from jointstat.wire.jointstat.v1 import session_pb2 as pb

FRAME_OVERHEAD_BYTES = 16  # a streamed frame's field tags and length prefixes, at most


class GarblerSession(SessionBase):
    """The garbler's side of one session: fresh Δ and labels, garbled tables streamed by ``produce()``.

    ``inputs`` are the garbler's input bits (in the program's garbler input order). After ``done``, ``outputs``
    holds the garbler's output bits. ``chunk_bytes`` bounds the tables (and the input labels) per frame;
    ``replay_limit_bytes`` the replay buffer of streamed frames not yet acknowledged (``protocol.session``).
    """

    PARTY = Party.GARBLER
    PEER = Party.EVALUATOR
    TABLE = GARBLER_TABLE

    def __init__(
        self,
        *,
        chunk_bytes: int = DEFAULT_CHUNK_BYTES,
        replay_limit_bytes: int = DEFAULT_REPLAY_LIMIT_BYTES,
        **args: Unpack[SessionArgs],
    ) -> None:
        if not isinstance(chunk_bytes, int) or not TABLE_BYTES <= chunk_bytes <= fr.MAX_PAYLOAD_BYTES:
            raise ValueError(f"chunk_bytes must be an integer from {TABLE_BYTES} to {fr.MAX_PAYLOAD_BYTES}")
        least = 2 * (chunk_bytes + FRAME_OVERHEAD_BYTES)
        if isinstance(replay_limit_bytes, bool) or not isinstance(replay_limit_bytes, int):
            raise ValueError(f"replay_limit_bytes must be an integer, got {replay_limit_bytes!r}")
        if replay_limit_bytes < least:
            raise ValueError(
                f"replay_limit_bytes must hold two frames of chunk_bytes ({least} bytes), got {replay_limit_bytes}"
            )
        self._chunk_bytes = chunk_bytes
        self.replay_limit_bytes = replay_limit_bytes
        super().__init__(**args)

    def _setup(self) -> None:
        self._delta: np.ndarray | None = None
        self._evaluator_zero: np.ndarray | None = None
        self._backend: GarblerBackend | None = None
        self._producer: TableProducer | None = None
        self._gates_garbled = 0  # once the program has ended (the backend is gone)
        self._producing = False
        self.last_number = -1  # the number of the logical frame produce() handed out last
        self._output_zero: dict[Party, np.ndarray] | None = None
        self._returned = Accumulator(
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

    @property
    def chunk_bytes(self) -> int:
        return self._chunk_bytes

    @property
    def can_stream(self) -> bool:
        """Whether ``produce()`` may hand out its next frame without the replay buffer passing its limit."""
        return self._replay_bytes + self._chunk_bytes + FRAME_OVERHEAD_BYTES <= self.replay_limit_bytes

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
            if current is None:  # _after_ot runs such a program itself and never enters 'streaming'
                raise ProtocolError(AbortReason.INTERNAL, f"{self._who}: streaming with nothing to stream")
            while current is not None:
                # Pull the next chunk first: it runs the program further, and after the last one the program has
                # ended (its output labels are known) before the state may leave 'streaming'.
                upcoming = next(payloads, None)
                if self._state != STREAMING:
                    return
                kind, payload = current
                frame = fr.payload_frame(kind, payload)
                if self._replay_bytes + len(frame) > self.replay_limit_bytes:
                    raise ProtocolError(
                        AbortReason.INTERNAL,
                        f"{self._who}: the replay buffer holds {self._replay_bytes} bytes and a frame of "
                        f"{len(frame)} would pass its limit of {self.replay_limit_bytes}: the transport must wait "
                        "for acknowledgements (can_stream)",
                    )
                number = self._transcript.logical_sent
                data = self._emit(kind, frame)
                extra = self._dispatch_numbered(TABLES_SENT) if upcoming is None else []
                self.last_number = number
                yield data
                yield from self._hand_out(extra)
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

    def _dispatch_numbered(self, event: str) -> list[tuple[int, bytes]]:
        """The frames an event sends, each with its number (they are all logical frames)."""
        first = self._transcript.logical_sent
        return list(enumerate(self._dispatch(event, None), start=first))

    def _hand_out(self, frames: list[tuple[int, bytes]]) -> Iterator[bytes]:
        """Yield frames made earlier in this step, but not those a resume has resent meanwhile (made, not yet
        handed out, then resent from the replay buffer: handing them out again would send them twice)."""
        for number, data in frames:
            if number >= self._resent_upto:
                self.last_number = number
                yield data

    def _payloads(self, delta: np.ndarray, evaluator_zero: np.ndarray) -> Iterator[tuple[str, bytes]]:
        own_zero = np.frombuffer(
            bytearray(self._random_bytes(BLOCK_BYTES * self._n_in[Party.GARBLER])), dtype=BLOCK_DTYPE
        ).reshape(-1, 2)
        mask = (self._inputs.astype(np.uint64) * np.uint64(0xFFFFFFFFFFFFFFFF)).reshape(-1, 1)
        raw = (own_zero ^ (np.broadcast_to(delta, own_zero.shape) & mask)).tobytes()
        for i in range(0, len(raw), self._chunk_bytes):
            yield fr.GARBLER_INPUT_LABELS, raw[i : i + self._chunk_bytes]
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

    def _on_ack(self, frame: fr.AnyFrame | None) -> tuple[str, list[bytes]]:
        assert isinstance(frame, pb.Frame)
        count = frame.tables_ack.frames
        if count <= self._peer_acked:  # the evaluator acknowledges each frame it takes once, in order
            raise ProtocolError(
                AbortReason.MALFORMED_FRAME,
                f"tables_ack acknowledges {count} frames; {self._peer_acked} were already acknowledged",
            )
        self._acknowledged(count, "tables_ack")
        return self._state, []

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
