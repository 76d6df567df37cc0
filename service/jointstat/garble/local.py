"""Both roles in one process: garble a program, stream its tables straight into an evaluator, decode both outputs.

Theory of operation: this is the whole of Yao's protocol minus the network and with the evaluator's input labels
handed over directly, standing in for an ideal oblivious transfer. It serves the benchmarks, the one-process demo
and the tests; the two-node session lives in ``jointstat.protocol``. The garbler's program runs until it has a
chunk of tables, the evaluator's program takes it, and so on (``jointstat.garble.streams``), so neither side holds
more than a chunk of tables, and each side's time is measured separately. ``input_counts`` are the numbers of
input bits of each party (from the program's count, ``jointstat.circuit.program``).
"""

from __future__ import annotations

import os
import time
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
    outputs: dict[Party, np.ndarray]
    and_gates: int
    table_bytes: int
    chunks: int
    garble_seconds: float
    evaluate_seconds: float


def _random_labels(n: int, random_bytes: Callable[[int], bytes]) -> np.ndarray:
    return np.frombuffer(bytearray(random_bytes(16 * n)), dtype=BLOCK_DTYPE).reshape(n, 2)


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
    bits = {p: np.asarray(inputs.get(p, np.zeros(0)), dtype=np.uint8).reshape(-1) for p in Party}
    delta = fresh_delta(random_bytes)
    zero = {p: _random_labels(bits[p].size, random_bytes) for p in Party}
    garbler: GarblerBackend | None = None

    def garble(sink: Sink) -> GarblerBackend:
        nonlocal garbler
        garbler = GarblerBackend(delta=delta, input_labels=zero, sink=sink, chunk_bytes=chunk_bytes)
        program(Builder(garbler))
        garbler.check_inputs_used()
        garbler.flush()
        return garbler

    producer = TableProducer(garble)
    active = {p: zero[p] ^ (np.broadcast_to(delta, zero[p].shape) & _mask(bits[p])) for p in Party}

    def evaluate(source: Source) -> EvaluatorBackend:
        ev = EvaluatorBackend(input_labels=active, source=source)
        program(Builder(ev))
        ev.check_inputs_used()
        return ev

    consumer = TableConsumer(evaluate)
    t_garble = t_eval = 0.0
    chunks = 0
    t0 = time.perf_counter()
    consumer.start()
    t_eval += time.perf_counter() - t0
    while True:
        t0 = time.perf_counter()
        chunk = producer.next_chunk()
        t1 = time.perf_counter()
        t_garble += t1 - t0
        if chunk is None:
            break
        chunks += 1
        if feed_bytes:
            for i in range(0, len(chunk), feed_bytes):
                consumer.feed(chunk[i : i + feed_bytes])
        else:
            consumer.feed(chunk)
        t_eval += time.perf_counter() - t1
    consumer.close()
    g: GarblerBackend = producer.result
    ev: EvaluatorBackend = consumer.result
    t0 = time.perf_counter()
    ev_out = decode(ev.output_labels(Party.EVALUATOR), make_decoding(g.output_labels(Party.EVALUATOR), delta))
    t_eval += time.perf_counter() - t0
    g_out = decode_returned(g.output_labels(Party.GARBLER), delta, ev.output_labels(Party.GARBLER))
    return LocalRun(
        outputs={Party.GARBLER: g_out, Party.EVALUATOR: ev_out},
        and_gates=g.and_gates,
        table_bytes=producer.bytes_out,
        chunks=chunks,
        garble_seconds=t_garble,
        evaluate_seconds=t_eval,
    )


def _mask(bits: np.ndarray) -> np.ndarray:
    return (bits.astype(np.uint64) * np.uint64(0xFFFFFFFFFFFFFFFF)).reshape(-1, 1)
