"""Both roles in one process: garble a program, stream its tables straight into an evaluator, decode both outputs.

Theory of operation: this is the whole of Yao's protocol minus the network and with the evaluator's input labels
handed over directly, standing in for an ideal oblivious transfer. It serves the benchmarks, the one-process demo
and the tests; the two-node session lives in ``jointstat.protocol``. The garbler's program runs until it has a
chunk of tables, the evaluator's program takes it, and so on (``jointstat.garble.streams``), so neither side holds
more than a chunk of tables. Like the rest of the core it reads no clock: ``LocalSession`` exposes each side's
steps, and the benchmarks time them (``jointstat.bench.garble.timed_run``).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.garble.backends import DEFAULT_CHUNK_BYTES, EvaluatorBackend, GarblerBackend
from jointstat.garble.halfgates import fresh_delta
from jointstat.garble.outputs import decode, decode_returned, make_decoding
from jointstat.garble.streams import Sink, Source, TableConsumer, TableProducer
from jointstat.primitives.blocks import BLOCK_DTYPE

Program = Callable[[Builder], object]


@dataclass
class LocalRun:
    """What one run did: each party's output bits, the AND gates garbled, the table bytes and chunks moved."""

    outputs: dict[Party, np.ndarray]
    and_gates: int
    table_bytes: int
    chunks: int


def _random_labels(n: int, random_bytes: Callable[[int], bytes]) -> np.ndarray:
    return np.frombuffer(bytearray(random_bytes(16 * n)), dtype=BLOCK_DTYPE).reshape(n, 2)


class LocalSession:
    """Both roles of one run, stepped by the caller; every step is the garbler's work or the evaluator's.

    Evaluator: ``start_evaluator()`` (its program runs up to the first AND gate), ``evaluate_chunk(chunk)`` for every
    chunk, ``finish_evaluator()`` (the stream ends; it decodes its outputs). Garbler: ``garble_chunk()`` until it
    returns None, ``finish()`` (it decodes the output labels the evaluator returns; gives the ``LocalRun``). A
    benchmark times each side by timing its steps; ``run_locally`` runs them untimed.
    """

    def __init__(
        self,
        program: Program,
        inputs: Mapping[Party, np.ndarray],
        *,
        chunk_bytes: int = DEFAULT_CHUNK_BYTES,
        feed_bytes: int = 0,
        random_bytes: Callable[[int], bytes] = os.urandom,
    ) -> None:
        bits = {p: np.asarray(inputs.get(p, np.zeros(0)), dtype=np.uint8).reshape(-1) for p in Party}
        delta = fresh_delta(random_bytes)
        zero = {p: _random_labels(bits[p].size, random_bytes) for p in Party}
        active = {p: zero[p] ^ (np.broadcast_to(delta, zero[p].shape) & _mask(bits[p])) for p in Party}

        def garble(sink: Sink) -> GarblerBackend:
            garbler = GarblerBackend(delta=delta, input_labels=zero, sink=sink, chunk_bytes=chunk_bytes)
            program(Builder(garbler))
            garbler.check_inputs_used()
            garbler.flush()
            return garbler

        def evaluate(source: Source) -> EvaluatorBackend:
            ev = EvaluatorBackend(input_labels=active, source=source)
            program(Builder(ev))
            ev.check_inputs_used()
            return ev

        self._delta = delta
        self._feed_bytes = feed_bytes
        self._producer = TableProducer(garble)
        self._consumer = TableConsumer(evaluate)
        self._evaluator_outputs: np.ndarray | None = None
        self.chunks = 0

    def start_evaluator(self) -> None:
        """The evaluator's program runs as far as it can before it needs tables."""
        self._consumer.start()

    def garble_chunk(self) -> bytes | None:
        """The garbler's next chunk of tables (garbling as far as needed), or None once its program has ended."""
        chunk = self._producer.next_chunk()
        if chunk is not None:
            self.chunks += 1
        return chunk

    def evaluate_chunk(self, chunk: bytes) -> None:
        """The evaluator takes one chunk (in pieces of ``feed_bytes`` if set) and evaluates as far as it reaches."""
        step = self._feed_bytes or len(chunk) or 1
        for i in range(0, len(chunk), step):
            self._consumer.feed(chunk[i : i + step])

    def finish_evaluator(self) -> None:
        """The table stream has ended: the evaluator's program must be done; it decodes its own outputs."""
        self._consumer.close()
        garbler: GarblerBackend = self._producer.result
        ev: EvaluatorBackend = self._consumer.result
        decoding = make_decoding(garbler.output_labels(Party.EVALUATOR), self._delta)
        self._evaluator_outputs = decode(ev.output_labels(Party.EVALUATOR), decoding)

    def finish(self) -> LocalRun:
        """The garbler decodes the output labels the evaluator returns; what the run did."""
        if self._evaluator_outputs is None:
            raise RuntimeError("finish() comes after finish_evaluator()")
        garbler: GarblerBackend = self._producer.result
        ev: EvaluatorBackend = self._consumer.result
        returned = ev.output_labels(Party.GARBLER)
        garbler_outputs = decode_returned(garbler.output_labels(Party.GARBLER), self._delta, returned)
        return LocalRun(
            outputs={Party.GARBLER: garbler_outputs, Party.EVALUATOR: self._evaluator_outputs},
            and_gates=garbler.and_gates,
            table_bytes=self._producer.bytes_out,
            chunks=self.chunks,
        )


def run_locally(
    program: Program,
    inputs: Mapping[Party, np.ndarray],
    *,
    chunk_bytes: int = DEFAULT_CHUNK_BYTES,
    feed_bytes: int = 0,
    random_bytes: Callable[[int], bytes] = os.urandom,
) -> LocalRun:
    """Garble and evaluate ``program`` once on each party's input bits; ``feed_bytes`` > 0 splits each chunk into
    pieces of that size (tests of framing)."""
    session = LocalSession(
        program, inputs, chunk_bytes=chunk_bytes, feed_bytes=feed_bytes, random_bytes=random_bytes
    )
    session.start_evaluator()
    while (chunk := session.garble_chunk()) is not None:
        session.evaluate_chunk(chunk)
    session.finish_evaluator()
    return session.finish()


def _mask(bits: np.ndarray) -> np.ndarray:
    return (bits.astype(np.uint64) * np.uint64(0xFFFFFFFFFFFFFFFF)).reshape(-1, 1)
