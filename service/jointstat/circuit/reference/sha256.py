"""The SHA-256 compression function (FIPS 180-4 §6.2.2) as a program.

Theory of operation
-------------------
``sha256_compress_program`` computes one step of SHA-256's hash computation: the garbler's 512-bit message
block M and the evaluator's 256-bit chaining value H give the evaluator the new chaining value H' (steps 1–4 of
§6.2.2: message schedule, working variables, 64 rounds, and the final additions H'_i = a/b/…/h + H_i). With the
initial hash value of §5.3.3 (``INITIAL_HASH``) as H and a message padded to one block (§5.1.1) as M, H' is the
digest. Padding is not part of the circuit.

Bit order: M is the 64 block bytes and H the 32 bytes H_0 ‖ … ‖ H_7 (each word big-endian, as in the digest),
and each vector is bit 8i + j = bit j (least significant first) of byte i (``block_bits``, ``chaining_bits``,
``bits_to_chaining``). Inside, 32-bit words are the builder's LSB-first words: word t is bytes 4t … 4t + 3
reversed (big-endian, FIPS 180-4 §3.1), so ROTR^n is ``rotate_right`` and SHR^n is ``shift_right``, both free.

Gates: Σ0, Σ1, σ0 and σ1 are XORs of rotations (free). Ch and Maj use one AND per bit each,
Ch(e, f, g) = g ⊕ (e ∧ (f ⊕ g)) and Maj(a, b, c) = a ⊕ ((a ⊕ b) ∧ (a ⊕ c)). Additions modulo 2^32 are
ripple-carry adders of 31 AND gates each (``add_words``); adding the public constant K_t folds the carries below
and at its lowest set bit, saving (trailing zeros of K_t) + 1 AND gates. K_t and the initial hash value are
computed here from their definition (§4.2.2: the first 32 bits of the fractional parts of the cube roots of the
first 64 primes; §5.3.3: of the square roots of the first 8 primes) rather than typed in.

Building: a round's additions are independent in three groups — (h + (K_t + W_t), Σ1(e) + Ch, Σ0(a) + Maj),
then T1, then (d + T1, T1 + T2) — and each group is one lane-parallel addition; K_t + W_t is one addition over all
64 rounds, and the message schedule makes two words per step. This takes about a quarter of the builder calls
of one word addition at a time.

Size: per round 7 additions (four for T1 = h + Σ1(e) + Ch + K_t + W_t, one for T2 = Σ0(a) + Maj, then
e = d + T1 and a = T1 + T2) and 64 AND for Ch and Maj: 7 · 31 + 64 = 281; 48 schedule words of 3 additions each; 8 final additions. That is
64 · 281 + 48 · 93 + 8 · 31 = 22,696 AND gates before folding; the K_t folding saves 64 + Σ tz(K_t) = 123,
leaving 22,573 (``AND_GATES``; the tests assert it), and 99,994 free XOR gates as the count backend counts them
(an XOR with a public constant included; no NOT gates). The figure commonly
cited for a SHA-256 compression circuit under free XOR is about 22,500 AND gates, 22,573 as we recall it (from
memory): the same construction (ripple-carry adders, one AND per bit for Ch and Maj, public constants folded)
gives the same count.
"""

from __future__ import annotations

import math

import numpy as np

from jointstat.circuit.bits import Bits, stack
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import CircuitError, Party
from jointstat.circuit.reference._bytes import bits_to_bytes, bytes_to_bits

BLOCK_BYTES = 64
CHAINING_BYTES = 32
ROUNDS = 64


def _primes(n: int) -> list[int]:
    found: list[int] = []
    candidate = 2
    while len(found) < n:
        if all(candidate % p for p in found if p * p <= candidate):
            found.append(candidate)
        candidate += 1
    return found


def _icbrt(n: int) -> int:
    """⌊n^(1/3)⌋ for a non-negative integer, by Newton's method on integers."""
    x = 1 << ((n.bit_length() + 2) // 3 + 1)  # above the root
    while True:
        y = (2 * x + n // (x * x)) // 3
        if y >= x:
            break
        x = y
    while x * x * x > n:
        x -= 1
    while (x + 1) ** 3 <= n:
        x += 1
    return x


# FIPS 180-4 §4.2.2 and §5.3.3: frac(p^(1/3)) · 2^32 = ⌊(p · 2^96)^(1/3)⌋ mod 2^32, likewise for square roots.
K: tuple[int, ...] = tuple(_icbrt(p << 96) & 0xFFFFFFFF for p in _primes(64))
INITIAL_HASH: bytes = b"".join((math.isqrt(p << 64) & 0xFFFFFFFF).to_bytes(4, "big") for p in _primes(8))
AND_GATES = 64 * (7 * 31 + 64) + 48 * 3 * 31 + 8 * 31 - sum((k & -k).bit_length() for k in K)


def _words_from_bytes(data: Bits) -> Bits:
    """(…, 4n, 8) byte bits → (…, n, 32) LSB-first words, each word big-endian over its 4 bytes."""
    grouped = data.reshape(*data.shape[:-2], data.shape[-2] // 4, 4, 8)
    return grouped[..., ::-1, :].reshape(*data.shape[:-2], data.shape[-2] // 4, 32)


def _bytes_from_words(words: Bits) -> Bits:
    """Inverse of ``_words_from_bytes``."""
    grouped = words.reshape(*words.shape[:-2], words.shape[-2], 4, 8)[..., ::-1, :]
    return grouped.reshape(*words.shape[:-2], 4 * words.shape[-2], 8)


def _rotr_xor(bld: Builder, x: Bits, rotations: tuple[int, ...], shift: int | None = None) -> Bits:
    """ROTR^r1(x) ⊕ ROTR^r2(x) ⊕ … (⊕ SHR^shift(x)): the Σ and σ functions of FIPS 180-4 §4.1.2."""
    terms = [bld.rotate_right(x, r) for r in rotations]
    if shift is not None:
        terms.append(bld.shift_right(x, shift))
    acc = terms[0]
    for term in terms[1:]:
        acc = bld.xor(acc, term)
    return acc


def add_words(bld: Builder, pairs: list[tuple[Bits, Bits]]) -> list[Bits]:
    """x + y modulo 2^32 for several pairs of words at once (each pair may carry its own lane axes).

    The builder's ripple-carry adder (Kolesnikov–Sadeghi–Schneider 2009: c' = c ⊕ ((x ⊕ c) ∧ (y ⊕ c)), 31 AND
    gates per addition, the carry out of the top bit not computed), run over all the pairs as lanes and with
    x ⊕ c and y ⊕ c made in one builder call, so building costs three builder calls per bit position for all
    the pairs together. Constants fold exactly as in the builder.
    """
    shapes = [np.broadcast_shapes(x.shape, y.shape) for x, y in pairs]
    width = max(shapes, key=len)
    xs = stack([x.broadcast_to(width) for x, _ in pairs])
    ys = stack([y.broadcast_to(width) for _, y in pairs])
    n = xs.shape[-1]
    carry = bld.zeros(xs.shape[:-1])
    x_plus_c = []
    for i in range(n - 1):
        xc, yc = bld.xor(stack([xs[..., i], ys[..., i]]), carry)
        x_plus_c.append(xc)
        carry = bld.xor(carry, bld.and_(xc, yc))
    x_plus_c.append(bld.xor(xs[..., n - 1], carry))
    total = bld.xor(stack(x_plus_c, axis=-1), ys)
    return list(total)


def sha256_compress(bld: Builder, block: Bits, chaining: Bits) -> Bits:
    """One SHA-256 compression: ``block`` bits (…, 64, 8) and ``chaining`` bits (…, 32, 8) → (…, 32, 8).

    Byte and bit order as in the module docstring; leading axes are lanes (broadcast together).
    """
    blk, chn = block, chaining
    if blk.ndim < 2 or blk.shape[-2:] != (BLOCK_BYTES, 8):
        raise CircuitError(f"SHA-256: the message block must be bits of shape (…, 64, 8), got {blk.shape}")
    if chn.ndim < 2 or chn.shape[-2:] != (CHAINING_BYTES, 8):
        raise CircuitError(f"SHA-256: the chaining value must be bits of shape (…, 32, 8), got {chn.shape}")
    lanes = np.broadcast_shapes(blk.shape[:-2], chn.shape[:-2])
    blk = blk.broadcast_to((*lanes, BLOCK_BYTES, 8))
    chn = chn.broadcast_to((*lanes, CHAINING_BYTES, 8))
    w = list(_words_from_bytes(blk).moveaxis(-2, 0))  # W_0 … W_15, each (…, 32)
    h_in = list(_words_from_bytes(chn).moveaxis(-2, 0))  # H_0 … H_7

    # §6.2.2 step 1. W_t and W_{t+1} read only W_0 … W_{t-1}, so they are made together, each as the sum
    # (σ1(W_{t-2}) + W_{t-7}) + (σ0(W_{t-15}) + W_{t-16}).
    for t in range(16, ROUNDS, 2):
        parts = add_words(
            bld,
            [
                (_rotr_xor(bld, w[u - 2], (17, 19), 10), w[u - 7])
                if half == 0
                else (_rotr_xor(bld, w[u - 15], (7, 18), 3), w[u - 16])
                for u in (t, t + 1)
                for half in (0, 1)
            ],
        )
        w.extend(add_words(bld, [(parts[0], parts[1]), (parts[2], parts[3])]))
    # K_t + W_t for all rounds at once; the constant folds (see the module docstring).
    wk = add_words(bld, [(w[t], bld.constant_word(K[t], 32)) for t in range(ROUNDS)])

    a, b, c, d, e, f, g, h = h_in  # step 2
    for t in range(ROUNDS):  # step 3, as three batches of additions per round
        ch = bld.xor(g, bld.and_(e, bld.xor(f, g)))
        maj = bld.xor(a, bld.and_(bld.xor(a, b), bld.xor(a, c)))
        hwk, sch, t2 = add_words(
            bld,
            [(h, wk[t]), (_rotr_xor(bld, e, (6, 11, 25)), ch), (_rotr_xor(bld, a, (2, 13, 22)), maj)],
        )
        (t1,) = add_words(bld, [(hwk, sch)])  # T1 = h + Σ1(e) + Ch(e, f, g) + K_t + W_t
        new_e, new_a = add_words(bld, [(d, t1), (t1, t2)])
        a, b, c, d, e, f, g, h = new_a, a, b, c, new_e, e, f, g
    new = add_words(bld, list(zip((a, b, c, d, e, f, g, h), h_in, strict=True)))  # step 4
    return _bytes_from_words(stack(new, axis=-2))


def sha256_compress_program(bld: Builder) -> None:
    """Garbler input the 512-bit block, evaluator input the 256-bit chaining value, evaluator output the new one."""
    block = bld.input(Party.GARBLER, (BLOCK_BYTES, 8))
    chaining = bld.input(Party.EVALUATOR, (CHAINING_BYTES, 8))
    bld.output(Party.EVALUATOR, sha256_compress(bld, block, chaining))


def block_bits(block: bytes) -> np.ndarray:
    """A 64-byte message block (already padded) as the circuit's 512 garbler input bits."""
    return bytes_to_bits(block, BLOCK_BYTES, "SHA-256 message block")


def chaining_bits(value: bytes) -> np.ndarray:
    """A 32-byte chaining value H_0 ‖ … ‖ H_7 (big-endian words) as the circuit's 256 evaluator input bits."""
    return bytes_to_bits(value, CHAINING_BYTES, "SHA-256 chaining value")


def bits_to_chaining(bits: object) -> bytes:
    """256 output bits back to the 32-byte chaining value (the digest, after the last block)."""
    return bits_to_bytes(bits, CHAINING_BYTES, "SHA-256 chaining value")
