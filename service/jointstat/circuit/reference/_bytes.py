"""Bytes to input bits and back, in the order the reference circuits document.

A byte string of n bytes is the bit vector of length 8n whose bit 8i + j is bit j (least significant first) of
byte i, i.e. ``np.unpackbits(..., bitorder="little")``. This is the builder's LSB-first word order applied to
each byte, with the bytes in the order the standard lists them.
"""

from __future__ import annotations

import numpy as np


def bytes_to_bits(data: bytes | bytearray | memoryview, length: int, what: str) -> np.ndarray:
    """``data`` (exactly ``length`` bytes) as a uint8 bit vector of 8·length bits; ``what`` names it in errors."""
    if not isinstance(data, bytes | bytearray | memoryview):
        raise TypeError(f"{what}: expected bytes, got {type(data).__name__}")
    raw = bytes(data)
    if len(raw) != length:
        raise ValueError(f"{what}: expected {length} bytes, got {len(raw)}")
    return np.unpackbits(np.frombuffer(raw, dtype=np.uint8), bitorder="little")


def bits_to_bytes(bits: object, length: int, what: str) -> bytes:
    """A vector of 8·length bits (0/1) back to ``length`` bytes; ``what`` names it in errors."""
    arr = np.asarray(bits)
    if arr.shape != (8 * length,):
        raise ValueError(f"{what}: expected {8 * length} bits, got an array of shape {arr.shape}")
    if arr.size and (arr.dtype.kind not in "biu" or arr.min() < 0 or arr.max() > 1):
        raise ValueError(f"{what}: bits must be the integers 0 or 1")
    return np.packbits(arr.astype(np.uint8), bitorder="little").tobytes()
