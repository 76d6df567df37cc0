"""Half-gates: an AND gate as two ciphertexts, garbled and evaluated in batches.

Theory of operation
-------------------
Free-XOR (Kolesnikov–Schneider, ICALP 2008): the garbler draws a global offset Δ with lsb(Δ) = 1 and, for every
wire, a zero label W⁰; the one label is W¹ = W⁰ ⊕ Δ. The label's lowest bit is its signal bit (point-and-permute,
Beaver–Micali–Rogaway, STOC 1990): since lsb(Δ) = 1 the two labels of a wire have opposite signal bits, so the
evaluator knows which row to use without learning the value.

AND, half-gates (Zahur–Rosulek–Evans, Eurocrypt 2015, figure 2), with p_a = lsb(A⁰), p_b = lsb(B⁰) and the gate's
index j giving tweaks 2j and 2j + 1:

    T_G = H(A⁰, 2j) ⊕ H(A¹, 2j) ⊕ p_b·Δ         W_G⁰ = H(A⁰, 2j) ⊕ p_a·T_G
    T_E = H(B⁰, 2j+1) ⊕ H(B¹, 2j+1) ⊕ A⁰         W_E⁰ = H(B⁰, 2j+1) ⊕ p_b·(T_E ⊕ A⁰)
    C⁰ = W_G⁰ ⊕ W_E⁰, and the garbled table is (T_G, T_E): exactly two 16-byte ciphertexts.

The evaluator, holding A and B with signal bits s_a, s_b, makes two hash calls:

    C = H(A, 2j) ⊕ s_a·T_G ⊕ H(B, 2j+1) ⊕ s_b·(T_E ⊕ A).

H is the tweakable circular correlation-robust hash from fixed-key AES (Guo–Katz–Wang–Yu, S&P 2020, §7.3), see
``jointstat.primitives.aes``; tweak 2j + h is unique per gate and half over a whole session.

``HalfGates`` is an *AND scheme*: ``garble`` and ``evaluate`` work on a batch of k gates at once (k ≤ ``STEP``; the
backends cut larger calls into steps) with preallocated buffers. A batch's garbled material is
``table_bytes(k)`` = 32k bytes: the k ciphertexts T_G of its gates in gate order, then their k ciphertexts T_E
(16 bytes each, little-endian words), so every operation runs over contiguous arrays.

Cost per batch: four (garbler) or two (evaluator) hashes per gate at two AES blocks each, and about twenty numpy
passes over k blocks; the select-by-signal-bit masks are made once per operand over the whole block array (the
signal bit of word 0 copied into word 1), since numpy is slow on a broadcast length-2 axis.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from typing import ClassVar

import numpy as np

from jointstat.primitives.aes import FixedKeyAES
from jointstat.primitives.blocks import BLOCK_DTYPE, CELL_DTYPE

STEP = 1 << 13  # AND gates per hashing step: the AES batches stay in cache
TABLE_BYTES = 32  # two 16-byte ciphertexts per AND gate


class GarbleError(ValueError):
    """Tables, labels or decoding information of the wrong size or content; the message says which and where."""


def fresh_delta(random_bytes: Callable[[int], bytes] = os.urandom) -> np.ndarray:
    """A fresh global offset Δ with lsb(Δ) = 1 (point-and-permute needs opposite signal bits)."""
    delta = np.frombuffer(bytearray(random_bytes(16)), dtype=BLOCK_DTYPE).copy()
    delta[0] |= np.uint64(1)
    return delta


def _signal_masks(labels: np.ndarray, out: np.ndarray) -> np.ndarray:
    """``out`` (n, 2) := all ones in both words where the label's signal bit is 1, else zeros."""
    np.bitwise_and(labels, np.uint64(1), out=out)
    np.negative(out, out=out)
    out[:, 1] = out[:, 0]
    return out


def _copy_blocks(dst: np.ndarray, src: np.ndarray) -> None:
    """dst[:] = src for (k, 2) block arrays, moving whole 16-byte cells when ``src`` is strided."""
    if src.flags.c_contiguous or src.strides[1] != 8:
        dst[...] = src
    else:
        dst.view(CELL_DTYPE)[...] = src.view(CELL_DTYPE)


class HalfGates:
    """The half-gates AND scheme over batches of at most ``STEP`` gates (module docstring)."""

    name: ClassVar[str] = "half_gates"

    def __init__(self) -> None:
        self._perm = FixedKeyAES()
        self._x = np.empty((4 * STEP, 2), dtype=BLOCK_DTYPE)  # hash inputs
        self._h = np.empty((4 * STEP, 2), dtype=BLOCK_DTYPE)  # hash outputs
        self._t = np.empty(4 * STEP, dtype=np.uint64)  # tweaks
        self._m = np.empty((2 * STEP, 2), dtype=BLOCK_DTYPE)  # signal masks
        self._w = np.empty((STEP, 2), dtype=BLOCK_DTYPE)
        self._d = np.empty((STEP, 2), dtype=BLOCK_DTYPE)
        self._even = np.arange(0, 2 * STEP, 2, dtype=np.uint64)  # 2i, to which 2·first_gate is added
        self._delta_tile = np.empty((STEP, 2), dtype=BLOCK_DTYPE)  # Δ in every row (same-shape XORs are fast)
        self._delta_of_tile = b""

    @staticmethod
    def table_bytes(k: int) -> int:
        return TABLE_BYTES * k

    def _tweaks(self, first_gate: int, k: int, copies: int) -> np.ndarray:
        """Tweaks 2j (``copies`` // 2 times) then 2j + 1 (as often) for gates j = first_gate … first_gate + k − 1."""
        t = self._t[: copies * k]
        np.add(self._even[:k], np.uint64(2 * first_gate), out=t[:k])
        half = copies // 2
        for c in range(1, copies):
            if c < half:
                t[c * k : (c + 1) * k] = t[:k]
            else:
                np.add(t[:k], np.uint64(1), out=t[c * k : (c + 1) * k])
        return t

    def _delta(self, delta: np.ndarray, k: int) -> np.ndarray:
        if self._delta_of_tile != delta.tobytes():
            self._delta_tile[:] = delta
            self._delta_of_tile = delta.tobytes()
        return self._delta_tile[:k]

    def garble(
        self,
        a0: np.ndarray,
        b0: np.ndarray,
        delta: np.ndarray,
        first_gate: int,
        c0_out: np.ndarray,
        table_out: np.ndarray,
    ) -> None:
        """Zero labels A⁰, B⁰ of k gates → output zero labels C⁰ and the 32k-byte table (figure 2 of ZRE15)."""
        k = a0.shape[0]
        if k > STEP:
            raise GarbleError(f"half-gates: a batch holds at most {STEP} gates, got {k}")
        x, h = self._x[: 4 * k], self._h[: 4 * k]
        dt = self._delta(delta, k)
        xa0, xa1, xb0, xb1 = x[:k], x[k : 2 * k], x[2 * k : 3 * k], x[3 * k :]
        _copy_blocks(xa0, a0)
        np.bitwise_xor(xa0, dt, out=xa1)
        _copy_blocks(xb0, b0)
        np.bitwise_xor(xb0, dt, out=xb1)
        self._perm.hash(x, self._tweaks(first_gate, k, 4), out=h)
        ha0, ha1, hb0, hb1 = h[:k], h[k : 2 * k], h[2 * k : 3 * k], h[3 * k :]
        table = table_out.view(BLOCK_DTYPE).reshape(2 * k, 2)
        tg, te = table[:k], table[k:]
        pa = _signal_masks(xa0, self._m[:k])
        pb = _signal_masks(xb0, self._m[k : 2 * k])
        w, d = self._w[:k], self._d[:k]
        np.bitwise_and(pb, dt, out=w)  # T_G = H(A⁰) ⊕ H(A¹) ⊕ p_b·Δ
        np.bitwise_xor(ha0, ha1, out=tg)
        tg ^= w
        np.bitwise_and(pa, tg, out=w)  # W_G⁰ = H(A⁰) ⊕ p_a·T_G
        w ^= ha0
        np.bitwise_xor(hb0, hb1, out=d)  # T_E = H(B⁰) ⊕ H(B¹) ⊕ A⁰
        np.bitwise_xor(d, xa0, out=te)
        d &= pb  # W_E⁰ = H(B⁰) ⊕ p_b·(T_E ⊕ A⁰)
        d ^= hb0
        np.bitwise_xor(w, d, out=c0_out)  # C⁰ = W_G⁰ ⊕ W_E⁰

    def evaluate(
        self, a: np.ndarray, b: np.ndarray, table: np.ndarray, first_gate: int, c_out: np.ndarray
    ) -> None:
        """Active labels A, B of k gates and their table → active output labels C."""
        k = a.shape[0]
        if k > STEP:
            raise GarbleError(f"half-gates: a batch holds at most {STEP} gates, got {k}")
        x, h = self._x[: 2 * k], self._h[: 2 * k]
        xa, xb = x[:k], x[k:]
        _copy_blocks(xa, a)
        _copy_blocks(xb, b)
        self._perm.hash(x, self._tweaks(first_gate, k, 2), out=h)
        rows = table.view(BLOCK_DTYPE).reshape(2 * k, 2)
        tg, te = rows[:k], rows[k:]
        masks = _signal_masks(x, self._m[: 2 * k])
        sa, sb = masks[:k], masks[k:]
        w = self._w[:k]
        np.bitwise_xor(h[:k], h[k:], out=c_out)
        np.bitwise_and(sa, tg, out=w)  # s_a·T_G
        c_out ^= w
        np.bitwise_xor(te, xa, out=w)  # s_b·(T_E ⊕ A)
        w &= sb
        c_out ^= w
