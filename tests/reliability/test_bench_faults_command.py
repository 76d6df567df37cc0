"""``jointstat bench faults``: prints the figures of a fault campaign and a fuzzing run, and refuses bad counts.

(The campaign of CI's size — 36 sessions, 10,000 frames — is the shared ``campaign`` and ``fuzzing`` run of this
suite, through the same functions; here the command itself runs a tiny one.)
"""

from __future__ import annotations

import json

import pytest
from jointstat.cli import main

FIGURES = (
    "sessions",
    "completed",
    "aborted_cleanly",
    "hung",
    "outputs_released_wrongly",
    "frames_fuzzed",
    "crashes",
)


def test_bench_faults_prints_the_figures_as_one_json_object(capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["bench", "faults", "--sessions", "2", "--frames", "60", "--json"])
    figures = json.loads(capsys.readouterr().out)
    assert code == 0
    assert list(figures)[: len(FIGURES)] == list(FIGURES)
    assert figures["sessions"] == 2 and figures["frames_fuzzed"] == 60
    assert figures["completed"] == figures["aborted_cleanly"] == 1
    assert figures["hung"] == figures["outputs_released_wrongly"] == figures["crashes"] == 0


@pytest.mark.parametrize(
    ("args", "text"), [(["--sessions", "0"], "--sessions"), (["--frames", "-1"], "--frames")]
)
def test_bench_faults_refuses_counts_it_cannot_run(
    capsys: pytest.CaptureFixture[str], args: list[str], text: str
) -> None:
    assert main(["bench", "faults", *args]) == 2
    assert text in capsys.readouterr().err
