"""``jointstat bench session`` on loopback: two real node processes over mutual TLS, and the figures it prints.

Specification: the command runs one session of the program asked for between two node processes, checks both
sides' outputs against the plain backend, then measures the transport alone on the same port; its JSON holds the
session's bytes, wall time and memory, each process's CPU seconds for the session and for the transport
measurement, the transport's rate and the ratio of the two rates — consistent with each other (no speed is
asserted here: speeds are for the benchmark to show).
"""

from __future__ import annotations

import json

import pytest
from jointstat import cli
from jointstat.bench.session import PUMP_BYTES


def test_bench_session_reports_the_sessions_and_the_transports_figures_with_their_cpu_time(
    capsys: pytest.CaptureFixture[str],
) -> None:
    assert cli.main(["bench", "session", "--and-gates", "4096", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["and_gates"] == 4096 and figures["outputs_correct"] is True
    # half-gates: 32 bytes per AND gate from garbler to evaluator, plus labels, OT and framing
    assert figures["garbler_to_evaluator_bytes"] > 32 * 4096
    assert (
        figures["bytes_on_wire"]
        == figures["garbler_to_evaluator_bytes"] + figures["evaluator_to_garbler_bytes"]
    )
    for key in (
        "wall_s",
        "garbler_cpu_s",
        "evaluator_cpu_s",
        "link_s",
        "link_garbler_cpu_s",
        "link_evaluator_cpu_s",
    ):
        assert figures[key] > 0, key
    assert figures["link_bytes_per_s"] == pytest.approx(PUMP_BYTES / figures["link_s"], rel=0.01)
    session_rate = figures["bytes_on_wire"] / figures["wall_s"]
    assert figures["link_utilisation"] == pytest.approx(session_rate / figures["link_bytes_per_s"], abs=0.002)
