"""Planning: rates, and traffic figures that equal what the garbling layer actually produces."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from jointstat.circuit.compile import compile_manifest
from jointstat.circuit.manifest import load_manifest
from jointstat.circuit.model import Party
from jointstat.circuit.plan import Speed, padded_ots, parse_rate, plan
from jointstat.cli import main
from jointstat.garble import Garbler

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "configs" / "shared-customers" / "manifest.yaml"
FIXED_SPEED = Speed(garble_and_per_s=1e6, evaluate_and_per_s=2e6)


@pytest.mark.parametrize(
    ("text", "bytes_per_s"),
    [
        ("100Mbit/s", 12.5e6),
        ("1Gbit/s", 125e6),
        ("50MB/s", 50e6),
        ("2MiB/s", 2 * 2**20),
        ("800 kbit/s", 1e5),
        ("1.5GB/s", 1.5e9),
    ],
)
def test_rates_in_bits_or_bytes_per_second(text: str, bytes_per_s: float) -> None:
    assert parse_rate(text) == pytest.approx(bytes_per_s)


@pytest.mark.parametrize("text", ["fast", "100", "100Mb", "-5MB/s", "0MB/s", "10 furlongs/s"])
def test_unreadable_rates_say_what_is_accepted(text: str) -> None:
    with pytest.raises(ValueError, match=r"bandwidth|more than zero"):
        parse_rate(text)


def test_ot_batches_are_padded_to_multiples_of_128() -> None:
    assert [padded_ots(n) for n in (1, 128, 129, 1 << 16, (1 << 16) + 1)] == [
        128,
        128,
        256,
        1 << 16,
        (1 << 16) + 128,
    ]


def test_traffic_figures_match_the_garbled_tables_and_decoding() -> None:
    compiled = compile_manifest(load_manifest(EXAMPLE))
    figures = plan(compiled, parse_rate("100Mbit/s"), FIXED_SPEED)
    c = compiled.circuit
    garbler = Garbler(compiled.layered)
    table_bytes = sum(len(chunk) for chunk in garbler.tables())
    decoding = len(garbler.output_decoding(Party.EVALUATOR).to_bytes())
    ots = padded_ots(c.n_inputs(Party.EVALUATOR))
    labels = 16 * (c.n_inputs(Party.GARBLER) + 2)
    assert figures["and_gates"] == c.and_count and figures["ot_count"] == c.n_inputs(Party.EVALUATOR)
    assert figures["bytes_garbler_to_evaluator"] == table_bytes + labels + 16 * ots + decoding + 128 * 32
    assert figures["bytes_evaluator_to_garbler"] == 16 * ots + 16 * c.n_outputs(Party.GARBLER) + 32
    assert figures["layers"] == compiled.layered.n_layers


def test_the_estimate_is_bounded_by_the_slowest_of_garbling_and_transfer() -> None:
    compiled = compile_manifest(load_manifest(EXAMPLE))
    slow_link = plan(compiled, parse_rate("1kB/s"), FIXED_SPEED)
    assert slow_link["est_seconds"] >= slow_link["bytes_garbler_to_evaluator"] / 1000
    fast_link = plan(compiled, parse_rate("10GB/s"), FIXED_SPEED)
    assert fast_link["est_seconds"] >= compiled.circuit.and_count / 1e6
    assert "assumes" in fast_link


def test_the_plan_command_prints_json_or_a_table(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["plan", str(EXAMPLE), "--bandwidth", "1Gbit/s", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    for key in (
        "and_gates",
        "xor_gates",
        "layers",
        "ot_count",
        "bytes_garbler_to_evaluator",
        "bytes_evaluator_to_garbler",
        "est_seconds",
    ):
        assert key in figures
    assert main(["plan", str(EXAMPLE)]) == 0
    out = capsys.readouterr().out
    assert "AND gates" in out and "assumes:" in out and "100Mbit/s" in out
    assert main(["plan", str(EXAMPLE), "--bandwidth", "quick"]) == 2
    assert "cannot read the bandwidth 'quick'" in capsys.readouterr().err
