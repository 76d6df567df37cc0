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


def select_mask(bits: np.ndarray) -> np.ndarray:
    """A ``(n, 1)`` word mask that is all ones where ``bits`` is 1 and zero where it is 0 (for branch-free select)."""
    return (np.asarray(bits, dtype=np.uint64) * np.uint64(0xFFFFFFFFFFFFFFFF)).reshape(-1, 1)


# A block as one opaque 16-byte cell: gathers, scatters and strided copies of whole blocks are several times faster
# on a ``.view(CELL_DTYPE)`` of an ``(n, 2)`` array than on pairs of words (numpy's inner loop would otherwise run
# over an axis of length 2); XORs stay on the word view.
CELL_DTYPE = np.dtype("V16")
