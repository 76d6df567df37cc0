"""Bits: the structural operations are numpy's, applied alike to the payload and to the public-bit map, cost no
gate, and account for the memory they keep alive (views share their parent's buffer, copies get their own).

The reference for every structural operation is numpy itself, applied to the plain values and to the expected
public map of the same bits.
"""

from __future__ import annotations

import gc
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.circuit.backend import Backend, CountBackend, PlainBackend
from jointstat.circuit.bits import SECRET, Bits, broadcast, concat, stack
from jointstat.circuit.model import Party

G = Party.GARBLER


def mixed_bits(backend: Backend, secret: np.ndarray, public: np.ndarray) -> Bits:
    """Bits of ``secret.shape``: an input of the garbler where ``public`` is −1, the public value elsewhere.

    Made with folded gates only: (x ∧ keep) ⊕ values, keep = 1 where secret, values = 0 there.
    """
    keep = (public < 0).astype(np.uint8)
    x = backend.input(G, secret.shape)
    return backend.xor(backend.and_(x, backend.constant(keep)), backend.constant(np.where(keep, 0, public)))


@st.composite
def arrays(draw: st.DrawFn) -> tuple[np.ndarray, np.ndarray]:
    """(values, public map): a random shape of 1 to 3 axes, random bits, some of them public (map −1 = secret)."""
    shape = tuple(draw(st.lists(st.integers(1, 4), min_size=1, max_size=3)))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    values = rng.integers(0, 2, shape, dtype=np.uint8)
    share = draw(st.sampled_from([0.0, 0.5, 1.0]))
    public = np.where(rng.random(shape) < share, values.astype(np.int8), np.int8(SECRET))
    return values, public


def plain_and_count(values: np.ndarray, public: np.ndarray) -> tuple[PlainBackend, Bits, CountBackend, Bits]:
    plain = PlainBackend({G: np.where(public < 0, values, 0).reshape(-1)})
    count = CountBackend()
    pb, cb = mixed_bits(plain, values, public), mixed_bits(count, values, public)
    assert plain.and_gates == count.and_gates == 0  # made without a gate
    return plain, pb, count, cb


Op = Callable[[Any], Any]

# (name, operation on Bits, the same operation on a numpy array, whether it copies)
STRUCTURAL: list[tuple[str, Op, Op, bool]] = [
    ("first", lambda a: a[0], lambda a: a[0], False),
    ("last on every axis", lambda a: a[..., -1], lambda a: a[..., -1], False),
    ("every other reversed", lambda a: a[::-2], lambda a: a[::-2], False),
    ("new axis", lambda a: a[None, ..., None], lambda a: a[None, ..., None], False),
    ("pick rows", lambda a: a[[0, -1, 0]], lambda a: a[[0, -1, 0]], True),
    (
        "pick by mask",
        lambda a: a[np.arange(a.shape[0]) % 2 == 0],
        lambda a: a[np.arange(a.shape[0]) % 2 == 0],
        True,
    ),
    ("flatten", lambda a: a.reshape(-1), lambda a: a.reshape(-1), False),
    ("reshape as tuple", lambda a: a.reshape((1, -1)), lambda a: a.reshape((1, -1)), False),
    ("transpose", lambda a: a.transpose(), lambda a: a.transpose(), False),
    (
        "transpose axes",
        lambda a: a.transpose(*range(a.ndim)[::-1]),
        lambda a: a.transpose(*range(a.ndim)[::-1]),
        False,
    ),
    ("move axis", lambda a: a.moveaxis(0, -1), lambda a: np.moveaxis(a, 0, -1), False),
    (
        "broadcast",
        lambda a: a.broadcast_to((2, *a.shape)),
        lambda a: np.broadcast_to(a, (2, *a.shape)),
        False,
    ),
    ("flip", lambda a: a.flip(-1), lambda a: np.flip(a, -1), False),
    ("roll", lambda a: a.roll(1, 0), lambda a: np.roll(a, 1, 0), True),
    ("roll last axis", lambda a: a.roll(-2), lambda a: np.roll(a, -2, -1), True),
]


@pytest.mark.parametrize(("name", "op", "ref", "copies"), STRUCTURAL, ids=[s[0] for s in STRUCTURAL])
@given(case=arrays())
def test_structural_operations_are_numpys_on_payload_and_public_map(
    name: str, op: Op, ref: Op, copies: bool, case: tuple[np.ndarray, np.ndarray]
) -> None:
    values, public = case
    plain, pb, count, cb = plain_and_count(values, public)
    want_values, want_public = ref(values), ref(public)
    for bits in (op(pb), op(cb)):
        assert isinstance(bits, Bits)
        assert bits.shape == want_values.shape
        assert bits.public_mask().tolist() == (want_public >= 0).tolist()
        if bits.pub is not None:
            assert np.array_equal(bits.pub, want_public)
    assert np.array_equal(op(pb).data, want_values)
    assert op(cb).data is None
    # No gate, and views keep their parent's buffer while copies get one of their own
    gates = {k: v for k, v in plain.counts().items() if k.endswith("_gates")}
    assert gates == {k: v for k, v in count.counts().items() if k.endswith("_gates")}
    assert gates["and_gates"] == 0 and gates["xor_gates"] == int((public < 0).sum())
    for bits, parent in ((op(pb), pb), (op(cb), cb)):
        assert (bits.buffer is not parent.buffer) == copies


@given(case=arrays())
def test_the_public_map_says_which_bits_are_public_and_their_values(
    case: tuple[np.ndarray, np.ndarray],
) -> None:
    values, public = case
    _, pb, _, cb = plain_and_count(values, public)
    for bits in (pb, cb):
        assert bits.public_mask().tolist() == (public >= 0).tolist()
        assert bits.all_secret == (not (public >= 0).any())
        if (public >= 0).all():
            assert np.array_equal(bits.public_values(), values)
        else:
            assert bits.public_values() is None
        assert repr(bits) == (
            f"Bits(shape={values.shape}, no public bits)"
            if bits.all_secret
            else f"Bits(shape={values.shape}, {int((public >= 0).sum())} public bits)"
        )


def test_an_empty_value_has_no_secret_bit() -> None:
    empty = CountBackend().input(G, (0, 3))
    assert empty.size == 0 and empty.public_values() is not None and empty.public_values().shape == (0, 3)


def test_length_iteration_and_sizes_follow_the_first_axis() -> None:
    bits = CountBackend().input(G, (3, 2, 4))
    assert (len(bits), bits.ndim, bits.size) == (3, 3, 24)
    assert [row.shape for row in bits] == [(2, 4)] * 3
    with pytest.raises(TypeError, match=r"len\(\) of a single bit"):
        len(bits[0, 0, 0])


def test_secret_bits_cannot_index_bits() -> None:
    backend = CountBackend()
    bits = backend.input(G, 4)
    with pytest.raises(TypeError, match="cannot be indexed by secret bits; use the builder's select or mux"):
        bits[backend.input(G, 2)]  # type: ignore[index]


# -- concat, stack, broadcast ------------------------------------------------------------------------------------
@given(case=arrays(), axis=st.integers(-1, 0))
def test_concat_and_stack_are_numpys(case: tuple[np.ndarray, np.ndarray], axis: int) -> None:
    va, pa = case
    vb, pb = 1 - va, np.roll(pa, 1)  # other values, another public map, the same shape
    pb = np.where(pb < 0, pb, vb.astype(np.int8))
    plain = PlainBackend(
        {G: np.concatenate([np.where(p < 0, v, 0).reshape(-1) for v, p in ((va, pa), (vb, pb))])}
    )
    a, b = mixed_bits(plain, va, pa), mixed_bits(plain, vb, pb)
    before = plain.counts()
    joined = concat([a, b, a], axis=axis)
    assert np.array_equal(joined.data, np.concatenate([va, vb, va], axis=axis))
    assert joined.public_mask().tolist() == (np.concatenate([pa, pb, pa], axis=axis) >= 0).tolist()
    stacked = stack([a, b], axis=axis)
    assert np.array_equal(stacked.data, np.stack([va, vb], axis=axis))
    assert stacked.public_mask().tolist() == (np.stack([pa, pb], axis=axis) >= 0).tolist()
    assert plain.counts()["and_gates"] == before["and_gates"] and plain.xor_gates == before["xor_gates"]
    assert joined.buffer is not a.buffer and stacked.buffer is not a.buffer


def test_concat_stack_and_broadcast_refuse_what_does_not_fit_naming_the_shapes() -> None:
    backend = CountBackend()
    x, y = backend.input(G, (2, 3)), backend.input(G, (3, 3))
    with pytest.raises(ValueError, match=r"concat: shapes \[\(2, 3\), \(3, 3\)\] do not agree off axis 1"):
        concat([x, y], axis=1)
    with pytest.raises(ValueError, match=r"concat: shapes \[\(2, 3\), \(3,\)\] do not agree off axis 0"):
        concat([x, y[0]])
    with pytest.raises(ValueError, match=r"stack: values of different shapes \[\(2, 3\), \(3, 3\)\]"):
        stack([x, y])
    with pytest.raises(ValueError, match="concat/stack of Bits from different backends"):
        concat([x, PlainBackend({G: [0] * 6}).input(G, (2, 3))])
    with pytest.raises(ValueError, match="shape mismatch"):
        broadcast(x, y)
    assert concat([x, y]).shape == (5, 3) and concat([x]) is x


@pytest.mark.parametrize("join", [concat, stack])
def test_joining_no_values_is_an_error_that_says_so(join: Callable[..., Bits]) -> None:
    with pytest.raises(ValueError, match="no Bits"):
        join([])


def test_broadcast_gives_the_common_shape_without_copying() -> None:
    backend = CountBackend()
    x, y, z = backend.input(G, (4, 1)), backend.input(G, (3,)), backend.input(G, (4, 3))
    bx, by, bz = broadcast(x, y, z)
    assert bx.shape == by.shape == bz.shape == (4, 3)
    assert bz is z and bx.buffer is x.buffer and by.buffer is y.buffer


def test_depth_is_kept_by_views_and_the_deepest_part_wins_a_join() -> None:
    backend = CountBackend()
    x, y = backend.input(G, 4), backend.input(G, 4)
    deep = backend.and_(backend.and_(x, y), y)
    assert (deep[1:].depth, deep.reshape(2, 2).depth, deep.roll(1).depth) == (2, 2, 2)
    assert concat([x, deep]).depth == 2 and stack([deep, x]).depth == 2 and x.depth == 0


# -- memory accounting ------------------------------------------------------------------------------------------
def test_the_meter_counts_held_bits_views_are_free_copies_are_not() -> None:
    backend = CountBackend()
    meter = backend.meter
    x = backend.input(G, (100, 8))
    assert (meter.live, meter.peak) == (800, 800)
    views = [x[3], x[:50], x.reshape(-1), x.transpose(), x.broadcast_to((2, 100, 8)), x.flip(0)]
    assert meter.live == 800
    copies = [x[[0, 1]], x.roll(1, 0), concat([x, x]), stack([x[0], x[1]])]
    assert meter.live == 800 + 16 + 800 + 1600 + 16
    del copies
    gc.collect()
    assert meter.live == 800 and meter.peak == 800 + 16 + 800 + 1600 + 16
    del x
    gc.collect()
    assert meter.live == 800  # the views still hold the input's buffer
    del views
    gc.collect()
    assert meter.live == 0


def test_a_gate_result_holds_its_own_bits_until_the_program_drops_it() -> None:
    backend = PlainBackend({G: [1] * 64})
    x = backend.input(G, (4, 16))
    y = backend.and_(x, x)
    assert backend.meter.live == 128
    z = backend.xor(y, x)[0]  # a view of a 64-bit result keeps all 64 bits alive
    del y
    gc.collect()
    assert backend.meter.live == 128
    del z
    gc.collect()
    assert backend.meter.live == 64 and backend.meter.peak == 192
