"""``jointstat bench ot``: wall time of 128 Chou–Orlandi base OTs and the rate of IKNP correlated-OT
extension.

Theory of operation: both parties run in this one process, connected by the in-memory pipe of ``ot.pipe``, so
every figure is the real wall time of both sides' work together (on one core, as the pipe is sequential).

* ``base_ot_seconds`` — 128 base OTs, both sides, the median of three runs
  (``BaseOTSender``/``BaseOTReceiver``).
* ``extension_ot_per_s`` — ``count`` correlated OTs by the extension phase alone (``ExtensionSender``/
  ``ExtensionReceiver``, started from the keys of the last base-OT run), divided by its wall time.
* ``bytes_per_ot`` — all payload bytes of the extension phase, both directions, over ``count``.
* ``end_to_end_seconds`` — the whole ``CorrelatedOTSender``/``CorrelatedOTReceiver`` protocol once more,
  for scale.
* ``working_mib_beyond_outputs`` — in one more run of that protocol, traced by ``tracemalloc`` (numpy reports its
  arrays to it), the peak of what both sides held above what they hold at the end (the two ``count``-label
  output arrays): the batches in flight, which the batch size and the receiver's window bound, not ``count``.

Each run's output is checked (the evaluator's labels equal K ⊕ choices·Δ) before any figure is printed; a
wrong result exits with status 1 and prints nothing but the failure.
"""

from __future__ import annotations

import os
import statistics
import sys
import time
import tracemalloc

import numpy as np

from jointstat.bench.report import emit, peak_rss_mib
from jointstat.ot import (
    BaseOTReceiver,
    BaseOTSender,
    CorrelatedOTReceiver,
    CorrelatedOTSender,
    ExtensionReceiver,
    ExtensionSender,
    run_pipe,
)
from jointstat.ot.base import random_choice_bits
from jointstat.ot.messages import EXTENSION_COLUMNS, EXTENSION_CORRECTIONS
from jointstat.primitives.blocks import random_blocks, select_mask

BASE_RUNS = 3


def _fresh_delta() -> np.ndarray:
    delta = random_blocks(1)[0].copy()
    delta[0] |= np.uint64(1)
    return delta


def run(count: int, as_json: bool) -> int:
    if count < 1:
        print("jointstat bench ot: --count must be at least 1", file=sys.stderr)
        return 2
    session_id = os.urandom(16)

    base_times = []
    for _ in range(BASE_RUNS):
        base_choices = random_choice_bits(128)
        base_sender = BaseOTSender(session_id)
        base_receiver = BaseOTReceiver(session_id, base_choices)
        started = time.perf_counter()
        run_pipe(base_sender, base_receiver)
        base_times.append(time.perf_counter() - started)
        chosen = [pair[c] for pair, c in zip(base_sender.keys, base_choices, strict=True)]
        if chosen != base_receiver.keys:
            print("jointstat bench ot: base OT gave wrong keys", file=sys.stderr)
            return 1

    delta = _fresh_delta()
    choices = random_choice_bits(count)
    ext_sender = ExtensionSender(base_receiver.keys, base_choices, delta, count)
    ext_receiver = ExtensionReceiver(base_sender.keys, choices)
    started = time.perf_counter()
    stats = run_pipe(ext_receiver, ext_sender)
    extension_seconds = time.perf_counter() - started
    if not np.array_equal(ext_receiver.labels, ext_sender.zero_labels ^ (select_mask(choices) & delta)):
        print("jointstat bench ot: OT extension gave wrong labels", file=sys.stderr)
        return 1
    extension_bytes = stats.bytes_of(EXTENSION_COLUMNS, EXTENSION_CORRECTIONS)
    del ext_sender, ext_receiver

    delta = _fresh_delta()
    sender = CorrelatedOTSender(session_id, delta, count)
    receiver = CorrelatedOTReceiver(session_id, choices)
    started = time.perf_counter()
    end_to_end = run_pipe(receiver, sender)
    end_to_end_seconds = time.perf_counter() - started
    if not np.array_equal(receiver.labels, sender.zero_labels ^ (select_mask(choices) & delta)):
        print("jointstat bench ot: correlated OT gave wrong labels", file=sys.stderr)
        return 1

    working_bytes = _traced_working_bytes(session_id, count)
    if working_bytes is None:
        print("jointstat bench ot: correlated OT gave wrong labels", file=sys.stderr)
        return 1

    figures = {
        "count": count,
        "base_ot_seconds": statistics.median(base_times),
        "extension_ot_per_s": count / extension_seconds,
        "bytes_per_ot": extension_bytes / count,
        "extension_seconds": extension_seconds,
        "end_to_end_seconds": end_to_end_seconds,
        "largest_message_bytes": end_to_end.largest_payload,
        "working_mib_beyond_outputs": round(working_bytes / 2**20, 2),
        "peak_rss_mib": peak_rss_mib(),
    }
    emit(
        "OT: 128 Chou–Orlandi base OTs, IKNP correlated-OT extension (both sides, one process)",
        figures,
        as_json,
    )
    return 0


def _traced_working_bytes(session_id: bytes, count: int) -> int | None:
    """Peak traced bytes above the final ones over one correlated-OT run of ``count``; None if its labels are wrong."""
    delta = _fresh_delta()
    choices = random_choice_bits(count)
    sender = CorrelatedOTSender(session_id, delta, count)
    receiver = CorrelatedOTReceiver(session_id, choices)
    tracemalloc.start()
    try:
        run_pipe(receiver, sender)
        final, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    if not np.array_equal(receiver.labels, sender.zero_labels ^ (select_mask(choices) & delta)):
        return None
    return peak - final


_ot_speed: list[tuple[float, float]] = []


def measured_ot_speed(count: int = 1 << 14) -> tuple[float, float]:
    """This machine's (base-OT seconds, extension OTs per second): one run of 128 base OTs and ``count`` extended
    OTs, both sides in this process (as ``run`` measures them), cached per process. The labels are checked."""
    if not _ot_speed:
        session_id = os.urandom(16)
        base_choices = random_choice_bits(128)
        base_sender = BaseOTSender(session_id)
        base_receiver = BaseOTReceiver(session_id, base_choices)
        started = time.perf_counter()
        run_pipe(base_sender, base_receiver)
        base_seconds = time.perf_counter() - started
        delta = _fresh_delta()
        choices = random_choice_bits(count)
        ext_sender = ExtensionSender(base_receiver.keys, base_choices, delta, count)
        ext_receiver = ExtensionReceiver(base_sender.keys, choices)
        started = time.perf_counter()
        run_pipe(ext_receiver, ext_sender)
        seconds = time.perf_counter() - started
        if not np.array_equal(ext_receiver.labels, ext_sender.zero_labels ^ (select_mask(choices) & delta)):
            raise RuntimeError("OT extension gave wrong labels while measuring its speed")
        _ot_speed.append((base_seconds, count / max(seconds, 1e-9)))
    return _ot_speed[0]
