"""Signed checkpoints in the session log: removing its last records is caught, and what cannot be caught is named.

Specification: the writer appends a signed ``checkpoint`` (the size and head of the chain before it, and how many
sessions are open) when it creates a log, when a session ends, when it closes the log and when it reopens a log
that was not closed. ``audit verify`` fails on a log whose last record is not a checkpoint or that leaves a
session open, unless ``--allow-open`` (the log of a running node); so removing the last 1, 2 or 3 lines of a log
is caught. Cutting a log back to an earlier checkpoint is not caught by the log alone; the peer's log catches it.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest
from jointstat.audit import SessionLog, compare_logs, verify_log
from jointstat.canonical import parse
from jointstat.cli import main

from tests.test_audit_log import FakeClock, keys, write_pair
from tests.test_audit_verify import joined, rechain


def lines_of(path: Path) -> list[bytes]:
    return path.read_bytes().splitlines()


@pytest.mark.parametrize("removed", [1, 2, 3])
def test_removing_the_last_records_of_a_log_is_caught(tmp_path: Path, removed: int) -> None:
    pa, _ = write_pair(tmp_path, ["completed", "completed"])
    assert verify_log(pa).ok
    cut = lines_of(pa)[:-removed]
    report = verify_log(joined(cut))
    assert report.problem is not None, f"{removed} last lines removed and not noticed"
    assert report.problem.check in ("unclosed", "open")
    assert report.problem.line == len(cut)


def test_the_writer_signs_a_checkpoint_when_it_creates_a_log_a_session_ends_and_it_closes_the_log(
    tmp_path: Path,
) -> None:
    pa, _ = write_pair(tmp_path, ["completed", "aborted", "open"])
    records = [parse(line) for line in lines_of(pa)]
    checkpoints = [(i, r) for i, r in enumerate(records) if r["kind"] == "checkpoint"]
    assert [r["body"]["cause"] for _, r in checkpoints] == [
        "opened",
        "session_ended",
        "session_ended",
        "closed",
    ]
    assert records[-1]["kind"] == "checkpoint"
    for i, r in checkpoints:
        assert r["session"] is None
        # The size and head of the chain it signs: RFC 6962's signed tree head, for a hash chain.
        assert r["body"]["records"] == r["seq"] == i
        assert r["body"]["head"] == r["prev"] == hashlib.sha256(lines_of(pa)[i - 1]).hexdigest()
    assert [r["body"]["open_sessions"] for _, r in checkpoints] == [0, 0, 0, 1]


def test_a_log_that_leaves_a_session_open_fails_unless_open_sessions_are_allowed(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed", "open"])
    report = verify_log(pa)
    assert report.problem is not None and report.problem.check == "open"
    assert "session s-0002" in report.problem.message and "--allow-open" in report.problem.message
    assert verify_log(pa, allow_open=True).ok


def test_a_running_nodes_log_verifies_with_allow_open(tmp_path: Path) -> None:
    ka, _ = keys()
    with SessionLog(tmp_path / "a.log", ka, "alpha", clock=FakeClock()) as log:
        log.session_started(
            "s-1", job="shared-donors", manifest_digest=bytes(32), role="garbler", peer="beta"
        )
        log.phase_finished("s-1", phase="handshake", duration_us=5, bytes_sent=1, bytes_received=1)
        running = (tmp_path / "a.log").read_bytes()
        report = verify_log(running)
        assert report.problem is not None and report.problem.check == "unclosed"
        assert verify_log(running, allow_open=True).ok


def test_a_checkpoint_that_misstates_the_chain_is_named(tmp_path: Path) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    ka, _ = keys()
    lines = lines_of(pa)
    k = next(i for i, line in enumerate(lines) if parse(line)["kind"] == "checkpoint" and i > 1)
    for field, value in (("records", 3), ("open_sessions", 1), ("head", "ab" * 32)):
        record = parse(lines[k])
        record["body"][field] = value
        forged = rechain(
            [*lines[:k], json.dumps(record).encode(), *lines[k + 1 :]], ka, start=k, fix_checkpoints=False
        )
        report = verify_log(joined(forged))
        assert report.problem is not None and (report.problem.line, report.problem.check) == (
            k + 1,
            "checkpoint",
        )
        assert field.replace("_", " ") in report.problem.message


def test_reopening_a_log_that_was_not_closed_marks_the_place_with_a_recovered_checkpoint(
    tmp_path: Path,
) -> None:
    pa, _ = write_pair(tmp_path, ["completed", "open"])
    crashed = lines_of(pa)[:-1]  # as if the node had died before closing the log
    pa.write_bytes(joined(crashed))
    ka, _ = keys()
    with SessionLog(pa, ka, "alpha", clock=FakeClock()) as log:
        assert log.open_sessions() == ["s-0002"]
        log.session_aborted(
            "s-0002", reason="node_restarted", detail="the node stopped before this session ended"
        )
    report = verify_log(pa)
    assert report.ok, report.problem
    assert report.recovered == [len(crashed) + 1]
    assert parse(lines_of(pa)[len(crashed)])["body"]["cause"] == "recovered"


def test_cutting_a_log_back_to_an_earlier_checkpoint_is_not_caught_by_the_log_alone_but_by_the_peers(
    tmp_path: Path,
) -> None:
    pa, pb = write_pair(tmp_path, ["completed", "completed"])
    lines = lines_of(pa)
    ends = [i for i, line in enumerate(lines) if parse(line)["body"].get("cause") == "session_ended"]
    earlier = joined(lines[: ends[0] + 1])  # the second session and everything after it removed
    assert verify_log(earlier).ok  # what the chain cannot tell: a shorter log ending at a checkpoint
    report = compare_logs(earlier, pb)
    assert not report.ok
    assert (
        "session s-0002: their log has a transcript for it, the other log has no such session"
        in report.problems
    )


def test_audit_verify_fails_on_a_cut_log_and_accepts_a_running_one_with_allow_open(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    assert main(["audit", "verify", str(pa)]) == 0
    out = capsys.readouterr().out
    assert "ends with a signed checkpoint" in out
    cut = tmp_path / "cut.log"
    cut.write_bytes(joined(lines_of(pa)[:-2]))
    assert main(["audit", "verify", str(cut)]) == 1
    assert "unclosed" in capsys.readouterr().out
    assert main(["audit", "verify", "--allow-open", str(cut)]) == 0
    assert "does not end with a checkpoint" in capsys.readouterr().out
