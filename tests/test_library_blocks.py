"""The library's shared blocks: exact AND counts (Kolesnikov–Sadeghi–Schneider 2009) and algebraic laws."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int, int_to_bits
from jointstat.circuit.layers import evaluate_plain, schedule
from jointstat.circuit.library import blocks
from jointstat.circuit.model import GateKind, Party


def evaluate(
    bld: Builder, outputs: list[np.ndarray], g: np.ndarray, e: np.ndarray | None = None
) -> list[np.ndarray]:
    sizes = []
    for o in outputs:
        bld.output(Party.GARBLER, o)
        sizes.append(np.asarray(o).size)
    c = bld.build()
    inputs = {Party.GARBLER: g.reshape(-1)}
    if e is not None:
        inputs[Party.EVALUATOR] = e.reshape(-1)
    bits = evaluate_plain(schedule(c), inputs)[Party.GARBLER]
    return [
        p.reshape(np.asarray(o).shape)
        for p, o in zip(np.split(bits, np.cumsum(sizes)[:-1]), outputs, strict=True)
    ]


@pytest.mark.parametrize("n", [1, 2, 7, 32, 64])
def test_adder_comparator_and_multiplexer_cost_n_and_gates(n: int) -> None:
    def ands(make: object) -> int:
        bld = Builder()
        x, y = bld.input(Party.GARBLER, n), bld.input(Party.EVALUATOR, n)
        s = bld.input(Party.EVALUATOR, 1)[0]
        make(bld, x, y, s)  # type: ignore[operator]
        return bld.and_gates

    assert ands(lambda b, x, y, s: b.add_carry(x, y)) == n
    assert ands(lambda b, x, y, s: blocks.greater_than(b, x, y)) == n
    assert ands(lambda b, x, y, s: b.select(s, x, y)) == n


def test_the_comparator_needs_no_not_gates_and_compare_swap_costs_key_plus_element_bits() -> None:
    bld = Builder()
    x, y = bld.input(Party.GARBLER, (3, 16)), bld.input(Party.EVALUATOR, (3, 16))
    blocks.greater_than(bld, x, y)
    c = bld.build()
    assert c.count(GateKind.NOT) == 0 and c.count(GateKind.AND) == 3 * 16
    assert blocks.and_per_compare_swap(33) == 66
    assert blocks.and_per_compare_swap(10, 7) == 10 + 17


@settings(max_examples=30)
@given(st.integers(1, 12), st.data())
def test_greater_than_and_compare_swap_order_pairs(w: int, data: st.DataObject) -> None:
    xs = data.draw(st.lists(st.integers(0, 2**w - 1), min_size=4, max_size=4))
    ys = data.draw(st.lists(st.integers(0, 2**w - 1), min_size=4, max_size=4))
    bld = Builder()
    x, y = bld.input(Party.GARBLER, (4, w)), bld.input(Party.EVALUATOR, (4, w))
    res = blocks.compare_swap(bld, x, y)
    gt, lo, hi = evaluate(bld, [res.swap, res.low, res.high], int_to_bits(xs, w), int_to_bits(ys, w))
    assert list(gt) == [int(a > b) for a, b in zip(xs, ys, strict=True)]
    assert list(bits_to_int(lo)) == [min(a, b) for a, b in zip(xs, ys, strict=True)]
    assert list(bits_to_int(hi)) == [max(a, b) for a, b in zip(xs, ys, strict=True)]


@settings(max_examples=30)
@given(st.lists(st.integers(0, 63), max_size=9), st.lists(st.integers(0, 63), max_size=7))
def test_merging_two_sorted_lists_sorts_their_union_and_routes_bits_back(a: list[int], b: list[int]) -> None:
    a, b = sorted(a), sorted(b)
    bld = Builder()
    xa, xb = bld.input(Party.GARBLER, (len(a), 6)), bld.input(Party.EVALUATOR, (len(b), 6))
    seq, layout = blocks.arrange(xa, xb, np.ones(6, dtype=np.int64))
    merged = blocks.bitonic_merge(bld, seq)
    assert merged.comparators == blocks.bitonic_comparators(layout.size)
    marks = np.zeros(layout.size, dtype=np.int64)
    marks[0] = 1  # mark the smallest merged element and carry the mark back to where it came from
    before = bld.and_gates
    back = blocks.route_back(bld, marks, merged)
    assert bld.and_gates - before <= merged.comparators
    keys, where = evaluate(bld, [merged.keys, back], int_to_bits(a, 6), int_to_bits(b, 6) if b else None)
    assert list(bits_to_int(keys)) == sorted(a + b) + [63] * (layout.size - len(a) - len(b))
    if a or b:
        origin = int(np.argmax(where))
        values = [*a, *[63] * (layout.size - len(a) - len(b)), *b[::-1]]
        assert where.sum() == 1 and values[origin] == min(a + b)


@settings(max_examples=30)
@given(st.lists(st.integers(-(2**9), 2**9 - 1), min_size=1, max_size=13), st.booleans())
def test_tree_sums_never_overflow(values: list[int], signed: bool) -> None:
    vals = values if signed else [v + 2**9 for v in values]
    bld = Builder()
    x = bld.input(Party.GARBLER, (len(vals), 10))
    s = blocks.tree_sum(bld, x, signed=signed)
    assert s.shape[-1] == 10 + (len(vals) - 1).bit_length()
    (got,) = evaluate(bld, [s], int_to_bits(vals, 10))
    assert int(bits_to_int(got, signed=signed)) == sum(vals)


@settings(max_examples=40)
@given(st.integers(1, 14), st.integers(1, 8), st.data())
def test_restoring_division_is_divmod(wn: int, wd: int, data: st.DataObject) -> None:
    n = data.draw(st.integers(0, 2**wn - 1))
    d = data.draw(st.integers(1, 2**wd - 1))
    bld = Builder()
    q, r = blocks.divide(bld, bld.input(Party.GARBLER, wn), bld.input(Party.EVALUATOR, wd))
    gq, gr = evaluate(bld, [q, r], int_to_bits(n, wn), int_to_bits(d, wd))
    assert (int(bits_to_int(gq)), int(bits_to_int(gr))) == divmod(n, d)


@settings(max_examples=40)
@given(st.integers(-(2**11), 2**11 - 1), st.integers(1, 200), st.integers(0, 6))
def test_fixed_point_division_rounds_toward_zero(num: int, den: int, extra: int) -> None:
    bld = Builder()
    x = blocks.Number(bld.input(Party.GARBLER, 12), True, 1)
    res = blocks.divide_fixed(bld, x, bld.input(Party.EVALUATOR, 8), extra)
    (got,) = evaluate(bld, [res.wires], int_to_bits(num, 12), int_to_bits(den, 8))
    q = abs(num) * 2**extra // den
    assert res.frac == 1 + extra
    assert int(bits_to_int(got, signed=True)) == (q if num >= 0 else -q)


@settings(max_examples=30)
@given(st.integers(1, 9), st.integers(1, 9), st.data())
def test_full_products(a: int, b: int, data: st.DataObject) -> None:
    x, y = data.draw(st.integers(0, 2**a - 1)), data.draw(st.integers(0, 2**b - 1))
    bld = Builder()
    p = blocks.multiply_full(bld, bld.input(Party.GARBLER, a), bld.input(Party.EVALUATOR, b))
    assert p.shape[-1] == a + b
    (got,) = evaluate(bld, [p], int_to_bits(x, a), int_to_bits(y, b))
    assert int(bits_to_int(got)) == x * y


@pytest.mark.parametrize("size", [1, 5, 8, 13, 64])
def test_one_hot_selection_reads_the_chosen_word_for_about_one_and_per_position(size: int) -> None:
    k = max(1, (size - 1).bit_length())
    rng = np.random.default_rng(size)
    words = [int(v) for v in rng.integers(0, 256, size)]
    for index in sorted({0, size // 2, size - 1}):
        bld = Builder()
        idx = bld.input(Party.GARBLER, k)
        data = bld.input(Party.EVALUATOR, (size, 8))
        onehot = blocks.one_hot(bld, idx, size)
        decoder = bld.and_gates
        chosen = blocks.select(bld, onehot, data)
        assert decoder <= size
        hot, got = evaluate(bld, [onehot, chosen], int_to_bits(index, k), int_to_bits(words, 8))
        assert list(hot) == [int(i == index) for i in range(size)]
        assert int(bits_to_int(got)) == words[index]


def test_gating_zeroes_refused_results() -> None:
    bld = Builder()
    v, allow = bld.input(Party.GARBLER, 5), bld.input(Party.EVALUATOR, 1)[0]
    (out,) = evaluate(
        bld, [blocks.gate(bld, v, allow)], np.ones(5, dtype=np.uint8), np.zeros(1, dtype=np.uint8)
    )
    assert not out.any()
