"""Integers to bits and back, in the builder's order (least significant bit first along the last axis)."""

from __future__ import annotations

import numpy as np


def int_to_bits(values: object, width: int) -> np.ndarray:
    """Integers (any shape, two's complement for negatives, Python ints of any size) → uint8 bits (..., width)."""
    vals = np.asarray(values, dtype=object)
    mask = (1 << width) - 1
    flat = [int(v) & mask for v in vals.reshape(-1)]
    if width <= 63:
        arr = np.array(flat, dtype=np.uint64).reshape(-1, 1)
        bits = (arr >> np.arange(width, dtype=np.uint64)) & np.uint64(1)
        return bits.astype(np.uint8).reshape(*vals.shape, width)
    out = np.array([[(v >> i) & 1 for i in range(width)] for v in flat], dtype=np.uint8)
    return out.reshape(*vals.shape, width)


def bits_to_int(bits: object, *, signed: bool = False) -> np.ndarray:
    """uint8 bits (..., width), LSB first → Python integers (object array) or int64 when they fit."""
    arr = np.asarray(bits, dtype=np.uint8)
    width = arr.shape[-1]
    flat = arr.reshape(-1, width)
    if width <= 62:
        vals = (flat.astype(np.int64) << np.arange(width, dtype=np.int64)).sum(axis=1)
        if signed and width:
            vals = np.where(vals >= (1 << (width - 1)), vals - (1 << width), vals)
        return vals.reshape(arr.shape[:-1])
    out = []
    for row in flat:
        v = sum(int(b) << i for i, b in enumerate(row))
        if signed and width and v >= 1 << (width - 1):
            v -= 1 << width
        out.append(v)
    return np.array(out, dtype=object).reshape(arr.shape[:-1])
