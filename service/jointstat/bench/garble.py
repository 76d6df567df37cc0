"""``jointstat bench garble``: garbling and evaluation speed of a wide circuit, tables streamed between them.

The circuit: ``width`` lanes of state; each round ANDs every lane with a pseudo-randomly chosen other lane of the
current state and XORs in the previous state, so every AND layer has exactly ``width`` gates and reads from a
nearby slice of the label array, as the layers of a lane-parallel statistic do. The garbler's generator and the
evaluator's ``feed`` alternate chunk by chunk in one process; each side's time is measured separately, so peak
memory reflects streaming (no side ever holds all tables). Speeds are the median over three garblings.
"""

from __future__ import annotations

import time

import numpy as np

from jointstat.bench.report import emit, peak_rss_mib
from jointstat.circuit.builder import Builder
from jointstat.circuit.layers import LayeredCircuit, evaluate_plain, schedule
from jointstat.circuit.model import Circuit, Party
from jointstat.garble.halfgates import STEP
from jointstat.garble.local import run_locally
from jointstat.primitives.aes import aes_blocks_per_second

REPEATS = 3


def wide_circuit(and_gates: int, width: int, seed: int = 7) -> Circuit:
    """A circuit of exactly ``and_gates`` AND gates in layers of ``width`` (the last may be narrower)."""
    rng = np.random.default_rng(seed)
    bld = Builder()
    prev = bld.input(Party.GARBLER, width)
    cur = bld.input(Party.EVALUATOR, width)
    left = and_gates
    while left > 0:
        n = min(width, left)
        # A random cyclic order pairs every lane with a different lane, so no AND folds away.
        order = rng.permutation(width)
        partner_of = np.empty(width, dtype=np.int64)
        partner_of[order] = np.roll(order, 1)
        mixed = bld.and_(cur[:n], cur[partner_of[:n]])
        nxt = cur.copy()
        nxt[:n] = bld.xor(mixed, prev[:n])
        prev, cur = cur, nxt
        left -= n
    bld.output(Party.EVALUATOR, cur[: width // 2])
    bld.output(Party.GARBLER, cur[width // 2 :])
    return bld.build()


def measure(layered: LayeredCircuit, check: bool) -> dict[str, float]:
    c = layered.circuit
    rng = np.random.default_rng(11)
    g_bits = rng.integers(0, 2, c.n_inputs(Party.GARBLER), dtype=np.uint8)
    e_bits = rng.integers(0, 2, c.n_inputs(Party.EVALUATOR), dtype=np.uint8)
    result = run_locally(layered, g_bits, e_bits)
    if check:
        ref = evaluate_plain(layered, {Party.GARBLER: g_bits, Party.EVALUATOR: e_bits})
        if not all(np.array_equal(ref[p], result.outputs[p]) for p in Party):
            raise RuntimeError("garbled evaluation disagrees with plain evaluation")
    return {
        "garble_s": result.garble_seconds,
        "evaluate_s": result.evaluate_seconds,
        "table_bytes": float(result.table_bytes),
    }


def run(and_gates: int, width: int, as_json: bool) -> int:
    t0 = time.perf_counter()
    circuit = wide_circuit(and_gates, width)
    t1 = time.perf_counter()
    layered = schedule(circuit)
    t2 = time.perf_counter()
    # Three garblings, each with fresh Δ and labels; the median of each side's time is reported (a single run of a
    # fraction of a second is at the mercy of whatever else the two cores are doing).
    runs = [measure(layered, check=and_gates <= 1 << 22 and i == 0) for i in range(REPEATS)]
    figures = {key: float(np.median([r[key] for r in runs])) for key in runs[0]}
    n_and = circuit.and_count
    widths = layered.and_width_stats()
    emit(
        "garbling benchmark (one process, tables streamed garbler → evaluator)",
        {
            "and_gates": n_and,
            "garble_and_per_s": round(n_and / figures["garble_s"], 1),
            "evaluate_and_per_s": round(n_and / figures["evaluate_s"], 1),
            "aes_blocks_per_s": round(aes_blocks_per_second(batch=4 * STEP), 1),
            "table_bytes_per_and": figures["table_bytes"] / n_and,
            "peak_rss_mib": round(peak_rss_mib(), 1),
            "layers": widths["layers"],
            "min_and_per_layer": widths["min_and_per_layer"],
            "build_s": round(t1 - t0, 3),
            "schedule_s": round(t2 - t1, 3),
            "garble_s": round(figures["garble_s"], 3),
            "evaluate_s": round(figures["evaluate_s"], 3),
            "repeats": REPEATS,
        },
        as_json,
    )
    return 0
