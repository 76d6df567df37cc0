"""Known-answer vectors of the fixed-key AES TCCR hash and the AES-CTR PRG, generated then verified, pyca style.

``tests/vectors/tccr_hash.txt`` and ``tests/vectors/prg_ctr.txt`` were written by ``tests.vectors.generate`` from
the project's own ``FixedKeyAES.hash`` and ``prg_expand``. Here every vector is recomputed by an independent
implementation written directly from the definitions, on bytes, with no code of the project:

* the TCCR hash of Guo–Katz–Wang–Yu (IEEE S&P 2020, §7.3), H(x, i) = π(π(x) ⊕ i) ⊕ π(x), with π one AES-128
  block encryption (FIPS 197) of the ``cryptography`` package in ECB mode, called block by block;
* CTR mode of NIST SP 800-38A (§6.5, counter blocks T_j = T_1 + j − 1 mod 2^128, read as a big-endian integer),
  from the same one-block AES, and again from ``cryptography``'s own CTR mode;

and the project's code must still produce exactly the committed files (so a change to either side fails). The
one-block AES is itself checked against FIPS 197 appendix C.1 and the CTR construction against the SP 800-38A F.5.1
example, both written here from memory.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes
from jointstat.ot.extension import SeedStreams
from jointstat.primitives.aes import BATCH, FIXED_KEY, FixedKeyAES, prg_expand
from jointstat.primitives.blocks import BLOCK_DTYPE

from tests.vectors import generate, read_vectors
from tests.vectors.generate import PRG_FILE, TCCR_FILE

TCCR = read_vectors(TCCR_FILE, ("key", "input", "tweak", "output"))
PRG = read_vectors(PRG_FILE, ("key", "counter", "length", "output"))


# -- the independent implementation ---------------------------------------------------------------------------------


def aes_block(key: bytes, block: bytes) -> bytes:
    """One AES-128 block encryption (FIPS 197): ``cryptography``'s ECB mode on exactly one block."""
    assert len(key) == 16 and len(block) == 16
    encryptor = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
    return encryptor.update(block) + encryptor.finalize()


def xor(a: bytes, b: bytes) -> bytes:
    return bytes(x ^ y for x, y in zip(a, b, strict=True))


def tccr(key: bytes, x: bytes, tweak: bytes) -> bytes:
    """H(x, i) = π(π(x) ⊕ i) ⊕ π(x) (Guo–Katz–Wang–Yu 2020, §7.3), π(y) = AES_key(y)."""
    px = aes_block(key, x)
    return xor(aes_block(key, xor(px, tweak)), px)


def ctr_keystream(key: bytes, counter: bytes, length: int) -> bytes:
    """SP 800-38A §6.5 CTR: O_j = AES_key(T_j), T_j = T_1 + (j − 1) mod 2^128 (big-endian); the first ``length``
    bytes of O_1 ‖ O_2 ‖ … (the PRG's output is the keystream: CTR encryption of zero bytes)."""
    t1 = int.from_bytes(counter, "big")
    blocks = -(-length // 16)
    stream = b"".join(aes_block(key, ((t1 + j) % 2**128).to_bytes(16, "big")) for j in range(blocks))
    return stream[:length]


def library_ctr(key: bytes, counter: bytes, length: int) -> bytes:
    """The same keystream from the ``cryptography`` package's CTR mode, encrypting ``length`` zero bytes."""
    encryptor = Cipher(algorithms.AES(key), modes.CTR(counter)).encryptor()
    return encryptor.update(bytes(length)) + encryptor.finalize()


# -- the independent implementation against published examples ------------------------------------------------------


def test_the_one_block_aes_is_fips_197_appendix_c1() -> None:
    # FIPS 197 appendix C.1, AES-128 (from memory).
    key = bytes.fromhex("000102030405060708090a0b0c0d0e0f")
    plaintext = bytes.fromhex("00112233445566778899aabbccddeeff")
    assert aes_block(key, plaintext) == bytes.fromhex("69c4e0d86a7b0430d8cdb78070b4c55a")


def test_the_ctr_keystream_encrypts_the_sp_800_38a_f51_example() -> None:
    # NIST SP 800-38A appendix F.5.1, CTR-AES128.Encrypt: key, initial counter block, the four plaintext blocks and
    # the four ciphertext blocks (from memory). The counter blocks run f0…feff, f0…ff00, f0…ff01, f0…ff02.
    key = bytes.fromhex("2b7e151628aed2a6abf7158809cf4f3c")
    counter = bytes.fromhex("f0f1f2f3f4f5f6f7f8f9fafbfcfdfeff")
    plaintext = bytes.fromhex(
        "6bc1bee22e409f96e93d7e117393172a"
        "ae2d8a571e03ac9c9eb76fac45af8e51"
        "30c81c46a35ce411e5fbc1191a0a52ef"
        "f69f2445df4f9b17ad2b417be66c3710"
    )
    ciphertext = bytes.fromhex(
        "874d6191b620e3261bef6864990db6ce"
        "9806f66b7970fdff8617187bb9fffdff"
        "5ae4df3edbd5d35e5b4f09020db03eab"
        "1e031dda2fbe03d1792170a0f3009cee"
    )
    assert xor(plaintext, ctr_keystream(key, counter, 64)) == ciphertext
    assert xor(plaintext, library_ctr(key, counter, 64)) == ciphertext
    assert xor(plaintext, prg_expand(key, 64, nonce=counter).tobytes()) == ciphertext


# -- the vector files -----------------------------------------------------------------------------------------------


def test_the_vector_files_cover_the_cases_that_matter() -> None:
    assert len(TCCR) == len(generate.tccr_inputs()) >= 20 and len(PRG) == len(generate.prg_inputs()) >= 10
    keys = {bytes.fromhex(v["key"]) for v in TCCR}
    assert FIXED_KEY in keys and len(keys) == 2
    tweaks = [bytes.fromhex(v["tweak"]) for v in TCCR]
    assert any(t[8:] == bytes(8) for t in tweaks) and any(t[8:] != bytes(8) for t in tweaks)
    lengths = {int(v["length"]) for v in PRG}
    assert {0, 1, 15, 16, 17} <= lengths and any(n % 16 for n in lengths if n > 16)
    counters = {bytes.fromhex(v["counter"]) for v in PRG}
    assert bytes(16) in counters and b"\xff" * 16 in counters  # counter 0 (OT extension) and the 128-bit wrap


def test_the_fixed_key_is_the_start_of_sha256_of_its_label() -> None:
    # jointstat.primitives.aes defines it so; hashlib (FIPS 180-4) recomputes it.
    assert hashlib.sha256(b"jointstat fixed-key AES permutation v1").digest()[:16] == FIXED_KEY


@pytest.mark.parametrize("vector", TCCR, ids=lambda v: f"{v['key'][:4]}-{v['input'][:6]}-{v['tweak'][:6]}")
def test_every_tccr_vector_is_what_the_definition_gives(vector: dict[str, str]) -> None:
    key, x, tweak = (bytes.fromhex(vector[f]) for f in ("key", "input", "tweak"))
    assert tccr(key, x, tweak).hex() == vector["output"]


@pytest.mark.parametrize("vector", PRG, ids=lambda v: f"{v['key'][:4]}-{v['counter'][:4]}-{v['length']}")
def test_every_prg_vector_is_sp_800_38a_ctr_and_what_the_library_ctr_gives(vector: dict[str, str]) -> None:
    key, counter, length = (
        bytes.fromhex(vector["key"]),
        bytes.fromhex(vector["counter"]),
        int(vector["length"]),
    )
    assert len(vector["output"]) == 2 * length
    assert ctr_keystream(key, counter, length).hex() == vector["output"]
    assert library_ctr(key, counter, length).hex() == vector["output"]


def test_the_project_still_writes_exactly_the_committed_files() -> None:
    assert generate.tccr_text() == TCCR_FILE.read_text(encoding="ascii")
    assert generate.prg_text() == PRG_FILE.read_text(encoding="ascii")


def test_the_hash_takes_integer_tweaks_as_the_low_word() -> None:
    rows = [v for v in TCCR if v["key"] == FIXED_KEY.hex() and v["tweak"].endswith("00" * 8)]
    assert len(rows) >= 10
    blocks = np.frombuffer(b"".join(bytes.fromhex(v["input"]) for v in rows), dtype=BLOCK_DTYPE).reshape(
        -1, 2
    )
    tweaks = np.array(
        [int.from_bytes(bytes.fromhex(v["tweak"])[:8], "little") for v in rows], dtype=np.uint64
    )
    got = FixedKeyAES().hash(blocks, tweaks)
    assert [row.tobytes().hex() for row in got] == [v["output"] for v in rows]


def test_the_hash_agrees_across_its_aes_batches_and_in_place() -> None:
    # More blocks than one AES call takes (BATCH), each vector's input and tweak repeated: every copy hashes to the
    # vector's output, whichever batch and position it falls in, also when the output is the input array.
    rows = [v for v in TCCR if v["key"] == FIXED_KEY.hex()]
    n = BATCH + 2 * len(rows) + 5
    pick = np.arange(n) % len(rows)
    inputs = np.frombuffer(b"".join(bytes.fromhex(v["input"]) for v in rows), dtype=BLOCK_DTYPE).reshape(
        -1, 2
    )
    tweaks = np.frombuffer(b"".join(bytes.fromhex(v["tweak"]) for v in rows), dtype=BLOCK_DTYPE).reshape(
        -1, 2
    )
    blocks = inputs[pick].copy()
    want = [bytes.fromhex(rows[i]["output"]) for i in pick]
    FixedKeyAES().hash(blocks, tweaks[pick], out=blocks)
    assert [row.tobytes() for row in blocks] == want


def test_the_permutation_is_aes_under_the_given_key() -> None:
    block = np.frombuffer(bytes.fromhex("00112233445566778899aabbccddeeff"), dtype=BLOCK_DTYPE).reshape(1, 2)
    got = FixedKeyAES(bytes(range(16))).permute(block)
    assert got.tobytes().hex() == "69c4e0d86a7b0430d8cdb78070b4c55a"  # FIPS 197 appendix C.1 (from memory)
    blocks = np.frombuffer(bytes(range(256)) * (BATCH // 8 + 1), dtype=BLOCK_DTYPE).reshape(-1, 2)
    out = FixedKeyAES().permute(blocks)
    for i in (0, 1, BATCH - 1, BATCH, blocks.shape[0] - 1):  # spot checks on both sides of a batch boundary
        assert out[i].tobytes() == aes_block(FIXED_KEY, blocks[i].tobytes())


def test_ot_extensions_seed_streams_are_the_counter_zero_vectors_read_in_pieces() -> None:
    rows = [v for v in PRG if v["counter"] == "00" * 16 and int(v["length"]) > 0]
    assert len(rows) >= 8
    longest = max(int(v["length"]) for v in rows)
    streams = SeedStreams([bytes.fromhex(v["key"]) for v in rows])
    parts = [streams.read(size) for size in (1, 15, 16, 17, longest)]
    whole = np.concatenate(parts, axis=1)
    for i, v in enumerate(rows):
        length = int(v["length"])
        assert whole[i, :length].tobytes().hex() == v["output"]
