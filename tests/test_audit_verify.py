"""Verifying a session log (first bad record named) and cross-checking the two nodes' logs of the same sessions."""

from __future__ import annotations

import hashlib
import json
import random
from pathlib import Path
from typing import Any

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from hypothesis import given
from hypothesis import strategies as st
from jointstat.audit import LogVerifier, compare_logs, sign_transcript, verify_log
from jointstat.audit.records import encode_b64, signing_input
from jointstat.canonical import canonicalize, parse

from tests.test_audit_log import HUNDRED, hundred_record_log, keys, write_pair


def resign(record: dict[str, Any], key: Ed25519PrivateKey) -> bytes:
    unsigned = {k: v for k, v in record.items() if k != "sig"}
    return canonicalize({**unsigned, "sig": encode_b64(key.sign(signing_input(unsigned)))})


def rechain(
    lines: list[bytes], key: Ed25519PrivateKey, start: int = 0, *, fix_checkpoints: bool = True
) -> list[bytes]:
    """Rewrite ``prev``/``seq`` from ``start`` on and re-sign with ``key`` (what a forger holding a key can do),
    with checkpoints restating the chain's size and head unless ``fix_checkpoints`` is false."""
    out = list(lines[:start])
    for line in lines[start:]:
        record = parse(line)
        record["seq"] = len(out)
        record["prev"] = hashlib.sha256(out[-1]).hexdigest() if out else "0" * 64
        if record["kind"] == "checkpoint" and fix_checkpoints:
            record["body"]["records"], record["body"]["head"] = record["seq"], record["prev"]
        out.append(resign(record, key))
    return out


def joined(lines: list[bytes]) -> bytes:
    return b"".join(line + b"\n" for line in lines)


@pytest.fixture(scope="module")
def first_line(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    pa, _ = write_pair(tmp_path_factory.mktemp("first"), [])
    return pa.read_bytes().splitlines()[0]


@pytest.fixture(scope="module")
def hundred(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    return hundred_record_log(tmp_path_factory.mktemp("hundred")).read_bytes()


def test_every_single_byte_change_in_a_100_record_log_is_caught_at_that_record(hundred: bytes) -> None:
    lines = hundred.splitlines(keepends=True)
    assert len(lines) == 100
    # Verifier state after each unchanged prefix: the same state verifying those bytes from the start reaches,
    # so each mutated log is checked in full without re-verifying the untouched records before the change.
    checkpoints = []
    verifier = LogVerifier()
    for line in lines:
        checkpoints.append(verifier.clone())
        verifier.feed(line)
    assert verifier.finish(allow_open=True).ok  # the log ends with a session left open
    rng = random.Random(8785)
    start, positions, missed, misnamed = 0, 0, [], []
    for number, line in enumerate(lines, start=1):
        rest = hundred[start + len(line) :]
        for j in range(len(line)):
            changed = (line[j] + rng.randrange(1, 256)) % 256
            tail = line[:j] + bytes([changed]) + line[j + 1 :] + rest
            v = checkpoints[number - 1].clone()
            v.feed(tail)
            report = v.finish(allow_open=True)
            positions += 1
            if report.problem is None:
                missed.append(start + j)
            elif report.problem.line != number:
                misnamed.append((start + j, report.problem.line))
        start += len(line)
    assert positions == len(hundred)
    assert missed == []
    assert misnamed == []


def test_resuming_from_a_checkpoint_gives_the_same_report_as_verifying_from_the_start(hundred: bytes) -> None:
    lines = hundred.splitlines(keepends=True)
    rng = random.Random(6962)
    for _ in range(30):
        k = rng.randrange(len(lines))
        offset = sum(len(x) for x in lines[:k])
        j = rng.randrange(len(lines[k]))
        mutated = bytearray(hundred)
        mutated[offset + j] ^= rng.randrange(1, 256)
        resumed = LogVerifier()
        resumed.feed(hundred[:offset])
        resumed = resumed.clone()
        resumed.feed(bytes(mutated[offset:]))
        assert resumed.finish().problem == verify_log(bytes(mutated)).problem


def test_feeding_in_pieces_is_the_same_as_feeding_at_once(hundred: bytes) -> None:
    v = LogVerifier()
    for i in range(0, len(hundred), 777):
        v.feed(hundred[i : i + 777])
    assert v.finish() == verify_log(hundred)


def test_a_log_checked_against_another_nodes_key_fails_at_the_first_record(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    _, kb = keys()
    report = verify_log(pa, kb.public_key())
    assert report.problem is not None
    assert (report.problem.line, report.problem.check) == (1, "key")
    assert report.records == 0


def test_a_log_resigned_end_to_end_under_a_forgers_key_verifies_only_until_the_real_key_is_pinned(
    tmp_path: Path,
) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    ka, _ = keys()
    forger = Ed25519PrivateKey.generate()
    lines = pa.read_bytes().splitlines()
    first = parse(lines[0])
    first["body"]["public_key"] = encode_b64(forger.public_key().public_bytes_raw())
    forged = rechain([canonicalize(first), *lines[1:]], forger)
    # The transcript record carries alpha's own transcript signature, which the forger cannot redo as alpha.
    report = verify_log(joined(forged))
    assert report.problem is not None and report.problem.check == "session"
    assert "own transcript signature" in report.problem.message
    pinned = verify_log(joined(forged), ka.public_key())
    assert pinned.problem is not None and (pinned.problem.line, pinned.problem.check) == (1, "key")


def test_a_record_signed_by_another_key_is_named_with_its_line_and_seq(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    lines = pa.read_bytes().splitlines()
    lines[3] = resign(parse(lines[3]), Ed25519PrivateKey.generate())
    report = verify_log(joined(lines))
    assert report.problem is not None
    assert (report.problem.line, report.problem.seq, report.problem.check) == (4, 3, "signature")
    assert (
        str(report.problem) == "line 4 (seq 3): signature: the signature does not verify under the node's key"
    )


@pytest.mark.parametrize(
    ("edit", "line", "check"),
    [
        (lambda ls: ls[:3] + ls[4:], 4, "sequence"),  # a record removed
        (lambda ls: [ls[0], ls[2], ls[1], *ls[3:]], 2, "sequence"),  # two records swapped
        (lambda ls: [*ls[:2], ls[2], *ls[2:]], 4, "sequence"),  # a record repeated
        (lambda ls: [*ls[:-1], ls[-1][:-10]], 10, "json"),  # the last record cut short
        (lambda ls: [*ls[:2], b"", *ls[2:]], 3, "json"),  # a blank line
        (
            lambda ls: [*ls[:2], json.dumps(parse(ls[2]), indent=1).encode().replace(b"\n", b""), *ls[3:]],
            3,
            "canonical",
        ),
    ],
)
def test_changes_to_whole_records_are_named(tmp_path: Path, edit: Any, line: int, check: str) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    report = verify_log(joined(edit(pa.read_bytes().splitlines())))
    assert report.problem is not None
    assert (report.problem.line, report.problem.check) == (line, check)


def test_a_record_removed_and_the_rest_renumbered_breaks_the_chain(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    ka, _ = keys()
    lines = pa.read_bytes().splitlines()
    renumbered = [*lines[:2]]
    for i, line in enumerate(lines[3:], start=2):
        record = parse(line)
        record["seq"] = i
        renumbered.append(resign(record, ka))
    report = verify_log(joined(renumbered))
    assert report.problem is not None and (report.problem.line, report.problem.check) == (3, "chain")


def test_a_missing_final_newline_is_reported_as_an_incomplete_record(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    data = pa.read_bytes()
    report = verify_log(data[:-1])
    assert report.problem is not None and (report.problem.line, report.problem.check) == (10, "truncated")
    assert report.records == 9


def test_an_empty_log_is_a_problem() -> None:
    report = verify_log(b"")
    assert report.problem is not None and report.problem.message == "the log is empty (no log_opened record)"


def test_validly_signed_records_that_break_the_session_rules_are_named(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    ka, _ = keys()
    lines = pa.read_bytes().splitlines()
    # Drop the peer_attestation (line 8) and re-chain: the completion then lacks the peer's attestation.
    assert parse(lines[7])["kind"] == "peer_attestation"
    forged = rechain([*lines[:7], *lines[8:]], ka, start=7)
    report = verify_log(joined(forged))
    assert report.problem is not None and (report.problem.line, report.problem.check) == (8, "session")
    assert "completed without the peer's attestation" in report.problem.message


def test_a_peer_signature_that_does_not_verify_under_the_recorded_peer_key_is_named(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    ka, _ = keys()
    lines = pa.read_bytes().splitlines()
    attestation = parse(lines[7])
    assert attestation["kind"] == "peer_attestation"
    attestation["body"]["signature"] = encode_b64(
        sign_transcript(ka, "s-0001", hashlib.sha256(b"s-0001").digest())
    )
    forged = rechain([*lines[:7], canonicalize(attestation), *lines[8:]], ka, start=7)
    report = verify_log(joined(forged))
    assert report.problem is not None and (report.problem.line, report.problem.check) == (8, "session")
    assert "peer's transcript signature does not verify" in report.problem.message


# -- comparing two nodes' logs ----------------------------------------------------------------------------------


def test_the_two_nodes_logs_attest_to_the_same_sessions(tmp_path: Path) -> None:
    pa, pb = write_pair(tmp_path, HUNDRED)
    report = compare_logs(pa, pb, allow_open=True)  # the last session is left open in both
    assert report.ok, report.problems
    assert len(report.matched) == 13 and report.only_mine == [] and report.only_theirs == []
    assert compare_logs(pb, pa, allow_open=True).ok
    assert not compare_logs(pa, pb).ok


def test_compare_reports_a_log_that_does_not_verify(tmp_path: Path) -> None:
    pa, pb = write_pair(tmp_path, ["completed"])
    data = bytearray(pb.read_bytes())
    data[data.index(b"\n") + 50] ^= 1
    report = compare_logs(pa, bytes(data))
    assert not report.ok
    assert report.problems[0].startswith("their log does not verify: line 2")


def test_compare_catches_a_different_transcript_digest(tmp_path: Path) -> None:
    from jointstat.audit import SessionLog

    from tests.test_audit_log import MANIFEST, FakeClock

    ka, kb = keys()
    clock = FakeClock()
    pa, pb = tmp_path / "a.log", tmp_path / "b.log"
    with SessionLog(pa, ka, "alpha", clock=clock) as a, SessionLog(pb, kb, "beta", clock=clock) as b:
        a.session_started("s-1", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta")
        b.session_started(
            "s-1", job="shared-donors", manifest_digest=MANIFEST, role="evaluator", peer="alpha"
        )
        sig_a = a.transcript("s-1", hashlib.sha256(b"alpha saw this").digest())
        sig_b = b.transcript("s-1", hashlib.sha256(b"beta saw that").digest())
        a.peer_attestation("s-1", sig_b)
        b.peer_attestation("s-1", sig_a)
        a.session_completed("s-1", duration_us=1)
        b.session_completed("s-1", duration_us=1)
    report = compare_logs(pa, pb)
    assert not report.ok
    assert any("transcript digests differ" in p for p in report.problems)
    assert any("peer signature in my log does not verify under their log's key" in p for p in report.problems)


def test_compare_catches_a_completed_session_missing_from_the_other_log(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed", "completed"])
    (tmp_path / "short").mkdir()
    _, pb_short = write_pair(tmp_path / "short", ["completed"])
    report = compare_logs(pa, pb_short)
    assert report.only_mine == ["s-0002"]
    assert report.problems == [
        "session s-0002: my log has a transcript for it, the other log has no such session"
    ]


def test_an_early_abort_known_to_one_side_only_is_a_note_not_a_problem(tmp_path: Path) -> None:
    pa, pb = write_pair(tmp_path, ["completed"])
    ka, _ = keys()
    from jointstat.audit import SessionLog

    from tests.test_audit_log import MANIFEST, FakeClock

    with SessionLog(pa, ka, "alpha", clock=FakeClock()) as a:
        a.session_started(
            "s-0009", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta"
        )
        a.session_aborted("s-0009", reason="peer_unreachable", phase="handshake")
    report = compare_logs(pa, pb)
    assert report.ok
    assert report.notes == ["session s-0009: only in my log (aborted; it never reached a transcript)"]


def test_a_log_compared_with_itself_is_not_two_nodes(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    report = compare_logs(pa, pa)
    assert "both logs are signed by the same key; they are not two nodes' logs" in report.problems
    assert any("roles are not one garbler and one evaluator" in p for p in report.problems)


def test_compare_with_a_pinned_key_that_is_not_theirs_fails(tmp_path: Path) -> None:
    pa, pb = write_pair(tmp_path, ["completed"])
    ka, _ = keys()
    report = compare_logs(pa, pb, theirs_key=ka.public_key())
    assert not report.ok and report.theirs.problem is not None and report.theirs.problem.check == "key"


# -- robustness: whatever the bytes, the verifier reports, it does not crash ---------------------------------

scalars = st.none() | st.booleans() | st.integers(-(2**53) + 1, 2**53 - 1) | st.text(max_size=70)
values = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=6), inner, max_size=3),
    max_leaves=8,
)


@given(st.binary(max_size=400))
def test_arbitrary_bytes_are_reported_not_crashed_on(data: bytes) -> None:
    report = verify_log(data)
    assert report.problem is not None and report.problem.line == 1


@given(
    st.fixed_dictionaries(
        {
            "seq": st.integers(0, 3) | values,
            "time": st.just("2025-03-01T02:00:00.000000Z") | values,
            "kind": st.sampled_from(["log_opened", "session_started", "transcript", "session_completed"])
            | values,
            "session": st.just("s-1") | values,
            "body": st.dictionaries(st.sampled_from(["job", "digest", "signature", "phase", "node"]), values)
            | values,
            "prev": st.just("0" * 64) | values,
            "sig": st.just("A" * 86 + "==") | values,
        }
    )
)
def test_well_formed_but_forged_records_after_a_good_first_record_are_named_at_line_2(
    first_line: bytes, record: dict[str, Any]
) -> None:
    report = verify_log(first_line + b"\n" + canonicalize(record) + b"\n")
    assert report.problem is not None and report.problem.line == 2
    assert report.records == 1
