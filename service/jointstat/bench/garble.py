"""``jointstat bench garble``: garbling and evaluation speed of a wide program, tables streamed between them.

The program: ``width`` lanes of state; each round ANDs every lane with its neighbour (the state rotated by one
lane) and XORs in the previous state, so every AND call has exactly ``width`` gates (the last may have fewer), as
the word operations of a lane-parallel statistic do. The garbler's and the evaluator's programs alternate chunk by
chunk in one process (``garble.local``); this module times each side's steps apart (``timed_run``; the core reads
no clock), and memory stays that of the state, whatever the number of gates. Speeds are the median over three garblings.
"""

from __future__ import annotations

import time
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from jointstat.bench.report import emit, peak_rss_mib
from jointstat.circuit.bits import concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.plan import Speed
from jointstat.circuit.program import Program
from jointstat.garble.backends import DEFAULT_CHUNK_BYTES
from jointstat.garble.halfgates import STEP
from jointstat.garble.local import LocalRun, LocalSession
from jointstat.primitives.aes import FixedKeyAES
from jointstat.primitives.blocks import BLOCK_DTYPE

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


@dataclass
class TimedRun:
    """A one-process run (``garble.local``) and the seconds each side spent in its own steps."""

    run: LocalRun
    garble_s: float
    evaluate_s: float


def timed_run(
    program: Program, inputs: Mapping[Party, np.ndarray], *, chunk_bytes: int = DEFAULT_CHUNK_BYTES
) -> TimedRun:
    """Garble and evaluate ``program`` once in this process, timing the garbler's and the evaluator's steps apart."""
    clock = time.perf_counter
    session = LocalSession(program.run, inputs, chunk_bytes=chunk_bytes)
    t0 = clock()
    session.start_evaluator()
    garble_s, evaluate_s = 0.0, clock() - t0
    while True:
        t0 = clock()
        chunk = session.garble_chunk()
        t1 = clock()
        garble_s += t1 - t0
        if chunk is None:
            break
        session.evaluate_chunk(chunk)
        evaluate_s += clock() - t1
    t0 = clock()
    session.finish_evaluator()
    t1 = clock()
    run = session.finish()
    evaluate_s += t1 - t0
    garble_s += clock() - t1
    return TimedRun(run, garble_s, evaluate_s)


def aes_blocks_per_second(batch: int = 1 << 14, seconds: float = 0.3) -> float:
    """Raw fixed-key AES throughput in this process at the given batch size (the benchmarks' yardstick)."""
    perm = FixedKeyAES()
    x = np.zeros((batch, 2), dtype=BLOCK_DTYPE)
    out = np.empty_like(x)
    done = 0
    start = time.perf_counter()
    while True:
        perm.permute(x, out=out)
        done += batch
        elapsed = time.perf_counter() - start
        if elapsed >= seconds:
            return done / elapsed


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
    timed = timed_run(program, bits)
    result = timed.run
    if check:
        from jointstat.circuit.backend import PlainBackend

        plain = PlainBackend(bits)
        program.run(Builder(plain))
        if not all(np.array_equal(plain.outputs(p), result.outputs[p]) for p in Party):
            raise RuntimeError("garbled evaluation disagrees with plain evaluation")
    return {
        "garble_s": timed.garble_s,
        "evaluate_s": timed.evaluate_s,
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
