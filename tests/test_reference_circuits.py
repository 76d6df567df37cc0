"""Reference circuits against published known answers.

Sources, named beside each check: FIPS 197 (AES: the S-box definition of §5.1.1, the multiplication examples of
§4.2, the S-box table of Figure 7, the Appendix C.1 example vector) and the ``cryptography`` package's AES;
FIPS 180-4 (SHA-256: the "abc" example, the constants of §4.2.2 and §5.3.3, the padding of §5.1.1) and
``hashlib``. Values typed in from those documents are marked "from memory"; each is also checked against the
library that implements the standard.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.backend import CountBackend, PlainBackend
from jointstat.circuit.bits import stack
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import CircuitError, Party
from jointstat.circuit.program import Program
from jointstat.circuit.reference import aes128, sha256
from jointstat.commands.demo import run as run_demo
from jointstat.garble.local import run_locally

G, E = Party.GARBLER, Party.EVALUATOR

# FIPS 197 Appendix C.1 (AES-128), from memory; checked against `cryptography` below.
FIPS197_C1_KEY = bytes.fromhex("000102030405060708090a0b0c0d0e0f")
FIPS197_C1_PLAINTEXT = bytes.fromhex("00112233445566778899aabbccddeeff")
FIPS197_C1_CIPHERTEXT = bytes.fromhex("69c4e0d86a7b0430d8cdb78070b4c55a")
# FIPS 180-4 example "abc" (one block), SHA-256 digest, from memory; checked against `hashlib` below.
FIPS180_ABC_DIGEST = bytes.fromhex("ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad")


# -- independent references --------------------------------------------------------------------------------------
def gf256_mul(a: int, b: int) -> int:
    """Multiplication in GF(2^8) modulo x^8 + x^4 + x^3 + x + 1 (FIPS 197 §4.2), shift-and-add."""
    product = 0
    while b:
        if b & 1:
            product ^= a
        a <<= 1
        if a & 0x100:
            a ^= 0x11B
        b >>= 1
    return product


def gf256_inverse(a: int) -> int:
    """a^254 = a^(-1) in GF(2^8), with 0 mapped to 0 (FIPS 197 §5.1.1)."""
    result, power, e = 1, a, 254
    while e:
        if e & 1:
            result = gf256_mul(result, power)
        power = gf256_mul(power, power)
        e >>= 1
    return result if a else 0


def fips197_sbox(a: int) -> int:
    """S-box of FIPS 197 §5.1.1: the inverse, then b'_i = b_i ⊕ b_{i+4} ⊕ b_{i+5} ⊕ b_{i+6} ⊕ b_{i+7} ⊕ c_i."""
    b = gf256_inverse(a)
    out = 0
    for i in range(8):
        bit = (
            (b >> i)
            ^ (b >> ((i + 4) % 8))
            ^ (b >> ((i + 5) % 8))
            ^ (b >> ((i + 6) % 8))
            ^ (b >> ((i + 7) % 8))
        )
        out |= ((bit ^ (0x63 >> i)) & 1) << i
    return out


def cryptography_aes128(key: bytes, block: bytes) -> bytes:
    encryptor = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
    return encryptor.update(block) + encryptor.finalize()


def sha256_pad(message: bytes) -> bytes:
    """FIPS 180-4 §5.1.1 padding: 0x80, zeros to 56 mod 64, then the bit length as a 64-bit big-endian integer."""
    zeros = (55 - len(message)) % 64
    return message + b"\x80" + b"\x00" * zeros + (8 * len(message)).to_bytes(8, "big")


# -- helpers -----------------------------------------------------------------------------------------------------
def garble_and_evaluate(program: Program, g_bits: np.ndarray, e_bits: np.ndarray) -> np.ndarray:
    """Garble with fresh labels, stream the tables in 4 KiB chunks fed in pieces of 1000 bytes (not a whole number
    of tables: the evaluator must carry the remainder), evaluate, decode; checks one table per counted AND gate."""
    run = run_locally(program.run, {G: g_bits, E: e_bits}, chunk_bytes=4096, feed_bytes=1000)
    assert run.and_gates == program.size.and_gates and run.table_bytes == 32 * run.and_gates
    return run.outputs[E]


def run_plain(program: Program, g_bits: np.ndarray, e_bits: np.ndarray) -> np.ndarray:
    """The program on the plain backend: the evaluator's output bits."""
    plain = PlainBackend({G: g_bits, E: e_bits})
    program.run(Builder(plain))
    plain.check_inputs_used()
    return plain.outputs(E)


def counted(make: object) -> CountBackend:
    """A count backend after ``make(bld)``."""
    backend = CountBackend()
    make(Builder(backend))  # type: ignore[operator]
    return backend


@pytest.fixture(scope="module")
def aes_program() -> Program:
    return Program.of(aes128.aes128_program, name="AES-128")


@pytest.fixture(scope="module")
def sha_program() -> Program:
    return Program.of(sha256.sha256_compress_program, name="SHA-256 compression")


# -- the independent S-box and GF(2^8) arithmetic against FIPS 197 -----------------------------------------------
def test_gf256_multiplication_matches_fips197_examples() -> None:
    # FIPS 197 §4.2: {57} • {83} = {c1}; §4.2.1: {57} • {13} = {fe} (from memory).
    assert gf256_mul(0x57, 0x83) == 0xC1
    assert gf256_mul(0x57, 0x13) == 0xFE


def test_independent_sbox_matches_fips197_listed_values() -> None:
    # FIPS 197 §5.1.1 example: S({53}) = {ed}; Figure 7: S({00}) = {63}, S({01}) = {7c}, S({ff}) = {16}
    # (from memory).
    assert fips197_sbox(0x53) == 0xED
    assert fips197_sbox(0x00) == 0x63
    assert fips197_sbox(0x01) == 0x7C
    assert fips197_sbox(0xFF) == 0x16
    assert sorted(fips197_sbox(a) for a in range(256)) == list(range(256))  # a permutation


# -- the Boyar–Peralta S-box circuit ----------------------------------------------------------------------------
def test_sbox_circuit_equals_fips197_sbox_on_all_256_inputs_as_lanes() -> None:
    inputs = np.unpackbits(np.arange(256, dtype=np.uint8), bitorder="little")
    plain = PlainBackend({E: inputs})
    bld = Builder(plain)
    bld.output(E, aes128.sub_bytes(bld, bld.input(E, (256, 8))))
    assert plain.and_gates == 256 * aes128.SBOX_AND_GATES
    got = np.packbits(plain.outputs(E), bitorder="little")
    want = np.array([fips197_sbox(a) for a in range(256)], dtype=np.uint8)  # FIPS 197 §5.1.1 definition
    assert np.array_equal(got, want)


def test_sbox_netlist_has_32_and_and_83_xor_or_xnor_gates() -> None:
    backend = counted(lambda b: b.output(E, aes128.sub_bytes(b, b.input(E, 8))))
    assert backend.and_gates == 32
    assert backend.xor_gates == 83  # 79 XOR and 4 XNOR, each XNOR an XOR and a free NOT
    assert backend.not_gates == 4


def test_sbox_rejects_bits_that_are_not_bytes() -> None:
    bld = Builder(CountBackend())
    with pytest.raises(
        CircuitError, match=r"AES S-box: expected bytes of 8 bits on the last axis, got shape \(2, 7\)"
    ):
        aes128.sub_bytes(bld, bld.input(E, (2, 7)))


# -- AES-128 ------------------------------------------------------------------------------------------------------
def test_fips197_appendix_c1_vector_agrees_with_cryptography() -> None:
    assert cryptography_aes128(FIPS197_C1_KEY, FIPS197_C1_PLAINTEXT) == FIPS197_C1_CIPHERTEXT


def test_aes128_program_has_6400_and_gates_one_sbox_of_32_per_byte_and_round(aes_program: Program) -> None:
    size = aes_program.size
    print(
        f"\nAES-128 program: {size.and_gates} AND, {size.xor_gates} XOR, {size.not_gates} NOT, depth {size.and_depth}"
    )
    assert size.and_gates == aes128.AND_GATES == 10 * 20 * 32 == 6400
    assert size.not_gates == 10 * 20 * 4  # the S-boxes' XNORs; Rcon is XORed in as a constant
    assert (size.inputs[G], size.inputs[E]) == (128, 128)
    assert (size.outputs[G], size.outputs[E]) == (0, 128)
    assert size.and_calls == 10 * 32  # one call per S-box AND gate and round, over all 20 bytes at once


def test_aes128_plain_equals_fips197_appendix_c1(aes_program: Program) -> None:
    out = run_plain(aes_program, aes128.key_bits(FIPS197_C1_KEY), aes128.block_bits(FIPS197_C1_PLAINTEXT))
    assert aes128.bits_to_block(out) == FIPS197_C1_CIPHERTEXT


def test_aes128_garbled_equals_fips197_appendix_c1(aes_program: Program) -> None:
    out = garble_and_evaluate(
        aes_program, aes128.key_bits(FIPS197_C1_KEY), aes128.block_bits(FIPS197_C1_PLAINTEXT)
    )
    assert aes128.bits_to_block(out) == FIPS197_C1_CIPHERTEXT


@settings(max_examples=6)
@given(key=st.binary(min_size=16, max_size=16), block=st.binary(min_size=16, max_size=16))
def test_aes128_garbled_equals_cryptography_on_random_keys_and_blocks(
    aes_program: Program, key: bytes, block: bytes
) -> None:
    out = garble_and_evaluate(aes_program, aes128.key_bits(key), aes128.block_bits(block))
    assert aes128.bits_to_block(out) == cryptography_aes128(key, block)


def test_aes128_encrypt_runs_64_lanes_of_keys_and_blocks_like_cryptography() -> None:
    rng = np.random.default_rng(197)
    keys = [rng.bytes(16) for _ in range(64)]
    blocks = [rng.bytes(16) for _ in range(64)]
    plain = PlainBackend(
        {
            G: np.concatenate([aes128.key_bits(k) for k in keys]),
            E: np.concatenate([aes128.block_bits(b) for b in blocks]),
        }
    )
    bld = Builder(plain)
    bld.output(E, aes128.aes128_encrypt(bld, bld.input(G, (64, 16, 8)), bld.input(E, (64, 16, 8))))
    assert (
        plain.and_gates == 64 * 6400 and plain.and_calls == 10 * 32
    )  # lanes widen the calls, not their number
    got = [aes128.bits_to_block(part) for part in plain.outputs(E).reshape(64, 128)]
    assert got == [cryptography_aes128(k, b) for k, b in zip(keys, blocks, strict=True)]


def test_aes128_encrypt_broadcasts_one_key_over_many_blocks() -> None:
    rng = np.random.default_rng(5)
    key, blocks = rng.bytes(16), [rng.bytes(16) for _ in range(3)]
    plain = PlainBackend({G: aes128.key_bits(key), E: np.concatenate([aes128.block_bits(b) for b in blocks])})
    bld = Builder(plain)
    bld.output(E, aes128.aes128_encrypt(bld, bld.input(G, (16, 8)), bld.input(E, (3, 16, 8))))
    got = [aes128.bits_to_block(part) for part in plain.outputs(E).reshape(3, 128)]
    assert got == [cryptography_aes128(key, b) for b in blocks]
    with pytest.raises(
        CircuitError, match=r"AES-128: key and block must be bits of shape \(…, 16, 8\), got \(3, 8\)"
    ):
        aes128.aes128_encrypt(
            bld,
            bld.constant(np.zeros((3, 8), dtype=np.uint8)),
            bld.constant(np.zeros((3, 8), dtype=np.uint8)),
        )


def test_aes_bit_order_is_bytes_in_order_each_least_significant_bit_first() -> None:
    bits = aes128.block_bits(bytes([0x01, 0x80]) + bytes(14))
    assert np.flatnonzero(bits).tolist() == [0, 15]
    assert aes128.bits_to_block(bits) == bytes([0x01, 0x80]) + bytes(14)


def test_aes_helpers_reject_wrong_lengths_and_non_bits_naming_the_input() -> None:
    with pytest.raises(ValueError, match="AES-128 key: expected 16 bytes, got 15"):
        aes128.key_bits(bytes(15))
    with pytest.raises(ValueError, match="AES block: expected 16 bytes, got 17"):
        aes128.block_bits(bytes(17))
    with pytest.raises(ValueError, match="AES block: expected 128 bits"):
        aes128.bits_to_block(np.zeros(127, dtype=np.uint8))
    with pytest.raises(ValueError, match="AES block: bits must be"):
        aes128.bits_to_block(np.full(128, 2, dtype=np.uint8))
    with pytest.raises(TypeError, match="AES-128 key: expected bytes"):
        aes128.key_bits("000102030405060708090a0b0c0d0e0f")  # type: ignore[arg-type]


# -- SHA-256 compression ------------------------------------------------------------------------------------------
def test_fips180_abc_digest_agrees_with_hashlib() -> None:
    assert hashlib.sha256(b"abc").digest() == FIPS180_ABC_DIGEST


def test_sha256_constants_computed_from_their_definition_match_fips180_listed_values() -> None:
    # FIPS 180-4 §4.2.2 (K_0, K_1, K_63) and §5.3.3 (H_0, H_7), from memory.
    assert (sha256.K[0], sha256.K[1], sha256.K[63]) == (0x428A2F98, 0x71374491, 0xC67178F2)
    assert sha256.INITIAL_HASH[:4].hex() == "6a09e667"
    assert sha256.INITIAL_HASH[28:].hex() == "5be0cd19"
    assert len(sha256.K) == 64 and len(sha256.INITIAL_HASH) == 32


def test_sha256_compression_program_has_22573_and_gates(sha_program: Program) -> None:
    size = sha_program.size
    print(
        f"\nSHA-256 compression program: {size.and_gates} AND, {size.xor_gates} XOR, depth {size.and_depth}"
    )
    # 64 rounds × (7 additions of 31 AND + 64 for Ch and Maj) + 48 schedule words × 3 additions + 8 final
    # additions, less the carries the public K_t fold (sha256 module docstring)
    folded = sum((k & -k).bit_length() for k in sha256.K)
    assert size.and_gates == sha256.AND_GATES == 64 * (7 * 31 + 64) + 48 * 3 * 31 + 8 * 31 - folded == 22573
    assert (size.xor_gates, size.not_gates) == (99994, 0)  # as the sha256 module docstring states (measured)
    assert (size.inputs[G], size.inputs[E]) == (512, 256)
    assert (size.outputs[G], size.outputs[E]) == (0, 256)


def sha256_lanes(n: int) -> Program:
    """SHA-256 compression of n garbler blocks (lanes) under one evaluator chaining value."""

    def run(bld: Builder) -> None:
        block, chaining = bld.input(G, (n, 64, 8)), bld.input(E, (32, 8))
        bld.output(
            E, sha256.sha256_compress(bld, block, chaining)
        )  # the chaining value broadcast over the lanes

    return Program.of(run, name=f"SHA-256 compression of {n} blocks")


def test_sha256_garbled_gives_the_fips180_abc_digest_and_hashlibs_on_a_random_message() -> None:
    message = np.random.default_rng(1804).bytes(41)
    program = sha256_lanes(2)
    assert program.size.and_gates == 2 * 22573
    g = np.concatenate([sha256.block_bits(sha256_pad(b"abc")), sha256.block_bits(sha256_pad(message))])
    out = garble_and_evaluate(program, g, sha256.chaining_bits(sha256.INITIAL_HASH)).reshape(2, 256)
    assert sha256.bits_to_chaining(out[0]) == FIPS180_ABC_DIGEST
    assert sha256.bits_to_chaining(out[1]) == hashlib.sha256(message).digest()


def test_sha256_plain_gives_the_fips180_abc_digest_and_hashlibs_on_lanes_of_messages() -> None:
    rng = np.random.default_rng(180)
    messages = [b"abc"] + [rng.bytes(n) for n in [0, 1, 3, 31, 32, 54, 55, *rng.integers(0, 56, 25).tolist()]]
    program = sha256_lanes(len(messages))
    g = np.concatenate([sha256.block_bits(sha256_pad(m)) for m in messages])
    out = run_plain(program, g, sha256.chaining_bits(sha256.INITIAL_HASH)).reshape(len(messages), 256)
    got = [sha256.bits_to_chaining(part) for part in out]
    assert got[0] == FIPS180_ABC_DIGEST
    assert got == [hashlib.sha256(m).digest() for m in messages]


def test_sha256_compression_chains_over_two_blocks_like_hashlib(sha_program: Program) -> None:
    message = np.random.default_rng(2).bytes(100)  # pads to two blocks
    padded = sha256_pad(message)
    assert len(padded) == 128
    state = sha256.INITIAL_HASH
    for block in (padded[:64], padded[64:]):
        state = sha256.bits_to_chaining(
            run_plain(sha_program, sha256.block_bits(block), sha256.chaining_bits(state))
        )
    assert state == hashlib.sha256(message).digest()


def test_sha256_helpers_reject_wrong_lengths_naming_the_input() -> None:
    with pytest.raises(ValueError, match="SHA-256 message block: expected 64 bytes, got 63"):
        sha256.block_bits(bytes(63))
    with pytest.raises(ValueError, match="SHA-256 chaining value: expected 32 bytes, got 0"):
        sha256.chaining_bits(b"")
    with pytest.raises(ValueError, match="SHA-256 chaining value: expected 256 bits"):
        sha256.bits_to_chaining(np.zeros(255, dtype=np.uint8))


def test_sha256_compress_rejects_bits_of_the_wrong_shape() -> None:
    bld = Builder(CountBackend())
    with pytest.raises(
        CircuitError, match=r"SHA-256: the message block must be bits of shape \(…, 64, 8\), got \(32, 8\)"
    ):
        sha256.sha256_compress(bld, bld.input(G, (32, 8)), bld.input(E, (32, 8)))
    with pytest.raises(
        CircuitError, match=r"SHA-256: the chaining value must be bits of shape \(…, 32, 8\), got \(64, 8\)"
    ):
        sha256.sha256_compress(bld, bld.input(G, (64, 8)), bld.input(E, (64, 8)))


# -- add_words: the batched adder -----------------------------------------------------------------------------
@settings(max_examples=20)
@given(
    pairs=st.lists(st.tuples(st.integers(0, 2**32 - 1), st.integers(0, 2**32 - 1)), min_size=1, max_size=4),
    constant=st.integers(0, 2**32 - 1),
)
def test_add_words_adds_modulo_2_32_for_every_pair_and_folds_constants(
    pairs: list[tuple[int, int]], constant: int
) -> None:
    g = np.concatenate(
        [np.unpackbits(np.array([x], "<u4").view(np.uint8), bitorder="little") for x, _ in pairs]
    )
    e = np.concatenate(
        [np.unpackbits(np.array([y], "<u4").view(np.uint8), bitorder="little") for _, y in pairs]
    )
    plain = PlainBackend({G: g, E: e})
    bld = Builder(plain)
    xs = bld.input(G, (len(pairs), 32))
    ys = bld.input(E, (len(pairs), 32))
    word = bld.constant_word(constant, 32)
    sums = sha256.add_words(bld, [*((xs[i], ys[i]) for i in range(len(pairs))), (xs[0], word)])
    # Below and at the constant's lowest set bit the carry is a constant, so those bits cost no AND gate.
    constant_cost = 0 if constant % 2**31 == 0 else 31 - (constant & -constant).bit_length()
    assert plain.and_gates == 31 * len(pairs) + constant_cost
    bld.output(E, stack(sums))
    out = plain.outputs(E).reshape(-1, 32)
    got = np.packbits(out, axis=1, bitorder="little").view("<u4").reshape(-1).tolist()
    want = [(x + y) % 2**32 for x, y in pairs] + [(pairs[0][0] + constant) % 2**32]
    assert got == want


# -- the demo -----------------------------------------------------------------------------------------------------
def test_demo_garbles_aes128_and_reports_a_match_with_cryptography(
    capsys: pytest.CaptureFixture[str],
) -> None:
    assert run_demo() == 0
    report = capsys.readouterr().out
    assert "6,400 AND" in report
    assert "match           yes" in report
