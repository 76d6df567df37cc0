"""Both roles in one process: garble, stream the tables straight into an evaluator, decode both sides' outputs.

Theory of operation: this is the whole of Yao's protocol minus the network and with the evaluator's input labels
handed over directly, standing in for an ideal oblivious transfer. It serves the benchmark, the one-process demo
and the tests; the two-node session lives in ``jointstat.protocol``. The garbler's generator and the evaluator's
``feed`` alternate chunk by chunk, so no side ever holds all tables, and each side's time is measured separately.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from jointstat.circuit.layers import LayeredCircuit
from jointstat.circuit.model import Party
from jointstat.garble.halfgates import DEFAULT_CHUNK_BYTES, Evaluator, Garbler


@dataclass
class LocalRun:
    garbler: Garbler
    evaluator: Evaluator
    outputs: dict[Party, np.ndarray]
    table_bytes: int
    chunks: int
    garble_seconds: float
    evaluate_seconds: float


def run_locally(
    layered: LayeredCircuit,
    garbler_bits: np.ndarray,
    evaluator_bits: np.ndarray,
    *,
    chunk_bytes: int = DEFAULT_CHUNK_BYTES,
    feed_bytes: int = 0,
) -> LocalRun:
    """Garble and evaluate once; ``feed_bytes`` > 0 splits each chunk into pieces of that size (tests of framing)."""
    garbler = Garbler(layered)
    evaluator = Evaluator(
        layered,
        constant_labels=garbler.constant_labels(),
        garbler_labels=garbler.input_labels(Party.GARBLER, garbler_bits),
        evaluator_labels=garbler.input_labels(Party.EVALUATOR, evaluator_bits),
    )
    t_garble = t_eval = 0.0
    table_bytes = chunks = 0
    stream = garbler.tables(chunk_bytes)
    while True:
        t0 = time.perf_counter()
        chunk = next(stream, None)
        t1 = time.perf_counter()
        t_garble += t1 - t0
        if chunk is None:
            break
        table_bytes += len(chunk)
        chunks += 1
        if feed_bytes:
            for i in range(0, len(chunk), feed_bytes):
                evaluator.feed(chunk[i : i + feed_bytes])
        else:
            evaluator.feed(chunk)
        t_eval += time.perf_counter() - t1
        del chunk
    t0 = time.perf_counter()
    evaluator.finish()
    ev_out = evaluator.decode(garbler.output_decoding(Party.EVALUATOR))
    t_eval += time.perf_counter() - t0
    g_out = garbler.decode_returned(Party.GARBLER, evaluator.output_labels(Party.GARBLER))
    return LocalRun(
        garbler=garbler,
        evaluator=evaluator,
        outputs={Party.GARBLER: g_out, Party.EVALUATOR: ev_out},
        table_bytes=table_bytes,
        chunks=chunks,
        garble_seconds=t_garble,
        evaluate_seconds=t_eval,
    )
