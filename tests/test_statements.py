"""The statements a node signs in a session (hello, transcript): one definition for the protocol and the audit log.

Specification: the signature a session puts in its finish frame is exactly the transcript signature the session
log records and an auditor checks, so a log written from a real session verifies; a statement of one kind is never
accepted as another kind, for another session or under another key; malformed statements are refused.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.audit import SessionLog, transcript_signature_ok, verify_log
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
from jointstat.protocol.pipe import run_in_memory

# Invented scenario: two allotment societies compare plot counts; the digest stands for their agreed manifest.
MANIFEST = hashlib.sha256(b"invented manifest: two allotment societies compare plot counts").digest()
SID = bytes.fromhex("5eed0a11075e55107e00000000000001")
GARDENS_KEY = Ed25519PrivateKey.generate()
MEADOW_KEY = Ed25519PrivateKey.generate()


def both_and(bld: Builder) -> None:
    a = bld.input(Party.GARBLER, 4)
    b = bld.input(Party.EVALUATOR, 4)
    bld.output(Party.EVALUATOR, bld.and_(a, b))


def sessions() -> tuple[GarblerSession, EvaluatorSession]:
    common = {"session_id": SID, "program": Program.of(both_and), "manifest_digest": MANIFEST}
    garbler = GarblerSession(
        inputs=np.ones(4, np.uint8),
        sign=signer(GARDENS_KEY),
        verify=verifier(MEADOW_KEY.public_key()),
        **common,
    )  # type: ignore[arg-type]
    evaluator = EvaluatorSession(
        inputs=np.ones(4, np.uint8),
        sign=signer(MEADOW_KEY),
        verify=verifier(GARDENS_KEY.public_key()),
        **common,
    )  # type: ignore[arg-type]
    return garbler, evaluator


def test_the_finish_signature_is_the_transcript_signature_the_session_log_records_and_checks(
    tmp_path: Path,
) -> None:
    garbler, evaluator = sessions()
    run_in_memory(garbler, evaluator)
    assert garbler.done and evaluator.done
    digest, sid = evaluator.transcript_digest, SID.hex()
    # What the garbler sent in its finish frame is what its session log signs (Ed25519 is deterministic) …
    with SessionLog(tmp_path / "gardens.jsonl", GARDENS_KEY, "gardens") as log:
        log.session_started(
            sid,
            job="plots",
            manifest_digest=MANIFEST,
            role="garbler",
            peer="meadow",
            peer_key=MEADOW_KEY.public_key(),
        )
        assert log.transcript(sid, digest) == evaluator.peer_signature
        # … and the log accepts the evaluator's finish signature as the peer's attestation.
        log.peer_attestation(sid, garbler.peer_signature)
        log.session_completed(sid, duration_us=1)
    assert verify_log(tmp_path / "gardens.jsonl").ok
    assert transcript_signature_ok(MEADOW_KEY.public_key(), sid, digest, garbler.peer_signature)
    assert not transcript_signature_ok(GARDENS_KEY.public_key(), sid, digest, garbler.peer_signature)
    assert not transcript_signature_ok(
        MEADOW_KEY.public_key(), "another-session", digest, garbler.peer_signature
    )
