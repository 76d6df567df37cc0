"""The garbler's (OT-extension sender's) view does not depend on the evaluator's choice bits.

Statistical test. Over RUNS independent protocol runs of COUNT OTs with fresh random choice bits r, we
take what the garbler sees in the extension phase — the 128 columns u^i it receives, and the columns d^i =
u^i ⊕ G(k_i^{s_i}) it can compute with its own base-OT keys — and count, for every bit, whether it equals
the choice bit r_j of its OT. If the view is independent of r, each count is Binomial(n, 1/2). We run
two-sided z-tests on the total count, on the count of each of the 128 columns and on the count of each of
the COUNT OT positions, for both u and d (1 + 128 + COUNT tests each, 2 · 641 = 1282 in all). Each test
uses the threshold z* with two-sided tail ALPHA / 1282 (z* ≈ 6.1), so by the union bound the false-alarm
rate of the whole test is at most ALPHA = 10^-6 (the normal approximation is excellent at n ≥ 8192 trials
per count).

Negative controls show the same statistic would catch a leak: applied to u^i ⊕ G(k_i^0) ⊕ G(k_i^1) (which
is r; this needs the evaluator's keys, so it is not the garbler's view), and to the view of a broken
evaluator that sends t^i ⊕ r without the second PRG mask, it is far beyond z*.
"""

from __future__ import annotations

import math

import numpy as np
from jointstat.ot import (
    BaseOTReceiver,
    BaseOTSender,
    ExtensionReceiver,
    ExtensionSender,
    OTMessage,
    run_pipe,
)
from jointstat.ot.base import random_choice_bits
from jointstat.ot.messages import EXTENSION_COLUMNS
from jointstat.primitives.aes import prg_expand
from jointstat.primitives.blocks import random_blocks

RUNS = 64
COUNT = 512
ALPHA = 1e-6
TESTS_PER_FAMILY = 1 + 128 + COUNT
FAMILIES = 2


def two_sided_threshold(alpha: float) -> float:
    """z with P(|N(0,1)| > z) = alpha, by bisection on erfc."""
    low, high = 0.0, 40.0
    for _ in range(200):
        mid = (low + high) / 2
        if math.erfc(mid / math.sqrt(2)) > alpha:
            low = mid
        else:
            high = mid
    return high


Z_STAR = two_sided_threshold(ALPHA / (FAMILIES * TESTS_PER_FAMILY))


class Agreement:
    """Counts of view bits equal to the choice bit of their OT: per column, per OT position, in total."""

    def __init__(self) -> None:
        self.per_column = np.zeros(128, dtype=np.int64)
        self.per_position = np.zeros(COUNT, dtype=np.int64)
        self.runs = 0

    def add(self, view_columns: np.ndarray, choices: np.ndarray) -> None:
        bits = np.unpackbits(view_columns, axis=1, bitorder="little")[:, :COUNT]
        same = bits == choices[None, :]
        self.per_column += same.sum(axis=1)
        self.per_position += same.sum(axis=0)
        self.runs += 1

    def worst_z(self) -> float:
        def z(successes: np.ndarray | int, trials: int) -> np.ndarray:
            return np.abs((np.asarray(successes) - trials / 2) / math.sqrt(trials / 4))

        total = int(self.per_column.sum())
        return float(
            max(
                z(total, self.runs * 128 * COUNT).max(),
                z(self.per_column, self.runs * COUNT).max(),
                z(self.per_position, self.runs * 128).max(),
            )
        )


def prg_columns(keys: list[bytes]) -> np.ndarray:
    return np.stack([prg_expand(key, COUNT // 8) for key in keys])


def test_the_threshold_is_the_two_sided_normal_quantile_scipy_gives_about_6_1() -> None:
    # The bisection above against an independent reference: scipy's inverse survival function of N(0, 1) at half the
    # per-test level (two-sided), and the docstring's z* ≈ 6.1.
    from scipy.stats import norm

    per_test = ALPHA / (FAMILIES * TESTS_PER_FAMILY)
    assert math.isclose(Z_STAR, float(norm.isf(per_test / 2)), rel_tol=1e-9)
    assert round(Z_STAR, 1) == 6.1


def test_garbler_view_is_independent_of_choices() -> None:
    received = Agreement()
    derived = Agreement()
    control_unmasked = Agreement()
    control_broken = Agreement()
    for _ in range(RUNS):
        session = random_blocks(1).tobytes()
        s = random_choice_bits(128)
        base_sender, base_receiver = BaseOTSender(session), BaseOTReceiver(session, s)  # evaluator, garbler
        run_pipe(base_sender, base_receiver)
        delta = random_blocks(1)[0].copy()
        delta[0] |= np.uint64(1)
        choices = random_choice_bits(COUNT)
        garbler = ExtensionSender(base_receiver.keys, s, delta, COUNT)
        evaluator = ExtensionReceiver(base_sender.keys, choices)
        to_garbler: list[OTMessage] = []

        def keep(to: str, message: OTMessage, sink: list[OTMessage] = to_garbler) -> None:
            if to == "second":
                sink.append(message)

        run_pipe(evaluator, garbler, observe=keep)
        (columns_message,) = [m for m in to_garbler if m.kind == EXTENSION_COLUMNS]
        u = np.frombuffer(columns_message.payload, dtype=np.uint8).reshape(128, COUNT // 8)

        own = prg_columns(base_receiver.keys)  # G(k_i^{s_i}): computable by the garbler
        received.add(u, choices)
        derived.add(u ^ own, choices)

        g0 = prg_columns([pair[0] for pair in base_sender.keys])  # evaluator secrets: controls only
        g1 = prg_columns([pair[1] for pair in base_sender.keys])
        control_unmasked.add(u ^ g0 ^ g1, choices)
        packed = np.packbits(choices, bitorder="little")
        broken_u = g0 ^ packed[None, :]  # a buggy evaluator sending t ⊕ r
        control_broken.add(broken_u ^ own, choices)

    assert received.worst_z() < Z_STAR, received.worst_z()
    assert derived.worst_z() < Z_STAR, derived.worst_z()
    assert control_unmasked.worst_z() > 10 * Z_STAR
    assert control_broken.worst_z() > 10 * Z_STAR
