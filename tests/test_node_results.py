"""Reading back result files (``node.results``): what ``write_result`` writes reads back field for field,
newest files are listed oldest first, and a damaged file is named without hiding the others or showing a value."""

from __future__ import annotations

import json
import os
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from jointstat.circuit.model import Party
from jointstat.node.config import parse_node_config
from jointstat.node.results import ResultFileError, ResultRecord, job_results, read_result, write_result

CONFIG = """
node: {name: teal-valley-weather, listen: "127.0.0.1:0", data_dir: data}
tls: {certificate: tls.crt, private_key: tls.key}
signing_key: signing.key
peers:
  - {name: saltmarsh-gauges, address: "127.0.0.1:7301", certificate: peer.crt, signing_public_key: peer.pub}
jobs:
  - name: rainfall-totals
    manifest: manifest.yaml
    peer: saltmarsh-gauges
    role: garbler
    initiate: true
    input: {csv: {path: gauges.csv}}
    schedule: {cron: "0 3 1 * *"}
"""
MIDNIGHT = datetime(2025, 3, 1, 3, 0, tzinfo=UTC)


def job(tmp_path: Path):  # type: ignore[no-untyped-def]
    return parse_node_config(CONFIG, base=tmp_path).jobs[0]


def test_a_written_result_reads_back_field_for_field(tmp_path: Path) -> None:
    path = write_result(
        job(tmp_path),
        session_id="a1" * 16,
        party=Party.GARBLER,
        digest=bytes(range(32)),
        scheduled_for=MIDNIGHT,
        finished_at=MIDNIGHT + timedelta(seconds=4),
        outputs={"withheld": False, "count": 41, "mean": 12.25, "above": True},
    )
    got = read_result(path)
    assert got == ResultRecord(
        path=path,
        job="rainfall-totals",
        session="a1" * 16,
        role="garbler",
        scheduled_for=MIDNIGHT,
        finished_at=MIDNIGHT + timedelta(seconds=4),
        withheld=False,
        outputs={"count": 41, "mean": 12.25, "above": True},
    )


def test_a_withheld_result_reads_back_as_withheld_with_no_values(tmp_path: Path) -> None:
    path = write_result(
        job(tmp_path),
        session_id="b2" * 16,
        party=Party.EVALUATOR,
        digest=bytes(32),
        scheduled_for=MIDNIGHT,
        finished_at=MIDNIGHT,
        outputs={"withheld": True, "count": None},
    )
    got = read_result(path)
    assert got.withheld is True and got.outputs == {"count": None} and got.role == "evaluator"


def test_which_rule_withheld_which_output_is_kept_apart_from_the_values(tmp_path: Path) -> None:
    path = write_result(
        job(tmp_path),
        session_id="c3" * 16,
        party=Party.EVALUATOR,
        digest=bytes(32),
        scheduled_for=MIDNIGHT,
        finished_at=MIDNIGHT,
        outputs={
            "withheld": False,
            "withheld_by": {"spend.mean": "no_rows"},
            "members.count": 0,
            "spend.mean": None,
        },
    )
    got = read_result(path)
    assert got.withheld is False and got.withheld_by == {"spend.mean": "no_rows"}
    assert got.outputs == {"members.count": 0, "spend.mean": None}
    body = json.loads(path.read_text())
    body["withheld_by"] = {"spend.mean": 3}
    path.write_text(json.dumps(body))
    with pytest.raises(ResultFileError, match="withheld_by is not an object of output names and rules"):
        read_result(path)


def test_the_newest_files_are_listed_oldest_first_and_other_files_are_ignored(tmp_path: Path) -> None:
    j = job(tmp_path)
    for day in range(5):
        write_result(
            j,
            session_id=f"{day:032x}",
            party=Party.GARBLER,
            digest=bytes(32),
            scheduled_for=MIDNIGHT + timedelta(days=day),
            finished_at=MIDNIGHT + timedelta(days=day),
            outputs={"withheld": False, "count": day},
        )
    (j.results / "notes.txt").write_text("not a result", encoding="utf-8")
    got = job_results(j.results, limit=3)
    assert [r.outputs["count"] for r in got if isinstance(r, ResultRecord)] == [2, 3, 4]
    assert job_results(tmp_path / "no-such-directory") == []


@pytest.mark.parametrize(
    ("content", "message"),
    [
        (b"\xff\xfe", "not UTF-8 JSON"),
        (b'{"format": "something-else"}', "not a result file"),
        (
            json.dumps(
                {
                    "format": "jointstat-result/1",
                    "job": "j",
                    "session": "s",
                    "role": "garbler",
                    "scheduled_for": "2025-03-01T03:00:00",
                    "finished_at": "2025-03-01T03:00:00+00:00",
                    "withheld": False,
                    "outputs": {"count": 987654321},
                }
            ).encode(),
            "scheduled_for is not an ISO 8601 time with a time zone",
        ),
        (
            json.dumps(
                {
                    "format": "jointstat-result/1",
                    "job": "j",
                    "session": "s",
                    "role": "garbler",
                    "scheduled_for": "2025-03-01T03:00:00+00:00",
                    "finished_at": "2025-03-01T03:00:00+00:00",
                    "withheld": "987654321",
                    "outputs": {},
                }
            ).encode(),
            "withheld is neither true, false nor null",
        ),
    ],
)
def test_a_damaged_file_is_named_with_what_is_wrong_and_never_its_values(
    tmp_path: Path, content: bytes, message: str
) -> None:
    directory = tmp_path / "results"
    directory.mkdir()
    good = write_result(
        job(tmp_path),
        session_id="c3" * 16,
        party=Party.GARBLER,
        digest=bytes(32),
        scheduled_for=MIDNIGHT,
        finished_at=MIDNIGHT,
        outputs={"withheld": False, "count": 7},
    )
    bad = good.parent / "20250302T030000Z-damaged.json"
    bad.write_bytes(content)
    os.chmod(bad, 0o600)
    with pytest.raises(ResultFileError) as caught:
        read_result(bad)
    assert message in str(caught.value) and str(bad) in str(caught.value)
    assert "987654321" not in str(caught.value)
    listed = job_results(good.parent)
    assert isinstance(listed[0], ResultRecord) and isinstance(listed[1], ResultFileError)


def test_results_finished_within_one_second_are_listed_by_their_finish_time_not_their_session_id(
    tmp_path: Path,
) -> None:
    j = job(tmp_path)
    for i, sid in enumerate(("f" * 32, "0" * 32, "8" * 32)):  # session ids in no order
        write_result(
            j,
            session_id=sid,
            party=Party.GARBLER,
            digest=bytes(32),
            scheduled_for=MIDNIGHT,
            finished_at=MIDNIGHT + timedelta(microseconds=100_000 * i),  # all in the same second
            outputs={"withheld": False, "count": i},
        )
    got = job_results(j.results)
    assert [r.outputs["count"] for r in got if isinstance(r, ResultRecord)] == [0, 1, 2]
