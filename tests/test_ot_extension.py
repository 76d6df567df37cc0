"""IKNP OT extension with ALSZ correlated OT (ot.extension): correctness, streaming, sizes, states, errors."""

from __future__ import annotations

import numpy as np
import pytest
from jointstat.ot import (
    MAX_BATCH,
    MAX_PAYLOAD_BYTES,
    BaseOTReceiver,
    BaseOTSender,
    CorrelatedOTReceiver,
    CorrelatedOTSender,
    ExtensionReceiver,
    ExtensionSender,
    OTError,
    OTMessage,
    PipeStats,
    run_pipe,
)
from jointstat.ot.base import random_choice_bits
from jointstat.ot.extension import SeedStreams
from jointstat.ot.messages import (
    BASE_OT_RECEIVER_POINTS,
    BASE_OT_SENDER_POINT,
    EXTENSION_COLUMNS,
    EXTENSION_CORRECTIONS,
)
from jointstat.primitives import group
from jointstat.primitives.aes import prg_expand
from jointstat.primitives.blocks import random_blocks, select_mask

SID = b"extension-test-session"


def fresh_delta() -> np.ndarray:
    delta = random_blocks(1)[0].copy()
    delta[0] |= np.uint64(1)
    return delta


CotRun = tuple[
    CorrelatedOTSender, CorrelatedOTReceiver, np.ndarray, np.ndarray, PipeStats, list[tuple[str, OTMessage]]
]


def run_cot(
    count: int, *, batch: int = 1 << 16, window: int = 4, choices: np.ndarray | None = None
) -> CotRun:
    delta = fresh_delta()
    if choices is None:
        choices = random_choice_bits(count)
    sender = CorrelatedOTSender(SID, delta, count, batch=batch)
    receiver = CorrelatedOTReceiver(SID, choices, batch=batch, window=window)
    seen: list[tuple[str, OTMessage]] = []
    stats = run_pipe(receiver, sender, observe=lambda to, m: seen.append((to, m)))
    return sender, receiver, delta, choices, stats, seen


def assert_correlated(
    sender: CorrelatedOTSender | ExtensionSender,
    receiver: CorrelatedOTReceiver | ExtensionReceiver,
    delta: np.ndarray,
    choices: np.ndarray,
) -> None:
    zero = sender.zero_labels
    labels = receiver.labels
    assert zero.shape == labels.shape == (len(choices), 2)
    assert zero.dtype == labels.dtype == np.dtype("<u8")
    # Exactly the chosen label: K where the choice is 0, K ⊕ Δ where it is 1.
    np.testing.assert_array_equal(labels[choices == 0], zero[choices == 0])
    np.testing.assert_array_equal(labels[choices == 1], zero[choices == 1] ^ delta)
    # Every pair differs by Δ: the label the evaluator did not get is labels ⊕ Δ.
    one = zero ^ delta
    np.testing.assert_array_equal(zero ^ one, np.broadcast_to(delta, zero.shape))
    np.testing.assert_array_equal(labels ^ (select_mask(1 - choices) & delta), one)
    # Labels look random: no repeats among the zero labels (2^-128-ish collision chance otherwise).
    if len(choices) > 1:
        assert len(np.unique(zero, axis=0)) == len(choices)


@pytest.mark.parametrize("count", [1, 127, 128, 129, 1000])
def test_small_counts(count: int) -> None:
    sender, receiver, delta, choices, stats, _ = run_cot(count)
    assert sender.done and receiver.done
    assert sender.completed == receiver.completed == count
    assert_correlated(sender, receiver, delta, choices)
    padded = -(-count // 128) * 128
    assert stats.payload_bytes[EXTENSION_COLUMNS] == 16 * padded
    assert stats.payload_bytes[EXTENSION_CORRECTIONS] == 16 * count
    assert stats.payload_bytes[BASE_OT_SENDER_POINT] == 32
    assert stats.payload_bytes[BASE_OT_RECEIVER_POINTS] == 128 * 32


def test_count_zero_finishes_without_messages() -> None:
    sender = CorrelatedOTSender(SID, fresh_delta(), 0)
    receiver = CorrelatedOTReceiver(SID, np.zeros(0, dtype=np.uint8))
    assert not sender.done and not receiver.done
    stats = run_pipe(receiver, sender)
    assert sender.done and receiver.done
    assert stats.messages == {}
    assert sender.zero_labels.shape == receiver.labels.shape == (0, 2)


def test_large_count_streams_in_bounded_batches() -> None:
    count = (1 << 18) + 77  # five batches of 2^16, the last one short and not a multiple of 128
    sender, receiver, delta, choices, stats, seen = run_cot(count, window=2)
    assert_correlated(sender, receiver, delta, choices)
    assert stats.messages[EXTENSION_COLUMNS] == stats.messages[EXTENSION_CORRECTIONS] == 5
    assert stats.largest_payload == (1 << 16) * 16
    # With a window of 2 the receiver never has more than 2 column batches outstanding.
    outstanding = peak = 0
    for _, message in seen:
        if message.kind == EXTENSION_COLUMNS:
            outstanding += 1
        elif message.kind == EXTENSION_CORRECTIONS:
            outstanding -= 1
        peak = max(peak, outstanding)
    assert peak == 2
    assert stats.most_queued <= 4
    bytes_per_ot = stats.bytes_of(EXTENSION_COLUMNS, EXTENSION_CORRECTIONS) / count
    assert 32 <= bytes_per_ot < 32.01


@pytest.mark.parametrize(("count", "batch", "window"), [(300, 128, 1), (1024, 256, 3), (5000, 1024, 64)])
def test_batch_and_window_boundaries(count: int, batch: int, window: int) -> None:
    sender, receiver, delta, choices, stats, _ = run_cot(count, batch=batch, window=window)
    assert_correlated(sender, receiver, delta, choices)
    assert stats.messages[EXTENSION_COLUMNS] == -(-count // batch)


def test_constant_choices() -> None:
    for bit in (0, 1):
        choices = np.full(777, bit, dtype=np.uint8)
        sender, receiver, delta, _, _, _ = run_cot(777, choices=choices)
        assert_correlated(sender, receiver, delta, choices)


def test_bool_choices_accepted() -> None:
    choices = random_choice_bits(200).astype(bool)
    sender, receiver, delta, _, _, _ = run_cot(200, choices=choices)
    assert_correlated(sender, receiver, delta, choices.astype(np.uint8))


def test_largest_batch_fits_the_payload_limit() -> None:
    count = MAX_BATCH + 3
    sender, receiver, delta, choices, stats, _ = run_cot(count, batch=MAX_BATCH, window=1)
    assert_correlated(sender, receiver, delta, choices)
    assert stats.largest_payload == MAX_PAYLOAD_BYTES


def test_extension_phase_alone_from_base_ot_keys() -> None:
    s = random_choice_bits(128)
    base_sender, base_receiver = BaseOTSender(SID), BaseOTReceiver(SID, s)
    run_pipe(base_sender, base_receiver)
    delta = fresh_delta()
    choices = random_choice_bits(4000)
    sender = ExtensionSender(base_receiver.keys, s, delta, 4000, batch=1024)
    receiver = ExtensionReceiver(base_sender.keys, choices, batch=1024, window=2)
    run_pipe(receiver, sender)
    assert_correlated(sender, receiver, delta, choices)


def test_wrong_base_keys_break_correlation() -> None:
    # If the sender's base keys are not the chosen ones, the outputs must not be correlated OTs.
    s = random_choice_bits(128)
    base_sender, base_receiver = BaseOTSender(SID), BaseOTReceiver(SID, s)
    run_pipe(base_sender, base_receiver)
    delta = fresh_delta()
    choices = random_choice_bits(512)
    flipped = 1 - s
    sender = ExtensionSender(base_receiver.keys, flipped, delta, 512)
    receiver = ExtensionReceiver(base_sender.keys, choices)
    run_pipe(receiver, sender)
    expected = sender.zero_labels ^ (select_mask(choices) & delta)
    assert not np.any(np.all(receiver.labels == expected, axis=1))


def test_seed_streams_match_prg_expand() -> None:
    seeds = [bytes([i]) * 16 for i in range(5)]
    streams = SeedStreams(seeds)
    parts = [streams.read(n) for n in (16, 48, 1024, 32)]
    whole = np.concatenate(parts, axis=1)
    for i, seed in enumerate(seeds):
        np.testing.assert_array_equal(whole[i], prg_expand(seed, whole.shape[1]))


# ---- states, sizes and malformed messages -------------------------------------------------------------------


def started_pair(
    count: int = 1000, batch: int = 256
) -> tuple[CorrelatedOTSender, CorrelatedOTReceiver, list[OTMessage]]:
    sender = CorrelatedOTSender(SID, fresh_delta(), count, batch=batch)
    receiver = CorrelatedOTReceiver(SID, random_choice_bits(count), batch=batch, window=2)
    assert sender.start() == []
    (point,) = receiver.start()
    (points,) = sender.receive(point)
    columns = receiver.receive(points)
    return sender, receiver, columns


def test_message_sizes_per_batch() -> None:
    _, _, columns = started_pair(1000, 256)
    assert [m.kind for m in columns] == [EXTENSION_COLUMNS] * 2
    assert all(len(m.payload) == 128 * 256 // 8 for m in columns)


def test_sender_rejects_wrong_column_size() -> None:
    sender, _, columns = started_pair()
    short = OTMessage(EXTENSION_COLUMNS, columns[0].payload[:-16])
    with pytest.raises(OTError) as info:
        sender.receive(short)
    text = str(info.value)
    assert "state 'receiving columns'" in text and EXTENSION_COLUMNS in text
    assert f"payload is {len(short.payload)} bytes, expected {len(columns[0].payload)}" in text
    assert sender.state == "failed"
    with pytest.raises(OTError, match="failed"):
        sender.receive(columns[0])
    with pytest.raises(OTError, match="only available when done"):
        _ = sender.zero_labels


def test_sender_rejects_full_size_columns_for_a_short_last_batch() -> None:
    # 800 OTs in batches of 256: the fourth batch holds 32 OTs, padded to 128 bits per column (2048 bytes).
    sender, receiver, columns = started_pair(800, 256)
    pending = list(columns)
    for _ in range(3):
        (corrections,) = sender.receive(pending.pop(0))
        pending += receiver.receive(corrections)
    last = pending.pop(0)
    assert len(last.payload) == 128 * 128 // 8
    with pytest.raises(OTError, match="payload is 4096 bytes, expected 2048 \\(batch 3"):
        sender.receive(OTMessage(EXTENSION_COLUMNS, last.payload * 2))


def test_receiver_rejects_wrong_correction_size() -> None:
    sender, receiver, columns = started_pair()
    (corrections,) = sender.receive(columns[0])
    assert len(corrections.payload) == 16 * 256
    for bad in (corrections.payload[:-1], corrections.payload + bytes(16), b""):
        fresh_sender, fresh_receiver, fresh_columns = started_pair()
        fresh_sender.receive(fresh_columns[0])
        with pytest.raises(OTError, match=f"state 'extending'.*payload is {len(bad)} bytes, expected 4096"):
            fresh_receiver.receive(OTMessage(EXTENSION_CORRECTIONS, bad))
        assert fresh_receiver.state == "failed"
    receiver.receive(corrections)
    assert receiver.completed == 256


def test_unexpected_kinds_name_state_and_kind() -> None:
    sender, receiver, columns = started_pair()
    with pytest.raises(OTError, match="state 'extending': unexpected 'ot_extension_columns'"):
        receiver.receive(columns[0])
    with pytest.raises(OTError, match="state 'receiving columns': unexpected 'base_ot_sender_point'"):
        sender.receive(OTMessage(BASE_OT_SENDER_POINT, group.base_mult(group.random_scalar())))
    fresh = CorrelatedOTSender(SID, fresh_delta(), 10)
    with pytest.raises(OTError, match="state 'new'"):
        fresh.receive(OTMessage(EXTENSION_COLUMNS, bytes(2048)))
    done_sender, done_receiver, *_ = run_cot(10)
    with pytest.raises(OTError, match="state 'done'"):
        done_receiver.receive(OTMessage(EXTENSION_CORRECTIONS, bytes(160)))
    with pytest.raises(OTError, match=r"state 'done'.*start"):
        done_sender.start()


def test_bad_base_point_aborts_the_correlated_ot() -> None:
    sender = CorrelatedOTSender(SID, fresh_delta(), 100)
    sender.start()
    with pytest.raises(OTError, match=r"awaiting base OT point.*identity"):
        sender.receive(OTMessage(BASE_OT_SENDER_POINT, group.IDENTITY))
    assert sender.state == "failed"
    receiver = CorrelatedOTReceiver(SID, random_choice_bits(100))
    receiver.start()
    with pytest.raises(OTError, match=r"awaiting base OT points.*payload is 4064 bytes, expected 4096"):
        receiver.receive(OTMessage(BASE_OT_RECEIVER_POINTS, bytes(4064)))


def test_outputs_only_when_done() -> None:
    sender, receiver, _ = started_pair()
    with pytest.raises(OTError, match="labels is only available when done"):
        _ = receiver.labels
    with pytest.raises(OTError, match="zero_labels is only available when done"):
        _ = sender.zero_labels


@pytest.mark.parametrize(
    "delta",
    [
        np.array([2, 5], dtype="<u8"),  # lsb 0
        np.array([1, 2, 3], dtype="<u8"),
        np.array([1, 2], dtype=np.int64),
        np.array([1.0, 2.0]),
    ],
)
def test_bad_delta_rejected(delta: np.ndarray) -> None:
    with pytest.raises(OTError, match="delta"):
        CorrelatedOTSender(SID, delta, 10)


@pytest.mark.parametrize(("count", "batch"), [(-1, 1 << 16), (10, 100), (10, 0), (10, MAX_BATCH + 128)])
def test_bad_count_or_batch_rejected(count: int, batch: int) -> None:
    with pytest.raises(OTError):
        CorrelatedOTSender(SID, fresh_delta(), count, batch=batch)


def test_bad_receiver_arguments_rejected() -> None:
    with pytest.raises(OTError, match="0 or 1"):
        CorrelatedOTReceiver(SID, np.array([0, 1, 2]))
    with pytest.raises(OTError, match="window"):
        CorrelatedOTReceiver(SID, np.array([0, 1]), window=0)
    with pytest.raises(OTError, match="session id"):
        CorrelatedOTReceiver(b"", np.array([0, 1]))


def test_message_repr_and_limits() -> None:
    message = OTMessage(EXTENSION_CORRECTIONS, bytes(range(32)))
    assert repr(message) == "OTMessage(kind='ot_extension_corrections', payload=<32 bytes>)"
    with pytest.raises(OTError, match="exceeds"):
        OTMessage(EXTENSION_COLUMNS, bytes(MAX_PAYLOAD_BYTES + 1))
    with pytest.raises(OTError, match="payload must be bytes"):
        OTMessage(EXTENSION_COLUMNS, "text")  # type: ignore[arg-type]
