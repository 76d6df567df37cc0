"""Acknowledgements, the replay buffer and resume after a cut, on the in-memory pipe with scripted cuts.

Specification: the evaluator acknowledges every frame of input labels and tables it has taken; each acknowledgement
counts more frames than the last (a repeated one is malformed); the garbler keeps the frames sent after OT and not
yet acknowledged in a replay buffer that never passes its limit (the garbler waits when it is full, as when the
evaluator stalls). A cut after both sides' OT has ended is resumed: the initiator's
signed resume frame, the other side's answer, and each side resends exactly the frames the other lacks, the same
bytes — the resumed session equals, frame for frame and in its transcript, the same session (same random bytes)
without a cut, at every phase boundary and in the middle of the table stream, with either side initiating. A cut
before OT has ended fails both sides (connection lost) and a fresh session completes. A resume with a wrong proof,
for another session or role, or an attempt already used is refused and changes nothing. No output is released
twice or on one side only.
"""

from __future__ import annotations

import hashlib
import os
from collections import deque
from collections.abc import Callable

import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.bench.garble import wide_program
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.protocol import (
    EvaluatorSession,
    GarblerSession,
    NoOutputError,
    ResumeRefused,
    signer,
    verifier,
)
from jointstat.protocol import frames as fr
from jointstat.protocol.pipe import run_in_memory
from jointstat.statements import RESUME, Statement, session_text

from tests.circuits import random_bits

# Invented scenario: two ferry companies compare their crossings; the digest stands for their agreed manifest.
MANIFEST = hashlib.sha256(b"invented manifest: two ferry companies compare crossings").digest()
SID = b"ferries-2033-week-02"
G_KEY = Ed25519PrivateKey.from_private_bytes(hashlib.sha256(b"invented ferry garbler key").digest())
E_KEY = Ed25519PrivateKey.from_private_bytes(hashlib.sha256(b"invented ferry evaluator key").digest())
CHUNK = 1 << 12


class Recorded:
    """The OS CSPRNG's bytes, recorded; or a recording replayed draw by draw."""

    def __init__(self, replay: list[bytes] | None = None) -> None:
        self.drawn: list[bytes] = []
        self._replay = None if replay is None else deque(replay)

    def __call__(self, n: int) -> bytes:
        data = os.urandom(n) if self._replay is None else self._replay.popleft()
        self.drawn.append(data)
        return data


@pytest.fixture(scope="module")
def program() -> Program:
    return wide_program(1 << 12, 256)  # 4,096 AND gates (32 table frames of 4 KiB), outputs for both sides


@pytest.fixture(scope="module")
def inputs(program: Program) -> dict[Party, np.ndarray]:
    rng = np.random.default_rng(11)
    return {p: random_bits(rng, program.n_inputs(p)) for p in Party}


def pair(
    program: Program,
    inputs: dict[Party, np.ndarray],
    randomness: dict[Party, Recorded] | None = None,
    *,
    replay_limit_bytes: int = 1 << 20,
    e_key: Ed25519PrivateKey = E_KEY,
) -> tuple[GarblerSession, EvaluatorSession]:
    randomness = randomness or {p: Recorded() for p in Party}
    garbler = GarblerSession(
        session_id=SID,
        program=program,
        manifest_digest=MANIFEST,
        inputs=inputs[Party.GARBLER],
        sign=signer(G_KEY),
        verify=verifier(E_KEY.public_key()),
        random_bytes=randomness[Party.GARBLER],
        chunk_bytes=CHUNK,
        replay_limit_bytes=replay_limit_bytes,
    )
    evaluator = EvaluatorSession(
        session_id=SID,
        program=program,
        manifest_digest=MANIFEST,
        inputs=inputs[Party.EVALUATOR],
        sign=signer(e_key),
        verify=verifier(G_KEY.public_key()),
        random_bytes=randomness[Party.EVALUATOR],
    )
    return garbler, evaluator


def plain(program: Program, inputs: dict[Party, np.ndarray]) -> dict[Party, np.ndarray]:
    backend = PlainBackend(inputs)
    program.run(Builder(backend))
    return {p: backend.outputs(p) for p in Party}


class Log:
    """An intercept recording every logical frame delivered, by destination (acks and resumes left out)."""

    def __init__(self) -> None:
        self.frames: list[tuple[Party, str, bytes]] = []

    def __call__(self, to: Party, data: bytes) -> list[bytes]:
        kind, _ = fr.decode(data)
        self.frames.append((to, kind, data))
        return [data]

    def logical(self) -> list[tuple[Party, str, bytes]]:
        return [f for f in self.frames if f[1] not in fr.UNNUMBERED]


def reference_run(
    program: Program, inputs: dict[Party, np.ndarray]
) -> tuple[dict[Party, list[bytes]], Log, bytes]:
    """A session without cuts: the random bytes each side drew, the frames, and the transcript digest."""
    randomness = {p: Recorded() for p in Party}
    garbler, evaluator = pair(program, inputs, randomness)
    log = Log()
    run_in_memory(garbler, evaluator, intercept=log)
    assert garbler.done and evaluator.done
    return {p: r.drawn for p, r in randomness.items()}, log, garbler.transcript_digest


def boundaries(log: Log) -> list[int]:
    """Delivery numbers (1-based) where the kind of frame delivered changes: every phase boundary."""
    kinds = [kind for _, kind, _ in log.frames]
    return [i + 1 for i in range(1, len(kinds)) if kinds[i] != kinds[i - 1]]


def test_the_evaluator_acknowledges_each_labels_and_tables_frame_and_the_garbler_keeps_only_unacknowledged_ones(
    program: Program, inputs: dict[Party, np.ndarray]
) -> None:
    garbler, evaluator = pair(program, inputs)
    log = Log()
    stats = run_in_memory(garbler, evaluator, intercept=log)
    assert garbler.done and evaluator.done
    streamed = [
        k
        for to, k, _ in log.frames
        if to == Party.EVALUATOR and k in (fr.GARBLED_TABLES, fr.GARBLER_INPUT_LABELS)
    ]
    acks = [data for to, k, data in log.frames if to == Party.GARBLER and k == fr.TABLES_ACK]
    assert len(acks) == len(streamed) == 32 + 1
    counts = [fr.decode(a)[1].tables_ack.frames for a in acks]
    assert counts == sorted(counts) and counts[-1] == garbler.peer_acked
    # The buffer held at most the pipe's window of frames; at the end only the decoding and finish remain.
    assert 0 < stats.most_replay_bytes <= 4 * (CHUNK + 16)
    assert garbler.replay_bytes < CHUNK


def test_resume_at_every_phase_boundary_and_mid_stream_repeats_the_uncut_session_frame_for_frame(
    program: Program, inputs: dict[Party, np.ndarray]
) -> None:
    drawn, reference, digest = reference_run(program, inputs)
    expected = plain(program, inputs)
    first_table = next(i for i, f in enumerate(reference.frames) if f[1] == fr.GARBLED_TABLES) + 1
    points = sorted(set(boundaries(reference)) | {first_table + 5, first_table + 17, len(reference.frames)})
    resumed = lost = 0
    for initiator in Party:
        for point in points:
            garbler, evaluator = pair(program, inputs, {p: Recorded(drawn[p]) for p in Party})
            log = Log()
            stats = run_in_memory(garbler, evaluator, intercept=log, cuts=[point], initiator=initiator)
            assert stats.cuts == 1, point
            if stats.lost:  # before OT had ended on both sides: both failed, nothing released anywhere
                lost += 1
                assert garbler.failed and evaluator.failed, point
                assert garbler.abort is not None and garbler.abort.reason == fr.AbortReason.CONNECTION_LOST
                continue
            resumed += 1
            assert stats.resumes == 1 and garbler.resumes == evaluator.resumes == 1, point
            assert garbler.done and evaluator.done, (point, garbler.abort, evaluator.abort)
            assert garbler.transcript_digest == evaluator.transcript_digest == digest, point
            for party, session in ((Party.GARBLER, garbler), (Party.EVALUATOR, evaluator)):
                assert np.array_equal(session.outputs, expected[party]), point
            # The transcripts equal the uncut session's: each side took each logical frame exactly once, in order.
            # Every frame put on the pipe (resent ones included) is one of the uncut session's: nothing was made
            # anew, so no table was garbled twice.
            made = {d for _, _, d in reference.logical()}
            assert {d for _, _, d in log.logical()} <= made, point
    assert lost > 0 and resumed > 0  # the cuts during OT restart, every later one resumes


def test_a_cut_before_ot_has_ended_fails_both_sides_and_a_fresh_session_completes(
    program: Program, inputs: dict[Party, np.ndarray]
) -> None:
    garbler, evaluator = pair(program, inputs)
    stats = run_in_memory(garbler, evaluator, cuts=[3])  # hellos delivered, base OT in flight
    assert stats.lost and garbler.failed and evaluator.failed
    assert not garbler.resumable and not evaluator.resumable
    with pytest.raises(ResumeRefused, match="nothing to resume"):
        evaluator.resume_frame(1)
    fresh_g, fresh_e = pair(program, inputs)
    run_in_memory(fresh_g, fresh_e)
    assert fresh_g.done and fresh_e.done


def test_several_cuts_in_one_session_are_each_resumed(
    program: Program, inputs: dict[Party, np.ndarray]
) -> None:
    drawn, reference, digest = reference_run(program, inputs)
    first_table = next(i for i, f in enumerate(reference.frames) if f[1] == fr.GARBLED_TABLES) + 1
    garbler, evaluator = pair(program, inputs, {p: Recorded(drawn[p]) for p in Party})
    stats = run_in_memory(garbler, evaluator, cuts=[first_table + 3, first_table + 12, first_table + 30])
    assert stats.cuts == stats.resumes == 3
    assert garbler.done and evaluator.done and garbler.transcript_digest == digest


def stalled_pair(
    program: Program, inputs: dict[Party, np.ndarray], limit: int
) -> tuple[GarblerSession, EvaluatorSession, Callable[[Party, bytes], list[bytes]]]:
    garbler, evaluator = pair(program, inputs, replay_limit_bytes=limit)

    def no_acks(to: Party, data: bytes) -> list[bytes]:
        return [] if fr.decode(data)[0] == fr.TABLES_ACK else [data]

    return garbler, evaluator, no_acks


def test_the_replay_buffer_stays_within_its_limit_when_the_evaluator_stalls(
    program: Program, inputs: dict[Party, np.ndarray]
) -> None:
    limit = 5 * (CHUNK + 16)
    garbler, evaluator, no_acks = stalled_pair(program, inputs, limit)
    stats = run_in_memory(garbler, evaluator, intercept=no_acks, window=1000)
    assert stats.stalled and not garbler.ended
    assert garbler.replay_bytes == stats.most_replay_bytes <= limit
    assert not garbler.can_stream


def resume_of(session: EvaluatorSession | GarblerSession, key: Ed25519PrivateKey, **change: object) -> bytes:
    """A resume frame as ``session`` would send it, signed with ``key``, with fields changed after signing."""
    data = session.resume_frame(change.pop("attempt", 1))  # type: ignore[arg-type]
    frame = fr.decode(data)[1]
    r = frame.resume  # type: ignore[union-attr]
    for name, value in change.items():
        setattr(r, name, value)
    anchor = session._anchor
    assert anchor is not None
    r.signature = key.sign(Statement(RESUME, session_text(SID), fr.resume_digest_of(r, anchor)).message())
    return fr.encode(frame)


def mid_stream(program: Program, inputs: dict[Party, np.ndarray]) -> tuple[GarblerSession, EvaluatorSession]:
    """A pair cut in the middle of the table stream, not yet resumed (the pipe stops at a stall)."""
    garbler, evaluator = pair(program, inputs, replay_limit_bytes=4 * (CHUNK + 16))
    dropped = {"on": False}

    def drop_after_some(to: Party, data: bytes) -> list[bytes]:
        if fr.decode(data)[0] == fr.GARBLED_TABLES and evaluator.logical_received > 8:
            dropped["on"] = True
        return [] if dropped["on"] else [data]

    run_in_memory(garbler, evaluator, intercept=drop_after_some)
    assert garbler.resumable and evaluator.resumable and not garbler.ended
    return garbler, evaluator


def test_a_resume_with_a_wrong_proof_another_session_or_role_or_a_used_attempt_is_refused_and_changes_nothing(
    program: Program, inputs: dict[Party, np.ndarray]
) -> None:
    garbler, evaluator = mid_stream(program, inputs)
    state, acked, resumes = garbler.state, garbler.peer_acked, garbler.resumes
    impostor = Ed25519PrivateKey.generate()
    cases = {
        "proof does not verify": resume_of(evaluator, impostor),
        "another session or role": resume_of(evaluator, E_KEY, session_id=b"ferries-2033-week-03"),
        "protocol version": resume_of(evaluator, E_KEY, protocol_version=3),
        "has taken": resume_of(evaluator, E_KEY, frames_received=garbler.logical_sent + 1),
    }
    for words, data in cases.items():
        with pytest.raises(ResumeRefused, match=words) as refused:
            garbler.receive(data)
        assert refused.value.reason == fr.AbortReason.RESUME_REFUSED and refused.value.frame is not None
        assert (garbler.state, garbler.peer_acked, garbler.resumes) == (state, acked, resumes)
    # The right one is accepted: the answer and the frames the evaluator lacks, then the session completes.
    replies = garbler.receive(evaluator.resume_frame(1))
    assert fr.decode(replies[0])[0] == fr.RESUME and len(replies) > 1
    with pytest.raises(ResumeRefused, match="not above the last accepted"):
        garbler.receive(resume_of(evaluator, E_KEY, attempt=1))
    for data in replies:
        for reply in evaluator.receive(data):
            garbler.receive(reply)
    assert garbler.resumes == evaluator.resumes == 1


def test_no_output_is_released_twice_or_on_one_side_only_whatever_the_cut(
    program: Program, inputs: dict[Party, np.ndarray]
) -> None:
    _, reference, _ = reference_run(program, inputs)
    for point in range(1, len(reference.frames) + 1, 3):
        garbler, evaluator = pair(program, inputs)
        run_in_memory(garbler, evaluator, cuts=[point])
        assert garbler.done == evaluator.done, point  # both or neither
        if garbler.done:
            # A done session still answers a resume (its finish may be what the peer lacks) and releases nothing new.
            outputs = garbler.outputs.copy()
            replies = garbler.receive(evaluator.resume_frame(5))
            assert fr.decode(replies[0])[0] == fr.RESUME
            assert np.array_equal(garbler.outputs, outputs) and garbler.done


def test_a_repeated_acknowledgement_is_malformed_and_fails_the_garbler(
    program: Program, inputs: dict[Party, np.ndarray]
) -> None:
    garbler, _ = mid_stream(program, inputs)
    repeated = fr.tables_ack_frame(garbler.peer_acked)
    with pytest.raises(fr.ProtocolError, match="already acknowledged") as info:
        garbler.receive(repeated)
    assert info.value.reason == fr.AbortReason.MALFORMED_FRAME
    assert garbler.ended and not garbler.done
    with pytest.raises(NoOutputError):
        garbler.outputs  # noqa: B018 (the property refuses)
