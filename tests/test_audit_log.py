"""The session-log writer: owner-only append-only file, hash chain, signatures, typed records, session rules.

Scenario (invented): two regional blood banks, nodes ``alpha`` and ``beta``, run nightly jobs counting shared
donors; ``alpha`` garbles, ``beta`` evaluates. Helpers here are reused by the verification and CLI tests.
"""

from __future__ import annotations

import hashlib
import itertools
import os
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.audit import AuditError, SessionLog, sign_transcript, transcript_signature_ok, verify_log
from jointstat.audit.records import Kind, validate_body
from jointstat.canonical import parse

MANIFEST = hashlib.sha256(b"shared-donors manifest, version 3").digest()


class FakeClock:
    """Starts at 2025-03-01T02:00:00Z and moves 1.25 s per reading."""

    def __init__(self) -> None:
        self.now = datetime(2025, 3, 1, 2, 0, tzinfo=UTC)

    def __call__(self) -> datetime:
        self.now += timedelta(milliseconds=1250)
        return self.now


def keys() -> tuple[Ed25519PrivateKey, Ed25519PrivateKey]:
    # Fixed seeds so failures reproduce; the values are arbitrary (common practice for test keys).
    return (
        Ed25519PrivateKey.from_private_bytes(hashlib.sha256(b"alpha test key").digest()),
        Ed25519PrivateKey.from_private_bytes(hashlib.sha256(b"beta test key").digest()),
    )


def run_session(a: SessionLog, b: SessionLog, sid: str, outcome: str, phases: int = 3) -> None:
    """One session as both nodes log it: ``completed``, ``aborted`` (after one phase) or ``open``."""
    ka, kb = a.public_key, b.public_key
    a.session_started(
        sid, job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta", peer_key=kb
    )
    b.session_started(
        sid, job="shared-donors", manifest_digest=MANIFEST, role="evaluator", peer="alpha", peer_key=ka
    )
    names = ["handshake", "base_ot", "ot_extension", "garbling", "output"]
    for i in range(phases if outcome != "aborted" else 1):
        for log, sent, received in ((a, 4096 * (i + 1), 512), (b, 512, 4096 * (i + 1))):
            log.phase_finished(
                sid, phase=names[i], duration_us=1000 + i, bytes_sent=sent, bytes_received=received
            )
    if outcome == "aborted":
        a.session_aborted(sid, reason="peer_unreachable", phase="base_ot", detail="connection closed by peer")
        b.session_aborted(sid, reason="peer_unreachable", by="peer", phase="base_ot")
        return
    if outcome == "open":
        return
    digest = hashlib.sha256(sid.encode()).digest()
    sig_a = a.transcript(sid, digest)
    sig_b = b.transcript(sid, digest)
    a.peer_attestation(sid, sig_b)
    b.peer_attestation(sid, sig_a)
    a.session_completed(sid, duration_us=52_000)
    b.session_completed(sid, duration_us=51_000)


def write_pair(directory: Path, plan: list[str | tuple[str, int]]) -> tuple[Path, Path]:
    """Both nodes' logs for sessions ``s-0001``… with the given outcomes (optionally ``(outcome, phases)``)."""
    ka, kb = keys()
    clock = FakeClock()
    pa, pb = directory / "alpha.log", directory / "beta.log"
    with SessionLog(pa, ka, "alpha", clock=clock) as a, SessionLog(pb, kb, "beta", clock=clock) as b:
        for i, step in enumerate(plan):
            outcome, phases = (step, 3) if isinstance(step, str) else step
            run_session(a, b, f"s-{i + 1:04d}", outcome, phases)
    return pa, pb


# 1 log_opened + its checkpoint + 11 completed x 8 + 1 aborted x 4 (each ends with a checkpoint) + 1 open with
# 4 phases x 5 + the closing checkpoint = 100 records in each log.
HUNDRED: list[str | tuple[str, int]] = ["completed"] * 6 + ["aborted"] + ["completed"] * 5 + [("open", 4)]


def hundred_record_log(directory: Path) -> Path:
    path, _ = write_pair(directory, HUNDRED)
    return path


def test_a_new_log_is_owner_only_and_opens_with_the_node_and_its_public_key(tmp_path: Path) -> None:
    ka, _ = keys()
    with SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock()) as log:
        assert log.records == 2
    assert os.stat(tmp_path / "a.log").st_mode & 0o777 == 0o600
    first, second = (parse(line) for line in (tmp_path / "a.log").read_bytes().splitlines())
    assert first["kind"] == "log_opened" and first["seq"] == 0 and first["prev"] == "0" * 64
    assert first["body"]["node"] == "alpha"
    assert first["time"] == "2025-03-01T02:00:01.250000Z"
    assert second["kind"] == "checkpoint" and second["body"]["cause"] == "opened"


def test_a_pair_of_logs_written_by_the_two_nodes_verifies(tmp_path: Path) -> None:
    pa, pb = write_pair(tmp_path, HUNDRED)
    for path, node in ((pa, "alpha"), (pb, "beta")):
        report = verify_log(path, allow_open=True)
        assert report.ok, report.problem
        assert report.records == 100 and report.node == node
        outcomes = sorted(s.outcome for s in report.sessions.values())
        assert outcomes == ["aborted"] + ["completed"] * 11 + ["open"]
        strict = verify_log(path).problem
        assert strict is not None and strict.check == "open"


def test_each_record_links_to_the_sha256_of_the_previous_line(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    lines = pa.read_bytes().splitlines()
    for before, after in itertools.pairwise(lines):
        assert parse(after)["prev"] == hashlib.sha256(before).hexdigest()
    assert [parse(line)["seq"] for line in lines] == list(range(len(lines)))


def test_reopening_continues_the_chain_and_remembers_open_sessions(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed", "open"])
    ka, _ = keys()
    with SessionLog(pa, ka, "alpha", clock=FakeClock()) as a:
        assert a.open_sessions() == ["s-0002"]
        a.session_aborted("s-0002", reason="node_restarted", detail="session cut short by a restart")
        assert a.open_sessions() == []
        before = a.records
        a.session_started(
            "s-0003", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta"
        )
        assert a.records == before + 1
    report = verify_log(pa, allow_open=True)
    assert report.ok, report.problem
    assert (
        report.sessions["s-0002"].outcome == "aborted"
        and report.sessions["s-0002"].reason == "node_restarted"
    )


def test_a_log_cannot_be_continued_under_another_key_or_node_name(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    ka, kb = keys()
    with pytest.raises(AuditError, match=r"does not verify, refusing to append: line 1 \(seq 0\): key"):
        SessionLog(pa, kb, "alpha", clock=FakeClock())
    with pytest.raises(AuditError, match="belongs to node alpha, not gamma"):
        SessionLog(pa, ka, "gamma", clock=FakeClock())


def test_a_broken_or_cut_off_log_is_never_appended_to(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed", "completed"])
    ka, _ = keys()
    data = pa.read_bytes()
    lines = data.splitlines(keepends=True)
    pa.write_bytes(b"".join(lines[:5] + lines[6:]))
    with pytest.raises(AuditError, match=r"line 6 \(seq 6\): sequence: seq is 6, expected 5"):
        SessionLog(pa, ka, "alpha", clock=FakeClock())
    pa.write_bytes(data[:-20])
    with pytest.raises(AuditError, match="truncated"):
        SessionLog(pa, ka, "alpha", clock=FakeClock())
    assert pa.read_bytes() == data[:-20]


def test_only_one_writer_at_a_time(tmp_path: Path) -> None:
    ka, _ = keys()
    with (
        SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock()),
        pytest.raises(AuditError, match="another process is writing it"),
    ):
        SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock())


def test_records_that_break_the_session_rules_are_refused_and_nothing_is_written(tmp_path: Path) -> None:
    ka, kb = keys()
    path = tmp_path / "a.log"
    with SessionLog(path, ka, "alpha", clock=FakeClock()) as a:
        size = path.stat().st_size
        with pytest.raises(AuditError, match="never started"):
            a.phase_finished("s-9", phase="base_ot", duration_us=1, bytes_sent=0, bytes_received=0)
        a.session_started(
            "s-1",
            job="shared-donors",
            manifest_digest=MANIFEST,
            role="garbler",
            peer="beta",
            peer_key=kb.public_key(),
        )
        size = path.stat().st_size
        with pytest.raises(AuditError, match="already started"):
            a.session_started(
                "s-1", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta"
            )
        with pytest.raises(AuditError, match="before its transcript"):
            a.peer_attestation("s-1", bytes(64))
        with pytest.raises(AuditError, match="without the peer's attestation"):
            a.session_completed("s-1", duration_us=5)
        digest = hashlib.sha256(b"transcript").digest()
        a.transcript("s-1", digest)
        size = path.stat().st_size
        with pytest.raises(AuditError, match="already has a transcript"):
            a.transcript("s-1", digest)
        forged = sign_transcript(ka, "s-1", digest)  # signed by the wrong party
        with pytest.raises(AuditError, match="peer's transcript signature does not verify"):
            a.peer_attestation("s-1", forged)
        assert path.stat().st_size == size
        a.peer_attestation("s-1", sign_transcript(kb, "s-1", digest))
        a.session_completed("s-1", duration_us=5)
        with pytest.raises(AuditError, match="already completed"):
            a.session_aborted("s-1", reason="late")
    assert verify_log(path).ok


def test_the_transcript_signature_returned_for_the_finish_frame_verifies_under_the_node_key(
    tmp_path: Path,
) -> None:
    ka, _ = keys()
    digest = hashlib.sha256(b"all frames of session s-1").digest()
    with SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock()) as a:
        a.session_started("s-1", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta")
        signature = a.transcript("s-1", digest)
    assert transcript_signature_ok(ka.public_key(), "s-1", digest, signature)
    assert not transcript_signature_ok(ka.public_key(), "s-2", digest, signature)
    assert not transcript_signature_ok(ka.public_key(), "s-1", hashlib.sha256(b"other").digest(), signature)


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (
            lambda a: a.phase_finished(
                "s-1", phase="base_ot", duration_us=1.5, bytes_sent=0, bytes_received=0
            ),
            "duration_us",
        ),
        (
            lambda a: a.phase_finished(
                "s-1", phase="base_ot", duration_us=True, bytes_sent=0, bytes_received=0
            ),
            "duration_us",
        ),
        (
            lambda a: a.phase_finished(
                "s-1", phase="base_ot", duration_us=1, bytes_sent=-1, bytes_received=0
            ),
            "bytes_sent",
        ),
        (
            lambda a: a.phase_finished("s-1", phase="Base OT", duration_us=1, bytes_sent=0, bytes_received=0),
            "phase",
        ),
        (lambda a: a.session_aborted("s-1", reason="bad input"), "reason"),
        (lambda a: a.session_aborted("s-1", reason="x", detail="line one\nline two"), "control characters"),
        (
            lambda a: a.session_started(
                "s 2", job="j", manifest_digest=MANIFEST, role="garbler", peer="beta"
            ),
            "session id",
        ),
        (
            lambda a: a.session_started(
                "s-2", job="j", manifest_digest=b"short", role="garbler", peer="beta"
            ),
            "manifest digest",
        ),
        (
            lambda a: a.session_started("s-2", job="j", manifest_digest=MANIFEST, role="judge", peer="beta"),
            "role",
        ),  # type: ignore[arg-type]
    ],
)
def test_fields_outside_their_types_are_refused_by_name(tmp_path: Path, call: object, message: str) -> None:
    ka, _ = keys()
    with SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock()) as a:
        a.session_started("s-1", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta")
        with pytest.raises(AuditError, match=message):
            call(a)  # type: ignore[operator]


@pytest.mark.parametrize(
    "secret",
    [
        os.urandom(16).hex(),  # a wire label or Δ in hex
        "kP3xQ9vB2mZ7tR1yW8nL4g==",  # 16 bytes in base64
        "AbCdEfGh0123456789XyZw",
    ],
)
def test_abort_details_that_look_like_key_material_are_refused_without_echoing_them(
    tmp_path: Path, secret: str
) -> None:
    ka, _ = keys()
    with SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock()) as a:
        a.session_started("s-1", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta")
        with pytest.raises(AuditError, match="key material") as caught:
            a.session_aborted("s-1", reason="bad_label", detail=f"evaluator returned {secret}")
    assert secret not in str(caught.value)
    assert secret.encode() not in (tmp_path / "a.log").read_bytes()


def test_record_bodies_are_closed_so_an_extra_field_cannot_carry_a_value() -> None:
    delta = os.urandom(16).hex()
    body = {"phase": "garbling", "duration_us": 1, "bytes_sent": 2, "bytes_received": 3, "delta": delta}
    with pytest.raises(
        AuditError, match=r"phase_finished body: delta: Extra inputs are not permitted"
    ) as caught:
        validate_body(Kind.PHASE_FINISHED, body)
    assert delta not in str(caught.value)


def test_a_clock_without_a_time_zone_is_refused(tmp_path: Path) -> None:
    ka, _ = keys()
    with pytest.raises(AuditError, match="without a time zone"):
        SessionLog(tmp_path / "a.log", ka, "alpha", clock=lambda: datetime(2025, 3, 1, 2, 0))


def test_a_node_name_must_be_dns_style(tmp_path: Path) -> None:
    ka, _ = keys()
    with pytest.raises(AuditError, match="node id 'Alpha Node'"):
        SessionLog(tmp_path / "a.log", ka, "Alpha Node", clock=FakeClock())


def test_appends_from_several_threads_keep_one_valid_chain(tmp_path: Path) -> None:
    ka, _ = keys()
    with SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock()) as a:
        for t in range(4):
            a.session_started(
                f"s-{t}", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta"
            )

        def work(t: int) -> None:
            for i in range(25):
                a.phase_finished(f"s-{t}", phase="garbling", duration_us=i, bytes_sent=i, bytes_received=0)

        threads = [threading.Thread(target=work, args=(t,)) for t in range(4)]
        for th in threads:
            th.start()
        for th in threads:
            th.join()
    report = verify_log(tmp_path / "a.log", allow_open=True)
    assert report.ok, report.problem
    assert report.records == 2 + 4 + 100 + 1  # log_opened and its checkpoint … the closing checkpoint
    assert all(len(s.phases) == 25 for s in report.sessions.values())


def test_a_snapshot_taken_while_records_are_appended_holds_whole_records_only_and_verifies(
    tmp_path: Path,
) -> None:
    ka, _ = keys()
    snapshots: list[bytes] = []
    with SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock()) as a:
        a.session_started("s-1", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta")

        def work() -> None:
            for i in range(200):
                a.phase_finished("s-1", phase="garbling", duration_us=i, bytes_sent=i, bytes_received=0)

        writer = threading.Thread(target=work)
        writer.start()
        while writer.is_alive():
            snapshots.append(a.snapshot())
        writer.join()
        snapshots.append(a.snapshot())
        assert snapshots[-1] == (tmp_path / "a.log").read_bytes()
    with pytest.raises(AuditError, match="closed"):
        a.snapshot()
    assert len(snapshots) > 1
    for data in snapshots:
        assert data.endswith(b"\n")
        report = verify_log(data, allow_open=True)  # a snapshot of a running node's log: a session still open
        assert report.ok, report.problem
    assert (
        verify_log(snapshots[-1], allow_open=True).records == 1 + 1 + 1 + 200
    )  # header, checkpoint, start, phases


def test_a_sessions_privacy_budget_is_reserved_once_then_spent_or_returned_once(tmp_path: Path) -> None:
    ka, kb = keys()
    path = tmp_path / "a.log"
    with SessionLog(path, ka, "alpha", clock=FakeClock()) as a:
        for sid in ("s-1", "s-2"):
            a.session_started(
                sid,
                job="shared-donors",
                manifest_digest=MANIFEST,
                role="garbler",
                peer="beta",
                peer_key=kb.public_key(),
            )
        with pytest.raises(AuditError, match="without an open reservation"):
            a.privacy_budget("s-1", epsilon="1.5", action="spent")
        a.privacy_budget("s-1", epsilon="1.5", action="reserved")
        assert a.held_budget("s-1") == "1.5" and a.held_budget("s-2") is None
        size = path.stat().st_size
        with pytest.raises(AuditError, match="already reserved"):
            a.privacy_budget("s-1", epsilon="1.5", action="reserved")
        with pytest.raises(AuditError, match="another ε than reserved"):
            a.privacy_budget("s-1", epsilon="2", action="spent")
        with pytest.raises(AuditError, match="epsilon"):
            a.privacy_budget("s-2", epsilon="0.1e1", action="reserved")  # exact decimal text only
        assert path.stat().st_size == size
        a.privacy_budget("s-1", epsilon="1.5", action="returned")
        assert a.held_budget("s-1") is None
        with pytest.raises(AuditError, match="without an open reservation"):
            a.privacy_budget("s-1", epsilon="1.5", action="spent")
        a.session_aborted("s-1", reason="peer_unreachable")
        a.privacy_budget("s-2", epsilon="1/3", action="reserved")
        a.session_aborted("s-2", reason="node_restarted")
    report = verify_log(path)
    assert report.ok
