"""A session's randomness is injected: replayed random bytes give the same session, byte for byte.

Specification: every random draw of a session — the garbler's Δ and input labels, its base-OT choice bits and the
receiver scalars of Chou–Orlandi base OT, the evaluator's base-OT sender scalar (from which the IKNP seeds follow)
— comes from the ``random_bytes`` the caller gives the session (the OS CSPRNG by default). Recording what each side
drew in one run and replaying it in another gives byte-identical frames in both directions, the same transcript
digest and the same outputs, so a recorded session is a test vector; other random bytes give other frames and
another transcript. Ed25519 signatures are deterministic (RFC 8032 §5.1.6), so the signed frames repeat too.
"""

from __future__ import annotations

import hashlib
import os
from collections import deque
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.bench.garble import wide_program
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
from jointstat.protocol import frames as fr
from jointstat.protocol.pipe import run_in_memory

# Invented scenario: two bakeries compare their weekly flour orders; the digest stands for their agreed manifest.
MANIFEST = hashlib.sha256(b"invented manifest: two bakeries compare weekly flour orders").digest()
SID = b"bakeries-2032-week-11"
G_KEY = Ed25519PrivateKey.from_private_bytes(hashlib.sha256(b"invented garbler signing key").digest())
E_KEY = Ed25519PrivateKey.from_private_bytes(hashlib.sha256(b"invented evaluator signing key").digest())


class RandomSource:
    """Hands out the OS CSPRNG's bytes and records them, or replays a recording draw by draw (same sizes)."""

    def __init__(self, replay: list[bytes] | None = None) -> None:
        self.drawn: list[bytes] = []
        self._replay = None if replay is None else deque(replay)

    def __call__(self, n: int) -> bytes:
        if self._replay is None:
            data = os.urandom(n)
        else:
            data = self._replay.popleft()
            assert len(data) == n, f"the replayed session drew {n} bytes where the recording has {len(data)}"
        self.drawn.append(data)
        return data

    @property
    def replayed_all(self) -> bool:
        return self._replay is not None and not self._replay


@dataclass
class Run:
    garbler: GarblerSession
    evaluator: EvaluatorSession
    frames: dict[Party, list[bytes]] = field(default_factory=lambda: {p: [] for p in Party})


def run_session(
    program: Program, inputs: dict[Party, np.ndarray], g_random: RandomSource, e_random: RandomSource
) -> Run:
    common: dict[str, Any] = {"session_id": SID, "program": program, "manifest_digest": MANIFEST}
    garbler = GarblerSession(
        inputs=inputs[Party.GARBLER],
        sign=signer(G_KEY),
        verify=verifier(E_KEY.public_key()),
        random_bytes=g_random,
        chunk_bytes=1 << 12,
        **common,
    )
    evaluator = EvaluatorSession(
        inputs=inputs[Party.EVALUATOR],
        sign=signer(E_KEY),
        verify=verifier(G_KEY.public_key()),
        random_bytes=e_random,
        **common,
    )
    run = Run(garbler, evaluator)

    def record(to: Party, data: bytes) -> list[bytes]:
        run.frames[to].append(bytes(data))
        return [data]

    run_in_memory(garbler, evaluator, intercept=record)
    assert garbler.done and evaluator.done
    return run


@pytest.fixture(scope="module")
def program() -> Program:
    return wide_program(1 << 12, 256)  # 4,096 AND gates; inputs and outputs for both parties


@pytest.fixture(scope="module")
def inputs(program: Program) -> dict[Party, np.ndarray]:
    rng = np.random.default_rng(2032)
    return {p: rng.integers(0, 2, program.n_inputs(p), dtype=np.uint8) for p in Party}


@pytest.fixture(scope="module")
def recorded(program: Program, inputs: dict[Party, np.ndarray]) -> tuple[Run, RandomSource, RandomSource]:
    g_random, e_random = RandomSource(), RandomSource()
    return run_session(program, inputs, g_random, e_random), g_random, e_random


def test_a_session_replayed_from_its_recorded_random_bytes_repeats_every_frame_byte_for_byte(
    program: Program, inputs: dict[Party, np.ndarray], recorded: tuple[Run, RandomSource, RandomSource]
) -> None:
    first, g_random, e_random = recorded
    g_replay, e_replay = RandomSource(g_random.drawn), RandomSource(e_random.drawn)
    second = run_session(program, inputs, g_replay, e_replay)
    assert g_replay.replayed_all and e_replay.replayed_all  # every recorded draw used, in the same sizes
    for to in Party:
        assert second.frames[to] == first.frames[to], f"frames to the {to.name.lower()} differ"
    assert second.garbler.transcript_digest == first.garbler.transcript_digest
    assert second.evaluator.transcript_digest == first.evaluator.transcript_digest
    for side in ("garbler", "evaluator"):
        assert np.array_equal(getattr(second, side).outputs, getattr(first, side).outputs)


def test_the_recording_holds_every_kind_of_randomness_the_session_draws(
    recorded: tuple[Run, RandomSource, RandomSource],
) -> None:
    run, g_random, e_random = recorded
    g_sizes = [len(d) for d in g_random.drawn]
    e_sizes = [len(d) for d in e_random.drawn]
    # Garbler: Δ (16 bytes), 128 base-OT choice bits (16 bytes), one 64-byte scalar per base OT (Chou–Orlandi
    # receiver; a rare zero scalar is drawn again), the labels of its own inputs (16 bytes each).
    n_g = run.garbler.program.n_inputs(Party.GARBLER)
    assert g_sizes[:2] == [16, 16]
    assert g_sizes[-1] == 16 * n_g
    assert set(g_sizes[2:-1]) == {64} and len(g_sizes[2:-1]) >= 128
    # Evaluator: the one scalar a of the base-OT sender; the IKNP seeds are the base-OT keys that follow from it.
    assert e_sizes == [64]


def test_other_random_bytes_give_other_frames_and_another_transcript(
    program: Program, inputs: dict[Party, np.ndarray], recorded: tuple[Run, RandomSource, RandomSource]
) -> None:
    first, _, _ = recorded
    fresh = run_session(program, inputs, RandomSource(), RandomSource())
    assert fresh.garbler.transcript_digest != first.garbler.transcript_digest
    kinds = [fr.decode(data)[0] for data in fresh.frames[Party.EVALUATOR]]
    differing = {
        kind
        for kind, new, old in zip(
            kinds, fresh.frames[Party.EVALUATOR], first.frames[Party.EVALUATOR], strict=True
        )
        if new != old
    }
    # The hello is signed over public fields only and repeats; everything drawn from the randomness differs.
    assert fr.HELLO not in differing
    assert {fr.BASE_OT, fr.OT_EXTENSION, fr.GARBLER_INPUT_LABELS, fr.GARBLED_TABLES} <= differing
    plain = PlainBackend(inputs)
    program.run(Builder(plain))
    assert np.array_equal(fresh.evaluator.outputs, plain.outputs(Party.EVALUATOR))
    assert np.array_equal(fresh.garbler.outputs, plain.outputs(Party.GARBLER))
