"""Output decoding with check tags, kept per party.

Theory of operation
-------------------
For each output bit k of a party the garbler knows the zero label W⁰ of the wire; the one label is W⁰ ⊕ Δ. It
publishes the decoding bit d = lsb(W⁰) and, indexed by signal bit, a 64-bit check tag
t_v = H(W^v, (2k + v, OUTPUT_DOMAIN)) for v = 0, 1. The evaluator reads v = lsb(W) ⊕ d and checks the tag, so a
wrong label or a wrong decoding bit is detected rather than decoded into a wrong value. The tags are hashes (the
TCCR hash of ``jointstat.primitives.aes``, in a tweak domain of their own) of labels the evaluator does not hold
for the other value, so they reveal nothing (common practice, as in the output-authenticity checks of garbling
schemes). The evaluator is given the decoding of its own outputs only. For the garbler's outputs it returns the
labels, and the garbler checks each is one of the two valid labels of its wire.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from jointstat.garble.halfgates import GarbleError
from jointstat.primitives.aes import FixedKeyAES
from jointstat.primitives.blocks import BLOCK_DTYPE

OUTPUT_DOMAIN = np.uint64(0x6A6F696E74737461)  # tweak high word for output tags; gate tweaks have high word 0


@dataclass(frozen=True)
class OutputDecoding:
    """Decoding bits and check tags for one party's output bits."""

    bits: np.ndarray  # (n,) uint8: lsb of the zero label
    tags: np.ndarray  # (n, 2) uint64: tags[k, s] is the check tag of the label of output k with signal bit s

    def to_bytes(self) -> bytes:
        return np.packbits(self.bits, bitorder="little").tobytes() + self.tags.astype("<u8").tobytes()

    @staticmethod
    def size(count: int) -> int:
        """Bytes of the decoding of ``count`` outputs."""
        return (count + 7) // 8 + 16 * count

    @classmethod
    def from_bytes(cls, data: bytes, count: int) -> OutputDecoding:
        packed = (count + 7) // 8
        if len(data) != cls.size(count):
            raise GarbleError(
                f"output decoding: expected {cls.size(count)} bytes for {count} outputs, got {len(data)}"
            )
        bits = np.unpackbits(np.frombuffer(data[:packed], dtype=np.uint8), bitorder="little", count=count)
        tags = np.frombuffer(data[packed:], dtype="<u8").reshape(count, 2).copy()
        return cls(bits=bits.astype(np.uint8), tags=tags)


def _tags(perm: FixedKeyAES, labels: np.ndarray, values: np.ndarray) -> np.ndarray:
    """64-bit check tag H(label, (2k + v, OUTPUT_DOMAIN)) of the k-th output label carrying value v."""
    n = labels.shape[0]
    tweak = np.empty((n, 2), dtype=BLOCK_DTYPE)
    tweak[:, 0] = 2 * np.arange(n, dtype=np.uint64) + values.astype(np.uint64)
    tweak[:, 1] = OUTPUT_DOMAIN
    return perm.hash(np.ascontiguousarray(labels, dtype=BLOCK_DTYPE), tweak)[:, 0]


def make_decoding(zero: np.ndarray, delta: np.ndarray, perm: FixedKeyAES | None = None) -> OutputDecoding:
    """The garbler's decoding bits and check tags of outputs with zero labels ``zero`` ((n, 2) blocks)."""
    perm = perm or FixedKeyAES()
    n = zero.shape[0]
    bits = (zero[:, 0] & np.uint64(1)).astype(np.uint8)
    t0 = _tags(perm, zero, np.zeros(n, dtype=np.uint8))
    t1 = _tags(perm, zero ^ delta, np.ones(n, dtype=np.uint8))
    tags = np.empty((n, 2), dtype=np.uint64)
    # The zero label has signal bit d; the one label has signal bit 1 − d.
    tags[np.arange(n), bits] = t0
    tags[np.arange(n), 1 - bits] = t1
    return OutputDecoding(bits=bits, tags=tags)


def decode_returned(zero: np.ndarray, delta: np.ndarray, returned: object) -> np.ndarray:
    """The garbler decodes labels the evaluator returned, checking each is one of the two valid labels."""
    got = np.asarray(returned, dtype=BLOCK_DTYPE)
    if got.shape != zero.shape:
        raise GarbleError(f"returned output labels: expected {zero.shape[0]} labels, got shape {got.shape}")
    is_zero = (got == zero).all(axis=1)
    is_one = (got == (zero ^ delta)).all(axis=1)
    bad = ~(is_zero | is_one)
    if bad.any():
        raise GarbleError(
            f"returned output label {int(np.argmax(bad))} is neither valid label of its wire"
            f" ({int(bad.sum())} of {zero.shape[0]} invalid)"
        )
    return is_one.astype(np.uint8)


def decode(labels: np.ndarray, decoding: OutputDecoding, perm: FixedKeyAES | None = None) -> np.ndarray:
    """The evaluator decodes its own output labels, checking every label against its tag."""
    perm = perm or FixedKeyAES()
    n = labels.shape[0]
    if decoding.bits.shape != (n,) or decoding.tags.shape != (n, 2):
        raise GarbleError(
            f"output decoding: expected {n} bits and {n} tag pairs, got {decoding.bits.shape[0]} bits and"
            f" {decoding.tags.shape[0]} tag pairs"
        )
    signal = (labels[:, 0] & np.uint64(1)).astype(np.uint8)
    values = signal ^ decoding.bits
    expected = decoding.tags[np.arange(n), signal]
    actual = _tags(perm, labels, values)
    bad = actual != expected
    if bad.any():
        raise GarbleError(
            f"output {int(np.argmax(bad))} failed its check tag: wrong label or wrong decoding bit"
            f" ({int(bad.sum())} of {n} outputs)"
        )
    return values
