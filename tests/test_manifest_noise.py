"""Noise on a manifest's outputs (issue 15, manifest side): settings validated with their field paths, clamping
bounds applied inside the circuit, the run's exact ε from the compiled job (``CompiledStatistic.epsilon()``) and in
``plan``, and a noisy output that follows the discrete Laplace law over many garbled runs (scipy.stats.dlaplace
as the outside reference; the geometric mechanism of Ghosh–Roughgarden–Sundararajan, STOC 2009)."""

from __future__ import annotations

import copy
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml
from jointstat.circuit.compile import compile_manifest
from jointstat.circuit.inputs import encode_inputs, read_csv
from jointstat.circuit.manifest import ManifestError, load_manifest, parse_manifest
from jointstat.circuit.model import Party
from jointstat.circuit.plan import Speed, plan
from jointstat.garble.local import run_locally
from scipy import stats

from tests.test_stat_support import SECRET, records, run_garbled, run_plain

ROOT = Path(__file__).resolve().parents[1]
CLINICS = ROOT / "configs" / "clinic-waits-noisy"
BASE: dict[str, Any] = yaml.safe_load((CLINICS / "manifest.yaml").read_text(encoding="utf-8"))


def changed(change: Any) -> dict[str, Any]:
    data = copy.deepcopy(BASE)
    change(data)
    return data


def problems_of(data: dict[str, Any]) -> list[str]:
    with pytest.raises(ManifestError) as info:
        parse_manifest(yaml.safe_dump(data), "<test>")
    return [str(p) for p in info.value.problems]


@pytest.mark.parametrize("epsilon", ["0", "-0.5", 0, -1, "0.0"])
def test_an_epsilon_of_zero_or_less_is_refused_with_its_field(epsilon: object) -> None:
    data = changed(lambda d: d["statistics"][0]["noise"]["count"].update(epsilon=epsilon))
    assert problems_of(data) == ["statistics[0].noise.count.epsilon: must be greater than 0"]


@pytest.mark.parametrize("compute", ["sum", "mean"])
def test_a_noisy_sum_or_mean_without_clamping_bounds_is_refused_with_its_field(compute: str) -> None:
    def change(d: dict[str, Any]) -> None:
        entry = d["statistics"][1]
        del entry["clamp"]
        entry["compute"] = compute
        entry["noise"] = {"sum": {"mechanism": "discrete_laplace", "epsilon": "0.5"}}
        entry["outputs"] = {"evaluator": ["sum"]}

    assert problems_of(changed(change)) == [
        "statistics[1].noise.sum: a noisy sum needs clamping bounds: add clamp: {min: …, max: …} to the statistic "
        "(without them one person could move the sum by any amount)"
    ]


@pytest.mark.parametrize(
    ("change", "expected"),
    [
        (
            lambda d: d["statistics"][1].update(clamp={"min": 10, "max": 0}),
            "statistics[1].clamp: min (10) must not be more than max (0)",
        ),
        (
            lambda d: d["statistics"][1].update(clamp={"min": 0, "max": "240.5"}),
            "statistics[1].clamp.max: 240.5 is not a multiple of the column's step 2^-0",
        ),
        (
            lambda d: d["statistics"][1]["noise"].pop("mean"),
            "statistics[1].noise: 'mean' is released without noise: a statistic with noise must noise every output",
        ),
        (
            lambda d: d["statistics"][0]["noise"]["count"].update(mechanism="gaussian"),
            "statistics[0].noise.count.mechanism: input should be 'discrete_laplace'",
        ),
        (
            lambda d: d["statistics"][1]["noise"].update(
                variance={"mechanism": "discrete_laplace", "epsilon": 1}
            ),
            "statistics[1].noise.variance: mean has no output 'variance'",
        ),
        (
            lambda d: d["statistics"][0]["noise"]["count"].update(epsilon="130"),
            "statistics[0].noise.count.epsilon: ε/Δ = 130/2 is above 64",
        ),
    ],
)
def test_bad_noise_settings_are_refused_with_their_fields(change: Any, expected: str) -> None:
    problems = problems_of(changed(change))
    assert any(p.startswith(expected) for p in problems), problems


def test_the_runs_epsilon_is_the_exact_sum_over_its_noisy_outputs() -> None:
    compiled = compile_manifest(load_manifest(CLINICS / "manifest.yaml"))
    assert compiled.epsilon() == Fraction(3, 2)  # 0.5 + 0.25 + 0.25 + 0.5
    assert compiled.noisy_outputs == {
        "patients.count": Fraction(1, 2),
        "wait.sum": Fraction(1, 4),
        "wait.count": Fraction(1, 4),
        "wait.mean": Fraction(1, 2),
    }
    tenths = changed(
        lambda d: [s["noise"][n].update(epsilon="0.1") for s in d["statistics"] for n in s["noise"]]
    )
    exact = compile_manifest(parse_manifest(yaml.safe_dump(tenths)))
    assert exact.epsilon() == Fraction(4, 10)  # exact decimals: not 0.1 + 0.1 + 0.1 + 0.1 in binary floats
    assert sum([Fraction(0.1)] * 4) != Fraction(4, 10)  # what binary floats would have given (IEEE 754)
    no_noise = compile_manifest(load_manifest(ROOT / "configs" / "rainfall-totals" / "manifest.yaml"))
    assert no_noise.epsilon() == 0 and no_noise.noisy_outputs == {}


def test_plan_reports_the_runs_epsilon_and_each_statistics_share() -> None:
    compiled = compile_manifest(load_manifest(CLINICS / "manifest.yaml"))
    figures = plan(compiled, 12.5e6, Speed(1e7, 1e7))
    assert figures["epsilon"] == "1.5"
    parts = figures["statistics"]
    assert [(p["name"], p["kind"], p["epsilon"]) for p in parts] == [  # type: ignore[union-attr]
        ("patients", "count", "0.5"),
        ("wait", "mean", "1"),
    ]
    assert sum(p["and_gates"] for p in parts) + figures["and_gates_release"] == figures["and_gates"]  # type: ignore[union-attr, operator]


def clamped_sum_manifest() -> Any:
    data = copy.deepcopy(BASE)
    data["statistics"] = [
        {
            "name": "wait",
            "compute": "sum",
            "column": "wait_minutes",
            "clamp": {"min": 10, "max": 240},
            "outputs": {"evaluator": ["count", "sum"]},
        }
    ]
    return parse_manifest(yaml.safe_dump(data))


def test_clamping_bounds_are_applied_inside_the_circuit() -> None:
    compiled = compile_manifest(clamped_sum_manifest())
    g, e = [5, 300, 10, 240, 241], [0, 1023, 120]
    expected = sum(min(max(v, 10), 240) for v in g + e)  # Python's min and max
    got = run_plain(compiled, records("g", wait_minutes=g), records("e", wait_minutes=e))
    assert got[Party.EVALUATOR] == {"withheld": False, "wait.count": 8, "wait.sum": expected}
    assert run_garbled(compiled, records("g", wait_minutes=g), records("e", wait_minutes=e)) == got


def noisy_histogram(bins: int, epsilon: str) -> Any:
    data = copy.deepcopy(BASE)
    data["privacy"] = {"rows_per_person": 1}
    data["statistics"] = [
        {
            "name": "waits",
            "compute": "histogram",
            "column": "wait_minutes",
            "edges": list(range(0, 10 * (bins + 1), 10)),
            "noise": {"counts": {"mechanism": "discrete_laplace", "epsilon": epsilon}},
            "outputs": {"evaluator": ["counts"]},
        }
    ]
    return compile_manifest(parse_manifest(yaml.safe_dump(data)))


def test_a_noisy_output_follows_the_discrete_laplace_law_over_many_garbled_runs() -> None:
    # Each run garbles the whole job with fresh random bits from the operating system for both parties; every bin
    # of the histogram is one sample of noise (sensitivity 1, one row per person). The released counts minus the
    # exact counts (numpy.histogram) must follow the discrete Laplace law with α = e^(−ε) (scipy.stats.dlaplace
    # with a = ε), never the exact value systematically.
    bins, runs, epsilon = 32, 40, 0.5
    compiled = noisy_histogram(bins, str(epsilon))
    g_rows = read_csv(CLINICS / "garbler.csv", compiled.manifest.tables.garbler)
    e_rows = read_csv(CLINICS / "evaluator.csv", compiled.manifest.tables.evaluator)
    values = g_rows.columns["wait_minutes"] + e_rows.columns["wait_minutes"]
    exact, _ = np.histogram(values, bins=list(range(0, 10 * (bins + 1), 10)))  # numpy.histogram
    differences: list[int] = []
    for _ in range(runs):
        bits = {Party.GARBLER: encode_inputs(compiled, Party.GARBLER, g_rows)}
        bits[Party.EVALUATOR] = encode_inputs(compiled, Party.EVALUATOR, e_rows)
        outputs = run_locally(compiled.program, bits, chunk_bytes=1 << 16).outputs
        released = compiled.decode(Party.EVALUATOR, outputs[Party.EVALUATOR])["waits.counts"]
        differences += [int(r) - int(x) for r, x in zip(released, exact, strict=True)]
    samples = np.array(differences)
    law = stats.dlaplace(epsilon)  # P(k) = tanh(a/2)·e^(−a|k|)
    ks = np.arange(-6, 7)
    observed = [np.count_nonzero(samples < -6)] + [np.count_nonzero(samples == k) for k in ks]
    observed.append(np.count_nonzero(samples > 6))
    expected = [law.cdf(-7), *law.pmf(ks), law.sf(6)]
    n = samples.size
    p = stats.chisquare(np.array(observed, dtype=float), np.array(expected) * n / sum(expected)).pvalue
    assert p >= 1e-3, (p, observed)
    assert abs(float(samples.mean())) < 4 * np.sqrt(law.var() / n)
    assert 0 < np.count_nonzero(samples == 0) < n / 2  # P(0) = tanh(0.25) ≈ 0.245
    with pytest.raises(AssertionError):  # the same check tells a wrong law apart (ε = 1 instead of 0.5)
        wrong = stats.dlaplace(1.0)
        expected_wrong = [wrong.cdf(-7), *wrong.pmf(ks), wrong.sf(6)]
        q = stats.chisquare(
            np.array(observed, dtype=float), np.array(expected_wrong) * n / sum(expected_wrong)
        ).pvalue
        assert q >= 1e-3


def test_encoding_draws_fresh_random_bits_for_the_noise_every_time() -> None:
    compiled = noisy_histogram(4, "1")
    rows = read_csv(CLINICS / "garbler.csv", compiled.manifest.tables.garbler, key_secret=SECRET)
    layout = compiled.inputs[Party.GARBLER]
    assert layout.random_bits > 0
    a, b = (encode_inputs(compiled, Party.GARBLER, rows) for _ in range(2))
    table_bits = layout.bits - layout.random_bits
    assert np.array_equal(a[:table_bits], b[:table_bits])  # the table's part is deterministic
    assert not np.array_equal(
        a[table_bits:], b[table_bits:]
    )  # the noise's part is not (2^-random_bits chance)


def test_a_disclosure_rule_on_an_exact_count_next_to_noisy_outputs_is_refused_with_its_field() -> None:
    def change(d: dict[str, Any], own: bool) -> None:
        entry = d["statistics"][1]
        del entry["noise"]["count"]
        entry["outputs"] = {"evaluator": ["sum", "mean"]}
        if own:
            entry["disclosure"] = {"min_count": 2}
        else:
            d["disclosure"] = {"min_count": 3}

    for own, field in ((False, "disclosure.min_count"), (True, "statistics[1].disclosure.min_count")):
        problems = problems_of(changed(lambda d, own=own: change(d, own)))
        assert problems == [
            f"{field}: wait (mean) has noisy outputs, and a disclosure rule decided on the exact count would "
            "reveal what the noise hides: noise 'count' too (the rule then compares the noisy count), or set "
            "min_count: 0"
        ]
