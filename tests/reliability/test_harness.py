"""The fault harness's own parts: the frames it plans faults at, the secrets its sessions record, the scan for them.

Specification: ``frames_per_phase`` counts exactly the frames of each phase that cross a session of the invented
job, with either side's frame size; a recording garbler records its Δ and both labels of every input and output
wire, and every label a recording evaluator holds for those wires is one of them; a Δ, a label or an input value of
a recorded session planted in a log line is found by the scan, which names it without showing it.
"""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.circuit.model import Party
from jointstat.garble.backends import DEFAULT_CHUNK_BYTES
from jointstat.harness.faultpoint import PEER_CHUNK_BYTES
from jointstat.harness.recording import RecordingEvaluator, RecordingGarbler, recording_session
from jointstat.harness.scanner import Secrets, scan_for_secrets
from jointstat.harness.scenario import (
    METRE_BITS,
    NODE_METRES,
    PHASES,
    PeerJob,
    frames_per_phase,
    peer_job,
    phase_of,
    write_job_files,
)
from jointstat.protocol import frames as fr
from jointstat.protocol import signer, verifier
from jointstat.protocol.pipe import run_in_memory

KEY = Ed25519PrivateKey.generate()


@pytest.fixture(scope="module")
def job(tmp_path_factory: pytest.TempPathFactory) -> PeerJob:
    return peer_job(write_job_files(tmp_path_factory.mktemp("job")))


def recorded_session(
    job: PeerJob, secrets: Secrets, chunk_bytes: int, sid: bytes
) -> tuple[RecordingGarbler, RecordingEvaluator, Counter[str]]:
    make = recording_session(secrets, chunk_bytes)
    common = {
        "session_id": sid,
        "program": job.program,
        "manifest_digest": job.digest,
        "sign": signer(KEY),
        "verify": verifier(KEY.public_key()),
    }
    garbler = make(Party.GARBLER, inputs=job.bits[Party.GARBLER], **common)
    evaluator = make(Party.EVALUATOR, inputs=job.bits[Party.EVALUATOR], **common)
    assert isinstance(garbler, RecordingGarbler) and isinstance(evaluator, RecordingEvaluator)
    phases: Counter[str] = Counter()

    def count(_to: Party, data: bytes) -> list[bytes]:
        phase = phase_of(fr.decode(data)[0])
        assert phase is not None
        phases[phase] += 1
        return [data]

    run_in_memory(garbler, evaluator, intercept=count)
    assert garbler.done and evaluator.done
    return garbler, evaluator, phases


@pytest.mark.parametrize("chunk_bytes", [PEER_CHUNK_BYTES, DEFAULT_CHUNK_BYTES])
def test_frames_per_phase_counts_the_frames_that_cross_a_session(job: PeerJob, chunk_bytes: int) -> None:
    _, _, phases = recorded_session(job, Secrets(), chunk_bytes, b"count-%d" % chunk_bytes)
    planned = frames_per_phase(job.program, chunk_bytes)
    assert dict(phases) == {p: n for p, n in planned.items() if n}
    assert set(planned) == set(PHASES)
    if chunk_bytes == PEER_CHUNK_BYTES:
        assert planned["tables"] > 10  # many frames to place a fault in


def test_a_recording_garbler_records_delta_and_both_labels_of_every_input_and_output_wire(
    job: PeerJob,
) -> None:
    secrets = Secrets()
    recorded_session(job, secrets, PEER_CHUNK_BYTES, b"recorded")
    program = job.program
    delta = secrets.deltas["recorded"]
    assert len(delta) == 16 and delta[0] & 1  # Δ with its signal bit set (point-and-permute)
    labels = secrets.labels["recorded"]
    inputs = sum(program.n_inputs(p) for p in Party)
    outputs = sum(program.n_outputs(p) for p in Party)
    # Both labels of every input wire; of the output wires, those not public constants (their labels are 0 and Δ).
    assert 2 * inputs < len(labels) <= 2 * (inputs + outputs)
    assert all(bytes(a ^ b for a, b in zip(label, delta, strict=True)) in labels for label in labels)
    assert delta not in labels and bytes(16) not in labels


def test_every_label_a_recording_evaluator_holds_is_one_the_garbler_recorded(job: PeerJob) -> None:
    garbler_secrets, evaluator_secrets = Secrets(), Secrets()
    make_g = recording_session(garbler_secrets, PEER_CHUNK_BYTES)
    make_e = recording_session(evaluator_secrets)
    common = {
        "session_id": b"two records",
        "program": job.program,
        "manifest_digest": job.digest,
        "sign": signer(KEY),
        "verify": verifier(KEY.public_key()),
    }
    garbler = make_g(Party.GARBLER, inputs=job.bits[Party.GARBLER], **common)
    evaluator = make_e(Party.EVALUATOR, inputs=job.bits[Party.EVALUATOR], **common)
    run_in_memory(garbler, evaluator)  # type: ignore[arg-type]
    held = evaluator_secrets.labels["two records"]
    made = garbler_secrets.labels["two records"]
    assert held and held <= made
    assert len(held) == len(made) // 2  # one label of each pair: the evaluator never holds both
    assert not evaluator_secrets.deltas


@pytest.mark.parametrize("what", ["delta", "label", "value"])
def test_the_scan_finds_a_secret_of_a_recorded_session_planted_in_a_log(
    job: PeerJob, tmp_path: Path, what: str
) -> None:
    secrets = Secrets(value_bits=METRE_BITS)
    recorded_session(job, secrets, PEER_CHUNK_BYTES, b"planted")
    for value in NODE_METRES:
        secrets.add_value(value)
    rng = np.random.default_rng(3)
    label = sorted(secrets.labels["planted"])[int(rng.integers(len(secrets.labels["planted"])))]
    planted = {
        "delta": secrets.deltas["planted"].hex(),
        "label": label.hex().upper(),
        "value": " ".join(format(NODE_METRES[1], f"0{METRE_BITS}b")[::-1]),
    }[what]
    log = tmp_path / "node.log"
    log.write_text(f"session ok\nthe peer's frame held {planted}, oddly\nsession closed\n", encoding="utf-8")
    found = scan_for_secrets(secrets, [log])
    assert [(f.line, f.source) for f in found] == [(2, str(log))]
    assert planted not in found[0].what
    assert scan_for_secrets(secrets, texts=[("clean", "session ok\nsession closed\n")]) == []
