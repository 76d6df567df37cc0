"""Exact discrete Laplace noise drawn inside the circuit, from random bits both parties feed.

Theory of operation
-------------------
**The law.** The discrete Laplace (two-sided geometric) distribution with parameter α = e^(−ε/Δ) has
P(N = k) = (1 − α)/(1 + α) · α^|k| for every integer k. Adding it to an integer statistic of sensitivity Δ (one
person changes the statistic by at most Δ) releases the value with ε-differential privacy: the geometric mechanism
of Ghosh–Roughgarden–Sundararajan (STOC 2009), the integer counterpart of the Laplace mechanism of Dwork–Roth
("The Algorithmic Foundations of Differential Privacy", 2014, definition 3.3 and theorem 3.6; numbers of
definitions and theorems of that book are cited from memory here and below).
Everything below is integer or rational arithmetic; no floating-point number decides a sample (Mironov, CCS 2012,
shows how floating-point Laplace samplers leak).

**Construction** (each step is an identity checked with ``fractions`` in the tests):

1. N = G₁ − G₂ for independent geometric G with P(G = g) = (1 − α)·α^g, g ≥ 0: for k ≥ 0,
   Σ_g (1−α)²·α^(g+k)·α^g = (1−α)²·α^k/(1 − α²) = (1−α)/(1+α)·α^k, and symmetrically for k < 0.
2. The binary digits of G are independent, bit i being 1 with probability p_i = a_i/(1 + a_i), a_i = α^(2^i):
   every g ≥ 0 has one binary expansion, so Σ_g α^g = Π_i (1 + α^(2^i)) = 1/(1 − α), and
   (1 − α)·α^g = Π_i a_i^(b_i)/(1 + a_i) — a product of independent Bernoulli(p_i) laws.
3. Keeping bits 0 … n−1 only (bits ≥ n fixed at 0) gives G conditioned on G < 2^n, because
   Π_{i<n} (1 + a_i) = (1 − α^(2^n))/(1 − α) (telescoping). The dropped tail has mass P(G ≥ 2^n) = α^(2^n).
4. Each biased bit is one comparison: with U uniform on w_i fresh bits and a public integer threshold t_i, the bit
   [U < t_i] is 1 with probability exactly q_i = t_i / 2^(w_i) (Champion–shelat–Ullman, CCS 2019, sample biased
   coins inside secure computation by comparing uniform bits against a public fixed-point threshold).
5. The circuit XORs the garbler's and the evaluator's random bits: each party's bits are uniform and independent of
   the other's, so the XOR is uniform whatever one party feeds, and neither alone knows (or can subtract) the noise.

**Rigorous thresholds.** α is irrational. ``_ExpBounds`` brackets e^(−u) between integers over 2^P: the alternating
Taylor series of e^(−y) for y = u/2^k ≤ 1/2 (its terms decrease, so consecutive partial sums enclose the limit),
then k squarings, each rounded outward (floor for the lower bound, ceiling for the upper). Squaring again gives
every a_i = α^(2^i); p_i = a_i/(1 + a_i) is increasing in a_i, so [p_lo, p_hi] encloses p_i exactly as fractions.
The working precision P doubles until every interval is 2^(−8) of a threshold step narrow. With z_i the number of
leading zero bits of p_i (p_i > 2^(−z_i − 1)) the comparison uses w_i = z_i + R bits and t_i = round(p_mid·2^(w_i)),
so |q_i − p_i| ≤ e_i (exact, from the interval) and e_i/p_i ≲ 2^(−R).

**What the implemented sampler guarantees.** The sampler is built for ε_s = ε·(1 − SLACK) (SLACK = 2^−32), a hair
*wider* than asked; the slack absorbs the rounding and the truncation, so the released value is (ε, δ)-
differentially private with **ε exactly the decimal that was written** and δ ≤ 2^−64 (Dwork–Roth, definition 2.4):

* Rounding: L = Σ_i e_i / min(p_i, q_i, 1 − p_i, 1 − q_i) bounds |ln P'(G = g) − ln P_t(G = g)| for every g (P' the
  implemented, P_t the ideal truncated law at ε_s; |ln x − ln y| ≤ |x − y|/min(x, y)). So P'(N = k) is within
  e^(±2L) of P_t(N = k), and likelihood ratios of N within e^(±4L).
* Edges: the truncated difference has P_t(N = k) = C·α^|k|·h(k), h(k) = 1 − α^(2(T + 1 − |k|)), T = 2^n − 1.
  For |s| ≤ Δ and |k − s| ≤ T − m: P_t(k)/P_t(k − s) ≤ α^(−Δ)/h(k − s) ≤ e^(ε_s)/(1 − η), η = α^(2(m + 1)).
  Where |k − s| > T − m (the last m values and beyond), |k| > T − m − Δ, which has probability at most
  δ = 2·e^L·α^(2^n − m − Δ) (N ≥ j needs G₁ ≥ j, and P_t(G ≥ j) ≤ α^j).
* ε_s + 4L + η/(1 − η) ≤ ε (−ln(1 − η) ≤ η/(1 − η)): m is the smallest with η/(1 − η) ≤ ε·SLACK/2, R the smallest
  with 4L ≤ ε·SLACK/2, and n the smallest with both the dropped tail α^(2^n) ≤ 2^−64 and δ ≤ 2^−64 (the tail alone
  can leave δ near 2^−30 for some ε/Δ; the δ condition adds at most one bit). ``Guarantee`` reports the bounds.
* Distance to the ideal law (total variation, TV) at ε: TV ≤ 2·Σ e_i (rounding, two geometrics) + 2·α_s^(2^n)
  (truncation: TV of a law and itself conditioned on an event A is P(not A)) + 2·(ε − ε_s)/Δ·Σ_i 2^i·a_i (the slack:
  |a_i(ε) − a_i(ε_s)| ≤ a_i(ε_s)·2^i·(ε − ε_s)/Δ, TVs of independent bits add).

No finite-support noise can be pure ε-DP (a value the noise cannot reach on one side of a change of Δ has
probability zero there); δ ≤ 2^−64 is the price of a sampler with a fixed number of random bits.

**Circuit.** Inputs are (lanes, B) random bits from each party, B = ``bits_per_sample`` = 2·Σ w_i, laid out per
lane as geometric 1's bits 0 … n−1 then geometric 2's, each w_i bits least significant first. One ``less_than``
against the constant t_i per bit position covers both geometrics of all lanes; its AND gates are w_i − 1 minus the
trailing zeros of t_i (the first carries fold on the constant). The noise word is G₁ − G₂ on n + 1 signed bits
(|N| ≤ 2^n − 1), n more AND gates: 2·Σ_i (w_i − 1 − tz(t_i)) + n per sample in all. ``add_noise`` adds it to a
value on max(value bits, n + 1) + 1 signed bits (an unsigned value counts one bit more), where two's-complement
addition of two such operands cannot overflow.

``plain_noise`` evaluates the same rule in the clear with numpy (lexicographic comparison, no carry chain) for the
tests and the benchmark; ``noise_pmf`` is the exact law of the implemented sampler, as fractions.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from jointstat.circuit.backend import CountBackend
from jointstat.circuit.bits import Bits, stack
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.exact import ExactNumberError, decimal_text, positive_number

TAIL_BITS = 64  # the dropped tail α^(2^n) and δ are each at most 2^−TAIL_BITS
SLACK = Fraction(1, 1 << 32)  # the sampler is built for ε_s = ε·(1 − SLACK)
MAX_NOISE_BITS = 48  # n beyond this (ε/Δ below about 1.6·10^−13) is refused
MAX_RATIO = 64  # ε/Δ above this is refused: the noise would be 0 except with probability below 2^−91
MAX_SENSITIVITY = 1 << 40
EXACT_PMF_MAX_BITS = 12  # noise_pmf is a quadratic convolution of big integers; beyond this it is too slow
_START_PRECISION = 256  # bits of the fixed-point exp bounds; doubled until every interval is narrow enough
_MAX_PRECISION = 1 << 16
_INTERVAL_SLACK = 8  # an interval of p_i must be 2^−8 of one threshold step narrow


class NoiseError(ValueError):
    """Noise settings that cannot be used; the message names the field."""


@dataclass(frozen=True)
class BiasedBit:
    """Bit i of a geometric variable: 1 iff U < threshold for U uniform on ``width`` bits."""

    index: int
    width: int
    threshold: int
    low: Fraction  # rigorous bounds on the ideal probability p_i = a_i/(1 + a_i) at ε_s
    high: Fraction

    @property
    def probability(self) -> Fraction:
        """q_i = t_i / 2^(w_i): the exact probability the sampler realises."""
        return Fraction(self.threshold, 1 << self.width)

    @property
    def error(self) -> Fraction:
        """e_i ≥ |q_i − p_i| for every p_i in [low, high]."""
        q = self.probability
        return max(abs(q - self.low), abs(self.high - q))

    @property
    def log_error(self) -> Fraction:
        """An upper bound on |ln(q_i/p_i)| and |ln((1 − q_i)/(1 − p_i))|."""
        q = self.probability
        return self.error / min(self.low, q, 1 - self.high, 1 - q)


@dataclass(frozen=True)
class Guarantee:
    """What the implemented sampler is proven to give (every figure an exact upper bound)."""

    epsilon: Fraction  # the privacy loss bound: the nominal ε itself
    delta: Fraction  # (ε, δ)-DP with δ at most this
    tail: Fraction  # the dropped geometric tail α_s^(2^n)
    rounding: Fraction  # L, the log-ratio bound between the implemented and the truncated ideal geometric
    edge: int  # m, the edge band whose probability δ covers
    loss_interior: Fraction  # ε_s + 4L + η/(1 − η), ≤ epsilon
    distance: Fraction  # total variation distance from the ideal discrete Laplace law at ε
    distance_sampling: Fraction  # the same from the ideal law at ε_s (rounding and truncation only)


@dataclass(frozen=True)
class NoiseParameters:
    """Public parameters of the sampler; both parties derive the same ones from (ε, Δ)."""

    epsilon: Fraction
    sensitivity: int
    sampling_epsilon: Fraction
    bits: tuple[BiasedBit, ...]  # the biased bits of one geometric, least significant first
    guarantee: Guarantee

    @property
    def noise_bits(self) -> int:
        """n: bits of each geometric."""
        return len(self.bits)

    @property
    def bound(self) -> int:
        """T = 2^n − 1: every sample lies in [−T, T]."""
        return (1 << self.noise_bits) - 1

    @property
    def noise_width(self) -> int:
        """Bits of the signed noise word."""
        return self.noise_bits + 1

    @property
    def bits_per_geometric(self) -> int:
        return sum(b.width for b in self.bits)

    @property
    def bits_per_sample(self) -> int:
        """Random bits each party feeds per sample (the circuit XORs the two parties' bits)."""
        return 2 * self.bits_per_geometric

    def describe(self) -> dict[str, object]:
        """Figures for reports (fractions as text; bounds as powers of two where they are tiny)."""
        g = self.guarantee
        return {
            "epsilon": decimal_text(self.epsilon),
            "sensitivity": self.sensitivity,
            "noise_bits": self.noise_bits,
            "random_bits_per_party_per_sample": self.bits_per_sample,
            "delta_log2_bound": _log2_ceiling(g.delta),
            "tail_log2_bound": _log2_ceiling(g.tail),
            "distance_log2_bound": _log2_ceiling(g.distance),
            "distance_at_sampling_epsilon_log2_bound": _log2_ceiling(g.distance_sampling),
            "edge_band": g.edge,
        }


def _log2_ceiling(x: Fraction) -> int:
    """The least integer k with x ≤ 2^k (x > 0)."""
    k = x.numerator.bit_length() - x.denominator.bit_length()
    while Fraction(2) ** k < x:
        k += 1
    while Fraction(2) ** (k - 1) >= x:
        k -= 1
    return k


# -- rigorous bounds on powers of α ----------------------------------------------------------------------------------


def _exp_neg_bounds(u: Fraction, precision: int) -> tuple[int, int]:
    """Integers lo ≤ e^(−u)·2^precision ≤ hi for u ≥ 0.

    y = u/2^k ≤ 1/2; the Taylor series of e^(−y) alternates with decreasing terms y^j/j!, so two consecutive
    partial sums enclose e^(−y); then k squarings rounded outward give e^(−u) = (e^(−y))^(2^k).
    """
    k = 0
    y = u
    while y > Fraction(1, 2):
        y /= 2
        k += 1
    limit = Fraction(1, 1 << (precision + k + 16))
    partial = Fraction(1)
    term = Fraction(1)
    j = 0
    while True:
        j += 1
        term = term * y / j
        following = partial - term if j % 2 else partial + term
        if term <= limit:
            break
        partial = following
    low, high = min(partial, following), max(partial, following)
    lo = (low.numerator << precision) // low.denominator
    hi = -((-high.numerator << precision) // high.denominator)
    for _ in range(k):
        lo = (lo * lo) >> precision
        hi = -((-hi * hi) >> precision)
    return lo, hi


class _Powers:
    """Bounds on a_i = α^(2^i) (fixed point over 2^precision) and upper bounds on α^j, extended on demand."""

    def __init__(self, u: Fraction, precision: int) -> None:
        self.precision = precision
        self.bounds = [_exp_neg_bounds(u, precision)]

    def power_of_two(self, i: int) -> tuple[int, int]:
        while len(self.bounds) <= i:
            lo, hi = self.bounds[-1]
            p = self.precision
            self.bounds.append(((lo * lo) >> p, -((-hi * hi) >> p)))
        return self.bounds[i]

    def upper(self, j: int) -> Fraction:
        """An upper bound on α^j (j ≥ 0): the product of the upper bounds of its binary digits' powers."""
        p = self.precision
        acc = 1 << p
        i = 0
        while j >> i:
            if (j >> i) & 1:
                acc = -((-acc * self.power_of_two(i)[1]) >> p)
            i += 1
        return min(Fraction(acc, 1 << p), Fraction(1))

    def probability(self, i: int) -> tuple[Fraction, Fraction]:
        """[p_lo, p_hi] enclosing p_i = a_i/(1 + a_i) (increasing in a_i)."""
        lo, hi = self.power_of_two(i)
        one = 1 << self.precision
        return Fraction(lo, one + lo), Fraction(hi, one + hi)


def _leading_zeros(p: Fraction) -> int:
    """z with 2^(−z−1) < p ≤ 2^(−z), for 0 < p ≤ 1."""
    return (p.denominator // p.numerator).bit_length() - 1


# -- parameters ------------------------------------------------------------------------------------------------------


def noise_parameters(epsilon: object, sensitivity: object, *, field: str = "noise") -> NoiseParameters:
    """The sampler for privacy parameter ε (a decimal, taken exactly) and sensitivity Δ (a positive integer on the
    output's encoded integer scale). Errors name ``field``.epsilon or ``field``.sensitivity."""
    try:
        eps = positive_number(epsilon, f"{field}.epsilon")
    except ExactNumberError as exc:
        raise NoiseError(str(exc)) from None
    if isinstance(sensitivity, bool) or not isinstance(sensitivity, int):
        raise NoiseError(
            f"{field}.sensitivity: expected a positive integer, got {type(sensitivity).__name__}"
        )
    if not 1 <= sensitivity <= MAX_SENSITIVITY:
        raise NoiseError(f"{field}.sensitivity: must be between 1 and 2^40, got {sensitivity}")
    ratio = eps / sensitivity
    if ratio > MAX_RATIO:
        raise NoiseError(
            f"{field}.epsilon: ε/Δ = {decimal_text(eps)}/{sensitivity} is above {MAX_RATIO}: the noise would be 0 "
            "except with probability below 2^−91"
        )
    # Necessary for a tail α^(2^n) ≤ 2^−64 with n ≤ MAX_NOISE_BITS: ε_s/Δ·2^n ≥ 64·ln 2 > 44.
    if ratio * (1 - SLACK) * (1 << MAX_NOISE_BITS) < 44:
        raise NoiseError(
            f"{field}.epsilon: ε/Δ = {decimal_text(eps)}/{sensitivity} is too small: the noise would need more "
            f"than {MAX_NOISE_BITS} bits"
        )
    precision = _START_PRECISION
    while precision <= _MAX_PRECISION:
        params = _plan(eps, sensitivity, precision, field)
        if params is not None:
            return params
        precision *= 2
    raise NoiseError(f"{field}.epsilon: {decimal_text(eps)} needs more precision than this sampler supports")


def _plan(eps: Fraction, sens: int, precision: int, field: str) -> NoiseParameters | None:
    """The parameters at one working precision, or None if some interval is not narrow enough."""
    eps_s = eps * (1 - SLACK)
    u = eps_s / sens
    margin = eps - eps_s
    rounding_budget = margin / 8  # 4L ≤ margin/2
    edge_budget = margin / 2  # η/(1 − η) ≤ margin/2
    target = Fraction(1, 1 << TAIL_BITS)
    powers = _Powers(u, precision)

    def eta_ok(m: int) -> bool:
        eta = powers.upper(2 * (m + 1))
        return eta < 1 and eta / (1 - eta) <= edge_budget

    # m: the edge band, found by bisection from a floating-point starting point (each candidate checked exactly)
    guess = float(np.log(1.0 / float(edge_budget)) / (2.0 * float(u)))
    m = int(min(max(guess, 0.0), 2.0**62))
    while not eta_ok(m):
        m = 2 * m + 1
    below = -1  # the band just below the smallest known good one
    while m - below > 1:
        mid = (below + m) // 2
        if eta_ok(mid):
            m = mid
        else:
            below = mid

    def delta_bound(n: int, rounding: Fraction) -> Fraction:
        # δ ≤ 2·e^L·α^(2^n − m − Δ), with e^L ≤ 1/(1 − L)
        return 2 / (1 - rounding) * powers.upper((1 << n) - m - sens)

    n = 1
    while True:
        if n > MAX_NOISE_BITS:
            raise NoiseError(
                f"{field}.epsilon: ε/Δ = {decimal_text(eps)}/{sens} is too small: the noise would need more than "
                f"{MAX_NOISE_BITS} bits"
            )
        if (
            (1 << n) - m - sens >= 1
            and powers.upper(1 << n) <= target
            and delta_bound(n, rounding_budget) <= target
        ):
            break
        n += 1

    intervals = [powers.probability(i) for i in range(n)]
    if any(low <= 0 for low, _ in intervals):
        return None  # a power of α below 2^−precision: more precision
    zeros = [_leading_zeros(low) for low, _ in intervals]
    # R: L ≈ n·2^−R, so start just below log2(n / budget) and widen until the exact bound fits
    relative = max(1, (n * rounding_budget.denominator // rounding_budget.numerator).bit_length() - 2)
    while True:
        bits = []
        for i, ((low, high), z) in enumerate(zip(intervals, zeros, strict=True)):
            width = z + relative
            if (high - low) * (1 << (width + _INTERVAL_SLACK)) > 1:
                return None
            centre = (low + high) / 2 * (1 << width)
            threshold = int(
                centre + Fraction(1, 2)
            )  # round half up; any integer near p_i·2^w is exact-accounted
            bits.append(BiasedBit(i, width, threshold, low, high))
        rounding = sum((b.log_error for b in bits), Fraction(0))
        if rounding <= rounding_budget:
            break
        relative += 1

    eta = powers.upper(2 * (m + 1))
    loss = eps_s + 4 * rounding + eta / (1 - eta)
    if loss > eps:  # pragma: no cover - guaranteed by the budgets above; kept as a hard stop
        raise AssertionError("noise: privacy accounting does not close")
    tail = powers.upper(1 << n)
    slack_sum = sum(
        (Fraction(powers.power_of_two(i)[1] << i, 1 << precision) for i in range(n)), Fraction(0)
    ) + (1 << n) * tail / (1 - 2 * tail)
    distance_sampling = 2 * sum((b.error for b in bits), Fraction(0)) + 2 * tail
    distance = distance_sampling + 2 * margin / sens * slack_sum
    guarantee = Guarantee(
        epsilon=eps,
        delta=delta_bound(n, rounding),
        tail=tail,
        rounding=rounding,
        edge=m,
        loss_interior=loss,
        distance=distance,
        distance_sampling=distance_sampling,
    )
    return NoiseParameters(eps, sens, eps_s, tuple(bits), guarantee)


# -- the circuit -----------------------------------------------------------------------------------------------------


def draw_noise(bld: Builder, params: NoiseParameters, garbler_bits: Bits, evaluator_bits: Bits) -> Bits:
    """Signed noise words (lanes…, n + 1) from each party's (lanes…, ``bits_per_sample``) random input bits."""
    g, e = garbler_bits, evaluator_bits
    b = params.bits_per_sample
    if g.shape != e.shape or g.ndim < 1 or g.shape[-1] != b:
        raise NoiseError(
            f"noise: both parties' random bits must have shape (lanes…, {b}), got {g.shape} and {e.shape}"
        )
    uniform = bld.xor(g, e).reshape(*g.shape[:-1], 2, params.bits_per_geometric)
    digits = []
    at = 0
    for bit in params.bits:
        words = uniform[..., at : at + bit.width]  # (lanes…, 2, w_i): this bit of both geometrics
        threshold = bld.constant_word(bit.threshold, bit.width).broadcast_to(words.shape)
        digits.append(bld.less_than(words, threshold))
        at += bit.width
    geometric = stack(digits, axis=-1)  # (lanes…, 2, n)
    width = params.noise_width
    return bld.sub(bld.extend(geometric[..., 0, :], width), bld.extend(geometric[..., 1, :], width))


def noisy_width(value_width: int, signed: bool, params: NoiseParameters) -> int:
    """Bits of value + noise: max(value bits, n + 1) + 1, counting an unsigned value one bit wider."""
    return max(value_width + (0 if signed else 1), params.noise_width) + 1


def add_noise(
    bld: Builder,
    params: NoiseParameters,
    value: Bits,
    garbler_bits: Bits,
    evaluator_bits: Bits,
    *,
    signed: bool,
) -> Bits:
    """value + noise per lane as signed words of ``noisy_width`` bits (no overflow: see the module docstring)."""
    v = value
    noise = draw_noise(bld, params, garbler_bits, evaluator_bits)
    if noise.shape[:-1] != v.shape[:-1]:
        raise NoiseError(f"noise: {v.shape[:-1]} value lanes but {noise.shape[:-1]} noise lanes")
    width = noisy_width(v.shape[-1], signed, params)
    return bld.add(bld.extend(v, width, signed=signed), bld.extend(noise, width, signed=True))


def and_gates_per_sample(params: NoiseParameters) -> int:
    """AND gates of one noise sample, counted on a fresh count backend (every lane costs the same)."""
    bld = Builder(CountBackend())
    g = bld.input(Party.GARBLER, (1, params.bits_per_sample))
    e = bld.input(Party.EVALUATOR, (1, params.bits_per_sample))
    draw_noise(bld, params, g, e)
    return bld.and_gates


# -- in the clear ----------------------------------------------------------------------------------------------------


def plain_noise(params: NoiseParameters, garbler_bits: np.ndarray, evaluator_bits: np.ndarray) -> np.ndarray:
    """The sampler in the clear: (lanes…, B) 0/1 arrays of both parties → int64 noise (lanes…).

    Each comparison is lexicographic: U < t where the most significant differing bit is set in t. This is a
    different rule from the circuit's carry chain, so the two check each other.
    """
    g = np.asarray(garbler_bits, dtype=np.uint8)
    e = np.asarray(evaluator_bits, dtype=np.uint8)
    b = params.bits_per_sample
    if g.shape != e.shape or g.ndim < 1 or g.shape[-1] != b:
        raise NoiseError(f"noise: both parties' random bits must have shape (lanes…, {b})")
    lanes = g.shape[:-1]
    uniform = (g ^ e).reshape(-1, 2, params.bits_per_geometric)
    value = np.zeros((uniform.shape[0], 2), dtype=np.int64)
    at = 0
    for bit in params.bits:
        words = uniform[..., at : at + bit.width]
        t = np.array([(bit.threshold >> j) & 1 for j in range(bit.width)], dtype=np.uint8)
        differs = words != t
        top = bit.width - 1 - np.argmax(differs[..., ::-1], axis=-1)  # most significant differing position
        below = differs.any(axis=-1) & (t[top] == 1)
        value |= below.astype(np.int64) << bit.index
        at += bit.width
    return (value[:, 0] - value[:, 1]).reshape(lanes)


def random_bits(count: int, bits: int, source: np.random.Generator | None = None) -> np.ndarray:
    """(count, bits) uniform 0/1 bits: from ``source`` if given (tests), else from the operating system's CSPRNG."""
    if source is not None:
        return source.integers(0, 2, (count, bits), dtype=np.uint8)
    raw = np.frombuffer(os.urandom((count * bits + 7) // 8), dtype=np.uint8)
    return np.unpackbits(raw, count=count * bits).reshape(count, bits)


# -- the exact law ---------------------------------------------------------------------------------------------------


def geometric_weights(params: NoiseParameters) -> tuple[list[int], int]:
    """The implemented geometric's law as integers: P(G = g) = weights[g] / 2^shift for g in [0, 2^n)."""
    weights = [1]
    for bit in params.bits:
        one = bit.threshold
        zero = (1 << bit.width) - one
        weights = [w * zero for w in weights] + [w * one for w in weights]
    return weights, params.bits_per_geometric


def noise_pmf(params: NoiseParameters) -> dict[int, Fraction]:
    """The exact law of the implemented sampler: {k: P(N = k)} for every k in [−T, T] (all sum to 1)."""
    if params.noise_bits > EXACT_PMF_MAX_BITS:
        raise NoiseError(
            f"noise: the exact law is computed up to {EXACT_PMF_MAX_BITS} noise bits, these settings need "
            f"{params.noise_bits}"
        )
    weights, shift = geometric_weights(params)
    w = np.array(weights, dtype=object)
    counts = np.correlate(w, w, mode="full")  # index j ↔ k = j − T: Σ_g w[g + k]·w[g]
    denominator = 1 << (2 * shift)
    t = params.bound
    return {j - t: Fraction(int(c), denominator) for j, c in enumerate(counts)}


def ideal_variance(epsilon: Fraction, sensitivity: int) -> float:
    """Variance 2α/(1 − α)² of the ideal discrete Laplace law, α = e^(−ε/Δ) (a float, for reports)."""
    alpha = float(np.exp(-float(epsilon) / sensitivity))
    return 2.0 * alpha / (1.0 - alpha) ** 2
