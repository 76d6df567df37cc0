"""Chou–Orlandi base OT (ot.base): correctness, key derivation, point checks, message sizes and states."""

from __future__ import annotations

import hashlib
import itertools

import numpy as np
import pytest
from jointstat.ot import (
    BaseOTReceiver,
    BaseOTSender,
    OTError,
    OTMessage,
    PipeStats,
    run_pipe,
)
from jointstat.ot.base import random_choice_bits
from jointstat.ot.messages import BASE_OT_RECEIVER_POINTS, BASE_OT_SENDER_POINT
from jointstat.primitives import group

SID = b"session-0001"


def small_order_point() -> bytes:
    # y = 0 gives x = ±sqrt(-1): the points (±sqrt(-1), 0) have order 4 (RFC 8032 curve equation with y = 0).
    return bytes(32)


def mixed_order_point() -> bytes:
    return group.add(group.base_mult(group.random_scalar()), small_order_point())


def off_curve_point() -> bytes:
    for counter in itertools.count():
        data = hashlib.sha256(counter.to_bytes(4, "big")).digest()
        try:
            group.check_point(data)
        except group.PointError as exc:
            if "not a point" in exc.reason:
                return data
    raise AssertionError("unreachable")


BAD_POINTS = {
    "identity": (group.IDENTITY, "identity"),
    "small order": (small_order_point(), "small order"),
    "mixed order": (mixed_order_point(), "prime-order subgroup"),
    "non-canonical": ((2**255 - 19 + 1).to_bytes(32, "little"), "non-canonical"),
    "off curve": (off_curve_point(), "not a point"),
}


def run_base(
    choices: np.ndarray, sid_sender: bytes = SID, sid_receiver: bytes = SID
) -> tuple[BaseOTSender, BaseOTReceiver, PipeStats]:
    sender = BaseOTSender(sid_sender, len(choices))
    receiver = BaseOTReceiver(sid_receiver, choices)
    stats = run_pipe(sender, receiver)
    return sender, receiver, stats


@pytest.mark.parametrize("count", [1, 7, 128])
def test_receiver_gets_exactly_the_chosen_keys(count: int) -> None:
    choices = random_choice_bits(count)
    sender, receiver, stats = run_base(choices)
    assert sender.done and receiver.done
    for (k0, k1), c, got in zip(sender.keys, choices, receiver.keys, strict=True):
        assert len(k0) == len(k1) == 16
        assert got == (k0, k1)[c]
        assert got != (k0, k1)[1 - c]
    all_keys = [k for pair in sender.keys for k in pair]
    assert len(set(all_keys)) == 2 * count
    assert stats.payload_bytes == {BASE_OT_SENDER_POINT: 32, BASE_OT_RECEIVER_POINTS: 32 * count}


def test_all_zero_and_all_one_choices() -> None:
    for bit in (0, 1):
        choices = np.full(128, bit, dtype=np.uint8)
        sender, receiver, _ = run_base(choices)
        assert receiver.keys == [pair[bit] for pair in sender.keys]


def test_fresh_keys_every_run() -> None:
    choices = random_choice_bits(16)
    first, _, _ = run_base(choices)
    second, _, _ = run_base(choices)
    assert not set(k for p in first.keys for k in p) & set(k for p in second.keys for k in p)


def test_session_id_mismatch_breaks_agreement() -> None:
    choices = random_choice_bits(32)
    sender, receiver, _ = run_base(choices, b"session-A", b"session-B")
    assert all(got not in pair for pair, got in zip(sender.keys, receiver.keys, strict=True))


def test_key_derivation_hashes_session_index_and_transcript() -> None:
    # Fix the scalars through the injected random source (64 bytes reduced mod L: a small value is the scalar
    # itself), then recompute every key from the documented formula with the group helpers.
    values = (1234567, *range(1000, 1000 + 8))
    scalars = [group.scalar_from_int(v) for v in values]
    feed = iter(v.to_bytes(64, "little") for v in values)

    def recorded(n: int) -> bytes:
        data = next(feed)
        assert len(data) == n
        return data

    choices = np.array([0, 1, 1, 0, 1, 0, 0, 1], dtype=np.uint8)
    sender = BaseOTSender(SID, len(choices), random_bytes=recorded)
    receiver = BaseOTReceiver(SID, choices, random_bytes=recorded)
    run_pipe(sender, receiver)
    a = scalars[0]
    big_a = group.base_mult(a)
    for i, (b, c) in enumerate(zip(scalars[1:], choices, strict=True)):
        r_point = group.base_mult(b) if c == 0 else group.add(group.base_mult(b), big_a)
        shared = group.mult(b, big_a)
        expected = hashlib.sha256(
            b"jointstat base OT key v1"
            + len(SID).to_bytes(2, "big")
            + SID
            + i.to_bytes(4, "big")
            + big_a
            + r_point
            + shared
        ).digest()[:16]
        assert receiver.keys[i] == expected
        assert sender.keys[i][c] == expected


@pytest.mark.parametrize("case", sorted(BAD_POINTS))
def test_receiver_rejects_bad_sender_point(case: str) -> None:
    point, reason = BAD_POINTS[case]
    receiver = BaseOTReceiver(SID, random_choice_bits(128))
    receiver.start()
    with pytest.raises(OTError) as info:
        receiver.receive(OTMessage(BASE_OT_SENDER_POINT, point))
    text = str(info.value)
    assert "awaiting base OT point" in text and BASE_OT_SENDER_POINT in text and reason in text
    assert receiver.state == "failed"
    with pytest.raises(OTError, match="failed"):
        receiver.receive(OTMessage(BASE_OT_SENDER_POINT, group.base_mult(group.random_scalar())))


@pytest.mark.parametrize("case", sorted(BAD_POINTS))
def test_sender_rejects_bad_receiver_point(case: str) -> None:
    point, reason = BAD_POINTS[case]
    sender = BaseOTSender(SID)
    receiver = BaseOTReceiver(SID, random_choice_bits(128))
    receiver.start()
    (message,) = receiver.receive(sender.start()[0])
    payload = bytearray(message.payload)
    payload[32 * 77 : 32 * 78] = point
    with pytest.raises(OTError) as info:
        sender.receive(OTMessage(BASE_OT_RECEIVER_POINTS, bytes(payload)))
    text = str(info.value)
    assert "point 77" in text and reason in text and BASE_OT_RECEIVER_POINTS in text
    assert not sender.done
    with pytest.raises(OTError, match="only available when done"):
        _ = sender.keys


@pytest.mark.parametrize("size", [0, 31, 33, 64])
def test_receiver_rejects_wrong_point_size(size: int) -> None:
    receiver = BaseOTReceiver(SID, random_choice_bits(128))
    receiver.start()
    with pytest.raises(OTError, match=f"payload is {size} bytes, expected 32"):
        receiver.receive(OTMessage(BASE_OT_SENDER_POINT, bytes(size)))


@pytest.mark.parametrize("size", [0, 32, 4064, 4095, 4097, 4128])
def test_sender_rejects_wrong_points_size(size: int) -> None:
    sender = BaseOTSender(SID)
    sender.start()
    with pytest.raises(OTError, match=f"payload is {size} bytes, expected 4096"):
        sender.receive(OTMessage(BASE_OT_RECEIVER_POINTS, bytes(size)))


def test_unexpected_messages_and_calls() -> None:
    sender = BaseOTSender(SID)
    with pytest.raises(OTError, match="state 'new': unexpected 'base_ot_receiver_points'"):
        sender.receive(OTMessage(BASE_OT_RECEIVER_POINTS, bytes(4096)))
    sender = BaseOTSender(SID)
    sender.start()
    with pytest.raises(OTError, match="start\\(\\) called"):
        sender.start()
    receiver = BaseOTReceiver(SID, random_choice_bits(128))
    receiver.start()
    with pytest.raises(OTError, match=r"unexpected 'base_ot_receiver_points'.*accepts base_ot_sender_point"):
        receiver.receive(OTMessage(BASE_OT_RECEIVER_POINTS, bytes(4096)))
    with pytest.raises(OTError, match="expected an OTMessage"):
        BaseOTReceiver(SID, random_choice_bits(2)).receive(b"not a message")  # type: ignore[arg-type]


def test_an_error_names_the_state_the_party_was_in_not_failed() -> None:
    receiver = BaseOTReceiver(SID, random_choice_bits(2))
    with pytest.raises(OTError, match="in state 'new': expected an OTMessage"):
        receiver.receive(b"not a message")  # type: ignore[arg-type]
    assert receiver.state == "failed"
    sender = BaseOTSender(SID)
    sender.start()
    with pytest.raises(OTError, match="in state 'awaiting base OT points': expected an OTMessage"):
        sender.receive("not a message either")  # type: ignore[arg-type]
    with pytest.raises(OTError, match="in state 'failed': refusing"):
        sender.receive(OTMessage(BASE_OT_RECEIVER_POINTS, bytes(4096)))


@pytest.mark.parametrize(
    "choices",
    [np.array([0, 2, 1]), np.array([[0, 1]]), np.array([0.0, 1.0]), np.array([-1, 0]), np.zeros(0, np.uint8)],
)
def test_bad_choices_rejected(choices: np.ndarray) -> None:
    with pytest.raises(OTError):
        BaseOTReceiver(SID, choices)


@pytest.mark.parametrize("sid", [b"", "text", b"x" * 1025])
def test_bad_session_ids_rejected(sid: object) -> None:
    with pytest.raises(OTError, match="session id"):
        BaseOTSender(sid)  # type: ignore[arg-type]
