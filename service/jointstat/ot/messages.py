"""The messages of base OT and OT extension, and the error raised for any message that does not fit.

Theory of operation: the OT objects are sans-I/O — they take ``OTMessage`` values in and give ``OTMessage``
values out; the session layer carries them in its own frames. A message is a kind (a plain-English name) and
raw payload bytes whose length is fixed by the kind and the public OT parameters, so every receiver checks the
exact length before reading anything. No payload is larger than ``MAX_PAYLOAD_BYTES``.

| kind                        | direction (extension roles)  | payload                                               |
|-----------------------------|------------------------------|-------------------------------------------------------|
| ``base_ot_sender_point``    | evaluator → garbler          | A = [a]B, 32 bytes                                    |
| ``base_ot_receiver_points`` | garbler → evaluator          | B_0 … B_127, 128 × 32 = 4096 bytes                    |
| ``ot_extension_columns``    | evaluator → garbler          | 128 columns u^i of one batch, 128 × ⌈n/128⌉ × 16 bytes |
| ``ot_extension_corrections``| garbler → evaluator          | one 16-byte correction y_j per OT of the batch, n × 16 |

(Chou–Orlandi, Latincrypt 2015, for the first two; IKNP, Crypto 2003, with the correlated OT of
Asharov–Lindell–Schneider–Zohner, CCS 2013, for the last two.)
"""

from __future__ import annotations

from dataclasses import dataclass

MAX_PAYLOAD_BYTES = 4 * 1024 * 1024

BASE_OT_SENDER_POINT = "base_ot_sender_point"
BASE_OT_RECEIVER_POINTS = "base_ot_receiver_points"
EXTENSION_COLUMNS = "ot_extension_columns"
EXTENSION_CORRECTIONS = "ot_extension_corrections"

KINDS = frozenset({BASE_OT_SENDER_POINT, BASE_OT_RECEIVER_POINTS, EXTENSION_COLUMNS, EXTENSION_CORRECTIONS})


class OTError(ValueError):
    """A message did not fit the protocol state (wrong kind, wrong size, bad point), or the OT was misused.

    The text names the state, the message kind and what is wrong; it never contains keys, choice bits or
    Δ. After an ``OTError`` from ``receive`` the object is failed and refuses further messages: the
    session aborts.
    """


@dataclass(frozen=True, slots=True, repr=False)
class OTMessage:
    """One protocol message: ``kind`` is one of ``KINDS``, ``payload`` its raw bytes (≤ ``MAX_PAYLOAD_BYTES``)."""

    kind: str
    payload: bytes

    def __post_init__(self) -> None:
        if not isinstance(self.kind, str):
            raise OTError(f"message kind must be a string, got {type(self.kind).__name__}")
        if not isinstance(self.payload, bytes | bytearray):
            raise OTError(f"{self.kind} message: payload must be bytes, got {type(self.payload).__name__}")
        if len(self.payload) > MAX_PAYLOAD_BYTES:
            raise OTError(
                f"{self.kind} message: payload of {len(self.payload)} bytes exceeds {MAX_PAYLOAD_BYTES}"
            )

    def __repr__(self) -> str:
        return f"OTMessage(kind={self.kind!r}, payload=<{len(self.payload)} bytes>)"
