"""``jointstat bench noise`` runs end to end through the garbled circuit and reports the figures it promises (no
speed is asserted here)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from jointstat import cli
from jointstat.bench import noise as bench_noise
from jointstat.circuit.library import noise


def test_bench_draws_through_the_garbled_circuit_and_reports_json_figures(
    capsys: pytest.CaptureFixture[str],
) -> None:
    argv = ["bench", "noise", "--epsilon", "2", "--sensitivity", "3", "--samples", "300", "--lanes", "128"]
    assert cli.main([*argv, "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    params = noise.noise_parameters("2", 3)
    assert figures["samples"] == 300 and figures["batches"] == 3 and figures["lanes"] == 128
    assert figures["epsilon"] == "2" and figures["noise_bits"] == params.noise_bits
    assert figures["and_gates_per_sample"] == noise.and_gates_per_sample(params)
    assert figures["random_bits_per_party_per_sample"] == params.bits_per_sample
    assert 0.0 <= figures["chi2_pvalue"] <= 1.0 and figures["variance_ratio"] > 0
    assert figures["delta_log2_bound"] <= -64


def test_goodness_of_fit_merges_sparse_values_and_rejects_a_wrong_law() -> None:
    params = noise.noise_parameters("0.5", 1)
    law = noise.noise_pmf(params)
    rng = np.random.default_rng(5)
    bits = params.bits_per_sample
    samples = noise.plain_noise(
        params, noise.random_bits(5000, bits, rng), noise.random_bits(5000, bits, rng)
    )
    pvalue, bins = bench_noise.goodness_of_fit(samples, law)
    dense = sum(1 for v in law.values() if float(v) * 5000 >= 5)
    assert bins == dense + 2 and pvalue >= 1e-3
    wrong, _ = bench_noise.goodness_of_fit(samples + 1, law)
    assert wrong < 1e-6


def test_bench_refuses_bad_settings(capsys: pytest.CaptureFixture[str]) -> None:
    assert bench_noise.run(epsilon="0", sensitivity=1, samples=10, as_json=True) == 2
    assert "bench noise.epsilon: must be greater than 0" in capsys.readouterr().err
    assert bench_noise.run(epsilon="0.5", sensitivity=1, samples=0, as_json=True) == 2
    assert "--samples" in capsys.readouterr().err
    assert bench_noise.run(epsilon="0.001", sensitivity=1, samples=10, as_json=True) == 2
    assert "noise bits" in capsys.readouterr().err
