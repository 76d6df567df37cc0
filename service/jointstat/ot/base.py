"""Base OT: the "simplest OT" of Chou and Orlandi (Latincrypt 2015) over the prime-order group of
edwards25519.

Theory of operation
-------------------
n random 1-out-of-2 OTs (the sender learns two keys per OT, the receiver the one it chose), all sharing
one sender point, in one round trip. B is the RFC 8032 base point, all points are checked by
``group.check_point``.

1. Sender: random scalar a, sends A = [a]B; keeps T = [a]A.
2. Receiver, for each i with choice c_i: random scalar b_i, sends R_i = [b_i]B + c_i·A; its key is
   k_i = KDF(i, A, R_i, [b_i]A).
3. Sender, for each i: k_i^0 = KDF(i, A, R_i, [a]R_i), k_i^1 = KDF(i, A, R_i, [a]R_i − T).

Correctness: [a]R_i = [a b_i]B + c_i·T, so [a]R_i − c_i·T = [b_i]A. The sender sees R_i, which is uniform
whatever c_i is; the receiver cannot compute [a](R_i − c̄_i·A) without solving CDH. Security here is
semi-honest.

KDF(i, A, R, P) = SHA-256("jointstat base OT key v1" ‖ len(sid) ‖ sid ‖ i ‖ A ‖ R ‖ P), first 16 bytes,
where sid is the session identifier (2-byte big-endian length, then the bytes) and i a 4-byte big-endian
index. Hashing the session id, the index and the transcript points separates keys across sessions and OTs.

The receiver computes both [b_i]B and [b_i]B + A for every i and selects one, so its running time does not
grow with the number of choice bits that are 1.

States and transitions (the ``TABLE`` of each class, run by ``jointstat.machine``; ``tests/test_machine.py``
checks this table against them; every other (state, event) pair raises ``OTError``, and any error leaves the party
in ``failed``, which refuses everything)

| party          | state                   | event                            | sends                           | next |
|----------------|-------------------------|----------------------------------|---------------------------------|------|
| BaseOTSender   | new                     | start()                          | base_ot_sender_point, 32 B      | awaiting base OT points |
| BaseOTSender   | awaiting base OT points | base_ot_receiver_points, 32·n B  | —                               | done |
| BaseOTReceiver | new                     | start()                          | —                               | awaiting base OT point |
| BaseOTReceiver | awaiting base OT point  | base_ot_sender_point, 32 B       | base_ot_receiver_points, 32·n B | done |

Randomness (the scalars a and b_i) comes from ``random_bytes``, the operating system's CSPRNG unless the caller
injects another source (to replay a recorded session in a test).
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Callable
from typing import ClassVar

import numpy as np

from jointstat.machine import DONE, NEW, START, Transition
from jointstat.ot.messages import BASE_OT_RECEIVER_POINTS, BASE_OT_SENDER_POINT, OTError, OTMessage
from jointstat.ot.party import OTMachine
from jointstat.primitives import group

BASE_OT_COUNT = 128
KEY_BYTES = 16
MAX_SESSION_ID_BYTES = 1024
_KDF_LABEL = b"jointstat base OT key v1"

RandomBytes = Callable[[int], bytes]

AWAITING_RECEIVER_POINTS = "awaiting base OT points"  # the base-OT sender waits for the receiver's 128 points
AWAITING_SENDER_POINT = "awaiting base OT point"  # the base-OT receiver waits for the sender's point


def check_session_id(session_id: bytes) -> bytes:
    """The session id as bytes, after checking it is 1 to ``MAX_SESSION_ID_BYTES`` bytes long."""
    if not isinstance(session_id, bytes | bytearray):
        raise OTError(f"session id must be bytes, got {type(session_id).__name__}")
    if not 1 <= len(session_id) <= MAX_SESSION_ID_BYTES:
        raise OTError(f"session id must be 1 to {MAX_SESSION_ID_BYTES} bytes, got {len(session_id)}")
    return bytes(session_id)


def derive_key(
    session_id: bytes, index: int, sender_point: bytes, receiver_point: bytes, shared: bytes
) -> bytes:
    """KDF(i, A, R, P) of the module docstring: 16 bytes of SHA-256 over the session id, index and points."""
    h = hashlib.sha256(_KDF_LABEL)
    h.update(len(session_id).to_bytes(2, "big"))
    h.update(session_id)
    h.update(index.to_bytes(4, "big"))
    h.update(sender_point)
    h.update(receiver_point)
    h.update(shared)
    return h.digest()[:KEY_BYTES]


def check_choice_bits(bits: np.ndarray, *, what: str) -> None:
    """Raise ``OTError`` unless ``bits`` is a one-dimensional integer or boolean array of zeros and ones."""
    integral = np.issubdtype(bits.dtype, np.integer) or bits.dtype == np.bool_
    if bits.ndim != 1 or not integral:
        raise OTError(f"{what} must be a one-dimensional integer array of 0/1")
    if bits.size and (int(bits.min()) < 0 or int(bits.max()) > 1):
        raise OTError(f"{what} must all be 0 or 1")


def _check_count(count: int) -> int:
    if not isinstance(count, int) or isinstance(count, bool) or not 1 <= count <= 1 << 16:
        raise OTError(f"base OT count must be an integer from 1 to 65536, got {count!r}")
    return count


class BaseOTSender(OTMachine):
    """Chou–Orlandi sender: ends with ``keys``, a list of ``count`` pairs (k^0, k^1) of 16-byte keys."""

    ROLE = "base OT sender"
    TABLE: ClassVar[dict[tuple[str, str], Transition]] = {
        (NEW, START): ("_on_start", (AWAITING_RECEIVER_POINTS,)),
        (AWAITING_RECEIVER_POINTS, BASE_OT_RECEIVER_POINTS): ("_on_receiver_points", (DONE,)),
    }

    def __init__(
        self,
        session_id: bytes,
        count: int = BASE_OT_COUNT,
        *,
        role: str | None = None,
        random_bytes: RandomBytes = os.urandom,
    ) -> None:
        super().__init__(role)
        self._session_id = check_session_id(session_id)
        self._count = _check_count(count)
        self._random_bytes = random_bytes
        self._scalar: bytes | None = None
        self._point = b""
        self._square = b""
        self._keys: list[tuple[bytes, bytes]] = []

    @property
    def count(self) -> int:
        return self._count

    @property
    def keys(self) -> list[tuple[bytes, bytes]]:
        """The pairs (k_i^0, k_i^1); only once done."""
        self._require_done("keys")
        return self._keys

    def _on_start(self, _message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        self._scalar = group.random_scalar(self._random_bytes)
        self._point = group.base_mult(self._scalar)
        self._square = group.mult(self._scalar, self._point, what="[a]A")
        return AWAITING_RECEIVER_POINTS, [OTMessage(BASE_OT_SENDER_POINT, self._point)]

    def _on_receiver_points(self, message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        assert message is not None and self._scalar is not None
        self._expect_size(message, group.POINT_BYTES * self._count, f"{self._count} points of 32 bytes")
        payload = bytes(message.payload)
        points = [payload[32 * i : 32 * (i + 1)] for i in range(self._count)]
        for i, point in enumerate(points):
            group.check_point(point, what=f"point {i}")
        keys = []
        for i, point in enumerate(points):
            shared0 = group.mult(self._scalar, point, what=f"point {i}")
            shared1 = group.sub(shared0, self._square)
            keys.append(
                (
                    derive_key(self._session_id, i, self._point, point, shared0),
                    derive_key(self._session_id, i, self._point, point, shared1),
                )
            )
        self._keys = keys
        self._scalar = None
        self._square = b""
        return DONE, []


class BaseOTReceiver(OTMachine):
    """Chou–Orlandi receiver with ``choices`` (0/1 per OT): ends with ``keys``, the chosen 16-byte key per OT."""

    ROLE = "base OT receiver"
    TABLE: ClassVar[dict[tuple[str, str], Transition]] = {
        (NEW, START): ("_on_start", (AWAITING_SENDER_POINT,)),
        (AWAITING_SENDER_POINT, BASE_OT_SENDER_POINT): ("_on_sender_point", (DONE,)),
    }

    def __init__(
        self,
        session_id: bytes,
        choices: np.ndarray,
        *,
        role: str | None = None,
        random_bytes: RandomBytes = os.urandom,
    ) -> None:
        super().__init__(role)
        self._session_id = check_session_id(session_id)
        self._random_bytes = random_bytes
        bits = np.asarray(choices)
        check_choice_bits(bits, what="base OT choices")
        self._count = _check_count(int(bits.size))
        self._choices = bits.astype(np.uint8)
        self._keys: list[bytes] = []

    @property
    def count(self) -> int:
        return self._count

    @property
    def keys(self) -> list[bytes]:
        """The chosen keys k_i^{c_i}; only once done."""
        self._require_done("keys")
        return self._keys

    def _on_start(self, _message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        return AWAITING_SENDER_POINT, []

    def _on_sender_point(self, message: OTMessage | None) -> tuple[str, list[OTMessage]]:
        assert message is not None
        self._expect_size(message, group.POINT_BYTES, "one point")
        sender_point = group.check_point(bytes(message.payload), what="sender point")
        out = bytearray()
        keys = []
        for i in range(self._count):
            scalar = group.random_scalar(self._random_bytes)
            plain = group.base_mult(scalar)
            shifted = group.add(plain, sender_point)
            point = (plain, shifted)[int(self._choices[i])]
            shared = group.mult(scalar, sender_point, what="sender point")
            keys.append(derive_key(self._session_id, i, sender_point, point, shared))
            out += point
        self._keys = keys
        self._choices = np.zeros(0, dtype=np.uint8)
        return DONE, [OTMessage(BASE_OT_RECEIVER_POINTS, bytes(out))]


def random_choice_bits(count: int, random_bytes: RandomBytes = os.urandom) -> np.ndarray:
    """``count`` uniformly random bits (uint8 0/1) from ``random_bytes`` (the operating system's CSPRNG by default)."""
    raw = np.frombuffer(random_bytes((count + 7) // 8), dtype=np.uint8)
    return np.unpackbits(raw, bitorder="little")[:count].copy()
