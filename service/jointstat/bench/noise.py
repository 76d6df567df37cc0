"""``jointstat bench noise``: discrete Laplace samples drawn through the garbled circuit, checked against their law.

One program of ``lanes`` samples (``library.noise.draw_noise``) is measured once, then garbled and evaluated
again for every batch (garbler and evaluator in one process, ``garble.local``), each time with fresh Δ
and labels and with fresh random bits from the operating system for both parties, until ``samples`` samples are
drawn. The first batch is also computed by the plain sampler and must agree bit for bit. Figures:

* ``chi2_pvalue`` — ``scipy.stats.chisquare`` of the samples against the exact law of the implemented sampler
  (``noise_pmf``), values whose expected count is below 5 merged into the two tail bins;
* ``mean``, ``variance`` (sample variance) and ``variance_ratio`` — measured variance ÷ 2α/(1 − α)², the variance
  of the ideal discrete Laplace law at α = e^(−ε/Δ);
* ``and_gates_per_sample`` — AND gates of the program ÷ lanes (counted on the count backend);
* ``random_bits_per_party_per_sample``, ``noise_bits``, and the base-2 logarithms of the guarantee's bounds
  (δ, the dropped tail, the distance from the ideal law), from ``NoiseParameters.describe``;
* ``garble_s``, ``evaluate_s``, ``seconds`` — wall times of the garbler's and evaluator's work and of the whole run.
"""

from __future__ import annotations

import sys
import time
from fractions import Fraction

import numpy as np

from jointstat.bench.garble import timed_run
from jointstat.bench.report import emit, peak_rss_mib
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int
from jointstat.circuit.library import noise
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program

DEFAULT_LANES = 4096
MIN_EXPECTED = 5.0  # chi-square bins with fewer expected samples are merged into the tails (common practice)


def noise_program(params: noise.NoiseParameters, lanes: int) -> Program:
    """The sampler for ``lanes`` samples, noise words to the evaluator, measured."""

    def run(bld: Builder) -> None:
        g = bld.input(Party.GARBLER, (lanes, params.bits_per_sample))
        e = bld.input(Party.EVALUATOR, (lanes, params.bits_per_sample))
        bld.output(Party.EVALUATOR, noise.draw_noise(bld, params, g, e))

    return Program.of(run, name="noise sampler")


def goodness_of_fit(samples: np.ndarray, law: dict[int, Fraction]) -> tuple[float, int]:
    """(p-value, bins) of ``scipy.stats.chisquare`` against ``law``; sparse values merged into the two tails."""
    from scipy import stats

    n = samples.shape[0]
    ks = np.array(sorted(law), dtype=np.int64)
    expected = np.array([float(law[int(k)]) for k in ks]) * n
    dense = ks[expected >= MIN_EXPECTED]
    low, high = int(dense.min()), int(dense.max())
    inner = np.arange(low, high + 1)
    counts = np.bincount(samples[(samples >= low) & (samples <= high)] - low, minlength=inner.size)
    observed = np.concatenate([[np.count_nonzero(samples < low)], counts, [np.count_nonzero(samples > high)]])
    exp = np.concatenate(
        [[expected[ks < low].sum()], expected[(ks >= low) & (ks <= high)], [expected[ks > high].sum()]]
    )
    keep = exp > 0  # a tail bin with no mass (a law of one bit) is dropped
    observed, exp = observed[keep].astype(float), exp[keep]
    exp *= n / exp.sum()  # float rounding only: the law sums to 1 exactly
    return float(stats.chisquare(observed, exp).pvalue), int(observed.size)


def run(epsilon: str, sensitivity: int, samples: int, as_json: bool, lanes: int = DEFAULT_LANES) -> int:
    try:
        import scipy  # noqa: F401 - the reference for the goodness of fit
    except ImportError:
        print(
            "jointstat bench noise: needs scipy (install the development extras: pip install -e '.[dev]')",
            file=sys.stderr,
        )
        return 2
    if samples < 1 or lanes < 1:
        print("jointstat bench noise: --samples and --lanes must be at least 1", file=sys.stderr)
        return 2
    started = time.perf_counter()
    try:
        params = noise.noise_parameters(epsilon, sensitivity, field="bench noise")
        law = noise.noise_pmf(params)
    except noise.NoiseError as exc:
        print(f"jointstat bench noise: {exc}", file=sys.stderr)
        return 2
    lanes = min(lanes, samples)
    program = noise_program(params, lanes)
    and_gates = program.size.and_gates
    width = params.noise_width
    drawn: list[np.ndarray] = []
    garble_s = evaluate_s = 0.0
    left = samples
    batches = 0
    while left > 0:
        g = noise.random_bits(lanes, params.bits_per_sample)  # fresh bits from os.urandom for each party
        e = noise.random_bits(lanes, params.bits_per_sample)
        timed = timed_run(program, {Party.GARBLER: g.reshape(-1), Party.EVALUATOR: e.reshape(-1)})
        result = timed.run
        garble_s += timed.garble_s
        evaluate_s += timed.evaluate_s
        values = bits_to_int(result.outputs[Party.EVALUATOR].reshape(lanes, width), signed=True)
        if batches == 0 and not np.array_equal(values, noise.plain_noise(params, g, e)):
            raise RuntimeError("garbled noise samples disagree with the plain sampler")
        take = min(left, lanes)
        drawn.append(np.asarray(values[:take], dtype=np.int64))
        left -= take
        batches += 1
    data = np.concatenate(drawn)
    pvalue, bins = goodness_of_fit(data, law)
    variance = float(data.var(ddof=1)) if data.size > 1 else 0.0
    ideal = noise.ideal_variance(params.epsilon, sensitivity)
    described = params.describe()
    emit(
        "discrete Laplace noise through the garbled circuit (one process)",
        {
            "epsilon": described["epsilon"],
            "sensitivity": sensitivity,
            "samples": int(data.size),
            "chi2_pvalue": pvalue,
            "chi2_bins": bins,
            "mean": float(data.mean()),
            "variance": variance,
            "variance_ratio": variance / ideal,
            "and_gates_per_sample": and_gates / lanes,
            "random_bits_per_party_per_sample": params.bits_per_sample,
            "noise_bits": params.noise_bits,
            "delta_log2_bound": described["delta_log2_bound"],
            "tail_log2_bound": described["tail_log2_bound"],
            "distance_log2_bound": described["distance_log2_bound"],
            "lanes": lanes,
            "batches": batches,
            "garble_s": round(garble_s, 2),
            "evaluate_s": round(evaluate_s, 2),
            "seconds": round(time.perf_counter() - started, 2),
            "peak_rss_mib": round(peak_rss_mib(), 1),
        },
        as_json,
    )
    return 0
