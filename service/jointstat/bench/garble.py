"""``jointstat bench garble``: garbling and evaluation speed of a wide program, tables streamed between them.

The program: ``width`` lanes of state; each round ANDs every lane with its neighbour (the state rotated by one
lane) and XORs in the previous state, so every AND call has exactly ``width`` gates (the last may have fewer), as
the word operations of a lane-parallel statistic do. The garbler's and the evaluator's programs alternate chunk by
chunk in one process (``garble.local``); each side's time is measured separately, and memory stays that of the
state, whatever the number of gates. Speeds are the median over three garblings.
"""

from __future__ import annotations

import time

import numpy as np

from jointstat.bench.report import emit, peak_rss_mib
from jointstat.circuit.bits import concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.plan import Speed
from jointstat.circuit.program import Program
from jointstat.garble.halfgates import STEP
from jointstat.garble.local import run_locally
from jointstat.primitives.aes import aes_blocks_per_second

REPEATS = 3
DEFAULT_WIDTH = 1 << 14


def wide_program(and_gates: int, width: int) -> Program:
    """A program of exactly ``and_gates`` AND gates in calls of ``width`` lanes (the last may be narrower)."""

    def run(bld: Builder) -> None:
        prev = bld.input(Party.GARBLER, width)
        cur = bld.input(Party.EVALUATOR, width)
        left = and_gates
        while left > 0:
            n = min(width, left)
            mixed = bld.and_(cur[:n], cur.roll(1, axis=0)[:n])  # every lane with its neighbour: no AND folds
            nxt = bld.xor(mixed, prev[:n])
            prev, cur = cur, (nxt if n == width else concat([nxt, cur[n:]]))
            left -= n
        bld.output(Party.EVALUATOR, cur[: width // 2])
        bld.output(Party.GARBLER, cur[width // 2 :])

    return Program.of(run, name=f"wide program of {and_gates} AND gates")


_speed: list[Speed] = []


def measured_speed(and_gates: int = 1 << 19) -> Speed:
    """This machine's garbling and evaluation speed on the wide program (one short run, cached per process)."""
    if not _speed:
        figures = measure(wide_program(and_gates, DEFAULT_WIDTH), check=False)
        _speed.append(
            Speed(and_gates / max(figures["garble_s"], 1e-9), and_gates / max(figures["evaluate_s"], 1e-9))
        )
    return _speed[0]


def measure(program: Program, check: bool) -> dict[str, float]:
    rng = np.random.default_rng(11)
    bits = {p: rng.integers(0, 2, program.n_inputs(p), dtype=np.uint8) for p in Party}
    result = run_locally(program.run, bits)
    if check:
        from jointstat.circuit.backend import PlainBackend

        plain = PlainBackend(bits)
        program.run(Builder(plain))
        if not all(np.array_equal(plain.outputs(p), result.outputs[p]) for p in Party):
            raise RuntimeError("garbled evaluation disagrees with plain evaluation")
    return {
        "garble_s": result.garble_seconds,
        "evaluate_s": result.evaluate_seconds,
        "table_bytes": float(result.table_bytes),
    }


def run(and_gates: int, width: int, as_json: bool) -> int:
    t0 = time.perf_counter()
    program = wide_program(and_gates, width)
    t1 = time.perf_counter()
    # Three garblings, each with fresh Δ and labels; the median of each side's time is reported (a single run of a
    # fraction of a second is at the mercy of whatever else the two cores are doing).
    runs = [measure(program, check=and_gates <= 1 << 22 and i == 0) for i in range(REPEATS)]
    figures = {key: float(np.median([r[key] for r in runs])) for key in runs[0]}
    n_and = program.size.and_gates
    emit(
        "garbling benchmark (one process, tables streamed garbler → evaluator)",
        {
            "and_gates": n_and,
            "garble_and_per_s": round(n_and / figures["garble_s"], 1),
            "evaluate_and_per_s": round(n_and / figures["evaluate_s"], 1),
            "aes_blocks_per_s": round(aes_blocks_per_second(batch=4 * STEP), 1),
            "table_bytes_per_and": figures["table_bytes"] / n_and,
            "peak_rss_mib": round(peak_rss_mib(), 1),
            "width": width,
            "and_calls": program.size.and_calls,
            "count_s": round(t1 - t0, 3),
            "garble_s": round(figures["garble_s"], 3),
            "evaluate_s": round(figures["evaluate_s"], 3),
            "repeats": REPEATS,
        },
        as_json,
    )
    return 0
