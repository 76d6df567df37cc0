"""The lane-parallel builder: word arithmetic equals Python integer arithmetic, with the minimal AND counts.

AND counts follow Kolesnikov–Sadeghi–Schneider (CANS 2009): with free XOR an n-bit adder with carry-out, a
subtractor with borrow, a comparator and a multiplexer each cost exactly n AND gates.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int, int_to_bits
from jointstat.circuit.layers import evaluate_plain, schedule
from jointstat.circuit.model import CircuitError, GateKind, Party

LANES = 6


def run_binary(op: str, bits: int, xs: list[int], ys: list[int], **kwargs: object) -> np.ndarray:
    """Build ``op`` over lanes of x (garbler) and y (evaluator), evaluate in the clear, return the result bits."""
    b = Builder()
    x = b.input(Party.GARBLER, (len(xs), bits))
    y = b.input(Party.EVALUATOR, (len(ys), bits))
    result = getattr(b, op)(x, y, **kwargs)
    if isinstance(result, tuple):
        result = np.concatenate([r if r.ndim == x.ndim else r[..., None] for r in result], axis=-1)
    elif result.ndim == x.ndim - 1:
        result = result[..., None]
    b.output(Party.EVALUATOR, result)
    c = b.build()
    out = evaluate_plain(
        schedule(c),
        {
            Party.GARBLER: int_to_bits(xs, bits).reshape(-1),
            Party.EVALUATOR: int_to_bits(ys, bits).reshape(-1),
        },
    )[Party.EVALUATOR]
    return out.reshape(len(xs), -1)


def words(width: int, signed: bool = False) -> st.SearchStrategy[list[int]]:
    lo, hi = (-(1 << (width - 1)), (1 << (width - 1)) - 1) if signed else (0, (1 << width) - 1)
    return st.lists(st.integers(lo, hi), min_size=LANES, max_size=LANES)


widths = st.integers(1, 24)


@given(widths.flatmap(lambda w: st.tuples(st.just(w), words(w), words(w))))
def test_add_and_sub_are_modular(case: tuple[int, list[int], list[int]]) -> None:
    w, xs, ys = case
    m = 1 << w
    assert list(bits_to_int(run_binary("add", w, xs, ys))) == [
        (x + y) % m for x, y in zip(xs, ys, strict=True)
    ]
    assert list(bits_to_int(run_binary("sub", w, xs, ys))) == [
        (x - y) % m for x, y in zip(xs, ys, strict=True)
    ]


@given(widths.flatmap(lambda w: st.tuples(st.just(w), words(w), words(w))))
def test_add_carry_and_sub_borrow_report_the_carry(case: tuple[int, list[int], list[int]]) -> None:
    w, xs, ys = case
    got = run_binary("add_carry", w, xs, ys)
    assert list(bits_to_int(got)) == [x + y for x, y in zip(xs, ys, strict=True)]
    got = run_binary("sub_borrow", w, xs, ys)
    assert list(bits_to_int(got[:, :w])) == [(x - y) % (1 << w) for x, y in zip(xs, ys, strict=True)]
    assert list(got[:, w]) == [int(x >= y) for x, y in zip(xs, ys, strict=True)]


@given(st.booleans().flatmap(lambda s: st.tuples(st.just(s), widths, st.data())))
def test_comparisons_match_python(case: tuple[bool, int, st.DataObject]) -> None:
    signed, w, data = case
    xs = data.draw(words(w, signed))
    ys = data.draw(words(w, signed))
    ys[0] = xs[0]  # always include a tie
    for op, ref in (
        ("less_than", lambda x, y: x < y),
        ("less_equal", lambda x, y: x <= y),
        ("greater_than", lambda x, y: x > y),
        ("greater_equal", lambda x, y: x >= y),
    ):
        got = run_binary(op, w, xs, ys, signed=signed)[:, 0]
        assert list(got) == [int(ref(x, y)) for x, y in zip(xs, ys, strict=True)], op
    assert list(run_binary("equal", w, xs, ys)[:, 0]) == [int(x == y) for x, y in zip(xs, ys, strict=True)]


@given(st.booleans().flatmap(lambda s: st.tuples(st.just(s), st.integers(1, 12), st.data())))
def test_multiply_is_the_product_modulo_the_width(case: tuple[bool, int, st.DataObject]) -> None:
    signed, w, data = case
    xs, ys = data.draw(words(w, signed)), data.draw(words(w, signed))
    got = bits_to_int(run_binary("multiply", w, xs, ys, signed=signed), signed=signed)
    m = 1 << w
    expect = [
        ((x * y) % m) - (m if signed and (x * y) % m >= m // 2 else 0) for x, y in zip(xs, ys, strict=True)
    ]
    assert list(got) == expect
    wide = bits_to_int(run_binary("multiply", w, xs, ys, signed=signed, width=2 * w), signed=signed)
    assert list(wide) == [x * y for x, y in zip(xs, ys, strict=True)]


@given(st.booleans().flatmap(lambda s: st.tuples(st.just(s), widths, st.data())))
def test_min_max_orders_each_lane(case: tuple[bool, int, st.DataObject]) -> None:
    signed, w, data = case
    xs, ys = data.draw(words(w, signed)), data.draw(words(w, signed))
    got = run_binary("min_max", w, xs, ys, signed=signed)
    assert list(bits_to_int(got[:, :w], signed=signed)) == [min(a, b) for a, b in zip(xs, ys, strict=True)]
    assert list(bits_to_int(got[:, w:], signed=signed)) == [max(a, b) for a, b in zip(xs, ys, strict=True)]


@given(widths.flatmap(lambda w: st.tuples(st.just(w), words(w), st.integers(0, 30))))
def test_shifts_and_rotations_are_free_rewiring(case: tuple[int, list[int], int]) -> None:
    w, xs, k = case
    m = (1 << w) - 1
    b = Builder()
    x = b.input(Party.GARBLER, (LANES, w))
    kk = k % w
    outs = [
        b.shift_left(x, k),
        b.shift_right(x, k),
        b.rotate_left(x, kk),
        b.rotate_right(x, kk),
        b.extend(x, w + 3, signed=True),
    ]
    for o in outs:
        b.output(Party.GARBLER, o)
    c = b.build()
    assert c.n_gates == 0
    bits = evaluate_plain(schedule(c), {Party.GARBLER: int_to_bits(xs, w).reshape(-1)})[Party.GARBLER]
    parts = np.split(bits, np.cumsum([LANES * o.shape[-1] for o in outs])[:-1])
    got = [bits_to_int(p.reshape(LANES, -1)) for p in parts]
    assert list(got[0]) == [(v << k) & m for v in xs]
    assert list(got[1]) == [v >> k for v in xs]
    assert list(got[2]) == [((v << kk) | (v >> (w - kk))) & m for v in xs]
    assert list(got[3]) == [((v >> kk) | (v << (w - kk))) & m for v in xs]
    signed = [v - (1 << w) if v >> (w - 1) else v for v in xs]
    assert list(bits_to_int(parts[4].reshape(LANES, -1), signed=True)) == signed


@pytest.mark.parametrize("n", [1, 2, 8, 32, 64])
def test_and_counts_are_minimal(n: int) -> None:
    def count(build: object) -> int:
        b = Builder()
        x = b.input(Party.GARBLER, n)
        y = b.input(Party.EVALUATOR, n)
        s = b.input(Party.EVALUATOR, 1)
        b.output(Party.EVALUATOR, np.atleast_1d(build(b, x, y, s)))  # type: ignore[operator]
        return b.build().count(GateKind.AND)

    assert count(lambda b, x, y, s: np.concatenate([*[np.atleast_1d(v) for v in b.add_carry(x, y)]])) == n
    assert count(lambda b, x, y, s: b.add(x, y)) == n - 1
    assert count(lambda b, x, y, s: np.concatenate([np.atleast_1d(v) for v in b.sub_borrow(x, y)])) == n
    assert count(lambda b, x, y, s: b.less_than(x, y)) == n
    assert count(lambda b, x, y, s: b.greater_equal(x, y, signed=True)) == n
    assert count(lambda b, x, y, s: b.select(s[0], x, y)) == n
    assert count(lambda b, x, y, s: b.equal(x, y)) == n - 1


def test_constants_fold_without_gates() -> None:
    b = Builder()
    x = b.input(Party.GARBLER, 4)
    assert list(b.xor(x, 0)) == list(x)
    assert list(b.and_(x, 1)) == list(x)
    assert list(b.and_(x, 0)) == [0, 0, 0, 0]
    assert list(b.xor(x, x)) == [0, 0, 0, 0]
    assert list(b.and_(x, x)) == list(x)
    assert list(b.xor([0, 1, 0, 1], [0, 0, 1, 1])) == [0, 1, 1, 0]
    assert b.build().n_gates == 0


def test_adding_a_public_constant_costs_fewer_and_gates() -> None:
    b = Builder()
    x = b.input(Party.GARBLER, (1, 16))
    b.output(Party.GARBLER, b.add(x, b.constant_word([[0b1000_0000_0000_0000]], 16)[0]))
    assert b.build().count(GateKind.AND) == 0


def test_operations_on_many_lanes_emit_gates_in_bulk() -> None:
    b = Builder()
    lanes = 50_000
    x = b.input(Party.GARBLER, (lanes, 32))
    y = b.input(Party.EVALUATOR, (lanes, 32))
    b.output(Party.EVALUATOR, b.add(x, y))
    c = b.build()
    assert c.count(GateKind.AND) == lanes * 31
    # One Python-level emission per bit position, not per lane: the builder holds ~4 arrays per bit.
    assert len(b._kinds) == 0  # released by build()


def test_mismatched_word_widths_are_an_error() -> None:
    b = Builder()
    with pytest.raises(CircuitError, match="same width"):
        b.add(b.input(Party.GARBLER, 8), b.input(Party.EVALUATOR, 9))


def test_a_built_builder_refuses_more_gates() -> None:
    b = Builder()
    x = b.input(Party.GARBLER, 2)
    b.build()
    with pytest.raises(CircuitError, match="built already"):
        b.and_(x[0], x[1])
