"""Bit-matrix transposition for OT extension, with word-level bit tricks over whole numpy arrays.

Theory of operation
-------------------
IKNP OT extension (Ishai–Kilian–Nissim–Petrank, Crypto 2003) builds a 128 × m bit matrix column by column
(one PRG stream per base OT) and then needs its m rows of 128 bits (one block per OT). Bits are numbered
little-endian throughout: bit j of a column is bit j mod 8 of byte j // 8, and bit i of a row block is bit
i mod 64 of 64-bit word i // 64 — the ``(n, 2) '<u8'`` block convention of ``primitives.blocks``.

The matrix is cut into 64 × 64 tiles, each tile being 64 words (one per matrix row, word t of that row). A
tile is transposed in place by the classic recursive block swap (H. S. Warren, Hacker's Delight, section 7-3): for j =
32, 16, 8, 4, 2, 1, every word pair (k, k + j) with k & j = 0 exchanges the bits at positions c + j of
word k with positions c of word k + j (c & j = 0):

    t = ((w[k] >> j) ^ w[k + j]) & mask_j;   w[k + j] ^= t;   w[k] ^= t << j

Each stage is six whole-array numpy operations over the m word pairs of the 2m-word matrix (all tiles at
once), so the whole transposition costs about 36 word operations per 64 matrix bits instead of one step
per bit; a last gather puts the two 64-bit halves of each row side by side.
"""

from __future__ import annotations

import numpy as np

WORD = np.dtype("<u8")

# mask_j selects the bit positions c with c & j == 0.
_STAGES: tuple[tuple[int, np.uint64], ...] = (
    (32, np.uint64(0x00000000FFFFFFFF)),
    (16, np.uint64(0x0000FFFF0000FFFF)),
    (8, np.uint64(0x00FF00FF00FF00FF)),
    (4, np.uint64(0x0F0F0F0F0F0F0F0F)),
    (2, np.uint64(0x3333333333333333)),
    (1, np.uint64(0x5555555555555555)),
)


def transpose_bits(matrix: np.ndarray) -> np.ndarray:
    """Transpose an (R, nbytes) uint8 bit matrix (R a multiple of 64, nbytes a multiple of 8).

    Returns an ``(8 · nbytes, R // 64)`` array of ``'<u8'`` words: row j holds the R bits of column j, bit
    i in word i // 64 at position i mod 64. For R = 128 this is an ``(m, 2)`` block array. The input is
    not modified.
    """
    if matrix.ndim != 2 or matrix.dtype != np.uint8:
        raise ValueError("transpose_bits needs a two-dimensional uint8 array")
    rows, nbytes = matrix.shape
    if rows % 64 or nbytes % 8:
        raise ValueError(f"transpose_bits needs rows % 64 == 0 and bytes % 8 == 0, got {rows} × {nbytes}")
    groups, words = rows // 64, nbytes // 8
    if words == 0:
        return np.zeros((0, groups), dtype=WORD)
    # tiles[g, k, t]: word t of matrix row 64 g + k (a copy, transposed in place below).
    tiles = np.ascontiguousarray(matrix).view(WORD).reshape(groups, 64, words).copy()
    scratch = np.empty(groups * 32 * words, dtype=WORD)
    for j, mask in _STAGES:
        view = tiles.reshape(groups, 32 // j, 2, j, words)
        low = view[:, :, 0]
        high = view[:, :, 1]
        t = scratch.reshape(groups, 32 // j, j, words)
        shift = np.uint64(j)
        np.right_shift(low, shift, out=t)
        t ^= high
        t &= mask
        high ^= t
        t <<= shift
        low ^= t
    # Now tiles[g, c, t] holds bits 64 g .. 64 g + 63 of column 64 t + c; rows are ordered (t, c).
    out = np.empty((words, 64, groups), dtype=WORD)
    out[...] = tiles.transpose(2, 1, 0)
    return out.reshape(words * 64, groups)
