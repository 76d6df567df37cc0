"""Shared building blocks of the statistic library: merge networks, tree sums, division, selection, gating.

Theory of operation
-------------------
Every block works on lanes at once (see ``jointstat.circuit.builder``) and uses the AND-count-minimal word
operations of Kolesnikov–Sadeghi–Schneider (CANS 2009); with free XOR only AND gates cost ciphertexts.

* ``greater_than`` — x > y on unsigned words, n AND gates and a single NOT (at bit 0, x₀ ∧ ¬y₀) instead of n:
  the carry out of x + ¬y, with the majority rewritten so the complement disappears,
  c' = c ⊕ ((x ⊕ y) ∧ (x ⊕ c)). The x ⊕ y it reads is the same difference a compare-and-swap needs, so the two
  share it.
* ``compare_swap`` — orders two elements by a key: a comparator (k AND gates for a k-bit key) and one shared
  swap, δ = s ∧ (a ⊕ b), a' = a ⊕ δ, b' = b ⊕ δ (one AND gate per key or payload bit). Its swap bits are kept,
  so a bit can later be carried back to where its element came from (``route_back``, one AND per comparator).
* ``bitonic_merge`` — Batcher's bitonic merger (Batcher 1968): a bitonic sequence of M = 2^L elements becomes
  sorted after L stages of M/2 comparators each, (M/2)·L in all. Two locally sorted lists become bitonic by
  reversing the second (free rewiring); ``arrange`` does that and pads the middle with the largest key up to a
  power of two. This is the sort–merge structure of Huang–Evans–Katz (NDSS 2012).
* ``tree_sum`` — the sum of many words by a balanced tree of adders whose width grows by one bit per level, so it
  cannot overflow: n words of w bits give w + ⌈log2 n⌉ bits at about n·w AND gates.
* ``divide`` — restoring division of unsigned words: one subtract-with-borrow and one multiplexer per quotient
  bit; ``divide_fixed`` shifts the dividend first to get fraction bits and divides magnitudes, so a signed
  quotient is rounded toward zero.
* ``one_hot`` / ``select`` — oblivious selection of the element at a secret index: a decoder turns the index into
  a one-hot vector (about one AND per position: the upper half of each split is v ∧ b, the lower is v ⊕ that),
  then the chosen word is the XOR of the words masked by it (one AND per bit per position).
* ``gate`` — disclosure gating: every result bit ANDed with the permission bit, so a refused result is all zero.
* ``at_least`` — a word against a public bound (a release condition, a threshold, a bin edge): the comparator
  against a constant folds, and a bound outside the word's range is a constant with no gate at all;
  ``encoded_bound`` turns a decimal bound written in a manifest into the integer on a column's encoded scale.
* ``compare_constant`` — a number against an exact decimal v with an operator, exactly on the values the number
  can hold: with F fraction bits the stored integer X stands for X/2^F, so x ≥ v ⇔ X ≥ ⌈v·2^F⌉,
  x > v ⇔ X ≥ ⌊v·2^F⌋ + 1, x ≤ v and x < v are their negations (free), and x == v needs v·2^F to be a whole
  number k (then X == k, n − 1 AND gates; otherwise it never holds). ``clamp`` bounds numbers to [L, U] with
  two comparisons against constants and two multiplexers.
* ``percentile`` — the p-th percentile of a sorted list of numbers whose first n are valid (n secret): the rank
  j = ⌊(n − 1)·a/b⌋ and remainder r for p/100 = a/b, an oblivious selection of x_j and x_{j+1}, and the method's
  combination (numpy.percentile's lower, higher, midpoint and linear); used by the pooled quantile (after the
  merge) and by compare on each party's own sorted rows.

Numbers (``Number``) carry their wires with their signedness and fraction bits (the value is the two's-complement
integer over 2^fraction_bits); ``common_format`` is the one scale and width a set of formats fits without loss, and
``align`` brings numbers to it by free rewiring (statistics use ``common_format`` to declare their output widths
before building, ``align`` when they build).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from decimal import Decimal
from fractions import Fraction

import numpy as np

from jointstat.circuit.backend import CountBackend
from jointstat.circuit.bits import Bits, concat, stack
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party

# -- numbers ---------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class NumberFormat:
    """How a number is encoded: ``width`` bits, two's complement when ``signed``, ``frac`` fraction bits."""

    width: int
    signed: bool
    frac: int = 0


def common_format(*formats: NumberFormat) -> NumberFormat:
    """The one format all of these numbers fit without loss: the most fraction bits, signed if any is, and the
    widest of them after rescaling (an unsigned number made signed gains a zero top bit)."""
    frac = max(f.frac for f in formats)
    signed = any(f.signed for f in formats)
    width = max(f.width + (frac - f.frac) + (1 if signed and not f.signed else 0) for f in formats)
    return NumberFormat(width, signed, frac)


@dataclass(frozen=True)
class Number:
    """Fixed-point words over lanes: ``wires`` has shape (..., width); value = integer / 2^frac."""

    wires: Bits
    signed: bool
    frac: int = 0

    @property
    def width(self) -> int:
        return int(self.wires.shape[-1])

    @property
    def format(self) -> NumberFormat:
        return NumberFormat(self.width, self.signed, self.frac)

    def with_wires(self, wires: Bits) -> Number:
        return Number(wires, self.signed, self.frac)


def rescale(bld: Builder, x: Number, frac: int) -> Number:
    """The same values with ``frac`` ≥ x.frac fraction bits: zero bits below (free)."""
    k = frac - x.frac
    if k < 0:
        raise ValueError(f"rescale: cannot drop fraction bits ({x.frac} → {frac})")
    if k == 0:
        return x
    low = bld.zeros((*x.wires.shape[:-1], k))
    return Number(concat([low, x.wires], axis=-1), x.signed, frac)


def widen(bld: Builder, x: Number, width: int, *, signed: bool | None = None) -> Number:
    """Sign- or zero-extend to ``width`` bits; an unsigned number made signed gains a zero top bit first."""
    sign = x.signed if signed is None else signed
    wires = x.wires
    if sign and not x.signed:
        wires = bld.extend(wires, wires.shape[-1] + 1)
    if width < wires.shape[-1]:
        raise ValueError(f"widen: {wires.shape[-1]} bits do not fit in {width}")
    return Number(bld.extend(wires, width, signed=x.signed), sign, x.frac)


def align(bld: Builder, *xs: Number) -> list[Number]:
    """Bring numbers to common fraction bits, signedness and width (all free rewiring)."""
    fmt = common_format(*(x.format for x in xs))
    return [widen(bld, rescale(bld, x, fmt.frac), fmt.width, signed=fmt.signed) for x in xs]


def concat_rows(xs: list[Number]) -> Number:
    """Numbers of one format (``align``) one after another along the lanes (axis 0), as one number."""
    return Number(concat([x.wires for x in xs], axis=0), xs[0].signed, xs[0].frac)


def order_key(bld: Builder, x: Number) -> Bits:
    """Wires whose unsigned order is the numeric order of ``x``: a signed word gets its sign bit flipped.

    Flipping costs one NOT gate per lane (free under free XOR) and turns two's-complement order into unsigned order.
    """
    if not x.signed:
        return x.wires
    return concat([x.wires[..., :-1], bld.not_(x.wires[..., -1:])], axis=-1)


def from_order_key(bld: Builder, key: Bits, signed: bool) -> Bits:
    """The inverse of ``order_key``."""
    if not signed:
        return key
    return concat([key[..., :-1], bld.not_(key[..., -1:])], axis=-1)


# -- comparison and compare-and-swap --------------------------------------------------------------------------------


def greater_than(bld: Builder, x: Bits, y: Bits, diff: Bits | None = None) -> Bits:
    """x > y for unsigned words, one AND gate per bit: c' = c ⊕ ((x ⊕ y) ∧ (x ⊕ c)), c₀ = 0.

    ``diff`` may pass a precomputed x ⊕ y (a compare-and-swap shares it with its swap).
    """
    xa = x
    if xa.shape[-1] == 0:
        return bld.zeros(xa.shape[:-1])
    d = bld.xor(xa, y) if diff is None else diff
    # Bit 0 with c₀ = 0 is x₀ ∧ ¬y₀: the same gate, written so that a public y₀ folds it away.
    carry = bld.and_(xa[..., 0], bld.not_(y[..., 0]))
    for i in range(1, xa.shape[-1]):
        carry = bld.xor(carry, bld.and_(d[..., i], bld.xor(xa[..., i], carry)))
    return carry


@dataclass(frozen=True)
class Swapped:
    low: Bits  # keys of the smaller element of each pair
    high: Bits
    low_payload: Bits | None
    high_payload: Bits | None
    swap: Bits  # 1 where the pair was exchanged


def compare_swap(
    bld: Builder, a: Bits, b: Bits, a_payload: Bits | None = None, b_payload: Bits | None = None
) -> Swapped:
    """Order each lane's pair by key (unsigned): k AND gates for the comparator plus one per key and payload bit."""
    kw = a.shape[-1]
    if a_payload is not None and b_payload is not None:
        a = concat([a, a_payload], axis=-1)
        b = concat([b, b_payload], axis=-1)
    diff = bld.xor(a, b)
    swap = greater_than(bld, a[..., :kw], b[..., :kw], diff[..., :kw])
    delta = bld.and_(swap[..., None], diff)
    low, high = bld.xor(a, delta), bld.xor(b, delta)
    if a_payload is None or b_payload is None:
        return Swapped(low, high, None, None, swap)
    return Swapped(low[..., :kw], high[..., :kw], low[..., kw:], high[..., kw:], swap)


def and_per_compare_swap(key_width: int, payload_width: int = 0) -> int:
    """AND gates of one compare-and-swap on secret operands (counted on a fresh count backend, not assumed)."""
    bld = Builder(CountBackend())
    a = bld.input(Party.GARBLER, (1, key_width + payload_width))
    b = bld.input(Party.EVALUATOR, (1, key_width + payload_width))
    pa = a[:, key_width:] if payload_width else None
    pb = b[:, key_width:] if payload_width else None
    compare_swap(bld, a[:, :key_width], b[:, :key_width], pa, pb)
    return bld.and_gates


# -- merge networks --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Merged:
    keys: Bits  # (M, key width), sorted ascending
    payload: Bits | None  # (M, payload width), moved with the keys
    swaps: list[Bits]  # per stage, the (M/2,) swap bits, in network order
    comparators: int


MERGE_CHUNK = (
    1 << 15
)  # elements per piece of a merge stage: wide enough for batched AES, small next to the data


def bitonic_merge(bld: Builder, keys: Bits, payload: Bits | None = None, chunk: int = MERGE_CHUNK) -> Merged:
    """Sort a bitonic sequence of M = 2^L keys (with optional payload) by Batcher's merger: (M/2)·L comparators.

    The sequence is held as pieces of ``chunk`` elements (a power of two), and each stage replaces its pieces one
    pair at a time, so besides the data itself only one pair of pieces' temporaries is ever alive: a stage whose
    comparators span pieces (distance ≥ ``chunk``) pairs piece j with piece j + distance/chunk; a shorter stage
    works inside each piece. The swap bits of each stage are kept in network order (for ``route_back``).
    """
    m, kw = keys.shape
    if m & (m - 1):
        raise ValueError(f"bitonic merge: {m} elements is not a power of two")
    if chunk < 1 or chunk & (chunk - 1):
        raise ValueError(f"bitonic merge: the chunk of {chunk} elements is not a power of two")
    pw = 0 if payload is None else int(payload.shape[-1])
    data = keys if payload is None else concat([keys, payload], axis=-1)
    width = kw + pw
    size = min(m, chunk)
    pieces: list[Bits | None] = [data[i : i + size] for i in range(0, m, size)]
    del data, keys, payload

    def swap_pair(a: Bits, b: Bits) -> tuple[Bits, Bits, Bits]:
        res = compare_swap(bld, a[:, :kw], b[:, :kw], a[:, kw:] if pw else None, b[:, kw:] if pw else None)
        low = res.low if res.low_payload is None else concat([res.low, res.low_payload], axis=-1)
        high = res.high if res.high_payload is None else concat([res.high, res.high_payload], axis=-1)
        return low, high, res.swap

    swaps: list[Bits] = []
    comparators = 0
    half = m // 2
    while half >= 1:
        stage: list[Bits] = []
        if half >= size:
            step = half // size
            for group in range(0, len(pieces), 2 * step):
                for j in range(group, group + step):
                    a, b = pieces[j], pieces[j + step]
                    assert a is not None and b is not None
                    pieces[j] = pieces[j + step] = None
                    low, high, swap = swap_pair(a, b)
                    del a, b
                    pieces[j], pieces[j + step] = low, high
                    stage.append(swap)
        else:
            groups = size // (2 * half)
            for j, piece in enumerate(pieces):
                assert piece is not None
                pieces[j] = None
                blocks = piece.reshape(groups, 2, half, width)
                del piece
                low, high, swap = swap_pair(blocks[:, 0].reshape(-1, width), blocks[:, 1].reshape(-1, width))
                del blocks
                pieces[j] = stack(
                    [low.reshape(groups, half, width), high.reshape(groups, half, width)], axis=1
                ).reshape(size, width)
                stage.append(swap)
        swaps.append(concat(stage))
        comparators += m // 2
        half //= 2
    data = concat([p for p in pieces if p is not None])
    return Merged(data[:, :kw], data[:, kw:] if pw else None, swaps, comparators)


def lanewise(fn: Callable[..., Bits], *xs: Bits, chunk: int = MERGE_CHUNK) -> Bits:
    """``fn(*xs)`` computed on pieces of ``chunk`` lanes (axis 0) and the results joined: the same gates when
    ``fn`` acts on each lane alone, with the temporaries of one piece alive at a time."""
    n = xs[0].shape[0]
    if n <= chunk:
        return fn(*xs)
    return concat([fn(*(x[i : i + chunk] for x in xs)) for i in range(0, n, chunk)])


def route_back(bld: Builder, bits: Bits, swaps: list[Bits]) -> Bits:
    """Carry one bit per merged position back to the element's input position: one AND per comparator.

    A swap is its own inverse, so the stages are replayed in reverse order with the same swap bits.
    """
    vals = bits
    m = vals.shape[0]
    half = 1
    for swap in reversed(swaps):
        blocks = vals.reshape(m // (2 * half), 2, half)
        a = blocks[:, 0].reshape(-1)
        b = blocks[:, 1].reshape(-1)
        delta = bld.and_(swap, bld.xor(a, b))
        vals = stack(
            [bld.xor(a, delta).reshape(-1, half), bld.xor(b, delta).reshape(-1, half)], axis=1
        ).reshape(m)
        half *= 2
    return vals


def merge_size(n: int) -> int:
    """The power of two a merge of n elements is padded to."""
    return 1 if n <= 1 else 1 << (n - 1).bit_length()


def bitonic_comparators(m: int) -> int:
    """Comparators of a bitonic merger of m = 2^L elements: (m/2)·L."""
    return (m // 2) * (m.bit_length() - 1) if m > 1 else 0


@dataclass(frozen=True)
class MergeLayout:
    """Where the two inputs sit in the merged network's input: first at [0, n_a), second reversed at the end."""

    size: int
    first: slice
    second: slice  # positions of the second list, in reverse order (position size-1 is its element 0)


def merge_layout(na: int, nb: int) -> MergeLayout:
    """Where ``arrange`` puts lists of ``na`` and ``nb`` elements."""
    m = merge_size(na + nb)
    return MergeLayout(m, slice(0, na), slice(m - nb, m))


def arrange(first: Bits, second: Bits, pad: Bits) -> tuple[Bits, MergeLayout]:
    """The bitonic input: ``first`` (ascending) ++ copies of ``pad`` ++ ``second`` reversed (so descending)."""
    na, nb = first.shape[0], second.shape[0]
    m = merge_size(na + nb)
    parts = [first]
    if m - na - nb:
        parts.append(pad.broadcast_to((m - na - nb, first.shape[-1])))
    parts.append(second[::-1])
    seq = concat(parts, axis=0)
    return seq, merge_layout(na, nb)


# -- sums, products, division ------------------------------------------------------------------------------------------


def tree_sum(bld: Builder, words: Bits, *, signed: bool = False) -> Bits:
    """Σ over axis 0 of (n, w) words, widths growing one bit per tree level: the result has w + ⌈log2 n⌉ bits."""
    arr = words
    n = arr.shape[0]
    if n == 0:
        return bld.zeros(arr.shape[1:])
    while arr.shape[0] > 1:
        half = arr.shape[0] // 2
        x, y = arr[:half], arr[half : 2 * half]
        if signed:
            w = x.shape[-1] + 1
            paired = bld.add(bld.extend(x, w, signed=True), bld.extend(y, w, signed=True))
        else:
            total, carry = bld.add_carry(x, y)
            paired = concat([total, carry[..., None]], axis=-1)
        if arr.shape[0] % 2:
            rest = bld.extend(arr[2 * half :], paired.shape[-1], signed=signed)
            arr = concat([paired, rest], axis=0)
        else:
            arr = paired
    return arr[0]


def count_bits(bld: Builder, bits: Bits) -> Bits:
    """How many of the bits (a flat array) are 1, as an unsigned word of ⌈log2(n+1)⌉ bits."""
    flat = bits.reshape(-1)
    n = flat.shape[0]
    width = max(1, n.bit_length())
    if n == 0:
        return bld.zeros(1)
    return bld.extend(tree_sum(bld, flat[:, None]), width)


def multiply_full(bld: Builder, x: Bits, y: Bits) -> Bits:
    """The full unsigned product of an a-bit and a b-bit word (a + b bits): a·b partial ANDs plus b − 1 adders."""
    a, b = x.shape[-1], y.shape[-1]
    lanes = np.broadcast_shapes(x.shape[:-1], y.shape[:-1])
    xa = x.broadcast_to((*lanes, a))
    ya = y.broadcast_to((*lanes, b))
    acc = bld.and_(xa, ya[..., 0:1])  # the running sum at weight j, here j = 0
    low: list[Bits] = []
    for j in range(1, b):
        low.append(acc[..., 0])  # bit j − 1 of the product is final
        rest = bld.extend(acc[..., 1:], a)
        total, carry = bld.add_carry(rest, bld.and_(xa, ya[..., j : j + 1]))
        acc = concat([total, carry[..., None]], axis=-1)
    out = concat([stack(low, axis=-1), acc], axis=-1) if low else acc
    return bld.extend(out, a + b)


def negate_if(bld: Builder, x: Bits, flag: Bits) -> Bits:
    """x where ``flag`` is 0, −x (two's complement) where it is 1: (x ⊕ f) + f, n − 1 AND gates."""
    flipped = bld.xor(x, flag[..., None])
    return bld.add(flipped, bld.zeros(flipped.shape), flag)


def magnitude(bld: Builder, x: Number) -> tuple[Bits, Bits]:
    """(|x| as an unsigned word of the same width, sign bit); for unsigned x the sign is the constant 0."""
    if not x.signed:
        return x.wires, bld.zeros(x.wires.shape[:-1])
    sign = x.wires[..., -1]
    return negate_if(bld, x.wires, sign), sign


def divide(
    bld: Builder, dividend: Bits, divisor: Bits, quotient_bits: int | None = None
) -> tuple[Bits, Bits]:
    """Unsigned restoring division: (⌊n / d⌋, n mod d with d's width).

    Per quotient bit one subtract-with-borrow and one multiplexer on w_d + 1 bits. With ``quotient_bits`` = q
    only the low q quotient bits are computed, starting from the remainder n >> q: correct whenever the true
    quotient is below 2^q (callers state why it is), since then n >> q < d < 2^w_d, so the dividend's bits above
    q + w_d are zero and are dropped (a sum over many rows divided by a count of few has such bits). A zero
    divisor gives an all-ones quotient (callers withhold such results).
    """
    n, d = dividend, divisor
    wn, wd = n.shape[-1], d.shape[-1]
    q_bits = wn if quotient_bits is None else min(wn, int(quotient_bits))
    lanes = np.broadcast_shapes(n.shape[:-1], d.shape[:-1])
    n = n.broadcast_to((*lanes, wn))
    dext = bld.extend(d, wd + 1).broadcast_to((*lanes, wd + 1))
    rem = bld.extend(n[..., q_bits:], wd + 1)  # n >> q < d: bits above w_d are zero (docstring)
    quotient: list[Bits] = []  # most significant first
    for i in range(q_bits - 1, -1, -1):
        rem = concat([n[..., i : i + 1], rem[..., :-1]], axis=-1)
        diff, ge = bld.sub_borrow(rem, dext)
        quotient.append(ge)
        rem = bld.select(ge, rem, diff)
    q = stack(quotient[::-1], axis=-1) if quotient else bld.zeros((*lanes, 0))
    return q, rem[..., :wd]


def divide_fixed(
    bld: Builder, numerator: Number, denominator: Bits, fraction_bits: int, result_bits: int | None = None
) -> Number:
    """numerator / denominator (unsigned, > 0) with ``fraction_bits`` more fraction bits, rounded toward zero.

    ``result_bits`` bounds the result's width (two's complement when the numerator is signed); callers pass a
    width the true quotient is known to fit, which also shortens the division (see ``divide``).
    """
    mag, sign = magnitude(bld, numerator)
    shifted = concat([bld.zeros((*mag.shape[:-1], fraction_bits)), mag], axis=-1)
    q_bits = None if result_bits is None else result_bits
    q, _ = divide(bld, shifted, denominator, q_bits)
    frac = numerator.frac + fraction_bits
    if not numerator.signed:
        return Number(q, False, frac)
    width = q.shape[-1] + 1 if result_bits is None else result_bits
    q = bld.extend(q, max(width, q.shape[-1]))
    return Number(bld.extend(negate_if(bld, q, sign), width), True, frac)


# -- selection and gating ----------------------------------------------------------------------------------------------


def one_hot(bld: Builder, index: Bits, size: int) -> Bits:
    """(size,) bits, bit i = [index = i], for an unsigned index word (LSB first); about ``size`` AND gates."""
    idx = index.reshape(-1)
    k = idx.shape[0]
    vec = bld.ones(1)
    for t in range(k - 1, -1, -1):  # most significant bit first
        b = idx[t]
        keep = -(-size // (1 << t))  # prefixes that can still reach an index below size
        high = bld.and_(vec, b)
        low = bld.xor(vec, high)
        vec = stack([low, high], axis=-1).reshape(-1)[:keep]
    vec = vec[:size]
    if vec.shape[0] < size:
        vec = concat([vec, bld.zeros(size - vec.shape[0])])
    return vec


def select(bld: Builder, onehot: Bits, words: Bits, chunk: int = MERGE_CHUNK) -> Bits:
    """The word at the one-hot position: XOR of the words masked by the one-hot bits (one AND per bit).

    Works in pieces of ``chunk`` words, XORing the pieces' results (XOR is free), so only one piece's masked
    words are alive at a time.
    """
    total: Bits | None = None
    for i in range(0, words.shape[0], chunk):
        part = bld.reduce_xor(bld.and_(onehot[i : i + chunk, None], words[i : i + chunk]), axis=0)
        total = part if total is None else bld.xor(total, part)
    return total if total is not None else bld.zeros(words.shape[1:])


def gate(bld: Builder, wires: Bits, allow: Bits) -> Bits:
    """``wires`` where ``allow`` is 1 and all zeros where it is 0 (one AND per bit)."""
    return bld.and_(wires, allow)


def at_least(bld: Builder, value: Bits, bound: int, *, signed: bool = False) -> Bits:
    """value ≥ bound for words (two's complement when ``signed``) and a public integer bound: a comparator against
    a constant (it folds to fewer AND gates), or a constant where the bound is outside the words' range."""
    w = value.shape[-1]
    lanes = value.shape[:-1]
    lo, hi = (-(1 << (w - 1)), (1 << (w - 1)) - 1) if signed else (0, (1 << w) - 1)
    if bound <= lo:
        return bld.ones(lanes)
    if bound > hi:
        return bld.zeros(lanes)
    return bld.greater_equal(value, bld.constant_word(bound, w).broadcast_to((*lanes, w)), signed=signed)


def encoded_bound(value: float, frac: int, *, strict: bool = False) -> int:
    """The smallest encoded integer v with v / 2^frac ≥ value (> value when ``strict``), the value read as the
    decimal written (a threshold or a bin edge of a manifest)."""
    scaled = Decimal(repr(float(value))) * (1 << frac)
    return math.floor(scaled) + 1 if strict else math.ceil(scaled)


def compare_constant(bld: Builder, x: Number, op: str, value: Fraction) -> Bits:
    """x op value per lane, exactly on the values x can hold (see the module docstring); op is one of
    >, >=, <, <=, ==, !=."""
    scaled = value * (1 << x.frac)
    floor = scaled.numerator // scaled.denominator
    ceil = -((-scaled.numerator) // scaled.denominator)
    if op in (">=", "<"):
        holds = at_least(bld, x.wires, ceil, signed=x.signed)
        return holds if op == ">=" else bld.not_(holds)
    if op in (">", "<="):
        holds = at_least(bld, x.wires, floor + 1, signed=x.signed)
        return holds if op == ">" else bld.not_(holds)
    if op not in ("==", "!="):
        raise ValueError(f"compare_constant: unknown operator {op!r}")
    w = x.width
    lanes = x.wires.shape[:-1]
    lo, hi = (-(1 << (w - 1)), (1 << (w - 1)) - 1) if x.signed else (0, (1 << w) - 1)
    if scaled.denominator != 1 or not lo <= floor <= hi:
        equal = bld.zeros(lanes)
    else:
        equal = bld.equal(x.wires, bld.constant_word(floor % (1 << w), w).broadcast_to((*lanes, w)))
    return equal if op == "==" else bld.not_(equal)


def clamp(bld: Builder, x: Number, low: int, high: int) -> Number:
    """Each lane's value bounded to [low, high] (encoded integers, low ≤ high): below low it is low, above high
    it is high. Both comparisons read x itself (x < low implies x ≤ high), then two multiplexers."""
    w = x.width
    lanes = x.wires.shape[:-1]

    def word(v: int) -> Bits:
        return bld.constant_word(v % (1 << w), w).broadcast_to((*lanes, w))

    lo, hi = (-(1 << (w - 1)), (1 << (w - 1)) - 1) if x.signed else (0, (1 << w) - 1)
    below = bld.not_(at_least(bld, x.wires, low, signed=x.signed))
    above = at_least(bld, x.wires, high + 1, signed=x.signed)
    wires = x.wires
    if low > lo:
        wires = bld.select(below, wires, word(max(low, lo)))
    if high < hi:
        wires = bld.select(above, wires, word(min(high, hi)))
    return x.with_wires(wires)


# -- percentiles of a sorted list ---------------------------------------------------------------------------------


def rank_fraction(p: float) -> Fraction:
    """p / 100 as an exact fraction of the decimal written in the manifest."""
    return Fraction(repr(float(p))) / 100


def percentile_width(width: int, frac: int, method: str, precision_bits: int) -> tuple[int, int]:
    """(bits, fraction bits) of a percentile of numbers of ``width`` bits and ``frac`` fraction bits."""
    if method == "midpoint":
        return width + 1, frac + 1
    if method == "linear":
        return width + precision_bits, frac + precision_bits
    return width, frac


def percentile(
    bld: Builder,
    values: Bits,
    n_minus_1: Bits,
    fraction: Fraction,
    *,
    method: str,
    signed: bool,
    precision_bits: int,
    width: int,
) -> Bits:
    """The percentile p (``fraction`` = p/100) of ``values`` (m, w) sorted ascending whose first n are the valid
    ones, given n − 1 (see the module docstring); ``width`` bits as ``percentile_width`` says."""
    m = values.shape[0]
    idx_bits = max(1, (m - 1).bit_length())
    j, r, denominator = _rank(bld, n_minus_1, fraction, idx_bits)
    onehot = one_hot(bld, j, m)
    x_j = select(bld, onehot, values)
    x_next = select(bld, onehot[:-1], values[1:]) if m > 1 else x_j
    r_nonzero = bld.reduce_or(r) if r.shape[-1] else bld.zeros(())
    return _interpolate(bld, method, x_j, x_next, r, r_nonzero, denominator, signed, precision_bits, width)


def _rank(bld: Builder, n_minus_1: Bits, frac: Fraction, idx_bits: int) -> tuple[Bits, Bits, int]:
    """(j, r, b) with j = ⌊(n − 1)·a/b⌋ (``idx_bits`` bits) and r = (n − 1)·a mod b."""
    a, b = frac.numerator, frac.denominator
    if a == 0:
        return bld.zeros(idx_bits), bld.zeros(0), 1
    t = multiply_full(bld, n_minus_1, bld.constant_word(a, a.bit_length()))
    if b == 1:
        return bld.extend(t, idx_bits), bld.zeros(0), 1
    if b & (b - 1) == 0:
        s = b.bit_length() - 1
        return bld.extend(t[s:], idx_bits), t[:s], b
    # j < n ≤ 2^idx_bits, so the low idx_bits quotient bits are the whole quotient.
    q, r = divide(bld, t, bld.constant_word(b, b.bit_length()), quotient_bits=idx_bits)
    return q, r, b


def _interpolate(
    bld: Builder,
    method: str,
    x_j: Bits,
    x_next: Bits,
    r: Bits,
    r_nonzero: Bits,
    b: int,
    signed: bool,
    e: int,
    width: int,
) -> Bits:
    if method == "lower":
        return x_j
    higher = bld.select(r_nonzero, x_j, x_next)
    if method == "higher":
        return higher
    w = x_j.shape[-1]
    if method == "midpoint":
        return bld.add(bld.extend(x_j, w + 1, signed=signed), bld.extend(higher, w + 1, signed=signed))
    if r.shape[-1] == 0:  # the rank is always whole
        return bld.extend(concat([bld.zeros(e), x_j]), width, signed=signed)
    # x_{j+1} ≥ x_j whenever r > 0, so the difference is unsigned; when r = 0 it is multiplied by zero.
    d = bld.sub(x_next, x_j)
    prod = multiply_full(bld, d, r)
    shifted = concat([bld.zeros(e), prod])
    part, _ = divide(bld, shifted, bld.constant_word(b, b.bit_length()), quotient_bits=w + e)
    base = bld.extend(concat([bld.zeros(e), x_j]), w + e + 1, signed=signed)
    total = bld.add(base, bld.extend(part, w + e + 1))
    return bld.extend(total, width, signed=signed)
