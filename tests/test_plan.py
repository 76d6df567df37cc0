"""Planning: rates; traffic figures that equal what the garbling backends actually produce; memory, depth and the
limits a node refuses a job above; and a plan at the scale of large organisations, on the count backend only."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.manifest import load_manifest
from jointstat.circuit.model import Party
from jointstat.circuit.plan import (
    PROCESS_BYTES,
    LimitError,
    Speed,
    check_limits,
    memory_bytes,
    padded_ots,
    parse_rate,
    plan,
    round_trips,
)
from jointstat.cli import main
from jointstat.garble.outputs import OutputDecoding, make_decoding

from tests.circuits import garble_and_evaluate
from tests.test_stat_support import manifest, table

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
    size = compiled.size()
    bits = {p: np.zeros(compiled.n_inputs(p), dtype=np.uint8) for p in Party}
    run = garble_and_evaluate(compiled.program, bits, chunk_bytes=1 << 16)
    table_bytes = len(run.stream)
    decoding = len(make_decoding(run.garbler.output_labels(Party.EVALUATOR), run.delta).to_bytes())
    assert decoding == OutputDecoding.size(size.outputs[Party.EVALUATOR])
    ots = padded_ots(size.inputs[Party.EVALUATOR])
    labels = 16 * size.inputs[Party.GARBLER]  # the garbler's input labels only: constants need none
    assert figures["and_gates"] == size.and_gates == table_bytes // 32
    assert figures["ot_count"] == size.inputs[Party.EVALUATOR]
    assert figures["bytes_garbler_to_evaluator"] == table_bytes + labels + 16 * ots + decoding + 128 * 32
    assert figures["bytes_evaluator_to_garbler"] == 16 * ots + 16 * size.outputs[Party.GARBLER] + 32
    assert figures["and_depth"] == size.and_depth > 0
    assert figures["xor_gates"] == size.xor_gates + size.not_gates


def test_the_estimate_is_bounded_by_the_slowest_of_garbling_and_transfer() -> None:
    compiled = compile_manifest(load_manifest(EXAMPLE))
    slow_link = plan(compiled, parse_rate("1kB/s"), FIXED_SPEED)
    assert slow_link["est_seconds"] >= slow_link["bytes_garbler_to_evaluator"] / 1000
    fast_link = plan(compiled, parse_rate("10GB/s"), FIXED_SPEED)
    assert fast_link["est_seconds"] >= compiled.size().and_gates / 1e6
    slow_evaluator = plan(compiled, parse_rate("10GB/s"), Speed(garble_and_per_s=1e9, evaluate_and_per_s=1e3))
    assert slow_evaluator["est_seconds"] >= compiled.size().and_gates / 1e3
    assert "assumes" in fast_link
    assert fast_link["garble_and_per_s"] == 1_000_000 and fast_link["evaluate_and_per_s"] == 2_000_000
    assert 0 <= fast_link["count_seconds"] <= fast_link["est_seconds"]


def join_of(rows: int) -> CompiledStatistic:
    key = {"name": "k", "type": "key", "width": 32}
    return compile_manifest(
        manifest(
            {"garbler": table(rows, key), "evaluator": table(rows, key)},
            {"name": "keyed_join", "key": "k"},
            {"evaluator": ["matches"]},
            matching={
                "max_false_matches": 1e4
            },  # plans only: 32-bit keys keep them quick (2^22 rows: 4,096 expected)
        )
    )


def test_memory_is_the_process_plus_the_labels_the_program_holds_at_its_peak() -> None:
    compiled = compile_manifest(load_manifest(EXAMPLE))
    size = compiled.size()
    labels = 16 * (size.peak_bits + 3 * size.widest_call)  # the peak already holds the input labels
    assert size.label_bytes() == labels
    assert (
        memory_bytes(compiled) == PROCESS_BYTES + labels == plan(compiled, 1e6, FIXED_SPEED)["memory_bytes"]
    )
    small, large = join_of(64), join_of(4096)
    assert memory_bytes(small) < memory_bytes(large)
    # the labels follow the live state: 64 times the rows hold at least 64 times the bits, not the whole circuit
    assert large.size().peak_bits >= 64 * small.size().peak_bits
    assert large.size().peak_bits < large.size().and_gates


def test_a_job_above_the_memory_limit_is_refused_with_the_figure() -> None:
    compiled = join_of(4096)
    need = memory_bytes(compiled)
    check_limits(compiled, memory_limit=need)  # exactly enough
    with pytest.raises(LimitError) as info:
        check_limits(compiled, memory_limit=need - 1)
    message = str(info.value)
    assert f"needs about {need / 2**30:.2f} GiB of memory per party" in message
    assert f"({compiled.size().peak_bits:,} bits held at its peak, 16 bytes each)" in message
    assert f"more than the {(need - 1) / 2**30:.2f} GiB allowed" in message
    assert "job 'test-job'" in message and "lower the capacities" in message


def test_a_job_above_the_time_limit_is_refused_with_the_figure() -> None:
    compiled = compile_manifest(load_manifest(EXAMPLE))
    check_limits(compiled, est_seconds=3600.0)  # the default session deadline, not more
    with pytest.raises(
        LimitError, match=r"is estimated at 5,000 s, more than the 3,600 s a session may take"
    ):
        check_limits(compiled, est_seconds=5000.0)
    with pytest.raises(LimitError, match=r"estimated at 61 s, more than the 60 s"):
        check_limits(compiled, time_limit_s=60, est_seconds=61.0)


def tree_sum_and_gates(n: int) -> int:
    """AND gates of blocks.tree_sum over n one-bit words: at each level ⌊n/2⌋ adders with carry-out (KSS 2009: one
    AND per bit), the words one bit wider per level."""
    total, width = 0, 1
    while n > 1:
        total += (n // 2) * width
        n, width = -(-n // 2), width + 1
    return total


def join_matches_and_gates(rows: int, key_bits: int) -> int:
    """The join module's structure for ``matches`` with equal capacities of a power of two (no padding, no
    disclosure count): Batcher's merger of M = 2·rows elements of k = key_bits + 1 bits, (M/2)·log2 M
    compare-and-swaps of 2k AND gates; M − 1 neighbour comparisons of k − 1 (equality) + 1 (validity) AND gates;
    and the count of the M − 1 match bits (a tree sum)."""
    m, k = 2 * rows, key_bits + 1
    return (m // 2) * (m.bit_length() - 1) * 2 * k + (m - 1) * k + tree_sum_and_gates(m - 1)


@pytest.mark.parametrize("rows", [1, 4, 1024])
def test_the_join_formula_holds_at_small_sizes(rows: int) -> None:
    assert join_of(rows).size().and_gates == join_matches_and_gates(rows, 32)


def test_a_keyed_join_of_2_22_rows_a_side_is_planned_on_the_count_backend() -> None:
    compiled = join_of(1 << 22)
    figures = plan(compiled, parse_rate("1Gbit/s"), FIXED_SPEED)
    assert figures["and_gates"] == join_matches_and_gates(1 << 22, 32) == 6_660_554_693
    assert figures["ot_count"] == compiled.n_inputs(Party.EVALUATOR) == (1 << 22) * 33


def test_the_plan_command_prints_json_or_a_table(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["plan", str(EXAMPLE), "--bandwidth", "1Gbit/s", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    for key in (
        "and_gates",
        "xor_gates",
        "and_depth",
        "ot_count",
        "memory_bytes",
        "count_seconds",
        "bytes_garbler_to_evaluator",
        "bytes_evaluator_to_garbler",
        "est_seconds",
    ):
        assert key in figures
    assert main(["plan", str(EXAMPLE)]) == 0
    out = capsys.readouterr().out
    assert "AND gates" in out and "AND depth" in out and "memory per party" in out
    assert "assumes:" in out and "100Mbit/s" in out
    assert main(["plan", str(EXAMPLE), "--bandwidth", "quick"]) == 2
    assert "cannot read the bandwidth 'quick'" in capsys.readouterr().err


def test_the_estimate_adds_ot_round_trips_and_start_up_to_the_tables() -> None:
    compiled = compile_manifest(load_manifest(EXAMPLE))
    speed = Speed(garble_and_per_s=1e6, evaluate_and_per_s=2e6, base_ot_seconds=0.05, ot_per_s=1e5)
    near = plan(compiled, parse_rate("1Gbit/s"), speed, rtt=0.0)
    far = plan(compiled, parse_rate("1Gbit/s"), speed, rtt=0.1)
    ots = compiled.size().inputs[Party.EVALUATOR]
    assert near["ot_seconds"] >= 0.05 + ots / 1e5  # base OTs plus the extension at the given rate
    assert near["latency_seconds"] == 0.0
    assert far["round_trips"] == near["round_trips"] == round_trips(ots)
    assert far["latency_seconds"] == pytest.approx(0.1 * round_trips(ots))
    parts = ("tables_seconds", "ot_seconds", "latency_seconds", "startup_seconds")
    for figures in (near, far):
        assert figures["est_seconds"] == pytest.approx(sum(figures[p] for p in parts), abs=1e-5)  # type: ignore[misc]


def test_round_trips_count_the_handshakes_and_one_per_window_of_ot_batches() -> None:
    # proposal: TCP + TLS 1.3 + the call = 3; session: TCP + TLS = 2, hellos 0.5, first tables, output labels,
    # decoding and finish 0.5 each = 2; with OTs: base OT 1, then one per window of 4 batches of 65,536 OTs.
    assert round_trips(0) == 3 + 2.5 + 2
    assert round_trips(1) == 3 + 2.5 + 2 + 1 + 1
    assert round_trips(4 * 65_536) == 3 + 2.5 + 2 + 1 + 1
    assert round_trips(4 * 65_536 + 1) == 3 + 2.5 + 2 + 1 + 2


def test_the_plan_command_reports_its_own_memory_and_warns_before_counting_a_huge_plan(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["plan", str(EXAMPLE), "--rtt", "40ms"]) == 0
    captured = capsys.readouterr()
    assert "at 40ms round-trip time" in captured.out and "this plan used" in captured.out
    assert captured.err == ""  # a small plan: no warning
    big = tmp_path / "big.yaml"
    text = (ROOT / "configs" / "rainfall-totals" / "manifest.yaml").read_text(
        encoding="utf-8"
    )  # a sum: no keys
    capacities = {line.strip() for line in text.splitlines() if line.strip().startswith("capacity:")}
    for line in capacities:
        text = text.replace(line, "capacity: 131072")
    big.write_text(text, encoding="utf-8")
    assert main(["plan", str(big), "--json"]) in (0, 2)
    captured = capsys.readouterr()
    assert "tables of up to 131,072 rows a side; counting the program first" in captured.err
    assert json.loads(captured.out.splitlines()[0])["planner_peak_memory_bytes"] > 0
    assert main(["plan", str(EXAMPLE), "--rtt", "soon"]) == 2
