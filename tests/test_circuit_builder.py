"""The lane-parallel builder: word arithmetic equals Python integer arithmetic on the plain backend, with the
minimal AND counts on the count backend, and public constants fold.

AND counts follow Kolesnikov–Sadeghi–Schneider (CANS 2009): with free XOR an n-bit adder with carry-out, a
subtractor with borrow, a comparator and a multiplexer each cost exactly n AND gates; addition and subtraction
modulo 2^n cost n − 1 (the last carry is not needed) and equality n − 1 (an AND tree over the XNORs). The
reference for every value is Python's integer arithmetic.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.circuit.backend import CountBackend, PlainBackend
from jointstat.circuit.bits import Bits
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int, int_to_bits
from jointstat.circuit.model import CircuitError, Party

G, E = Party.GARBLER, Party.EVALUATOR
LANES = 6


def plain_builder(xs: list[int], ys: list[int], width: int) -> tuple[Builder, Bits, Bits]:
    """A builder over the plain backend with the garbler's words ``xs`` and the evaluator's ``ys`` as inputs."""
    backend = PlainBackend({G: int_to_bits(xs, width).reshape(-1), E: int_to_bits(ys, width).reshape(-1)})
    bld = Builder(backend)
    return bld, bld.input(G, (len(xs), width)), bld.input(E, (len(ys), width))


def values(bits: Bits, *, signed: bool = False) -> list[int]:
    """The words of plain-backend bits as Python integers."""
    assert bits.data is not None
    return [int(v) for v in bits_to_int(bits.data, signed=signed)]


def flags(bits: Bits) -> list[int]:
    assert bits.data is not None
    return [int(v) for v in bits.data]


def words(width: int, signed: bool = False) -> st.SearchStrategy[list[int]]:
    lo, hi = (-(1 << (width - 1)), (1 << (width - 1)) - 1) if signed else (0, (1 << width) - 1)
    return st.lists(st.integers(lo, hi), min_size=LANES, max_size=LANES)


widths = st.integers(1, 24)
pairs = widths.flatmap(lambda w: st.tuples(st.just(w), words(w), words(w)))
signed_cases = st.booleans().flatmap(lambda s: st.tuples(st.just(s), widths, st.data()))


# -- arithmetic against Python integers --------------------------------------------------------------------------
@given(pairs)
def test_add_sub_and_neg_are_modular(case: tuple[int, list[int], list[int]]) -> None:
    w, xs, ys = case
    m = 1 << w
    bld, x, y = plain_builder(xs, ys, w)
    assert values(bld.add(x, y)) == [(a + b) % m for a, b in zip(xs, ys, strict=True)]
    assert values(bld.sub(x, y)) == [(a - b) % m for a, b in zip(xs, ys, strict=True)]
    assert values(bld.neg(x)) == [-a % m for a in xs]
    assert values(bld.add(x, y, 1)) == [(a + b + 1) % m for a, b in zip(xs, ys, strict=True)]
    carry_in = y[:, 0]  # a secret carry per lane
    assert values(bld.add(x, y, carry_in)) == [(a + b + (b & 1)) % m for a, b in zip(xs, ys, strict=True)]


@given(pairs)
def test_add_carry_and_sub_borrow_report_the_carry(case: tuple[int, list[int], list[int]]) -> None:
    w, xs, ys = case
    bld, x, y = plain_builder(xs, ys, w)
    total, carry = bld.add_carry(x, y)
    assert [s + (c << w) for s, c in zip(values(total), flags(carry), strict=True)] == [
        a + b for a, b in zip(xs, ys, strict=True)
    ]
    diff, ge = bld.sub_borrow(x, y)
    assert values(diff) == [(a - b) % (1 << w) for a, b in zip(xs, ys, strict=True)]
    assert flags(ge) == [int(a >= b) for a, b in zip(xs, ys, strict=True)]


@given(signed_cases)
def test_comparisons_match_python(case: tuple[bool, int, st.DataObject]) -> None:
    signed, w, data = case
    xs, ys = data.draw(words(w, signed)), data.draw(words(w, signed))
    ys[0] = xs[0]  # always include a tie
    bld, x, y = plain_builder(xs, ys, w)
    pairs_ = list(zip(xs, ys, strict=True))
    assert flags(bld.less_than(x, y, signed=signed)) == [int(a < b) for a, b in pairs_]
    assert flags(bld.less_equal(x, y, signed=signed)) == [int(a <= b) for a, b in pairs_]
    assert flags(bld.greater_than(x, y, signed=signed)) == [int(a > b) for a, b in pairs_]
    assert flags(bld.greater_equal(x, y, signed=signed)) == [int(a >= b) for a, b in pairs_]
    assert flags(bld.equal(x, y)) == [int(a == b) for a, b in pairs_]
    assert flags(bld.is_zero(x)) == [int(a == 0) for a in xs]
    low, high = bld.min_max(x, y, signed=signed)
    assert values(low, signed=signed) == [min(a, b) for a, b in pairs_]
    assert values(high, signed=signed) == [max(a, b) for a, b in pairs_]


@given(st.booleans().flatmap(lambda s: st.tuples(st.just(s), st.integers(1, 12), st.data())))
def test_multiply_is_the_product_modulo_the_width(case: tuple[bool, int, st.DataObject]) -> None:
    signed, w, data = case
    xs, ys = data.draw(words(w, signed)), data.draw(words(w, signed))
    bld, x, y = plain_builder(xs, ys, w)
    m = 1 << w
    wrapped = [(a * b) % m for a, b in zip(xs, ys, strict=True)]
    expect = [v - m if signed and v >= m // 2 else v for v in wrapped]
    assert values(bld.multiply(x, y, signed=signed), signed=signed) == expect
    wide = bld.multiply(x, y, signed=signed, width=2 * w)
    assert values(wide, signed=signed) == [a * b for a, b in zip(xs, ys, strict=True)]


@given(st.integers(1, 16).flatmap(lambda w: st.tuples(st.just(w), words(w))))
def test_square_is_the_exact_square_and_never_costs_more_than_multiply(case: tuple[int, list[int]]) -> None:
    n, xs = case
    bld, x, _ = plain_builder(xs, xs, n)
    sq = bld.square(x)
    assert sq.shape == (LANES, 2 * n)
    assert values(sq) == [v * v for v in xs]
    square_ands, multiply_ands = (
        count_ands(lambda b, x, y: b.square(x), n),
        count_ands(lambda b, x, y: b.multiply(x, x, width=2 * n), n),
    )
    assert n * (n - 1) // 2 <= square_ands <= multiply_ands  # the cross products, and the adds of their rows
    if n > 2:
        assert square_ands < multiply_ands


@given(st.integers(1, 12), st.data())
def test_select_and_mux_choose_per_lane(w: int, data: st.DataObject) -> None:
    xs, ys = data.draw(words(w)), data.draw(words(w))
    choice = data.draw(st.lists(st.integers(0, 1), min_size=LANES, max_size=LANES))
    backend = PlainBackend(
        {G: int_to_bits(xs, w).reshape(-1), E: np.concatenate([int_to_bits(ys, w).reshape(-1), choice])}
    )
    bld = Builder(backend)
    x, y, s = bld.input(G, (LANES, w)), bld.input(E, (LANES, w)), bld.input(E, LANES)
    want = [b if c else a for a, b, c in zip(xs, ys, choice, strict=True)]
    assert values(bld.select(s, x, y)) == want
    assert values(bld.mux(s[:, None], x, y)) == want
    assert flags(bld.or_(x[:, 0], y[:, 0])) == [(a | b) & 1 for a, b in zip(xs, ys, strict=True)]


@given(st.lists(st.integers(0, 1), min_size=1, max_size=40))
def test_reductions_are_all_any_and_parity(bits: list[int]) -> None:
    backend = PlainBackend({G: bits})
    bld = Builder(backend)
    x = bld.input(G, (1, len(bits)))
    assert flags(bld.reduce_and(x)) == [int(all(bits))]
    assert flags(bld.reduce_or(x)) == [int(any(bits))]
    assert flags(bld.reduce_xor(x)) == [sum(bits) % 2]
    count = CountBackend()
    cb = Builder(count)
    tree = cb.reduce_and(cb.input(G, len(bits)))
    assert count.and_gates == len(bits) - 1 and tree.depth == (len(bits) - 1).bit_length()


@given(widths.flatmap(lambda w: st.tuples(st.just(w), words(w), st.integers(0, 30))))
def test_shifts_rotations_and_extension_are_free_rewiring(case: tuple[int, list[int], int]) -> None:
    w, xs, k = case
    m = (1 << w) - 1
    kk = k % w
    bld, x, _ = plain_builder(xs, xs, w)
    assert values(bld.shift_left(x, k)) == [(v << k) & m for v in xs]
    assert values(bld.shift_right(x, k)) == [v >> k for v in xs]
    as_signed = [v - (1 << w) if v >> (w - 1) else v for v in xs]
    assert values(bld.shift_right(x, k, signed=True), signed=True) == [v >> k for v in as_signed]
    assert values(bld.rotate_left(x, kk)) == [((v << kk) | (v >> (w - kk))) & m for v in xs]
    assert values(bld.rotate_right(x, kk)) == [((v >> kk) | (v << (w - kk))) & m for v in xs]
    assert values(bld.extend(x, w + 3, signed=True), signed=True) == as_signed
    assert values(bld.extend(x, w + 3)) == xs
    assert values(bld.extend(x, max(1, w - 1))) == [v & ((1 << max(1, w - 1)) - 1) for v in xs]
    backend = bld.backend
    assert (backend.and_gates, backend.xor_gates, backend.not_gates) == (0, 0, 0)


# -- exact AND counts on the count backend --------------------------------------------------------------------------
def count_ands(make: Callable[[Builder, Bits, Bits], object], n: int, lanes: int = 1) -> int:
    backend = CountBackend()
    bld = Builder(backend)
    make(bld, bld.input(G, (lanes, n)), bld.input(E, (lanes, n)))
    return backend.and_gates


@pytest.mark.parametrize("n", [1, 2, 3, 8, 32, 64])
def test_and_counts_are_the_minimal_ones(n: int) -> None:
    # Kolesnikov–Sadeghi–Schneider 2009, per n-bit word
    assert count_ands(lambda b, x, y: b.add_carry(x, y), n) == n
    assert count_ands(lambda b, x, y: b.add(x, y), n) == n - 1
    assert count_ands(lambda b, x, y: b.sub(x, y), n) == n - 1
    assert count_ands(lambda b, x, y: b.sub_borrow(x, y), n) == n
    assert count_ands(lambda b, x, y: b.less_than(x, y), n) == n
    assert count_ands(lambda b, x, y: b.greater_equal(x, y, signed=True), n) == n
    assert count_ands(lambda b, x, y: b.greater_than(x, y), n) == n
    assert count_ands(lambda b, x, y: b.select(y[:, 0], x, y), n) == n
    assert count_ands(lambda b, x, y: b.mux(y[:, :1], x, y), n) == n
    assert count_ands(lambda b, x, y: b.equal(x, y), n) == n - 1
    assert count_ands(lambda b, x, y: b.min_max(x, y), n) == 2 * n
    assert count_ands(lambda b, x, y: b.or_(x, y), n) == n
    assert count_ands(lambda b, x, y: b.neg(x), n) == max(
        0, n - 2
    )  # 0 − x: the constant folds the lowest carry


@pytest.mark.parametrize("lanes", [1, 7, 50_000])
def test_a_word_operation_is_a_few_batched_calls_whatever_the_lanes(lanes: int) -> None:
    backend = CountBackend()
    bld = Builder(backend)
    x, y = bld.input(G, (lanes, 32)), bld.input(E, (lanes, 32))
    bld.output(E, bld.add(x, y))
    assert backend.and_gates == lanes * 31
    assert backend.and_calls == 31  # one call per bit position, never one per lane or gate
    assert backend.widest_call == lanes


# -- constants fold ------------------------------------------------------------------------------------------------
def test_constants_fold_without_gates() -> None:
    backend = PlainBackend({G: [1, 0, 1, 1]})
    bld = Builder(backend)
    x = bld.input(G, 4)
    zeros, ones = bld.zeros(4), bld.ones(4)
    assert bld.xor(x, zeros).data.tolist() == [1, 0, 1, 1] and bld.xor(x, zeros).all_secret
    assert bld.and_(x, ones).data.tolist() == [1, 0, 1, 1] and bld.and_(x, ones).all_secret
    assert bld.and_(x, zeros).public_values().tolist() == [0, 0, 0, 0]
    assert bld.xor(x, ones).data.tolist() == [0, 1, 0, 0]  # XOR with a public 1 is a NOT
    both = bld.xor(bld.constant([0, 1, 0, 1]), bld.constant([0, 0, 1, 1]))
    assert both.public_values().tolist() == [0, 1, 1, 0]
    # a ∨ 1 = a ⊕ 1 ⊕ (a ∧ 1): no AND gate, though the backend cannot see that ¬a ⊕ a is a public 1
    assert bld.or_(x, ones).data.tolist() == [1, 1, 1, 1]
    assert backend.and_gates == 0


@given(st.integers(2, 32).flatmap(lambda n: st.tuples(st.just(n), st.integers(1, (1 << n) - 1))))
def test_adding_a_public_constant_folds_the_carries_below_its_lowest_set_bit(case: tuple[int, int]) -> None:
    n, constant = case
    backend = CountBackend()
    bld = Builder(backend)
    bld.add(bld.input(G, (1, n)), bld.constant_word([constant], n))
    # Below and at the lowest set bit the carry is a public constant; each later carry of the n − 1 costs an AND.
    lowest = (constant & -constant).bit_length() - 1
    assert backend.and_gates == max(0, n - 2 - lowest)


@given(st.integers(1, 70), st.lists(st.integers(-(2**70), 2**70), min_size=1, max_size=4))
def test_constant_words_are_twos_complement_least_significant_bit_first(width: int, ints: list[int]) -> None:
    word = Builder(CountBackend()).constant_word(ints, width)
    assert word.shape == (len(ints), width)
    got = bits_to_int(word.public_values())
    assert [int(v) for v in got] == [v % (1 << width) for v in ints]


# -- errors ----------------------------------------------------------------------------------------------------------
def test_mismatched_word_widths_and_non_words_are_errors_naming_them() -> None:
    bld = Builder(CountBackend())
    with pytest.raises(CircuitError, match="words must have the same width, got 8 and 9 bits"):
        bld.add(bld.input(G, 8), bld.input(E, 9))
    with pytest.raises(CircuitError, match="a word needs a bit axis, got a single bit"):
        bld.add(bld.input(G, 1)[0], bld.input(E, 1)[0])
    with pytest.raises(CircuitError, match="expected Bits for a word, got list"):
        bld.extend([0, 1], 4)  # type: ignore[arg-type]
