"""Bit-matrix transposition (ot.transpose) against a per-bit reference built from numpy's unpackbits/packbits."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.ot.transpose import transpose_bits


def reference(matrix: np.ndarray) -> np.ndarray:
    """Row j, bit i (little-endian within bytes and words) = matrix bit (i, j), one bit at a time."""
    bits = np.unpackbits(matrix, axis=1, bitorder="little")  # (R, m)
    rows = np.packbits(np.ascontiguousarray(bits.T), axis=1, bitorder="little")  # (m, R / 8)
    return rows.view("<u8")


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 2), st.integers(0, 40), st.integers(0, 2**32 - 1))
def test_matches_reference(groups: int, words: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    matrix = rng.integers(0, 256, (64 * groups, 8 * words), dtype=np.uint8)
    before = matrix.copy()
    out = transpose_bits(matrix)
    assert out.shape == (64 * words, groups)
    assert out.dtype == np.dtype("<u8")
    assert np.array_equal(out, reference(matrix).reshape(64 * words, groups))
    assert np.array_equal(matrix, before)


def test_single_bits_land_where_expected() -> None:
    # One set bit at (row i, column j) must come out as bit i of row block j and nowhere else.
    for i, j in [(0, 0), (1, 0), (0, 1), (63, 64), (64, 63), (127, 1023), (100, 517)]:
        matrix = np.zeros((128, 128), dtype=np.uint8)
        matrix[i, j // 8] = 1 << (j % 8)
        out = transpose_bits(matrix)
        expected = np.zeros((1024, 2), dtype="<u8")
        expected[j, i // 64] = np.uint64(1) << np.uint64(i % 64)
        assert np.array_equal(out, expected), (i, j)


def test_large_ot_shape() -> None:
    rng = np.random.default_rng(7)
    matrix = rng.integers(0, 256, (128, 1 << 13), dtype=np.uint8)  # 2^16 OTs
    assert np.array_equal(transpose_bits(matrix), reference(matrix))


@pytest.mark.parametrize(
    "matrix",
    [
        np.zeros((128, 12), dtype=np.uint8),
        np.zeros((100, 16), dtype=np.uint8),
        np.zeros((128, 16), dtype=np.uint16),
        np.zeros(128, dtype=np.uint8),
    ],
)
def test_bad_shapes_rejected(matrix: np.ndarray) -> None:
    with pytest.raises(ValueError):
        transpose_bits(matrix)
