"""128-bit blocks as numpy arrays.

Theory of operation: a block (a wire label, an OT key, an AES state) is two little-endian 64-bit words. An array
of n blocks is a C-contiguous ``(n, 2)`` array of dtype ``<u8``; its raw buffer is exactly the n × 16 bytes on the
wire, so converting to and from bytes costs no copy. The signal bit of a label (point-and-permute) is bit 0 of its
first byte, i.e. ``blocks[:, 0] & 1``.
"""

from __future__ import annotations

import os

import numpy as np

BLOCK_BYTES = 16
BLOCK_DTYPE = np.dtype("<u8")


def random_blocks(n: int) -> np.ndarray:
    """n fresh uniformly random blocks from the operating system's CSPRNG (os.urandom)."""
    return np.frombuffer(bytearray(os.urandom(n * BLOCK_BYTES)), dtype=BLOCK_DTYPE).reshape(n, 2)


def blocks_from_bytes(data: bytes | bytearray | memoryview, *, what: str = "blocks") -> np.ndarray:
    """View ``data`` as an ``(n, 2)`` block array; raises ValueError naming ``what`` if the length is wrong."""
    if len(data) % BLOCK_BYTES:
        raise ValueError(f"{what}: {len(data)} bytes is not a whole number of 16-byte blocks")
    return np.frombuffer(data, dtype=BLOCK_DTYPE).reshape(-1, 2)


def blocks_to_bytes(blocks: np.ndarray) -> bytes:
    """The wire bytes of a block array (16 bytes per block, little-endian words)."""
    return np.ascontiguousarray(blocks, dtype=BLOCK_DTYPE).tobytes()


def block_from_bytes(data: bytes, *, what: str = "block") -> np.ndarray:
    """One 16-byte block as a ``(2,)`` array."""
    if len(data) != BLOCK_BYTES:
        raise ValueError(f"{what}: expected 16 bytes, got {len(data)}")
    return np.frombuffer(data, dtype=BLOCK_DTYPE).copy()


def select_mask(bits: np.ndarray) -> np.ndarray:
    """A ``(n, 1)`` word mask that is all ones where ``bits`` is 1 and zero where it is 0 (for branch-free select)."""
    return (np.asarray(bits, dtype=np.uint64) * np.uint64(0xFFFFFFFFFFFFFFFF)).reshape(-1, 1)


def lsb(blocks: np.ndarray) -> np.ndarray:
    """The signal bit (bit 0 of the first byte) of each block, as uint8."""
    return (blocks[:, 0] & np.uint64(1)).astype(np.uint8)


CELL_DTYPE = np.dtype("V16")


def as_cells(blocks: np.ndarray) -> np.ndarray:
    """View an ``(n, 2)`` block array as ``(n,)`` opaque 16-byte cells (an ``(n, 2m)`` one as ``(n, m)``).

    Gathers, scatters and strided copies of whole blocks are several times faster on 16-byte cells than on pairs
    of words (numpy's inner loop would otherwise run over an axis of length 2); XORs stay on the word view.
    """
    cells = blocks.view(CELL_DTYPE)
    return cells.reshape(blocks.shape[:-1]) if blocks.shape[-1] == 2 else cells


def signal_masks(blocks: np.ndarray) -> np.ndarray:
    """An ``(n, 2)`` word mask per block: all ones where the block's signal bit is 1, else 0 (branch-free select)."""
    bits = blocks[:, 0] & np.uint64(1)
    mask = np.repeat(bits, 2).reshape(-1, 2)
    np.negative(mask, out=mask)
    return mask
