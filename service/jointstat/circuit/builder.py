"""The lane-parallel builder: word operations over ``Bits``, run against any backend.

Theory of operation
-------------------
A statistic is written once, as a program over ``Bits`` values (``jointstat.circuit.bits``): a *word* is a value
whose last axis holds its bits, least significant first, and whose leading axes are *lanes* (records, table rows,
S-box positions…). Every operation here acts on all lanes at once and reduces to the backend's three primitives
(``xor``, ``and_``, ``not_`` over whole arrays, see ``jointstat.circuit.backend``). A word operation loops in Python
only over bit positions (at most the word width), never over lanes or gates, so an operation on a million lanes is
a few batched calls — garbled, evaluated, evaluated in the clear or merely counted, depending on the backend.

Public constants (``constant``, ``constant_word``, ``zeros``, ``ones``) fold: XOR with 0 or AND with 1 passes the
other operand through, AND with 0 gives 0, XOR with 1 is a NOT. Adding or comparing with a public constant
therefore costs fewer AND gates than with a secret.

The AND counts of the word operations are the minimal ones for garbling with free XOR (Kolesnikov–Sadeghi–
Schneider, CANS 2009): an n-bit adder with carry-out, a subtractor, a comparator and a multiplexer cost n AND gates
each; addition modulo 2^n costs n − 1; equality costs n − 1. ``square`` uses that x_i ∧ x_i = x_i and
x_i ∧ x_j = x_j ∧ x_i, so it needs only the n(n − 1)/2 cross products.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from jointstat.circuit.backend import Backend
from jointstat.circuit.bits import Bits, broadcast, concat, stack
from jointstat.circuit.model import CircuitError, Party


def _word(x: Bits, what: str = "word") -> Bits:
    if not isinstance(x, Bits):
        raise CircuitError(f"builder: expected Bits for a {what}, got {type(x).__name__}")
    if x.ndim == 0:
        raise CircuitError(f"builder: a {what} needs a bit axis, got a single bit")
    return x


class Builder:
    """Word operations over one backend (see the module docstring)."""

    def __init__(self, backend: Backend) -> None:
        self.backend = backend

    # -- counts --------------------------------------------------------------------------------------------------
    @property
    def and_gates(self) -> int:
        """AND gates of two secret operands so far (each costs a garbled table)."""
        return self.backend.and_gates

    # -- inputs, outputs, constants ------------------------------------------------------------------------------
    def input(self, party: Party, shape: int | tuple[int, ...]) -> Bits:
        return self.backend.input(party, shape)

    def output(self, party: Party, bits: Bits) -> slice:
        return self.backend.output(party, bits)

    def constant(self, bits: object) -> Bits:
        """Public constant bits (0/1 values, any shape)."""
        return self.backend.constant(bits)

    def constant_word(self, values: object, width: int) -> Bits:
        """Public integers (any shape; two's complement for negatives) as words of ``width`` bits."""
        vals = np.asarray(values, dtype=object)
        mask = (1 << width) - 1
        flat = [int(v) & mask for v in vals.reshape(-1)]
        bits = np.array([[(v >> i) & 1 for i in range(width)] for v in flat], dtype=np.uint8)
        return self.backend.constant(bits.reshape(*vals.shape, width))

    def zeros(self, shape: int | tuple[int, ...]) -> Bits:
        return self.backend.zeros(shape)

    def ones(self, shape: int | tuple[int, ...]) -> Bits:
        return self.backend.ones(shape)

    @staticmethod
    def concat(parts: Sequence[Bits], axis: int = 0) -> Bits:
        return concat(parts, axis)

    @staticmethod
    def stack(parts: Sequence[Bits], axis: int = 0) -> Bits:
        return stack(parts, axis)

    # -- bits ----------------------------------------------------------------------------------------------------
    def not_(self, a: Bits) -> Bits:
        return self.backend.not_(a)

    def xor(self, a: Bits, b: Bits) -> Bits:
        return self.backend.xor(a, b)

    def and_(self, a: Bits, b: Bits) -> Bits:
        return self.backend.and_(a, b)

    def or_(self, a: Bits, b: Bits) -> Bits:
        """a ∨ b = a ⊕ b ⊕ (a ∧ b): one AND gate per bit."""
        return self.xor(self.xor(a, b), self.and_(a, b))

    def mux(self, select: Bits, if_zero: Bits, if_one: Bits) -> Bits:
        """``if_one`` where ``select`` is 1, else ``if_zero``: x ⊕ (s ∧ (x ⊕ y)), one AND gate per bit.

        ``select`` broadcasts against the others; for words give it shape (..., 1).
        """
        diff = self.xor(if_zero, if_one)
        return self.xor(if_zero, self.and_(select, diff))

    # -- reductions ----------------------------------------------------------------------------------------------
    def reduce_and(self, bits: Bits, axis: int = -1) -> Bits:
        """AND over an axis by a balanced tree: n − 1 AND gates, depth ⌈log2 n⌉."""
        return self._tree(bits, axis, self.and_, 1)

    def reduce_or(self, bits: Bits, axis: int = -1) -> Bits:
        """OR over an axis (De Morgan over ``reduce_and``): n − 1 AND gates."""
        return self.not_(self.reduce_and(self.not_(bits), axis))

    def reduce_xor(self, bits: Bits, axis: int = -1) -> Bits:
        return self._tree(bits, axis, self.xor, 0)

    def _tree(self, bits: Bits, axis: int, op: Callable[[Bits, Bits], Bits], identity: int) -> Bits:
        arr = _word(bits, "bit array").moveaxis(axis, -1)
        if arr.shape[-1] == 0:
            return self.zeros(arr.shape[:-1]) if identity == 0 else self.ones(arr.shape[:-1])
        while arr.shape[-1] > 1:
            half = arr.shape[-1] // 2
            paired = op(arr[..., :half], arr[..., half : 2 * half])
            arr = concat([paired, arr[..., 2 * half :]], axis=-1) if arr.shape[-1] % 2 else paired
        return arr[..., 0]

    # -- words: arithmetic ---------------------------------------------------------------------------------------
    @staticmethod
    def _pair(x: Bits, y: Bits) -> tuple[Bits, Bits]:
        xa, ya = _word(x), _word(y)
        if xa.shape[-1] != ya.shape[-1]:
            raise CircuitError(
                f"builder: words must have the same width, got {xa.shape[-1]} and {ya.shape[-1]} bits"
            )
        xb, yb = broadcast(xa, ya)
        return xb, yb

    def _lanes(self, bit: Bits | int, lanes: tuple[int, ...]) -> Bits:
        b = (self.zeros(()) if bit == 0 else self.ones(())) if isinstance(bit, int) else bit
        return b if b.shape == lanes else b.broadcast_to(lanes)

    def add_carry(self, x: Bits, y: Bits, carry_in: Bits | int = 0) -> tuple[Bits, Bits]:
        """Ripple-carry x + y + carry_in: (sum of the same width, carry out). n AND gates for n bits.

        Per bit: s = x ⊕ y ⊕ c and c' = c ⊕ ((x ⊕ c) ∧ (y ⊕ c)) (Kolesnikov–Sadeghi–Schneider 2009).
        """
        xa, ya = self._pair(x, y)
        n = xa.shape[-1]
        carry = self._lanes(carry_in, xa.shape[:-1])
        total: list[Bits] = []
        for i in range(n):
            xi, yi = xa[..., i], ya[..., i]
            xc = self.xor(xi, carry)
            total.append(self.xor(xc, yi))
            carry = self.xor(carry, self.and_(xc, self.xor(yi, carry)))
        if not total:
            return xa, carry
        return stack(total, axis=-1), carry

    def add(self, x: Bits, y: Bits, carry_in: Bits | int = 0) -> Bits:
        """x + y (+ carry_in) modulo 2^n: n − 1 AND gates (the last carry is not computed)."""
        xa, ya = self._pair(x, y)
        n = xa.shape[-1]
        if n == 0:
            return xa
        if n == 1:
            return self.xor(self.xor(xa, ya), self._lanes(carry_in, xa.shape[:-1])[..., None])
        low, carry = self.add_carry(xa[..., : n - 1], ya[..., : n - 1], carry_in)
        top = self.xor(self.xor(xa[..., n - 1], ya[..., n - 1]), carry)
        return concat([low, top[..., None]], axis=-1)

    def sub(self, x: Bits, y: Bits) -> Bits:
        """x − y modulo 2^n, as x + ¬y + 1: n − 1 AND gates."""
        return self.add(x, self.not_(y), 1)

    def sub_borrow(self, x: Bits, y: Bits) -> tuple[Bits, Bits]:
        """(x − y modulo 2^n, x ≥ y as unsigned): n AND gates."""
        return self.add_carry(x, self.not_(y), 1)

    def neg(self, x: Bits) -> Bits:
        """−x modulo 2^n (two's complement)."""
        xa = _word(x)
        return self.sub(self.zeros(xa.shape), xa)

    def _carry_only(self, x: Bits, y: Bits, carry: Bits | int) -> Bits:
        c = self._lanes(carry, x.shape[:-1])
        for i in range(x.shape[-1]):
            xi, yi = x[..., i], y[..., i]
            c = self.xor(c, self.and_(self.xor(xi, c), self.xor(yi, c)))
        return c

    def _flip_sign(self, x: Bits) -> Bits:
        return concat([x[..., :-1], self.not_(x[..., -1:])], axis=-1)

    def greater_equal(self, x: Bits, y: Bits, *, signed: bool = False) -> Bits:
        """x ≥ y: the carry out of x + ¬y + 1, n AND gates; signed words compare with their sign bits flipped."""
        xa, ya = self._pair(x, y)
        if signed and xa.shape[-1]:
            xa, ya = self._flip_sign(xa), self._flip_sign(ya)
        return self._carry_only(xa, self.not_(ya), 1)

    def less_than(self, x: Bits, y: Bits, *, signed: bool = False) -> Bits:
        """x < y: n AND gates."""
        return self.not_(self.greater_equal(x, y, signed=signed))

    def greater_than(self, x: Bits, y: Bits, *, signed: bool = False) -> Bits:
        return self.less_than(y, x, signed=signed)

    def less_equal(self, x: Bits, y: Bits, *, signed: bool = False) -> Bits:
        return self.greater_equal(y, x, signed=signed)

    def equal(self, x: Bits, y: Bits) -> Bits:
        """x = y: the AND of the bitwise XNORs, n − 1 AND gates."""
        xa, ya = self._pair(x, y)
        return self.reduce_and(self.not_(self.xor(xa, ya)), axis=-1)

    def is_zero(self, x: Bits) -> Bits:
        return self.not_(self.reduce_or(x, axis=-1))

    def select(self, select: Bits, if_zero: Bits, if_one: Bits) -> Bits:
        """Word multiplexer: ``select`` has the lane shape; one AND gate per bit."""
        return self.mux(select[..., None], if_zero, if_one)

    def min_max(self, x: Bits, y: Bits, *, signed: bool = False) -> tuple[Bits, Bits]:
        """(min, max) of two words per lane: a comparator and one shared multiplexer, 2n AND gates."""
        xa, ya = self._pair(x, y)
        swap = self.greater_than(xa, ya, signed=signed)[..., None]
        delta = self.and_(swap, self.xor(xa, ya))
        return self.xor(xa, delta), self.xor(ya, delta)

    def multiply(self, x: Bits, y: Bits, *, width: int | None = None, signed: bool = False) -> Bits:
        """x · y modulo 2^width (default: the operands' width) by schoolbook shift-and-add.

        Signed operands are sign-extended to ``width`` first, so the low ``width`` bits are the two's-complement
        product. Costs about width² AND gates for the partial products and the additions.
        """
        xa, ya = self._pair(x, y)
        w = xa.shape[-1] if width is None else int(width)
        xa, ya = self.extend(xa, w, signed=signed), self.extend(ya, w, signed=signed)
        acc = self.and_(xa, ya[..., 0:1])
        for j in range(1, w):
            partial = self.and_(xa[..., : w - j], ya[..., j : j + 1])
            high = self.add(acc[..., j:], partial)
            acc = concat([acc[..., :j], high], axis=-1)
        return acc

    def square(self, x: Bits) -> Bits:
        """x² of an unsigned n-bit word, 2n bits: n(n − 1)/2 cross products and the additions of their rows.

        x² = Σ_i x_i·2^(2i) + Σ_{i<j} x_i x_j·2^(i+j+1), since x_i ∧ x_i = x_i and the cross products come in pairs.
        Row i (i = 0 … n − 2) holds the products x_i ∧ x_j for j > i at weights i + j + 1; the diagonal word is free.
        """
        xa = _word(x)
        n = xa.shape[-1]
        lanes = xa.shape[:-1]
        zero = self.zeros((*lanes, 1))
        diag: list[Bits] = []
        for i in range(n):
            diag += [xa[..., i : i + 1], zero]
        acc = concat(diag, axis=-1) if diag else self.zeros((*lanes, 0))
        for i in range(n - 1):
            row = self.and_(xa[..., i + 1 :], xa[..., i : i + 1])  # weights 2i + 2 … i + n
            low = 2 * i + 2
            total, carry = self.add_carry(acc[..., low : low + row.shape[-1]], row)
            upper = acc[..., low + row.shape[-1] :]
            if upper.shape[-1]:
                upper = self.add(
                    upper, concat([carry[..., None], self.zeros((*lanes, upper.shape[-1] - 1))], -1)
                )
            acc = concat([acc[..., :low], total, upper], axis=-1)
        return acc

    # -- words: free rewiring ------------------------------------------------------------------------------------
    def extend(self, x: Bits, width: int, *, signed: bool = False) -> Bits:
        """Zero- or sign-extend (or truncate) words to ``width`` bits; free."""
        xa = _word(x)
        n = xa.shape[-1]
        if width <= n:
            return xa[..., :width]
        if signed and n:
            fill = xa[..., -1:].broadcast_to((*xa.shape[:-1], width - n))
        else:
            fill = self.zeros((*xa.shape[:-1], width - n))
        return concat([xa, fill], axis=-1)

    def shift_left(self, x: Bits, k: int) -> Bits:
        xa = _word(x)
        n = xa.shape[-1]
        k = min(k, n)
        return concat([self.zeros((*xa.shape[:-1], k)), xa[..., : n - k]], axis=-1)

    def shift_right(self, x: Bits, k: int, *, signed: bool = False) -> Bits:
        xa = _word(x)
        n = xa.shape[-1]
        k = min(k, n)
        if signed and n:
            fill = xa[..., -1:].broadcast_to((*xa.shape[:-1], k))
        else:
            fill = self.zeros((*xa.shape[:-1], k))
        return concat([xa[..., k:], fill], axis=-1)

    @staticmethod
    def rotate_left(x: Bits, k: int) -> Bits:
        return _word(x).roll(k, axis=-1)

    @staticmethod
    def rotate_right(x: Bits, k: int) -> Bits:
        return _word(x).roll(-k, axis=-1)
