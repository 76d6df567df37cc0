"""The lane-parallel circuit builder.

Theory of operation
-------------------
Values in the builder are numpy arrays of wire numbers. A *bit array* has any shape; a *word* is an array whose last
axis holds its bits, least significant first, and whose leading axes are *lanes* (records, table rows, S-box
positions…). Every operation acts on all lanes at once and emits its gates in bulk: ``xor(a, b)`` on two arrays of a
million wires appends a million gates with a few numpy calls. A word operation loops in Python only over bit
positions (at most the word width), never over lanes or gates.

Constants are wires 0 and 1, and a constant's wire number is its value, so folding is a vectorised table lookup:
``xor`` with 0 or ``and`` with 1 passes the other wire through, ``and`` with 0 gives 0, ``xor`` with 1 becomes a
NOT, and ``xor(a, a)`` is 0. Adding a public constant therefore costs fewer AND gates than adding a secret.

The AND counts of the word operations are the minimal ones for garbling with free XOR (Kolesnikov–Sadeghi–
Schneider, CANS 2009): an n-bit adder with carry-out, a subtractor, a comparator and a multiplexer cost n AND gates
each; addition modulo 2^n costs n − 1; equality costs n − 1.

Storage: gate inputs go into two int32 columns in anonymous memory mappings that grow by doubling (``mremap``
moves pages without copying), gate kinds are kept as runs (one per emission), and output wires are not stored at
all — every emission takes the next consecutive wire numbers, so the output column is the complement of the input
ranges and is rebuilt by ``build``. The finished circuit's in0/in1 arrays are the columns themselves, so a gate
costs 13 bytes at the peak, as in the finished circuit. Every gate reads wires below the next free wire number
(checked as it is emitted), so the builder's circuits are valid by construction; circuits of at most
``VALIDATE_LIMIT`` gates are checked once more by ``Circuit.create``, larger ones (whose full check needs several
times the circuit's memory) are assembled directly.
"""

from __future__ import annotations

import mmap

import numpy as np

from jointstat.circuit.model import ONE_WIRE, WIRE_LIMIT, ZERO_WIRE, Circuit, CircuitError, GateKind, Party

Wires = np.ndarray

INITIAL_GATES = 1 << 12  # initial capacity of the gate-input columns; they double as needed
VALIDATE_LIMIT = 1 << 24  # circuits up to this many gates are re-validated by Circuit.create in build()


class _Column:
    """A growable int32 array in its own private anonymous memory mapping (a shared one cannot grow).

    Growing doubles the mapping with ``mremap`` (``mmap.resize``), which moves pages without copying them, and
    ``finish`` shrinks it to size and returns a view of it: the circuit's array *is* the storage the builder wrote,
    so no memory is copied or touched twice (first touches of fresh pages dominate the cost of large arrays).
    """

    def __init__(self) -> None:
        self._map = mmap.mmap(-1, INITIAL_GATES * 4, flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
        self.view = np.frombuffer(self._map, dtype=np.int32)
        self.size = 0

    def reserve(self, extra: int) -> None:
        need = self.size + extra
        capacity = self.view.shape[0]
        if need <= capacity:
            return
        while capacity < need:
            capacity *= 2
        old = self.view
        del self.view  # the mapping cannot move while a view of it exists
        try:
            del old
            self._map.resize(capacity * 4)
        except (OSError, SystemError, ValueError, BufferError):  # no mremap here: copy into a new mapping
            fresh = mmap.mmap(-1, capacity * 4, flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
            np.frombuffer(fresh, dtype=np.int32)[: self.size] = np.frombuffer(self._map, dtype=np.int32)[
                : self.size
            ]
            self._map = fresh
        self.view = np.frombuffer(self._map, dtype=np.int32)

    def finish(self) -> np.ndarray:
        if self.size == 0:
            return np.zeros(0, dtype=np.int32)
        del self.view
        self._map.resize(self.size * 4)
        arr = np.frombuffer(self._map, dtype=np.int32)
        self._map = None  # type: ignore[assignment]  # the array keeps the mapping alive
        return arr


def _wires(x: object) -> np.ndarray:
    arr = np.asarray(x)
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        raise CircuitError(f"builder: expected wire numbers (integers), got dtype {arr.dtype}")
    return arr.astype(np.int64, copy=False)


class Builder:
    """Accumulates gates in bulk and produces a validated ``Circuit``."""

    def __init__(self) -> None:
        self._next = 2  # wires 0 and 1 are the constants
        self._kinds: list[tuple[int, int]] = []  # (gate kind, count) per emission
        self._in0 = _Column()
        self._in1 = _Column()
        self._gates = 0
        self._input_ranges: list[tuple[int, int]] = []  # (first wire, count) of each input() call
        self._inputs: dict[Party, list[np.ndarray]] = {p: [] for p in Party}
        self._outputs: dict[Party, list[np.ndarray]] = {p: [] for p in Party}
        self._output_count = {p: 0 for p in Party}
        self.and_gates = 0
        self._built = False

    @property
    def gate_count(self) -> int:
        """Gates emitted so far."""
        return self._gates

    # -- wires --------------------------------------------------------------------------------------------------
    def _fresh(self, n: int) -> np.ndarray:
        wires = np.arange(self._next, self._next + n, dtype=np.int64)
        self._next += n
        return wires

    def input(self, party: Party, shape: int | tuple[int, ...]) -> Wires:
        """New input wires of ``party`` in the given shape; their order (C order) is the party's input bit order."""
        shape = (shape,) if isinstance(shape, int) else tuple(shape)
        n = int(np.prod(shape, dtype=np.int64))
        if self._built:
            raise CircuitError("builder: the circuit has been built already; start a new Builder")
        wires = self._fresh(n)
        if n:
            self._input_ranges.append((int(wires[0]), n))
        self._inputs[Party(party)].append(wires)
        return wires.reshape(shape)

    def output(self, party: Party, wires: object) -> slice:
        """Mark ``wires`` (flattened in C order) as outputs of ``party``; returns their slice of its output bits."""
        flat = _wires(wires).reshape(-1)
        if flat.size and (flat.min() < 0 or flat.max() >= self._next):
            raise CircuitError(f"builder: output wire out of range (0..{self._next - 1})")
        start = self._output_count[Party(party)]
        self._outputs[Party(party)].append(flat.copy())
        self._output_count[Party(party)] += flat.size
        return slice(start, start + flat.size)

    @staticmethod
    def constant(bits: object) -> Wires:
        """Public constant bits (0/1 values) as wires: the constant's wire number is its value."""
        arr = np.asarray(bits, dtype=np.int64)
        if arr.size and (arr.min() < 0 or arr.max() > 1):
            raise CircuitError("builder: constant bits must be 0 or 1")
        return arr

    def constant_word(self, values: object, width: int) -> Wires:
        """Public integers (any shape; two's complement for negatives) as words of ``width`` bits."""
        vals = np.asarray(values, dtype=object)
        flat = [int(v) & ((1 << width) - 1) for v in vals.reshape(-1)]
        bits = np.array([[(v >> i) & 1 for i in range(width)] for v in flat], dtype=np.int64)
        return bits.reshape(*vals.shape, width)

    # -- gates --------------------------------------------------------------------------------------------------
    def _emit(self, kind: GateKind, a: np.ndarray, b: np.ndarray | None) -> np.ndarray:
        """Append gates reading ``a`` (and ``b``) — flat arrays of non-constant wires — and return their outputs."""
        if self._built:
            raise CircuitError("builder: the circuit has been built already; start a new Builder")
        n = a.shape[0]
        if not n:
            return np.zeros(0, dtype=np.int64)
        top = int(a.max()) if b is None else max(int(a.max()), int(b.max()))
        if top >= self._next:
            raise CircuitError(
                f"builder: gate input wire {top} is not defined yet (wires are 0..{self._next - 1})"
            )
        if self._next + n >= WIRE_LIMIT:
            raise CircuitError(f"builder: more than {WIRE_LIMIT} wires")
        out = self._fresh(n)
        self._kinds.append((int(kind), n))
        at = self._gates
        for column, src in ((self._in0, a), (self._in1, b)):
            column.reserve(n)
            if src is None:
                column.view[at : at + n] = -1
            else:
                column.view[at : at + n] = src
            column.size = at + n
        self._gates += n
        if kind == GateKind.AND:
            self.and_gates += n
        return out

    @staticmethod
    def _flat_pair(a: object, b: object) -> tuple[np.ndarray, np.ndarray, tuple[int, ...]]:
        a_arr, b_arr = _wires(a), _wires(b)
        if a_arr.shape != b_arr.shape:
            a_arr, b_arr = np.broadcast_arrays(a_arr, b_arr)
        return a_arr.reshape(-1), b_arr.reshape(-1), a_arr.shape

    @staticmethod
    def _no_folding(fa: np.ndarray, fb: np.ndarray) -> bool:
        """True when no operand is a constant and no lane has equal operands: every lane becomes a gate."""
        return bool(fa.size) and min(int(fa.min()), int(fb.min())) >= 2 and not np.any(fa == fb)

    def not_(self, a: object) -> Wires:
        a_arr = _wires(a)
        flat = a_arr.reshape(-1)
        if flat.size and int(flat.min()) >= 2:
            return self._emit(GateKind.NOT, flat, None).reshape(a_arr.shape)
        res = np.empty_like(flat)
        const = flat < 2
        res[const] = 1 - flat[const]
        res[~const] = self._emit(GateKind.NOT, flat[~const], None)
        return res.reshape(a_arr.shape)

    def xor(self, a: object, b: object) -> Wires:
        fa, fb, shape = self._flat_pair(a, b)
        if self._no_folding(fa, fb):
            return self._emit(GateKind.XOR, fa, fb).reshape(shape)
        res = np.empty(fa.shape, dtype=np.int64)
        ca, cb = fa < 2, fb < 2
        both = ca & cb
        res[both] = fa[both] ^ fb[both]
        pass_b = ca & ~cb & (fa == ZERO_WIRE)
        pass_a = cb & ~ca & (fb == ZERO_WIRE)
        res[pass_b] = fb[pass_b]
        res[pass_a] = fa[pass_a]
        same = ~ca & ~cb & (fa == fb)
        res[same] = ZERO_WIRE
        flip_b = ca & ~cb & (fa == ONE_WIRE)
        flip_a = cb & ~ca & (fb == ONE_WIRE)
        flips = flip_a | flip_b
        if flips.any():
            res[flips] = self.not_(np.where(flip_b, fb, fa)[flips])
        gate = ~ca & ~cb & ~same
        res[gate] = self._emit(GateKind.XOR, fa[gate], fb[gate])
        return res.reshape(shape)

    def and_(self, a: object, b: object) -> Wires:
        fa, fb, shape = self._flat_pair(a, b)
        if self._no_folding(fa, fb):
            return self._emit(GateKind.AND, fa, fb).reshape(shape)
        res = np.empty(fa.shape, dtype=np.int64)
        ca, cb = fa < 2, fb < 2
        both = ca & cb
        res[both] = fa[both] & fb[both]
        only_a = ca & ~cb  # a constant: 0 → 0, 1 → b
        res[only_a] = np.where(fa[only_a] == ONE_WIRE, fb[only_a], ZERO_WIRE)
        only_b = cb & ~ca
        res[only_b] = np.where(fb[only_b] == ONE_WIRE, fa[only_b], ZERO_WIRE)
        same = ~ca & ~cb & (fa == fb)
        res[same] = fa[same]
        gate = ~ca & ~cb & ~same
        res[gate] = self._emit(GateKind.AND, fa[gate], fb[gate])
        return res.reshape(shape)

    def or_(self, a: object, b: object) -> Wires:
        """a ∨ b = a ⊕ b ⊕ (a ∧ b): one AND gate per bit."""
        return self.xor(self.xor(a, b), self.and_(a, b))

    def mux(self, select: object, if_zero: object, if_one: object) -> Wires:
        """``if_one`` where ``select`` is 1, else ``if_zero``: x ⊕ (s ∧ (x ⊕ y)), one AND gate per bit.

        ``select`` broadcasts against the others; for words give it shape (..., 1).
        """
        diff = self.xor(if_zero, if_one)
        return self.xor(if_zero, self.and_(select, diff))

    # -- reductions ---------------------------------------------------------------------------------------------
    def reduce_and(self, bits: object, axis: int = -1) -> Wires:
        """AND over an axis by a balanced tree: n − 1 AND gates, depth ⌈log2 n⌉."""
        return self._tree(bits, axis, self.and_, ONE_WIRE)

    def reduce_or(self, bits: object, axis: int = -1) -> Wires:
        """OR over an axis (De Morgan over ``reduce_and``): n − 1 AND gates."""
        return self.not_(self.reduce_and(self.not_(bits), axis))

    def reduce_xor(self, bits: object, axis: int = -1) -> Wires:
        return self._tree(bits, axis, self.xor, ZERO_WIRE)

    @staticmethod
    def _tree(bits: object, axis: int, op: object, identity: int) -> Wires:
        arr = np.moveaxis(_wires(bits), axis, -1)
        if arr.shape[-1] == 0:
            return np.full(arr.shape[:-1], identity, dtype=np.int64)
        while arr.shape[-1] > 1:
            half = arr.shape[-1] // 2
            paired = op(arr[..., :half], arr[..., half : 2 * half])  # type: ignore[operator]
            arr = np.concatenate([paired, arr[..., 2 * half :]], axis=-1)
        return arr[..., 0]

    # -- words: arithmetic -------------------------------------------------------------------------------------
    @staticmethod
    def _pair(x: object, y: object) -> tuple[np.ndarray, np.ndarray]:
        xa, ya = _wires(x), _wires(y)
        if xa.ndim == 0 or ya.ndim == 0 or xa.shape[-1] != ya.shape[-1]:
            raise CircuitError(
                f"builder: words must have the same width, got {xa.shape[-1:]} and {ya.shape[-1:]} bits"
            )
        xb, yb = np.broadcast_arrays(xa, ya)
        return xb, yb

    def add_carry(self, x: object, y: object, carry_in: object = ZERO_WIRE) -> tuple[Wires, Wires]:
        """Ripple-carry x + y + carry_in: (sum of the same width, carry out). n AND gates for n bits.

        Per bit: s = x ⊕ y ⊕ c and c' = c ⊕ ((x ⊕ c) ∧ (y ⊕ c)) (Kolesnikov–Sadeghi–Schneider 2009).
        """
        xa, ya = self._pair(x, y)
        n = xa.shape[-1]
        carry = np.broadcast_to(_wires(carry_in), xa.shape[:-1]).astype(np.int64)
        total = np.empty(xa.shape, dtype=np.int64)
        for i in range(n):
            xi, yi = xa[..., i], ya[..., i]
            xc = self.xor(xi, carry)
            total[..., i] = self.xor(xc, yi)
            carry = self.xor(carry, self.and_(xc, self.xor(yi, carry)))
        return total, carry

    def add(self, x: object, y: object, carry_in: object = ZERO_WIRE) -> Wires:
        """x + y (+ carry_in) modulo 2^n: n − 1 AND gates (the last carry is not computed)."""
        xa, ya = self._pair(x, y)
        n = xa.shape[-1]
        if n == 0:
            return xa.copy()
        low, carry = self.add_carry(xa[..., : n - 1], ya[..., : n - 1], carry_in)
        top = self.xor(self.xor(xa[..., n - 1], ya[..., n - 1]), carry)
        return np.concatenate([low, top[..., None]], axis=-1)

    def sub(self, x: object, y: object) -> Wires:
        """x − y modulo 2^n, as x + ¬y + 1: n − 1 AND gates."""
        return self.add(x, self.not_(y), ONE_WIRE)

    def sub_borrow(self, x: object, y: object) -> tuple[Wires, Wires]:
        """(x − y modulo 2^n, x ≥ y as unsigned): n AND gates."""
        return self.add_carry(x, self.not_(y), ONE_WIRE)

    def neg(self, x: object) -> Wires:
        """−x modulo 2^n (two's complement)."""
        xa = _wires(x)
        return self.sub(np.zeros_like(xa), xa)

    def _carry_only(self, x: np.ndarray, y: np.ndarray, carry: object) -> Wires:
        c = np.broadcast_to(_wires(carry), x.shape[:-1]).astype(np.int64)
        for i in range(x.shape[-1]):
            xi, yi = x[..., i], y[..., i]
            c = self.xor(c, self.and_(self.xor(xi, c), self.xor(yi, c)))
        return c

    def greater_equal(self, x: object, y: object, *, signed: bool = False) -> Wires:
        """x ≥ y: the carry out of x + ¬y + 1, n AND gates; signed words compare with their sign bits flipped."""
        xa, ya = self._pair(x, y)
        if signed and xa.shape[-1]:
            xa = np.concatenate([xa[..., :-1], self.not_(xa[..., -1:])], axis=-1)
            ya = np.concatenate([ya[..., :-1], self.not_(ya[..., -1:])], axis=-1)
        return self._carry_only(xa, self.not_(ya), ONE_WIRE)

    def less_than(self, x: object, y: object, *, signed: bool = False) -> Wires:
        """x < y: n AND gates."""
        return self.not_(self.greater_equal(x, y, signed=signed))

    def greater_than(self, x: object, y: object, *, signed: bool = False) -> Wires:
        return self.less_than(y, x, signed=signed)

    def less_equal(self, x: object, y: object, *, signed: bool = False) -> Wires:
        return self.greater_equal(y, x, signed=signed)

    def equal(self, x: object, y: object) -> Wires:
        """x = y: the AND of the bitwise XNORs, n − 1 AND gates."""
        xa, ya = self._pair(x, y)
        return self.reduce_and(self.not_(self.xor(xa, ya)), axis=-1)

    def is_zero(self, x: object) -> Wires:
        return self.not_(self.reduce_or(x, axis=-1))

    def select(self, select: object, if_zero: object, if_one: object) -> Wires:
        """Word multiplexer: ``select`` has the lane shape; one AND gate per bit."""
        return self.mux(_wires(select)[..., None], if_zero, if_one)

    def min_max(self, x: object, y: object, *, signed: bool = False) -> tuple[Wires, Wires]:
        """(min, max) of two words per lane: a comparator and one shared multiplexer, 2n AND gates."""
        xa, ya = self._pair(x, y)
        swap = self.greater_than(xa, ya, signed=signed)[..., None]
        delta = self.and_(swap, self.xor(xa, ya))
        return self.xor(xa, delta), self.xor(ya, delta)

    def multiply(self, x: object, y: object, *, width: int | None = None, signed: bool = False) -> Wires:
        """x · y modulo 2^width (default: the operands' width) by schoolbook shift-and-add.

        Signed operands are sign-extended to ``width`` first, so the low ``width`` bits are the two's-complement
        product. Costs about width² AND gates for the partial products and the additions.
        """
        xa, ya = self._pair(x, y)
        n = xa.shape[-1]
        w = n if width is None else int(width)
        xa, ya = self.extend(xa, w, signed=signed), self.extend(ya, w, signed=signed)
        acc = np.zeros(xa.shape, dtype=np.int64)
        for j in range(w):
            partial = self.and_(xa[..., : w - j], ya[..., j : j + 1])
            if j == 0:
                acc = partial
            else:
                high = self.add(acc[..., j:], partial)
                acc = np.concatenate([acc[..., :j], high], axis=-1)
        return acc

    # -- words: free rewiring -----------------------------------------------------------------------------------
    @staticmethod
    def extend(x: object, width: int, *, signed: bool = False) -> Wires:
        """Zero- or sign-extend (or truncate) words to ``width`` bits; free."""
        xa = _wires(x)
        n = xa.shape[-1]
        if width <= n:
            return xa[..., :width].copy()
        fill = np.broadcast_to(xa[..., -1:] if signed and n else ZERO_WIRE, (*xa.shape[:-1], width - n))
        return np.concatenate([xa, fill], axis=-1)

    @staticmethod
    def shift_left(x: object, k: int) -> Wires:
        xa = _wires(x)
        n = xa.shape[-1]
        k = min(k, n)
        return np.concatenate([np.zeros((*xa.shape[:-1], k), dtype=np.int64), xa[..., : n - k]], axis=-1)

    @staticmethod
    def shift_right(x: object, k: int, *, signed: bool = False) -> Wires:
        xa = _wires(x)
        n = xa.shape[-1]
        k = min(k, n)
        fill = np.broadcast_to(xa[..., -1:] if signed and n else ZERO_WIRE, (*xa.shape[:-1], k))
        return np.concatenate([xa[..., k:], fill], axis=-1)

    @staticmethod
    def rotate_left(x: object, k: int) -> Wires:
        return np.roll(_wires(x), k, axis=-1)

    @staticmethod
    def rotate_right(x: object, k: int) -> Wires:
        return np.roll(_wires(x), -k, axis=-1)

    # -- result -------------------------------------------------------------------------------------------------
    def build(self) -> Circuit:
        """The circuit of everything emitted (its gate-input arrays are the builder's own columns)."""
        if self._built:
            raise CircuitError("builder: the circuit has been built already; start a new Builder")
        self._built = True
        g = self._gates
        kinds = np.empty(g, dtype=np.uint8)
        pos = 0
        for kind, n in self._kinds:
            kinds[pos : pos + n] = kind
            pos += n
        self._kinds.clear()
        out = self._output_wires(g)

        in0 = self._in0.finish()
        in1 = self._in1.finish()

        def wires(parts: list[np.ndarray]) -> np.ndarray:
            arr = np.concatenate(parts).astype(np.int64, copy=False) if parts else np.zeros(0, dtype=np.int64)
            parts.clear()
            return arr

        inputs = {p: wires(self._inputs[p]) for p in Party}
        outputs = {p: wires(self._outputs[p]) for p in Party}
        if g <= VALIDATE_LIMIT:
            return Circuit.create(
                n_wires=self._next, kinds=kinds, in0=in0, in1=in1, out=out, inputs=inputs, outputs=outputs
            )
        # Valid by construction (see the module docstring); the full check would need several times the memory.
        return Circuit(
            n_wires=self._next, kinds=kinds, in0=in0, in1=in1, out=out, inputs=inputs, outputs=outputs
        )

    def _output_wires(self, g: int) -> np.ndarray:
        """Gate output wires in emission order: every wire from 2 up that no input() call took."""
        out = np.empty(g, dtype=np.int32)
        at, wire = 0, 2
        step = 1 << 22
        for first, n in [*self._input_ranges, (self._next, 0)]:
            while wire < first:
                take = min(step, first - wire)
                out[at : at + take] = np.arange(wire, wire + take, dtype=np.int32)
                at += take
                wire += take
            wire = first + n
        if at != g:
            raise CircuitError(f"builder: internal inconsistency: {at} gate outputs for {g} gates")
        return out
