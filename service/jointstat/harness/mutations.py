"""Mutated frames: a valid frame turned into the frames a broken or hostile peer sends in its place.

Theory of operation
-------------------
``mutate(data, how, rng, references, previous)`` returns the frames sent instead of the valid frame ``data``:

- ``bit_flip``: 1, 2, 3 or 8 bits flipped at random positions;
- ``truncate``: cut at a random length (possibly empty);
- ``oversized_length``: a length prefix claiming more bytes than its message holds — the frame body's own (after
  the frame's tag) or, half the time, that of the body's first field when it is length-delimited — by one byte, by
  up to a mebibyte, or by a huge value (2^31 − 1 up to 2^64 − 1); one time in a hundred, instead, the whole frame
  made larger than the 4 MiB frame limit;
- ``unknown_type``: the frame's tag replaced by that of a field number this version does not know (12–15,
  16–2047, or the largest, 2^29 − 1), or — one time in five — by a known frame type with the wrong wire type (a
  number instead of a message);
- ``out_of_order``: a valid frame in the wrong place: a frame of another type sent first, the same type of frame
  from another session sent instead (one that differs: acknowledgements of the same count are the same bytes in
  every session), or this session's previous frame sent again first.

Tags and lengths follow the protobuf encoding (varints of 7 bits per byte, least significant group first; a tag is
field number × 8 + wire type).
"""

from __future__ import annotations

import numpy as np

from jointstat.protocol import frames as fr
from jointstat.wire.jointstat.v1 import session_pb2 as pb

BIT_FLIP, TRUNCATE, OVERSIZED, UNKNOWN_TYPE, OUT_OF_ORDER = (
    "bit_flip",
    "truncate",
    "oversized_length",
    "unknown_type",
    "out_of_order",
)
MUTATIONS = (BIT_FLIP, TRUNCATE, OVERSIZED, UNKNOWN_TYPE, OUT_OF_ORDER)
HUGE_LENGTHS = (2**31 - 1, 2**32 + 5, 2**63 - 1, 2**64 - 1)
KNOWN_FRAME_TYPES = max(f.number for f in pb.Frame.DESCRIPTOR.fields)  # the frame types are fields 1 to this


def varint(value: int) -> bytes:
    """``value`` as a protobuf varint (the encoder the frames module writes table frames with)."""
    return fr._varint(value)


def read_varint(data: bytes, at: int) -> tuple[int, int] | None:
    """(value, position after it), or None if the bytes end inside it."""
    value, shift = 0, 0
    while at < len(data) and shift < 70:
        byte = data[at]
        value |= (byte & 0x7F) << shift
        at += 1
        if not byte & 0x80:
            return value, at
        shift += 7
    return None


def mutate(
    data: bytes, how: str, rng: np.random.Generator, references: list[bytes], previous: bytes | None = None
) -> list[bytes]:
    """The frames sent in place of the valid frame ``data``, mutated ``how`` (see the module docstring).

    ``references`` are valid frames of another session (for frames out of order), ``previous`` the frame this
    session sent before ``data``.
    """
    if how == BIT_FLIP:
        out = bytearray(data)
        flips = min(int(rng.choice([1, 1, 2, 3, 8])), 8 * len(out))
        for pos in rng.choice(8 * len(out), size=flips, replace=False):
            out[int(pos) // 8] ^= 1 << (int(pos) % 8)
        return [bytes(out)]
    if how == TRUNCATE:
        return [data[: int(rng.integers(len(data)))]]
    if how == OVERSIZED:
        if rng.random() < 0.01:  # the whole frame beyond the 4 MiB limit
            return [fr.payload_frame(fr.GARBLED_TABLES, bytes(32)) + bytes(fr.MAX_FRAME_BYTES)]
        outer = read_varint(data, 1)
        assert outer is not None
        length, body_at = outer
        at, after, room = 1, body_at, len(data) - body_at
        if rng.random() < 0.5 and body_at + 1 < len(data) and data[body_at] & 7 == 2:
            inner = read_varint(data, body_at + 1)
            if inner is not None:
                at, after = body_at + 1, inner[1]
                room = body_at + length - after
        claim = int(rng.choice([room + 1, room + 1 + int(rng.integers(1, 1 << 20)), *HUGE_LENGTHS]))
        return [data[:at] + varint(claim) + data[after:]]
    if how == UNKNOWN_TYPE:
        parsed = read_varint(data, 0)
        assert parsed is not None
        _, after = parsed
        if rng.random() < 0.2:  # a known frame type with the wrong wire type (a number, not a message)
            field_number = int(rng.integers(1, KNOWN_FRAME_TYPES + 1))
            return [varint(field_number << 3) + varint(int(rng.integers(1 << 20))) + data[after:]]
        first_unknown = KNOWN_FRAME_TYPES + 1
        field_number = int(
            rng.choice([int(rng.integers(first_unknown, 16)), int(rng.integers(16, 2048)), 2**29 - 1])
        )
        return [varint(field_number << 3 | 2) + data[after:]]
    if how == OUT_OF_ORDER:
        kind = fr.decode(data)[0]
        choice = rng.random()
        same = [r for r in references if fr.decode(r)[0] == kind and r != data]  # a copy would change nothing
        other = [r for r in references if fr.decode(r)[0] not in (kind, fr.ABORT)]
        if choice < 0.4 and other:  # a valid frame of another type first
            return [other[int(rng.integers(len(other)))], data]
        if choice < 0.7 and same:  # the same kind of frame from another session, instead of this one
            return [same[int(rng.integers(len(same)))]]
        if previous is not None:  # the previous frame of this session again, before this one
            return [previous, data]
        return [other[int(rng.integers(len(other)))], data]
    raise ValueError(f"unknown mutation {how!r}")
