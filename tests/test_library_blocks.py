"""The library's shared blocks: exact AND counts on the count backend (Kolesnikov–Sadeghi–Schneider 2009; Batcher
1968 for the merger) and algebraic laws on the plain backend, against Python integers and ``sorted``."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.backend import CountBackend, PlainBackend
from jointstat.circuit.bits import Bits
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int, int_to_bits
from jointstat.circuit.library import blocks
from jointstat.circuit.model import Party

G, E = Party.GARBLER, Party.EVALUATOR


def plain(g: np.ndarray | None = None, e: np.ndarray | None = None) -> Builder:
    """A builder over the plain backend holding the garbler's bits ``g`` and the evaluator's bits ``e``."""
    inputs = {}
    if g is not None:
        inputs[G] = np.asarray(g).reshape(-1)
    if e is not None:
        inputs[E] = np.asarray(e).reshape(-1)
    return Builder(PlainBackend(inputs))


def ints(bits: Bits, *, signed: bool = False) -> list[int]:
    assert bits.data is not None
    return [int(v) for v in np.atleast_1d(bits_to_int(bits.data, signed=signed))]


def bit_list(bits: Bits) -> list[int]:
    assert bits.data is not None
    return [int(v) for v in np.atleast_1d(bits.data)]


def count_ands(make: Callable[[Builder, Bits, Bits, Bits], object], n: int) -> int:
    bld = Builder(CountBackend())
    x, y = bld.input(G, n), bld.input(E, n)
    s = bld.input(E, 1)[0]
    make(bld, x, y, s)
    return bld.and_gates


@pytest.mark.parametrize("n", [1, 2, 7, 32, 64])
def test_adder_comparator_and_multiplexer_cost_n_and_gates(n: int) -> None:
    assert count_ands(lambda b, x, y, s: b.add_carry(x, y), n) == n
    assert count_ands(lambda b, x, y, s: blocks.greater_than(b, x, y), n) == n
    assert count_ands(lambda b, x, y, s: b.select(s, x, y), n) == n


def test_the_comparator_needs_one_not_gate_per_lane_and_compare_swap_costs_key_plus_element_bits() -> None:
    backend = CountBackend()
    bld = Builder(backend)
    blocks.greater_than(bld, bld.input(G, (3, 16)), bld.input(E, (3, 16)))
    assert backend.not_gates == 3 and backend.and_gates == 3 * 16  # ¬y₀ only, not ¬y
    assert blocks.and_per_compare_swap(33) == 66
    assert blocks.and_per_compare_swap(10, 7) == 10 + 17


def test_a_comparison_with_a_public_word_folds() -> None:
    backend = CountBackend()
    bld = Builder(backend)
    blocks.greater_than(bld, bld.input(G, (1, 8)), bld.constant_word([0b1000_0000], 8))
    assert backend.and_gates == 7  # bit 0 of y is a public 0: x₀ ∧ ¬0 folds


@settings(max_examples=30)
@given(st.integers(1, 12), st.data())
def test_greater_than_and_compare_swap_order_pairs(w: int, data: st.DataObject) -> None:
    xs = data.draw(st.lists(st.integers(0, 2**w - 1), min_size=4, max_size=4))
    ys = data.draw(st.lists(st.integers(0, 2**w - 1), min_size=4, max_size=4))
    bld = plain(int_to_bits(xs, w), int_to_bits(ys, w))
    x, y = bld.input(G, (4, w)), bld.input(E, (4, w))
    res = blocks.compare_swap(bld, x, y)
    assert bit_list(res.swap) == [int(a > b) for a, b in zip(xs, ys, strict=True)]
    assert bit_list(blocks.greater_than(bld, x, y)) == bit_list(res.swap)
    assert ints(res.low) == [min(a, b) for a, b in zip(xs, ys, strict=True)]
    assert ints(res.high) == [max(a, b) for a, b in zip(xs, ys, strict=True)]


@settings(max_examples=30)
@given(st.integers(1, 8), st.integers(1, 8), st.data())
def test_compare_swap_moves_the_payload_with_its_key(kw: int, pw: int, data: st.DataObject) -> None:
    keys = [data.draw(st.lists(st.integers(0, 2**kw - 1), min_size=3, max_size=3)) for _ in range(2)]
    loads = [data.draw(st.lists(st.integers(0, 2**pw - 1), min_size=3, max_size=3)) for _ in range(2)]
    bld = plain(
        np.concatenate([int_to_bits(keys[0], kw), int_to_bits(loads[0], pw)], axis=1),
        np.concatenate([int_to_bits(keys[1], kw), int_to_bits(loads[1], pw)], axis=1),
    )
    a, b = bld.input(G, (3, kw + pw)), bld.input(E, (3, kw + pw))
    res = blocks.compare_swap(bld, a[:, :kw], b[:, :kw], a[:, kw:], b[:, kw:])
    assert res.low_payload is not None and res.high_payload is not None
    for i in range(3):
        first, second = (keys[0][i], loads[0][i]), (keys[1][i], loads[1][i])
        low, high = (second, first) if first[0] > second[0] else (first, second)
        assert (ints(res.low)[i], ints(res.low_payload)[i]) == low
        assert (ints(res.high)[i], ints(res.high_payload)[i]) == high


@settings(max_examples=30)
@given(st.lists(st.integers(0, 63), max_size=9), st.lists(st.integers(0, 63), max_size=7))
def test_merging_two_sorted_lists_sorts_their_union_and_routes_bits_back(a: list[int], b: list[int]) -> None:
    a, b = sorted(a), sorted(b)
    bld = plain(int_to_bits(a, 6), int_to_bits(b, 6))
    xa, xb = bld.input(G, (len(a), 6)), bld.input(E, (len(b), 6))
    seq, layout = blocks.arrange(xa, xb, bld.constant(np.ones(6, dtype=np.uint8)))
    assert layout.size == blocks.merge_size(len(a) + len(b))
    before = bld.and_gates
    merged = blocks.bitonic_merge(bld, seq)
    assert merged.comparators == blocks.bitonic_comparators(layout.size)
    assert bld.and_gates - before <= merged.comparators * blocks.and_per_compare_swap(6)  # padding folds
    marks = np.zeros(layout.size, dtype=np.uint8)
    marks[0] = 1  # mark the smallest merged element and carry the mark back to where it came from
    before = bld.and_gates
    back = blocks.route_back(bld, bld.constant(marks), merged.swaps)
    assert bld.and_gates - before <= merged.comparators
    assert ints(merged.keys) == sorted(a + b) + [63] * (layout.size - len(a) - len(b))  # sorted(): Python
    where = bit_list(back)
    if a or b:
        origin = int(np.argmax(where))
        values = [*a, *[63] * (layout.size - len(a) - len(b)), *b[::-1]]
        assert sum(where) == 1 and values[origin] == min(a + b)


def test_a_merge_of_secret_elements_costs_exactly_its_comparators() -> None:
    # Batcher 1968: (M/2)·log2 M comparators; each a compare-and-swap of 2·k AND gates (KSS 2009)
    backend = CountBackend()
    bld = Builder(backend)
    seq = bld.input(G, (64, 9))
    merged = blocks.bitonic_merge(bld, seq)
    assert merged.comparators == blocks.bitonic_comparators(64) == 32 * 6
    assert backend.and_gates == merged.comparators * blocks.and_per_compare_swap(9) == 192 * 18
    assert len(merged.swaps) == 6 and all(s.shape == (32,) for s in merged.swaps)
    with pytest.raises(ValueError, match="bitonic merge: 12 elements is not a power of two"):
        blocks.bitonic_merge(bld, seq[:12])


@settings(max_examples=30)
@given(st.lists(st.integers(-(2**9), 2**9 - 1), min_size=1, max_size=13), st.booleans())
def test_tree_sums_never_overflow(values: list[int], signed: bool) -> None:
    vals = values if signed else [v + 2**9 for v in values]
    bld = plain(int_to_bits(vals, 10))
    s = blocks.tree_sum(bld, bld.input(G, (len(vals), 10)), signed=signed)
    assert s.shape[-1] == 10 + (len(vals) - 1).bit_length()
    assert ints(s, signed=signed) == [sum(vals)]


@settings(max_examples=30)
@given(st.lists(st.integers(0, 1), max_size=40))
def test_count_bits_counts_the_ones(flags: list[int]) -> None:
    bld = plain(np.array(flags, dtype=np.uint8))
    n = blocks.count_bits(bld, bld.input(G, len(flags)))
    assert n.shape == (max(1, len(flags).bit_length()),)
    assert ints(n) == [sum(flags)]


@settings(max_examples=40)
@given(st.integers(1, 14), st.integers(1, 8), st.data())
def test_restoring_division_is_divmod(wn: int, wd: int, data: st.DataObject) -> None:
    n = data.draw(st.integers(0, 2**wn - 1))
    d = data.draw(st.integers(1, 2**wd - 1))
    bld = plain(int_to_bits(n, wn), int_to_bits(d, wd))
    q, r = blocks.divide(bld, bld.input(G, wn), bld.input(E, wd))
    assert (ints(q)[0], ints(r)[0]) == divmod(n, d)


@settings(max_examples=40)
@given(st.integers(1, 4), st.integers(1, 8), st.integers(1, 6), st.data())
def test_division_with_a_bounded_quotient_takes_a_dividend_wider_than_the_divisor(
    wd: int, q: int, extra: int, data: st.DataObject
) -> None:
    # The caller knows ⌊n / d⌋ < 2^q; the dividend may carry more leading bits than the divisor has (they are zero
    # whenever the bound holds: n >> q < d < 2^wd), e.g. a sum over many rows divided by a count of few.
    wn = q + wd + 1 + extra
    d = data.draw(st.integers(1, 2**wd - 1))
    n = data.draw(st.integers(0, min(2**wn - 1, d * 2**q - 1)))
    bld = plain(int_to_bits(n, wn), int_to_bits(d, wd))
    quotient, remainder = blocks.divide(bld, bld.input(G, wn), bld.input(E, wd), quotient_bits=q)
    assert quotient.shape == (q,)
    assert (ints(quotient)[0], ints(remainder)[0]) == divmod(n, d)


@settings(max_examples=40)
@given(st.integers(-(2**11), 2**11 - 1), st.integers(1, 200), st.integers(0, 6))
def test_fixed_point_division_rounds_toward_zero(num: int, den: int, extra: int) -> None:
    bld = plain(int_to_bits(num, 12), int_to_bits(den, 8))
    x = blocks.Number(bld.input(G, 12), True, 1)
    res = blocks.divide_fixed(bld, x, bld.input(E, 8), extra)
    q = abs(num) * 2**extra // den
    assert res.frac == 1 + extra
    assert ints(res.wires, signed=True) == [q if num >= 0 else -q]


@settings(max_examples=30)
@given(st.integers(1, 9), st.integers(1, 9), st.data())
def test_full_products(a: int, b: int, data: st.DataObject) -> None:
    x, y = data.draw(st.integers(0, 2**a - 1)), data.draw(st.integers(0, 2**b - 1))
    bld = plain(int_to_bits(x, a), int_to_bits(y, b))
    p = blocks.multiply_full(bld, bld.input(G, a), bld.input(E, b))
    assert p.shape[-1] == a + b
    assert ints(p) == [x * y]


@settings(max_examples=30)
@given(st.integers(-(2**7), 2**7 - 1), st.integers(0, 1))
def test_negate_if_and_magnitude(value: int, flag: int) -> None:
    bld = plain(int_to_bits(value, 8), np.array([flag], dtype=np.uint8))
    x, f = bld.input(G, 8), bld.input(E, 1)[0]
    assert ints(blocks.negate_if(bld, x, f), signed=True) == [((-value if flag else value) + 128) % 256 - 128]
    mag, sign = blocks.magnitude(bld, blocks.Number(x, True))
    assert ints(mag) == [abs(value) % 256] and bit_list(sign) == [int(value < 0)]


@settings(max_examples=30)
@given(st.lists(st.integers(-(2**5), 2**5 - 1), min_size=2, max_size=6))
def test_order_keys_sort_signed_values_as_unsigned_words(values: list[int]) -> None:
    bld = plain(int_to_bits(values, 6))
    x = blocks.Number(bld.input(G, (len(values), 6)), True)
    key = blocks.order_key(bld, x)
    order = sorted(range(len(values)), key=lambda i: ints(key)[i])
    assert [values[i] for i in order] == sorted(values)
    assert ints(blocks.from_order_key(bld, key, True), signed=True) == values


def test_align_brings_numbers_to_one_scale_for_free() -> None:
    bld = plain(int_to_bits([-3], 6), int_to_bits([5], 4))
    a = blocks.Number(bld.input(G, (1, 6)), True, 2)  # −0.75
    b = blocks.Number(bld.input(E, (1, 4)), False, 0)  # 5
    x, y = blocks.align(bld, a, b)
    assert (x.signed, x.frac, y.signed, y.frac, x.width, y.width) == (True, 2, True, 2, 7, 7)
    assert ints(x.wires, signed=True) == [-3] and ints(y.wires, signed=True) == [20]
    assert bld.and_gates == bld.backend.xor_gates == 0
    with pytest.raises(ValueError, match=r"rescale: cannot drop fraction bits \(2 → 1\)"):
        blocks.rescale(bld, a, 1)


@pytest.mark.parametrize("size", [1, 5, 8, 13, 64])
def test_one_hot_selection_reads_the_chosen_word_for_about_one_and_per_position(size: int) -> None:
    k = max(1, (size - 1).bit_length())
    rng = np.random.default_rng(size)
    words = [int(v) for v in rng.integers(0, 256, size)]
    for index in sorted({0, size // 2, size - 1}):
        bld = plain(int_to_bits(index, k), int_to_bits(words, 8))
        onehot = blocks.one_hot(bld, bld.input(G, k), size)
        decoder = bld.and_gates
        chosen = blocks.select(bld, onehot, bld.input(E, (size, 8)))
        assert decoder <= size
        assert bld.and_gates - decoder == 8 * size  # one AND per bit per position
        assert bit_list(onehot) == [int(i == index) for i in range(size)]
        assert ints(chosen) == [words[index]]


@settings(max_examples=30)
@given(st.integers(1, 10), st.integers(-5, 1100), st.data())
def test_at_least_a_public_bound(w: int, bound: int, data: st.DataObject) -> None:
    value = data.draw(st.integers(0, 2**w - 1))
    bld = plain(int_to_bits(value, w))
    assert bit_list(blocks.at_least(bld, bld.input(G, w), bound)) == [int(value >= bound)]


def test_gating_zeroes_refused_results() -> None:
    bld = plain(np.ones(5, dtype=np.uint8), np.zeros(1, dtype=np.uint8))
    v, allow = bld.input(G, 5), bld.input(E, 1)[0]
    assert bit_list(blocks.gate(bld, v, allow)) == [0] * 5
    assert bld.and_gates == 5
