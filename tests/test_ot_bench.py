"""``jointstat bench ot`` runs end to end and reports the figures it promises (no speed is asserted here)."""

from __future__ import annotations

import json

import pytest
from jointstat import cli
from jointstat.bench import ot as bench_ot


def test_bench_reports_json_figures(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["bench", "ot", "--count", "300", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    for key in (
        "count",
        "base_ot_seconds",
        "extension_ot_per_s",
        "bytes_per_ot",
        "working_mib_beyond_outputs",
    ):
        assert key in figures
    assert figures["count"] == 300
    # 300 OTs = one batch: 128 columns of 384 bits (48 bytes each) plus 300 corrections of 16 bytes.
    assert figures["bytes_per_ot"] == pytest.approx((128 * 48 + 16 * 300) / 300)
    assert figures["base_ot_seconds"] > 0 and figures["extension_ot_per_s"] > 0
    assert figures["working_mib_beyond_outputs"] > 0  # measured, whatever its size


def test_bench_table_output(capsys: pytest.CaptureFixture[str]) -> None:
    assert bench_ot.run(count=129, as_json=False) == 0
    out = capsys.readouterr().out
    assert "bytes_per_ot" in out and "base_ot_seconds" in out


def test_bench_refuses_empty_count(capsys: pytest.CaptureFixture[str]) -> None:
    assert bench_ot.run(count=0, as_json=True) == 2
    assert "--count" in capsys.readouterr().err
