"""IKNP OT extension (Ishai–Kilian–Nissim–Petrank, Crypto 2003) giving correlated OT in the form of
Asharov–Lindell–Schneider–Zohner (CCS 2013), on top of 128 Chou–Orlandi base OTs; semi-honest, sans-I/O.

Theory of operation
-------------------
Roles: the garbler is the OT-extension *sender* S (it holds the free-XOR offset Δ and ends with zero
labels K_j); the evaluator is the OT-extension *receiver* R (choice bits r_j, ends with K_j ⊕ r_j·Δ). κ =
128.

1. Base OT with the roles swapped: R is the base-OT sender of 128 random key pairs (k_i^0, k_i^1); S is
   the base-OT receiver with 128 random choice bits s and learns k_i^{s_i}.
2. For each batch of n OTs (n ≤ ``batch``, padded up to a multiple of 128 bits), with G the AES-CTR PRG
   keyed by a base-OT key and read on from where the previous batch stopped: R builds the columns t^i =
   G(k_i^0) and u^i = t^i ⊕ G(k_i^1) ⊕ r and sends the 128 columns u^i (``ot_extension_columns``: 16 bytes
   per OT). S computes q^i = G(k_i^{s_i}) ⊕ s_i·u^i = t^i ⊕ s_i·r.
3. Both transpose their 128 × n matrices (``transpose.transpose_bits``); row j gives q_j = t_j ⊕ r_j·s.
4. S sets K_j = H(q_j, j) and sends y_j = K_j ⊕ Δ ⊕ H(q_j ⊕ s, j) (``ot_extension_corrections``: 16 bytes
   per OT). R outputs H(t_j, j) ⊕ r_j·y_j, which is K_j when r_j = 0 and, since q_j ⊕ s = t_j when r_j =
   1, K_j ⊕ Δ otherwise.

H is the tweakable correlation-robust hash of Guo–Katz–Wang–Yu (IEEE S&P 2020) over fixed-key AES
(``FixedKeyAES.hash``); the tweak of OT j is the block (j, ``HASH_TWEAK_DOMAIN``): its high word keeps OT
tweaks apart from the garbling tweaks, whose high word is expected to differ (it is zero for gate
indices). S's view — the columns u^i — is G(k_i^0) ⊕ G(k_i^1) ⊕ r with one of the two keys unknown to it,
hence pseudo-random whatever r is; R's view of K_j ⊕ Δ for an unchosen label needs H(t_j ⊕ s, j) for the
secret s.

Streaming: R sends at most ``window`` batches ahead of the corrections it has received (``set_window`` changes
the window between messages: the columns, and so the bytes on the wire, are the same, only their timing moves), each batch message
is at most 128 · ``batch`` / 8 bytes (1 MiB by default, 4 MiB at the largest batch), and both sides keep
only O(batch) working memory besides their output arrays.

States and transitions (the ``TABLE`` of each class, run by ``jointstat.machine``; ``tests/test_machine.py``
checks this table against them; any other (state, event) pair raises ``OTError``; any error leaves the party in
``failed``, which refuses everything). The garbler's side is ``CorrelatedOTSender`` (``ExtensionSender`` is its
extension phase alone), the evaluator's ``CorrelatedOTReceiver`` (``ExtensionReceiver``):

| party                | state                   | event                             | sends                               | next |
|----------------------|-------------------------|-----------------------------------|-------------------------------------|------|
| CorrelatedOTSender   | new                     | start()                           | —                                   | awaiting base OT point, done (count = 0) |
| CorrelatedOTSender   | awaiting base OT point  | base_ot_sender_point, 32 B        | base_ot_receiver_points, 4096 B     | receiving columns |
| CorrelatedOTSender   | receiving columns       | ot_extension_columns, batch b     | ot_extension_corrections, b         | receiving columns, done (after the last batch) |
| ExtensionSender      | new                     | start()                           | —                                   | receiving columns, done (count = 0) |
| ExtensionSender      | receiving columns       | ot_extension_columns, batch b     | ot_extension_corrections, b         | receiving columns, done (after the last batch) |
| CorrelatedOTReceiver | new                     | start()                           | base_ot_sender_point, 32 B          | awaiting base OT points, done (count = 0) |
| CorrelatedOTReceiver | awaiting base OT points | base_ot_receiver_points, 4096 B   | columns of batches 0 … window − 1   | extending |
| CorrelatedOTReceiver | extending               | ot_extension_corrections, batch b | columns up to batch b + window, if any | extending, done (after the last batch) |
| ExtensionReceiver    | new                     | start()                           | columns of batches 0 … window − 1   | extending, done (count = 0) |
| ExtensionReceiver    | extending               | ot_extension_corrections, batch b | columns up to batch b + window, if any | extending, done (after the last batch) |

``ExtensionSender``/``ExtensionReceiver`` are the extension phase alone, started from base-OT keys
obtained elsewhere (the benchmark times the two phases separately with them); the session layer uses the
``CorrelatedOT*`` classes, which run the base OTs themselves.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import ClassVar

import numpy as np
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from jointstat.machine import DONE, NEW, START, Transition
from jointstat.ot.base import (
    AWAITING_RECEIVER_POINTS,
    AWAITING_SENDER_POINT,
    BASE_OT_COUNT,
    KEY_BYTES,
    BaseOTReceiver,
    BaseOTSender,
    RandomBytes,
    check_choice_bits,
    check_session_id,
    random_choice_bits,
)
from jointstat.ot.messages import (
    BASE_OT_RECEIVER_POINTS,
    BASE_OT_SENDER_POINT,
    EXTENSION_COLUMNS,
    EXTENSION_CORRECTIONS,
    MAX_PAYLOAD_BYTES,
    OTError,
    OTMessage,
)
from jointstat.ot.party import OTMachine
from jointstat.ot.transpose import transpose_bits
from jointstat.primitives.aes import FixedKeyAES
from jointstat.primitives.blocks import BLOCK_BYTES, BLOCK_DTYPE, select_mask

KAPPA = BASE_OT_COUNT  # 128 base OTs = the computational security parameter
DEFAULT_BATCH = 1 << 16  # OTs per extension message: 1 MiB of columns, 1 MiB of corrections
MAX_BATCH = MAX_PAYLOAD_BYTES // KAPPA * 8  # 2^18 OTs: the columns of one batch fill the 4 MiB limit
DEFAULT_WINDOW = 4  # batches the receiver sends ahead of the corrections it has received
MAX_WINDOW = 64
HASH_TWEAK_DOMAIN = np.uint64(0x4F54 << 48)  # "OT" in the high word of every OT-extension hash tweak

AWAITING_BASE_POINT = AWAITING_SENDER_POINT  # the garbler, as base-OT receiver, waits for the point A
AWAITING_BASE_POINTS = AWAITING_RECEIVER_POINTS  # the evaluator, as base-OT sender, waits for 128 points
RECEIVING_COLUMNS = "receiving columns"
EXTENDING = "extending"


class SeedStreams:
    """The PRG G of IKNP for many seeds at once: one AES-128-CTR keystream per 16-byte seed (counter from 0).

    ``read(nbytes)`` returns the next ``nbytes`` of every stream as a ``(len(seeds), nbytes)`` uint8
    matrix. The streams are the same as ``primitives.aes.prg_expand(seed, total)``; keeping one encryptor
    per seed avoids re-keying AES for every batch.
    """

    def __init__(self, seeds: Sequence[bytes]) -> None:
        for seed in seeds:
            if len(seed) != KEY_BYTES:
                raise OTError(f"PRG seeds must be {KEY_BYTES} bytes")
        self._encryptors = [Cipher(algorithms.AES(bytes(s)), modes.CTR(bytes(16))).encryptor() for s in seeds]
        self._zeros = b""

    def read(self, nbytes: int) -> np.ndarray:
        rows = len(self._encryptors)
        if len(self._zeros) < nbytes:
            self._zeros = bytes(nbytes)
        zeros = memoryview(self._zeros)[:nbytes]
        # update_into wants block_size − 1 spare bytes past each write; the next row (or the tail) provides them.
        buffer = np.empty(rows * nbytes + BLOCK_BYTES, dtype=np.uint8)
        whole = buffer.data
        for i, encryptor in enumerate(self._encryptors):
            encryptor.update_into(zeros, whole[i * nbytes :])
        return buffer[: rows * nbytes].reshape(rows, nbytes)


class _Batches:
    """The public batch layout of ``count`` OTs: batch b covers OTs [start, stop), padded to a multiple of 128."""

    def __init__(self, count: int, batch: int) -> None:
        if not isinstance(count, int) or isinstance(count, bool) or count < 0:
            raise OTError(f"OT count must be a non-negative integer, got {count!r}")
        if not isinstance(batch, int) or batch % 128 or not 128 <= batch <= MAX_BATCH:
            raise OTError(f"batch must be a multiple of 128 from 128 to {MAX_BATCH}, got {batch!r}")
        self.count = count
        self.size = batch
        self.total = -(-count // batch)

    def bounds(self, b: int) -> tuple[int, int]:
        start = b * self.size
        return start, min(self.count, start + self.size)

    def column_bytes(self, b: int) -> int:
        """Bytes per column in batch b (n padded to a multiple of 128 bits, over 8)."""
        start, stop = self.bounds(b)
        return -(-(stop - start) // 128) * 16

    def tweaks(self, b: int) -> np.ndarray:
        start, stop = self.bounds(b)
        tweaks = np.empty((stop - start, 2), dtype=BLOCK_DTYPE)
        tweaks[:, 0] = np.arange(start, stop, dtype=BLOCK_DTYPE)
        tweaks[:, 1] = HASH_TWEAK_DOMAIN
        return tweaks


def _check_delta(delta: np.ndarray) -> np.ndarray:
    d = np.asarray(delta)
    if d.shape != (2,) or d.dtype.kind != "u" or d.dtype.itemsize != 8:
        raise OTError("delta must be one block: a (2,) array of 64-bit unsigned words")
    d = d.astype(BLOCK_DTYPE)
    if not int(d[0]) & 1:
        raise OTError("delta must have its least significant bit set (free-XOR with point-and-permute)")
    return d


def _check_window(window: int) -> int:
    if not isinstance(window, int) or isinstance(window, bool) or not 1 <= window <= MAX_WINDOW:
        raise OTError(f"window must be an integer from 1 to {MAX_WINDOW}, got {window!r}")
    return window


def _as_choices(choices: np.ndarray) -> np.ndarray:
    bits = np.asarray(choices)
    check_choice_bits(bits, what="choices")
    return np.array(bits, dtype=np.uint8, copy=True)  # a private copy: the caller may reuse its array


class ExtensionSender(OTMachine):
    """The OT-extension phase of the garbler, from the 128 base-OT keys k_i^{s_i} and its base choice bits s."""

    ROLE = "OT extension sender (garbler)"
    TABLE: ClassVar[dict[tuple[str, str], Transition]] = {
        (NEW, START): ("_on_start", (RECEIVING_COLUMNS, DONE)),
        (RECEIVING_COLUMNS, EXTENSION_COLUMNS): ("_on_columns", (RECEIVING_COLUMNS, DONE)),
    }

    def __init__(
        self,
        base_keys: Sequence[bytes],
        base_choices: np.ndarray,
        delta: np.ndarray,
        count: int,
        *,
        batch: int = DEFAULT_BATCH,
        role: str | None = None,
    ) -> None:
        super().__init__(role)
        s = _as_choices(base_choices)
        if len(base_keys) != KAPPA or s.size != KAPPA:
            raise OTError(f"OT extension needs exactly {KAPPA} base-OT keys and choice bits")
        self._delta = _check_delta(delta)
        self._batches = _Batches(count, batch)
        self._streams = SeedStreams(base_keys)
        self._s_block = np.frombuffer(np.packbits(s, bitorder="little").tobytes(), dtype=BLOCK_DTYPE).copy()
        self._s_mask = select_mask(s)  # (128, 1): all ones in the rows of columns with s_i = 1
        self._aes = FixedKeyAES()
        self._zero_labels = np.empty((count, 2), dtype=BLOCK_DTYPE)
        self._next = 0

    @property
    def count(self) -> int:
        return self._batches.count

    @property
    def completed(self) -> int:
        """How many OTs (a prefix) are finished on this side."""
        return self._batches.bounds(self._next)[0] if self._next < self._batches.total else self.count

    @property
    def zero_labels(self) -> np.ndarray:
        """K: ``(count, 2)`` '<u8'; the receiver holds K[j] ⊕ choices[j]·Δ. Only once done."""
        self._require_done("zero_labels")
        return self._zero_labels

    def _on_start(self, _message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        return (DONE if self._batches.total == 0 else RECEIVING_COLUMNS), []

    def _on_columns(self, message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        assert message is not None
        b = self._next
        nbytes = self._batches.column_bytes(b)
        self._expect_size(message, KAPPA * nbytes, f"batch {b}: {KAPPA} columns of {nbytes} bytes")
        start, stop = self._batches.bounds(b)
        columns = np.frombuffer(message.payload, dtype=BLOCK_DTYPE).reshape(KAPPA, nbytes // 8)
        q = self._streams.read(nbytes)
        q_words = q.view(BLOCK_DTYPE)
        q_words ^= columns & self._s_mask
        rows = transpose_bits(q)[: stop - start]
        tweaks = self._batches.tweaks(b)
        zero = self._aes.hash(rows, tweaks)
        rows ^= self._s_block
        correction = self._aes.hash(rows, tweaks)
        correction ^= zero
        correction ^= self._delta
        self._zero_labels[start:stop] = zero
        self._next = b + 1
        if self._next == self._batches.total:
            self._forget()
            return DONE, [OTMessage(EXTENSION_CORRECTIONS, correction.tobytes())]
        return RECEIVING_COLUMNS, [OTMessage(EXTENSION_CORRECTIONS, correction.tobytes())]

    def _forget(self) -> None:
        self._streams = SeedStreams([])
        self._s_block = np.zeros(2, dtype=BLOCK_DTYPE)
        self._s_mask = np.zeros((0, 1), dtype=BLOCK_DTYPE)


class ExtensionReceiver(OTMachine):
    """The OT-extension phase of the evaluator, from the 128 base-OT key pairs (k_i^0, k_i^1) it sent."""

    ROLE = "OT extension receiver (evaluator)"
    TABLE: ClassVar[dict[tuple[str, str], Transition]] = {
        (NEW, START): ("_on_start", (EXTENDING, DONE)),
        (EXTENDING, EXTENSION_CORRECTIONS): ("_on_corrections", (EXTENDING, DONE)),
    }

    def __init__(
        self,
        base_key_pairs: Sequence[tuple[bytes, bytes]],
        choices: np.ndarray,
        *,
        batch: int = DEFAULT_BATCH,
        window: int = DEFAULT_WINDOW,
        role: str | None = None,
    ) -> None:
        super().__init__(role)
        if len(base_key_pairs) != KAPPA:
            raise OTError(f"OT extension needs exactly {KAPPA} base-OT key pairs")
        self._choices = _as_choices(choices)
        self._batches = _Batches(int(self._choices.size), batch)
        self._window = _check_window(window)
        self._streams0 = SeedStreams([pair[0] for pair in base_key_pairs])
        self._streams1 = SeedStreams([pair[1] for pair in base_key_pairs])
        self._aes = FixedKeyAES()
        self._labels = np.empty((self._batches.count, 2), dtype=BLOCK_DTYPE)
        self._sent = 0  # batches whose columns have been produced
        self._finished = 0  # batches whose corrections have been applied

    @property
    def count(self) -> int:
        return self._batches.count

    @property
    def completed(self) -> int:
        """How many OTs (a prefix) are finished on this side."""
        return self._batches.bounds(self._finished)[0] if self._finished < self._batches.total else self.count

    @property
    def labels(self) -> np.ndarray:
        """``(count, 2)`` '<u8': labels[j] = K[j] ⊕ choices[j]·Δ. Only once done."""
        self._require_done("labels")
        return self._labels

    def _on_start(self, _message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        if self._batches.total == 0:
            return DONE, []
        first = min(self._window, self._batches.total)
        return EXTENDING, [self._columns(b) for b in range(first)]

    def _columns(self, b: int) -> OTMessage:
        """Build the columns of batch b and store H(t_j, j) as the provisional label of each OT j."""
        start, stop = self._batches.bounds(b)
        nbytes = self._batches.column_bytes(b)
        packed = np.zeros(nbytes, dtype=np.uint8)
        bits = np.packbits(self._choices[start:stop], bitorder="little")
        packed[: bits.size] = bits
        t = self._streams0.read(nbytes)
        u = self._streams1.read(nbytes)
        u_words = u.view(BLOCK_DTYPE)
        u_words ^= t.view(BLOCK_DTYPE)
        u_words ^= packed.view(BLOCK_DTYPE)
        rows = transpose_bits(t)[: stop - start]
        self._labels[start:stop] = self._aes.hash(rows, self._batches.tweaks(b))
        self._sent = b + 1
        return OTMessage(EXTENSION_COLUMNS, u.tobytes())

    @property
    def batches_sent(self) -> int:
        return self._sent

    @property
    def batches_done(self) -> int:
        return self._finished

    def set_window(self, window: int) -> None:
        """Keep ``window`` batches in flight from the next corrections on (the columns are the same bytes)."""
        self._window = _check_window(window)

    def _on_corrections(self, message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        assert message is not None
        b = self._finished
        start, stop = self._batches.bounds(b)
        self._expect_size(message, BLOCK_BYTES * (stop - start), f"batch {b}: one block per OT")
        correction = np.frombuffer(message.payload, dtype=BLOCK_DTYPE).reshape(-1, 2)
        self._labels[start:stop] ^= correction & select_mask(self._choices[start:stop])
        self._finished = b + 1
        if self._finished == self._batches.total:
            self._streams0 = self._streams1 = SeedStreams([])
            return DONE, []
        last = min(self._batches.total, self._finished + self._window)
        replies = [self._columns(b) for b in range(self._sent, last)]
        return EXTENDING, replies


class CorrelatedOTSender(OTMachine):
    """The garbler's side: ``count`` correlated OTs with offset ``delta``; ends with ``zero_labels`` K.

    ``delta`` is the free-XOR Δ, a ``(2,)`` '<u8' block with least significant bit 1. The garbler is the
    base-OT receiver (128 fresh random choice bits s) and the OT-extension sender. ``random_bytes`` (the OS
    CSPRNG by default) gives the choice bits s and the base-OT receiver's scalars: the only randomness this side
    draws (the extension's PRG seeds are the base-OT keys).
    """

    ROLE = "correlated OT sender (garbler)"
    TABLE: ClassVar[dict[tuple[str, str], Transition]] = {
        (NEW, START): ("_on_start", (AWAITING_BASE_POINT, DONE)),
        (AWAITING_BASE_POINT, BASE_OT_SENDER_POINT): ("_on_base_point", (RECEIVING_COLUMNS,)),
        (RECEIVING_COLUMNS, EXTENSION_COLUMNS): ("_on_columns", (RECEIVING_COLUMNS, DONE)),
    }

    def __init__(
        self,
        session_id: bytes,
        delta: np.ndarray,
        count: int,
        *,
        batch: int = DEFAULT_BATCH,
        random_bytes: RandomBytes = os.urandom,
    ) -> None:
        super().__init__()
        self._session_id = check_session_id(session_id)
        self._random_bytes = random_bytes
        self._delta = _check_delta(delta)
        _Batches(count, batch)  # validates count and batch before anything else happens
        self._count = count
        self._batch = batch
        self._base: BaseOTReceiver | None = None
        self._base_choices = np.zeros(0, dtype=np.uint8)
        self._extension: ExtensionSender | None = None

    @property
    def count(self) -> int:
        return self._count

    @property
    def completed(self) -> int:
        """How many OTs (a prefix) are finished on this side."""
        return 0 if self._extension is None else self._extension.completed

    @property
    def zero_labels(self) -> np.ndarray:
        """K: ``(count, 2)`` '<u8'; the evaluator holds K[j] ⊕ choices[j]·Δ. Only once done."""
        self._require_done("zero_labels")
        if self._extension is None:
            return np.empty((0, 2), dtype=BLOCK_DTYPE)
        return self._extension.zero_labels

    def _on_start(self, _message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        if self._count == 0:
            return DONE, []
        self._base_choices = random_choice_bits(KAPPA, self._random_bytes)
        self._base = BaseOTReceiver(
            self._session_id, self._base_choices, role=self.role, random_bytes=self._random_bytes
        )
        self._base.start()
        return AWAITING_BASE_POINT, []

    def _on_base_point(self, message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        assert message is not None and self._base is not None
        base = self._base
        replies = base.receive(message)
        self._extension = ExtensionSender(
            base.keys, self._base_choices, self._delta, self._count, batch=self._batch, role=self.role
        )
        self._extension.start()
        self._base = None
        self._base_choices = np.zeros(0, dtype=np.uint8)
        return RECEIVING_COLUMNS, replies

    def _on_columns(self, message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        assert message is not None and self._extension is not None
        replies = self._extension.receive(message)
        return (DONE if self._extension.done else RECEIVING_COLUMNS), replies


class CorrelatedOTReceiver(OTMachine):
    """The evaluator's side: one correlated OT per choice bit; ends with ``labels`` = K ⊕ choices·Δ.

    The evaluator is the base-OT sender (128 random key pairs) and the OT-extension receiver. ``window``
    batches of columns may be in flight before the corrections of the first come back. ``random_bytes`` (the OS
    CSPRNG by default) gives the base-OT sender's scalar, from which the 128 key pairs — the extension's PRG
    seeds — follow; the choice bits are the evaluator's inputs.
    """

    ROLE = "correlated OT receiver (evaluator)"
    TABLE: ClassVar[dict[tuple[str, str], Transition]] = {
        (NEW, START): ("_on_start", (AWAITING_BASE_POINTS, DONE)),
        (AWAITING_BASE_POINTS, BASE_OT_RECEIVER_POINTS): ("_on_base_points", (EXTENDING,)),
        (EXTENDING, EXTENSION_CORRECTIONS): ("_on_corrections", (EXTENDING, DONE)),
    }

    def __init__(
        self,
        session_id: bytes,
        choices: np.ndarray,
        *,
        batch: int = DEFAULT_BATCH,
        window: int = DEFAULT_WINDOW,
        random_bytes: RandomBytes = os.urandom,
    ) -> None:
        super().__init__()
        self._session_id = check_session_id(session_id)
        self._random_bytes = random_bytes
        self._choices = _as_choices(choices)
        _Batches(int(self._choices.size), batch)
        self._window = _check_window(window)
        self._batch = batch
        self._base: BaseOTSender | None = None
        self._extension: ExtensionReceiver | None = None

    @property
    def count(self) -> int:
        return int(self._choices.size)

    @property
    def completed(self) -> int:
        """How many OTs (a prefix) are finished on this side."""
        return 0 if self._extension is None else self._extension.completed

    @property
    def labels(self) -> np.ndarray:
        """``(count, 2)`` '<u8': labels[j] = K[j] ⊕ choices[j]·Δ. Only once done."""
        self._require_done("labels")
        if self._extension is None:
            return np.empty((0, 2), dtype=BLOCK_DTYPE)
        return self._extension.labels

    @property
    def batches_sent(self) -> int:
        return 0 if self._extension is None else self._extension.batches_sent

    @property
    def batches_done(self) -> int:
        return 0 if self._extension is None else self._extension.batches_done

    def set_window(self, window: int) -> None:
        """Keep ``window`` batches of columns in flight from the next corrections on (``ExtensionReceiver``)."""
        self._window = _check_window(window)
        if self._extension is not None:
            self._extension.set_window(window)

    def _on_start(self, _message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        if self._choices.size == 0:
            return DONE, []
        self._base = BaseOTSender(self._session_id, KAPPA, role=self.role, random_bytes=self._random_bytes)
        return AWAITING_BASE_POINTS, self._base.start()

    def _on_base_points(self, message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        assert message is not None and self._base is not None
        base = self._base
        base.receive(message)
        self._extension = ExtensionReceiver(
            base.keys, self._choices, batch=self._batch, window=self._window, role=self.role
        )
        self._base = None
        return EXTENDING, self._extension.start()

    def _on_corrections(self, message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        assert message is not None and self._extension is not None
        replies = self._extension.receive(message)
        return (DONE if self._extension.done else EXTENDING), replies


__all__ = [
    "DEFAULT_BATCH",
    "DEFAULT_WINDOW",
    "HASH_TWEAK_DOMAIN",
    "KAPPA",
    "MAX_BATCH",
    "CorrelatedOTReceiver",
    "CorrelatedOTSender",
    "ExtensionReceiver",
    "ExtensionSender",
    "SeedStreams",
]
