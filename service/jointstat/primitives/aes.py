"""Fixed-key AES as a public random permutation, the tweakable hash built on it, and an AES-CTR PRG.

Theory of operation
-------------------
Garbling and OT extension need a hash that is fast on huge batches. Following Bellare–Hoang–Keelveedhi–Rogaway
(IEEE S&P 2013) we model AES-128 under a fixed, public key as a random permutation π. From π we build the
tweakable circular correlation-robust hash of Guo–Katz–Wang–Yu (IEEE S&P 2020, section 7.3):

    H(x, i) = π(π(x) ⊕ i) ⊕ π(x)

Each call of H costs two AES blocks. The tweak i must be unique per use (per AND gate and half in garbling, per
OT index in OT extension). All functions take and return ``(n, 2)`` arrays of little-endian 64-bit words (see
``blocks``) and call AES in batches of ``BATCH`` blocks into preallocated buffers (``update_into``), because
allocation, not AES, dominates otherwise.

The AES itself is FIPS 197, provided by the ``cryptography`` package (OpenSSL, AES-NI where the CPU has it).
"""

from __future__ import annotations

import hashlib

import numpy as np
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from jointstat.primitives.blocks import BLOCK_BYTES, BLOCK_DTYPE

# The fixed public key: any fixed value works in the random-permutation model; ours is derived from a label so
# that nobody can claim it was chosen with a backdoor in mind.
FIXED_KEY = hashlib.sha256(b"jointstat fixed-key AES permutation v1").digest()[:16]

BATCH = 1 << 15  # blocks per AES call: large enough to amortise the call, small enough to stay in cache


class FixedKeyAES:
    """π: AES-128 encryption under a fixed key, applied to whole block arrays.

    An instance is used by one thread at a time (``cryptography``'s encryptor contexts are not thread-safe): each
    garbling scheme and OT party makes its own.
    """

    def __init__(self, key: bytes = FIXED_KEY) -> None:
        self._enc = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
        # update_into needs room for one extra block beyond the input.
        self._scratch = np.empty((BATCH + 1) * 2, dtype=BLOCK_DTYPE)

    def permute(self, blocks: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """π applied to each block; ``out`` (same shape) may be given to avoid an allocation, and may be ``blocks``."""
        src = np.ascontiguousarray(blocks, dtype=BLOCK_DTYPE)
        n = src.shape[0]
        if out is None:
            out = np.empty_like(src)
        flat_in = src.reshape(-1)
        flat_out = out.reshape(-1)
        whole_out = flat_out.data.cast("B")
        scratch = self._scratch.data.cast("B")
        for start in range(0, n, BATCH):
            stop = min(n, start + BATCH)
            chunk = flat_in[2 * start : 2 * stop].data.cast("B")
            if stop < n:
                # update_into insists on 15 spare bytes past the payload; the rest of ``out`` provides them.
                self._enc.update_into(chunk, whole_out[16 * start :])
            else:
                self._enc.update_into(chunk, scratch)
                flat_out[2 * start : 2 * stop] = self._scratch[: 2 * (stop - start)]
        return out

    def hash(self, blocks: np.ndarray, tweaks: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """H(x, i) = π(π(x) ⊕ i) ⊕ π(x) for each row (Guo–Katz–Wang–Yu 2020, TCCR hash).

        ``tweaks`` is either an ``(n, 2)`` block array or an ``(n,)`` array of 64-bit integers (the low word; the
        high word is then 0). Works batch by batch in the instance's scratch buffer: two AES calls, one copy and
        two XORs per batch, no allocation besides ``out``.
        """
        src = np.ascontiguousarray(blocks, dtype=BLOCK_DTYPE)
        n = src.shape[0]
        if out is None:
            out = np.empty_like(src)
        low_word_only = tweaks.ndim == 1
        scratch = self._scratch.reshape(-1, 2)
        scratch_bytes = self._scratch.data.cast("B")
        for start in range(0, n, BATCH):
            stop = min(n, start + BATCH)
            m = stop - start
            self._enc.update_into(src[start:stop].reshape(-1).data.cast("B"), scratch_bytes)
            px = scratch[:m]
            out[start:stop] = px
            if low_word_only:
                px[:, 0] ^= tweaks[start:stop]
            else:
                px ^= tweaks[start:stop]
            self._enc.update_into(
                scratch_bytes[: 16 * m], scratch_bytes
            )  # in place; scratch has a spare block
            out[start:stop] ^= px
        return out


def prg_expand(seed: bytes, nbytes: int, *, nonce: bytes = bytes(16)) -> np.ndarray:
    """Expand a 16-byte seed into ``nbytes`` pseudo-random bytes with AES-128-CTR (NIST SP 800-38A), as uint8.

    The PRG G of IKNP OT extension, one seed at a time: the seed is the AES key, ``nonce`` the initial counter
    block. OT extension reads many seeds at once through ``ot.extension.SeedStreams``, which gives the same streams
    (counter 0); ``tests/vectors/prg_ctr.txt`` holds known answers of both.
    """
    if len(seed) != BLOCK_BYTES:
        raise ValueError(f"PRG seed must be 16 bytes, got {len(seed)}")
    enc = Cipher(algorithms.AES(seed), modes.CTR(nonce)).encryptor()
    out = bytearray(nbytes + BLOCK_BYTES)
    n = enc.update_into(bytes(nbytes), out)
    return np.frombuffer(out, dtype=np.uint8, count=n)
