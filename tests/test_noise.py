"""Discrete Laplace noise inside the circuit: the construction's identities in exact arithmetic (``fractions``), the
thresholds against ``decimal`` (correctly rounded exp), the implemented law against its own privacy claim and
against ``scipy.stats.dlaplace``, the plain sampler against that law (``scipy.stats.chisquare``), and the circuit
against the plain sampler bit for bit."""

from __future__ import annotations

import math
from decimal import ROUND_FLOOR, Decimal, localcontext
from fractions import Fraction
from functools import cache

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int, int_to_bits
from jointstat.circuit.library import noise
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from scipy import stats

SETTINGS = [("0.5", 1), ("2", 3), ("1", 2), ("0.1", 1), ("50", 1)]


@cache
def params(epsilon: str, sensitivity: int) -> noise.NoiseParameters:
    return noise.noise_parameters(epsilon, sensitivity)


@cache
def pmf(epsilon: str, sensitivity: int) -> dict[int, Fraction]:
    return noise.noise_pmf(params(epsilon, sensitivity))


def decimal_exp_neg(u: Fraction, digits: int) -> Decimal:
    """e^(−u) from ``decimal`` (its exp is correctly rounded, Python ``decimal`` documentation)."""
    with localcontext() as ctx:
        ctx.prec = digits
        return (-(Decimal(u.numerator) / Decimal(u.denominator))).exp()


def exp_lower(x: Fraction, digits: int = 60) -> Fraction:
    """A rational lower bound on e^x: decimal's correctly rounded value, rounded down once more, minus one unit."""
    with localcontext() as ctx:
        ctx.prec = digits
        ctx.rounding = ROUND_FLOOR
        value = (Decimal(x.numerator) / Decimal(x.denominator)).exp()
        unit = Decimal(1).scaleb(value.adjusted() - digits + 1)
        return Fraction(value - unit)


# -- the construction, in exact arithmetic -------------------------------------------------------------------------


@given(st.integers(1, 50), st.integers(2, 51), st.integers(1, 6))
def test_binary_digits_of_a_truncated_geometric_are_independent_biased_bits(a: int, b: int, n: int) -> None:
    # Π_{i<n} Bernoulli(α^(2^i)/(1 + α^(2^i))) over the bits of g is (1 − α)·α^g / (1 − α^(2^n)) for g < 2^n.
    alpha = Fraction(min(a, b - 1), b)
    ps = [alpha ** (1 << i) / (1 + alpha ** (1 << i)) for i in range(n)]
    for g in range(1 << n):
        product = Fraction(1)
        for i, p in enumerate(ps):
            product *= p if (g >> i) & 1 else 1 - p
        assert product == (1 - alpha) * alpha**g / (1 - alpha ** (1 << n))


@given(st.integers(1, 30), st.integers(2, 31), st.integers(1, 4))
def test_difference_of_truncated_geometrics_has_the_law_the_privacy_accounting_uses(
    a: int, b: int, n: int
) -> None:
    # P_t(N = k) = c²·α^|k|·(1 − α^(2(T + 1 − |k|)))/(1 − α²), c = (1 − α)/(1 − α^(T+1)), T = 2^n − 1.
    alpha = Fraction(min(a, b - 1), b)
    t = (1 << n) - 1
    c = (1 - alpha) / (1 - alpha ** (t + 1))
    geo = [c * alpha**g for g in range(t + 1)]
    for k in range(-t, t + 1):
        direct = sum(geo[g + k] * geo[g] for g in range(t + 1) if 0 <= g + k <= t)
        h = 1 - alpha ** (2 * (t + 1 - abs(k)))
        assert direct == c * c * alpha ** abs(k) * h / (1 - alpha * alpha)


def test_as_the_truncation_grows_the_difference_approaches_the_discrete_laplace_law() -> None:
    # The untruncated law (1 − α)/(1 + α)·α^|k| (Ghosh–Roughgarden–Sundararajan 2009) is the limit T → ∞ of the
    # formula above; with α = 1/2 and T = 2^6 − 1 the two agree to within α^(2(T + 1 − |k|)) relative.
    alpha, t = Fraction(1, 2), 63
    c = (1 - alpha) / (1 - alpha ** (t + 1))
    for k in range(-5, 6):
        truncated = c * c * alpha ** abs(k) * (1 - alpha ** (2 * (t + 1 - abs(k)))) / (1 - alpha * alpha)
        ideal = (1 - alpha) / (1 + alpha) * alpha ** abs(k)
        assert abs(truncated / ideal - 1) <= 4 * alpha ** (t + 1 - abs(k))


@given(st.fractions(min_value=0, max_value=80, max_denominator=10**6), st.sampled_from([128, 256, 400]))
def test_exp_bounds_enclose_the_exponential(u: Fraction, precision: int) -> None:
    lo, hi = noise._exp_neg_bounds(u, precision)
    reference = Fraction(decimal_exp_neg(u, 200))  # correctly rounded to 200 digits
    slack = reference / 10**190
    assert Fraction(lo, 1 << precision) <= reference + slack
    assert Fraction(hi, 1 << precision) >= reference - slack
    assert hi - lo <= 1 << 12  # a few units of 2^−precision after at most eight outward-rounded squarings


@pytest.mark.parametrize(("epsilon", "sensitivity"), SETTINGS)
def test_thresholds_are_rounded_from_intervals_that_enclose_the_ideal_bit_probabilities(
    epsilon: str, sensitivity: int
) -> None:
    p = params(epsilon, sensitivity)
    assert p.sampling_epsilon == Fraction(epsilon) * (1 - noise.SLACK)
    u = p.sampling_epsilon / sensitivity
    widths = []
    for bit in p.bits:
        a = Fraction(decimal_exp_neg(u * (1 << bit.index), 120))
        ideal = a / (1 + a)  # ideal to ~110 digits; the intervals are far wider than that error
        assert bit.low - ideal / 10**100 <= ideal <= bit.high + ideal / 10**100
        assert (bit.high - bit.low) * (1 << bit.width) <= Fraction(1, 256)
        q = bit.probability
        assert q == Fraction(bit.threshold, 2**bit.width)
        assert abs(q - ideal) <= bit.error <= Fraction(1, 2 ** (bit.width + 1)) + (bit.high - bit.low)
        # w_i = z_i + R: the threshold keeps the same number R of significant bits for every i.
        zeros = noise._leading_zeros(bit.low)
        assert Fraction(1, 2 ** (zeros + 1)) < ideal
        widths.append(bit.width - zeros)
    assert len(set(widths)) == 1


@pytest.mark.parametrize(("epsilon", "sensitivity"), SETTINGS)
def test_the_guarantee_closes_the_accounting_with_the_nominal_epsilon(epsilon: str, sensitivity: int) -> None:
    p = params(epsilon, sensitivity)
    g = p.guarantee
    eps = Fraction(epsilon)
    assert g.epsilon == eps
    assert g.rounding == sum(bit.log_error for bit in p.bits)
    assert p.sampling_epsilon + 4 * g.rounding <= g.loss_interior <= eps
    assert g.delta <= Fraction(1, 2**64) and g.tail <= Fraction(1, 2**64)
    assert (1 << p.noise_bits) - g.edge - sensitivity >= 1
    assert g.distance_sampling == 2 * sum(bit.error for bit in p.bits) + 2 * g.tail
    # rounding and truncation stay below 2^−36; the deliberate 2^−32 slack in ε dominates the rest
    assert g.distance_sampling < Fraction(1, 2**36) and g.distance_sampling < g.distance < Fraction(1, 2**30)


# -- the exact law of the implemented sampler ----------------------------------------------------------------------


@pytest.mark.parametrize(("epsilon", "sensitivity"), SETTINGS)
def test_the_exact_law_sums_to_one_is_symmetric_and_bounded(epsilon: str, sensitivity: int) -> None:
    law = pmf(epsilon, sensitivity)
    t = params(epsilon, sensitivity).bound
    assert sum(law.values()) == 1
    assert sorted(law) == list(range(-t, t + 1))
    assert all(law[k] == law[-k] for k in law)
    assert all(law[k] > 0 for k in law)  # every value of [−T, T] can occur


@pytest.mark.parametrize(("epsilon", "sensitivity"), [("0.5", 1), ("2", 3), ("1", 2), ("50", 1)])
def test_the_implemented_law_is_epsilon_delta_private_by_direct_computation(
    epsilon: str, sensitivity: int
) -> None:
    # Dwork–Roth definition 2.4 for additive noise: for every shift |s| ≤ Δ,
    # Σ_k max(0, P(k) − e^ε·P(k − s)) ≤ δ. Computed from the exact law with a lower bound on e^ε (conservative).
    p = params(epsilon, sensitivity)
    law = pmf(epsilon, sensitivity)
    e_eps = exp_lower(Fraction(epsilon))
    t = p.bound
    for s in range(1, sensitivity + 1):
        excess = sum(max(Fraction(0), law[k] - e_eps * law.get(k - s, Fraction(0))) for k in law)
        assert excess <= p.guarantee.delta
        # away from the edge band no excess at all: the likelihood ratio is within e^ε
        inner = t - p.guarantee.edge - sensitivity
        assert all(law[k] <= e_eps * law[k - s] for k in range(-inner, inner + 1))


@pytest.mark.parametrize(("epsilon", "sensitivity"), [("0.5", 1), ("2", 3), ("0.1", 1)])
def test_the_implemented_law_is_within_its_distance_bound_of_scipys_discrete_laplace(
    epsilon: str, sensitivity: int
) -> None:
    # scipy.stats.dlaplace(a) has pmf tanh(a/2)·e^(−a|k|): the discrete Laplace law with α = e^(−a), a = ε/Δ.
    p = params(epsilon, sensitivity)
    law = pmf(epsilon, sensitivity)
    ks = np.arange(-p.bound, p.bound + 1)
    ideal = stats.dlaplace(float(Fraction(epsilon)) / sensitivity).pmf(ks)
    mine = np.array([float(law[int(k)]) for k in ks])
    outside = 1.0 - ideal.sum()  # ideal mass beyond ±T
    tv = 0.5 * (np.abs(mine - ideal).sum() + outside)
    assert tv <= float(p.guarantee.distance) + 1e-12  # float rounding of ~2^8 terms
    implemented_variance = sum(k * k * v for k, v in law.items())
    ideal_variance = stats.dlaplace(float(Fraction(epsilon)) / sensitivity).var()
    assert noise.ideal_variance(Fraction(epsilon), sensitivity) == pytest.approx(ideal_variance, rel=1e-12)
    assert float(implemented_variance) == pytest.approx(ideal_variance, rel=1e-8)


# -- the plain sampler -----------------------------------------------------------------------------------------------


def chi2_pvalue(samples: np.ndarray, law: dict[int, Fraction]) -> float:
    """Goodness of fit with scipy.stats.chisquare; bins with fewer than 5 expected samples merged into the tails."""
    n = samples.shape[0]
    ks = sorted(law)
    expected = {k: float(law[k]) * n for k in ks}
    inner = [k for k in ks if expected[k] >= 5 and expected.get(-k, 0) >= 5]
    low, high = min(inner), max(inner)
    obs = [np.count_nonzero(samples < low)] + [np.count_nonzero(samples == k) for k in inner]
    obs.append(np.count_nonzero(samples > high))
    exp = [sum(expected[k] for k in ks if k < low)] + [expected[k] for k in inner]
    exp.append(sum(expected[k] for k in ks if k > high))
    exp_arr = np.array(exp) * (n / sum(exp))
    return float(stats.chisquare(np.array(obs, dtype=float), exp_arr).pvalue)


def test_the_plain_sampler_follows_the_exact_law_and_the_test_can_tell_a_wrong_one() -> None:
    p = params("0.5", 1)
    rng = np.random.default_rng(20260501)
    count = 20_000
    g = noise.random_bits(count, p.bits_per_sample, rng)
    e = noise.random_bits(count, p.bits_per_sample, rng)
    samples = noise.plain_noise(p, g, e)
    assert chi2_pvalue(samples, pmf("0.5", 1)) >= 1e-3
    assert chi2_pvalue(samples, pmf("1", 2)) >= 1e-3  # the same α = e^(−1/2): the same law
    assert chi2_pvalue(samples, noise.noise_pmf(noise.noise_parameters("0.6", 1))) < 1e-6


def test_random_bits_from_the_operating_system_are_bits() -> None:
    bits = noise.random_bits(1000, 77)
    assert bits.shape == (1000, 77) and bits.dtype == np.uint8 and set(np.unique(bits)) <= {0, 1}
    assert 0.45 < bits.mean() < 0.55  # 77,000 fair bits: 17 standard deviations of room


# -- the circuit -----------------------------------------------------------------------------------------------------


def noise_program(p: noise.NoiseParameters, lanes: int) -> Program:
    def run(bld: Builder) -> None:
        g = bld.input(Party.GARBLER, (lanes, p.bits_per_sample))
        e = bld.input(Party.EVALUATOR, (lanes, p.bits_per_sample))
        bld.output(Party.EVALUATOR, noise.draw_noise(bld, p, g, e))

    return Program.of(run)


def evaluate(program: Program, inputs: dict[Party, np.ndarray]) -> np.ndarray:
    """The program on the plain backend: the evaluator's output bits."""
    plain = PlainBackend({party: bits.reshape(-1) for party, bits in inputs.items()})
    program.run(Builder(plain))
    plain.check_inputs_used()
    return plain.outputs(Party.EVALUATOR)


def run_circuit(p: noise.NoiseParameters, g: np.ndarray, e: np.ndarray) -> np.ndarray:
    out = evaluate(noise_program(p, g.shape[0]), {Party.GARBLER: g, Party.EVALUATOR: e})
    return bits_to_int(out.reshape(g.shape[0], p.noise_width), signed=True)


def boundary_bits(p: noise.NoiseParameters) -> np.ndarray:
    """Uniform words set to t_i, t_i − 1, 0 and all ones, for every bit of both geometrics in turn."""
    rows = []
    for value_of in (
        lambda b: b.threshold,
        lambda b: b.threshold - 1,
        lambda b: 0,
        lambda b: (1 << b.width) - 1,
    ):
        for first in (True, False):
            words = []
            for geometric in range(2):
                for bit in p.bits:
                    v = value_of(bit) if (geometric == 0) == first else (1 << bit.width) - 1 - value_of(bit)
                    words.append(int_to_bits(v, bit.width))
            rows.append(np.concatenate(words))
    return np.array(rows, dtype=np.uint8)


@pytest.mark.parametrize(("epsilon", "sensitivity"), SETTINGS)
def test_the_circuit_sampler_equals_the_plain_sampler_bit_for_bit(epsilon: str, sensitivity: int) -> None:
    p = params(epsilon, sensitivity)
    rng = np.random.default_rng(7)
    edges = boundary_bits(p)
    g = np.concatenate([noise.random_bits(300, p.bits_per_sample, rng), edges])
    e = np.concatenate([noise.random_bits(300, p.bits_per_sample, rng), np.zeros_like(edges)])
    circuit = run_circuit(p, g, e)
    plain = noise.plain_noise(p, g, e)
    assert np.array_equal(circuit, plain)
    # all-zero words make every biased bit 1 (t_i ≥ 1), all-one words make it 0 (t_i < 2^w_i): ±T are reached
    assert {p.bound, -p.bound} <= set(plain.tolist())


def test_a_word_equal_to_the_threshold_gives_0_and_one_below_gives_1() -> None:
    p = params("0.5", 1)
    sizes = [b.width for b in p.bits]
    for i, bit in enumerate(p.bits):
        for value, expected in ((bit.threshold, 0), (bit.threshold - 1, 1)):
            words = [int_to_bits((1 << w) - 1, w) for w in sizes] * 2  # every other biased bit 0
            words[i] = int_to_bits(value, bit.width)
            g = np.concatenate(words)[None, :]
            e = np.zeros_like(g)
            assert run_circuit(p, g, e)[0] == expected << i
            assert noise.plain_noise(p, g, e)[0] == expected << i


@pytest.mark.parametrize("fixed", [Party.GARBLER, Party.EVALUATOR])
def test_with_one_partys_bits_fixed_the_other_partys_bits_alone_give_the_full_noise_law(fixed: Party) -> None:
    p = params("0.5", 1)
    rng = np.random.default_rng(99 + int(fixed))
    runs = 6000
    fixed_bits = noise.random_bits(1, p.bits_per_sample, rng)[0]
    varied = noise.random_bits(runs, p.bits_per_sample, rng)  # one lane per run
    inputs = {fixed: np.tile(fixed_bits, (runs, 1)), Party(1 - int(fixed)): varied}
    out = evaluate(noise_program(p, runs), inputs)
    samples = bits_to_int(out.reshape(runs, p.noise_width), signed=True)
    assert chi2_pvalue(samples, pmf("0.5", 1)) >= 1e-3
    # and the fixed party's bits do not decide the value: the same fixed bits give many different noises
    assert len(set(samples.tolist())) > 20


def test_flipping_one_random_bit_of_either_party_flips_the_same_uniform_bit() -> None:
    # U = garbler ⊕ evaluator: flipping bit j of either party has the same effect on the sample.
    p = params("0.5", 1)
    rng = np.random.default_rng(3)
    g = noise.random_bits(1, p.bits_per_sample, rng)
    e = noise.random_bits(1, p.bits_per_sample, rng)
    flips = np.eye(p.bits_per_sample, dtype=np.uint8)
    by_garbler = run_circuit(p, g ^ flips, np.repeat(e, p.bits_per_sample, axis=0))
    by_evaluator = run_circuit(p, np.repeat(g, p.bits_per_sample, axis=0), e ^ flips)
    assert np.array_equal(by_garbler, by_evaluator)
    assert len(set(by_garbler.tolist())) > 1


@pytest.mark.parametrize("signed", [False, True])
def test_adding_noise_cannot_overflow_at_the_extremes(signed: bool) -> None:
    p = params("2", 3)
    width = 5
    values = [-(1 << (width - 1)), (1 << (width - 1)) - 1] if signed else [0, (1 << width) - 1]
    edges = boundary_bits(p)[4:6]  # all-zero then all-one words for geometric 1: noise +T, then −T
    lanes = len(values) * 2

    def run(bld: Builder) -> None:
        v = bld.input(Party.GARBLER, (lanes, width))
        g = bld.input(Party.GARBLER, (lanes, p.bits_per_sample))
        e = bld.input(Party.EVALUATOR, (lanes, p.bits_per_sample))
        total = noise.add_noise(bld, p, v, g, e, signed=signed)
        assert total.shape == (lanes, noise.noisy_width(width, signed, p))
        bld.output(Party.EVALUATOR, total)

    value_bits = np.repeat(int_to_bits(values, width), 2, axis=0)
    g_bits = np.tile(edges, (len(values), 1))
    out = evaluate(
        Program.of(run),
        {
            Party.GARBLER: np.concatenate([value_bits.reshape(-1), g_bits.reshape(-1)]),
            Party.EVALUATOR: np.zeros(lanes * p.bits_per_sample, dtype=np.uint8),
        },
    )
    got = bits_to_int(out.reshape(lanes, -1), signed=True)
    expected = [x + s * p.bound for x in values for s in (1, -1)]
    assert got.tolist() == expected


@pytest.mark.parametrize(("epsilon", "sensitivity"), SETTINGS)
def test_and_gates_per_sample_are_one_per_compared_bit_after_the_folded_ones(
    epsilon: str, sensitivity: int
) -> None:
    p = params(epsilon, sensitivity)
    trailing = sum((b.threshold & -b.threshold).bit_length() - 1 for b in p.bits)
    expected = 2 * (p.bits_per_geometric - p.noise_bits - trailing) + p.noise_bits
    assert noise.and_gates_per_sample(p) == expected
    assert noise_program(p, 5).size.and_gates == 5 * expected
    assert p.bits_per_sample == 2 * sum(b.width for b in p.bits)


# -- settings ----------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("epsilon", "sensitivity", "field", "words"),
    [
        ("0", 1, "job.noise.epsilon", "greater than 0"),
        ("-0.5", 1, "job.noise.epsilon", "greater than 0"),
        (0.5, 1, "job.noise.epsilon", "binary float"),
        ("half", 1, "job.noise.epsilon", "not a decimal"),
        ("0.5", 0, "job.noise.sensitivity", "between 1"),
        ("0.5", 1.0, "job.noise.sensitivity", "integer"),
        ("0.5", True, "job.noise.sensitivity", "integer"),
        ("1e-15", 1, "job.noise.epsilon", "too small"),
        ("1e-9", 10**5, "job.noise.epsilon", "too small"),
        ("64.5", 1, "job.noise.epsilon", "above 64"),
        ("0.5", 2**41, "job.noise.sensitivity", "between 1"),
    ],
)
def test_bad_settings_are_refused_naming_the_field(
    epsilon: object, sensitivity: object, field: str, words: str
) -> None:
    with pytest.raises(noise.NoiseError) as err:
        noise.noise_parameters(epsilon, sensitivity, field="job.noise")
    assert str(err.value).startswith(field + ":") and words in str(err.value)


def test_epsilon_is_taken_as_the_decimal_written() -> None:
    assert params("0.1", 1).epsilon == Fraction(1, 10)
    assert noise.noise_parameters(Decimal("0.1"), 1).epsilon == Fraction(1, 10)
    assert noise.noise_parameters(Fraction(1, 10), 1).bits == params("0.1", 1).bits
    assert math.isclose(float(params("0.1", 1).sampling_epsilon), 0.1, rel_tol=1e-9)


def test_the_exact_law_is_refused_beyond_its_size_limit() -> None:
    wide = noise.noise_parameters("0.001", 1)
    assert wide.noise_bits > noise.EXACT_PMF_MAX_BITS
    with pytest.raises(noise.NoiseError, match="noise bits"):
        noise.noise_pmf(wide)
