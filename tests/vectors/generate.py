"""Write the known-answer vectors of the fixed-key AES TCCR hash and the AES-CTR PRG from jointstat's own code.

Usage, from the repository root: ``.venv/bin/python -m tests.vectors.generate`` rewrites ``tccr_hash.txt`` and
``prg_ctr.txt`` beside this file. The inputs are fixed (edge values, the tweak shapes that half-gates garbling and
OT extension use, and blocks drawn from SHA-256 of a counter: test data of our own), so running it again writes
the same bytes unless the implementation changed. ``tests/test_primitive_vectors.py`` recomputes every vector with
an independent implementation written from the definitions, and checks that this module still writes exactly the
committed files.
"""

from __future__ import annotations

import hashlib

import numpy as np
from jointstat.primitives.aes import FIXED_KEY, FixedKeyAES, prg_expand
from jointstat.primitives.blocks import BLOCK_DTYPE

from tests.vectors import HERE

TCCR_FILE = HERE / "tccr_hash.txt"
PRG_FILE = HERE / "prg_ctr.txt"

FIPS197_KEY = bytes(range(16))  # the AES-128 key of FIPS 197 appendix C.1: 000102…0f
SP800_38A_KEY = bytes.fromhex("2b7e151628aed2a6abf7158809cf4f3c")  # SP 800-38A F.5.1's key (from memory)
SP800_38A_COUNTER = bytes.fromhex(
    "f0f1f2f3f4f5f6f7f8f9fafbfcfdfeff"
)  # its initial counter block (from memory)
OT_DOMAIN = 0x4F54 << 48  # the high tweak word of OT extension (ot/extension.py HASH_TWEAK_DOMAIN)

TCCR_HEADER = """\
# Fixed-key AES TCCR hash of Guo-Katz-Wang-Yu (IEEE S&P 2020, section 7.3):
#     H(x, i) = pi(pi(x) xor i) xor pi(x),   pi = AES-128 (FIPS 197) encryption under the key below.
# Written by tests/vectors/generate.py from jointstat.primitives.aes.FixedKeyAES.hash; checked by
# tests/test_primitive_vectors.py against AES-ECB of the cryptography package, one block at a time.
# Every value is 16 bytes in hex, as the bytes of the block on the wire (the two 64-bit words of jointstat's
# block arrays, little-endian). A tweak whose last 8 bytes are zero is the integer tweak of its first 8 bytes.
"""

PRG_HEADER = """\
# AES-128-CTR PRG (NIST SP 800-38A, section 6.5): output = the first `length` bytes of
#     AES_key(T1) || AES_key(T2) || ...,   T1 = counter, T(j+1) = T(j) + 1 mod 2^128 (the whole block, big-endian).
# Written by tests/vectors/generate.py from jointstat.primitives.aes.prg_expand(key, length, nonce=counter);
# checked by tests/test_primitive_vectors.py against AES-ECB block by block and against the cryptography package's
# CTR mode. OT extension's seed streams (ot/extension.py SeedStreams) are the counter-0 streams.
"""


def drawn(label: str, n: int) -> bytes:
    """16 bytes of test data of our own: the start of SHA-256 of a label and a counter."""
    return hashlib.sha256(f"jointstat test vector {label} {n}".encode()).digest()[:16]


def tweak(low: int, high: int = 0) -> bytes:
    """The 16 bytes of a tweak block: its low and high 64-bit words, little-endian."""
    return low.to_bytes(8, "little") + high.to_bytes(8, "little")


def tccr_inputs() -> list[tuple[bytes, bytes, bytes]]:
    """(key, input block, tweak block) of every TCCR vector."""
    zero, ones = bytes(16), b"\xff" * 16
    cases = [
        (FIXED_KEY, zero, tweak(0)),
        (FIXED_KEY, ones, tweak(0)),
        (FIXED_KEY, zero, tweak(1)),
        (FIXED_KEY, tweak(1), tweak(0)),  # only the signal bit set
        (FIXED_KEY, ones, tweak(2**64 - 1)),  # the largest integer tweak
        (FIXED_KEY, zero, tweak(0, 1)),  # the smallest tweak with a high word
        (FIXED_KEY, zero, ones),
    ]
    for j in (0, 1, 2**20 + 3, 2**40 + 17):  # half-gates: gate j hashes with tweaks 2j and 2j + 1
        x = drawn("gate", j)
        cases += [(FIXED_KEY, x, tweak(2 * j)), (FIXED_KEY, x, tweak(2 * j + 1))]
    for j in (0, 5, 65_535, 2**32 + 1):  # OT extension: OT j hashes with tweak (j, "OT" domain)
        cases.append((FIXED_KEY, drawn("ot", j), tweak(j, OT_DOMAIN)))
    for n in range(4):
        cases.append((FIXED_KEY, drawn("input", n), drawn("tweak", n)))
    for n in range(3):  # another key: the key is a parameter of the construction
        cases.append((FIPS197_KEY, drawn("other key input", n), drawn("other key tweak", n)))
    return cases


def prg_inputs() -> list[tuple[bytes, bytes, int]]:
    """(key, initial counter block, length) of every PRG vector."""
    zero = bytes(16)
    cases = [(zero, zero, n) for n in (0, 1, 15, 16, 17, 32, 100)]
    cases += [(drawn("seed", n), zero, length) for n, length in enumerate((16, 48, 160, 255))]
    cases += [
        (drawn("seed", 10), b"\xff" * 16, 48),  # the counter wraps from 2^128 - 1 to 0
        (drawn("seed", 11), bytes(8) + b"\xff" * 8, 48),  # a carry out of the low 64 bits
        (drawn("seed", 12), drawn("counter", 12), 80),
        (SP800_38A_KEY, SP800_38A_COUNTER, 64),  # the key and counter of SP 800-38A F.5.1
    ]
    return cases


def tccr_outputs(cases: list[tuple[bytes, bytes, bytes]]) -> list[bytes]:
    """H(x, i) of every case from the project's ``FixedKeyAES.hash``, all cases of one key in one call."""
    outputs: dict[int, bytes] = {}
    for key in dict.fromkeys(c[0] for c in cases):
        rows = [i for i, c in enumerate(cases) if c[0] == key]
        blocks = np.frombuffer(b"".join(cases[i][1] for i in rows), dtype=BLOCK_DTYPE).reshape(-1, 2)
        tweaks = np.frombuffer(b"".join(cases[i][2] for i in rows), dtype=BLOCK_DTYPE).reshape(-1, 2)
        hashed = FixedKeyAES(key).hash(blocks, tweaks)
        for i, row in zip(rows, hashed, strict=True):
            outputs[i] = row.tobytes()
    return [outputs[i] for i in range(len(cases))]


def tccr_text() -> str:
    cases = tccr_inputs()
    records = [
        f"key = {key.hex()}\ninput = {x.hex()}\ntweak = {t.hex()}\noutput = {out.hex()}\n"
        for (key, x, t), out in zip(cases, tccr_outputs(cases), strict=True)
    ]
    return TCCR_HEADER + "\n" + "\n".join(records)


def prg_text() -> str:
    records = [
        f"key = {key.hex()}\ncounter = {counter.hex()}\nlength = {length}\n"
        f"output = {prg_expand(key, length, nonce=counter).tobytes().hex()}\n"
        for key, counter, length in prg_inputs()
    ]
    return PRG_HEADER + "\n" + "\n".join(records)


def main() -> None:
    for path, text in ((TCCR_FILE, tccr_text()), (PRG_FILE, prg_text())):
        path.write_text(text, encoding="ascii")
        print(f"wrote {path}")


if __name__ == "__main__":
    main()
