"""Quantiles (median, any percentile) of the union of both parties' values.

Theory of operation
-------------------
Each party sorts its own values ascending (the encoder does it); a value's sort key is its order key (sign bit
flipped for signed values) with the row's invalid bit above it, so padding sorts last. The garbler's list, padding
to a power of two M and the evaluator's list reversed are bitonic, and Batcher's bitonic merger sorts the union
((M/2)·log2 M compare-and-swaps of w + 1 bits). The count n = Σ validity bits is secret, so the rank is computed
in the circuit: for the percentile p = 100·a/b (a/b in lowest terms) the position is h = (n − 1)·a/b,
j = ⌊h⌋ = ⌊(n − 1)·a / b⌋ and r = (n − 1)·a mod b (a multiplication by a public constant and a division by one;
free shifts when b is a power of two). An oblivious selection (``blocks.one_hot`` and ``blocks.select``, about
(w + 1)·M AND gates) reads x_j and, when the method needs it, x_{j+1} (the one-hot vector shifted by one place).

Methods, as numpy.percentile names them (with x sorted, h as above):

* ``lower`` — x_j; ``higher`` — x_j if r = 0 else x_{j+1};
* ``midpoint`` — (lower + higher) / 2, exact with one more fraction bit (``statistics.median`` at p = 50);
* ``linear`` (default, numpy's default) — x_j + (x_{j+1} − x_j)·r/b, rounded down to ``precision_bits`` more
  fraction bits.

Ties need no care: equal values are adjacent after the merge and the rank picks one of them. A result needs
n ≥ 1; the disclosure count is n.
"""

from __future__ import annotations

from fractions import Fraction
from typing import Annotated, Literal

from pydantic import Field, field_validator

from jointstat.circuit.bits import Bits, concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.library import blocks
from jointstat.circuit.library.statistic import BuildContext, ColumnStatistic, OutputSpec, StatisticResult
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import ColumnParameters, PrecisionBits


class QuantileParameters(ColumnParameters):
    name: Literal["quantile"]
    percentiles: Annotated[list[float], Field(min_length=1, max_length=16)]
    method: Literal["lower", "higher", "midpoint", "linear"] = "linear"
    precision_bits: PrecisionBits = 8

    @field_validator("percentiles")
    @classmethod
    def _in_range(cls, v: list[float]) -> list[float]:
        for i, p in enumerate(v):
            if not 0 <= p <= 100:
                raise ValueError(f"[{i}] must be between 0 and 100")
            if p in v[:i]:
                raise ValueError(f"[{i}] is listed twice")
        return v


def percentile_name(p: float) -> str:
    """50 → 'p50', 99.5 → 'p99_5'."""
    text = f"{p:.10f}".rstrip("0").rstrip(".")
    return "p" + text.replace(".", "_")


def rank_fraction(p: float) -> Fraction:
    """p / 100 as an exact fraction of the decimal written in the manifest."""
    return Fraction(repr(float(p))) / 100


class Quantile(ColumnStatistic[QuantileParameters]):
    name = "quantile"
    Parameters = QuantileParameters
    description = "percentiles of the union of both parties' values (oblivious merge and selection)"
    sorted_rows = True  # each party's values ascending: the merge needs them so

    def outputs(self) -> list[OutputSpec]:
        n = self.rows()
        fmt = self.column_format(self.params.column)
        w, signed, frac = fmt.width, fmt.signed, fmt.frac
        if self.params.method == "midpoint":
            w, frac = w + 1, frac + 1
        elif self.params.method == "linear":
            w, frac = w + self.params.precision_bits, frac + self.params.precision_bits
        specs = [OutputSpec("count", n.bit_length(), description="values in the union")]
        for q in self.params.percentiles:
            specs.append(OutputSpec(percentile_name(q), w, signed, frac, description=f"percentile {q:g}"))
        return specs

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        specs = self.output_specs()
        nums = self.aligned(ctx, self.params.column)
        signed, w = nums[0].signed, nums[0].width
        elements = []
        for party, x in zip(Party, nums, strict=True):
            key = blocks.order_key(bld, x)
            elements.append(concat([key, bld.not_(ctx.table(party).valid)[:, None]], axis=1))
        pad = bld.constant([0] * w + [1])
        seq, layout = blocks.arrange(elements[0], elements[1], pad)
        merged = blocks.bitonic_merge(bld, seq)
        sorted_vals = blocks.from_order_key(bld, merged.keys[:, :w], signed)
        m = layout.size
        n = bld.extend(blocks.count_bits(bld, ctx.valid()), specs["count"].width)
        values: dict[str, Bits] = {"count": n}
        n_minus_1 = bld.sub(n, bld.constant_word(1, n.shape[-1]))
        idx_bits = max(1, (m - 1).bit_length())
        for q in self.params.percentiles:
            name = percentile_name(q)
            if name not in ctx.wanted:
                continue
            j, r, denominator = self._rank(bld, n_minus_1, rank_fraction(q), idx_bits)
            onehot = blocks.one_hot(bld, j, m)
            x_j = blocks.select(bld, onehot, sorted_vals)
            x_next = blocks.select(bld, onehot[:-1], sorted_vals[1:]) if m > 1 else x_j
            r_nonzero = bld.reduce_or(r) if r.shape[-1] else bld.zeros(())
            values[name] = self._combine(bld, x_j, x_next, r, r_nonzero, denominator, signed, specs[name])
        extra = {"comparators": merged.comparators, "merge_size": m}
        return StatisticResult(values, count=n, ok=blocks.at_least(bld, n, 1), extra=extra)

    @staticmethod
    def _rank(bld: Builder, n_minus_1: Bits, frac: Fraction, idx_bits: int) -> tuple[Bits, Bits, int]:
        """(j, r, b) with j = ⌊(n − 1)·a/b⌋ (``idx_bits`` bits) and r = (n − 1)·a mod b."""
        a, b = frac.numerator, frac.denominator
        if a == 0:
            return bld.zeros(idx_bits), bld.zeros(0), 1
        t = blocks.multiply_full(bld, n_minus_1, bld.constant_word(a, a.bit_length()))
        if b == 1:
            return bld.extend(t, idx_bits), bld.zeros(0), 1
        if b & (b - 1) == 0:
            s = b.bit_length() - 1
            return bld.extend(t[s:], idx_bits), t[:s], b
        # j < n ≤ 2^idx_bits, so the low idx_bits quotient bits are the whole quotient.
        q, r = blocks.divide(bld, t, bld.constant_word(b, b.bit_length()), quotient_bits=idx_bits)
        return q, r, b

    def _combine(
        self,
        bld: Builder,
        x_j: Bits,
        x_next: Bits,
        r: Bits,
        r_nonzero: Bits,
        b: int,
        signed: bool,
        spec: OutputSpec,
    ) -> Bits:
        method = self.params.method
        if method == "lower":
            return x_j
        higher = bld.select(r_nonzero, x_j, x_next)
        if method == "higher":
            return higher
        w = x_j.shape[-1]
        if method == "midpoint":
            return bld.add(bld.extend(x_j, w + 1, signed=signed), bld.extend(higher, w + 1, signed=signed))
        e = self.params.precision_bits
        if r.shape[-1] == 0:  # the rank is always whole
            return bld.extend(concat([bld.zeros(e), x_j]), spec.width, signed=signed)
        # x_{j+1} ≥ x_j whenever r > 0, so the difference is unsigned; when r = 0 it is multiplied by zero.
        d = bld.sub(x_next, x_j)
        prod = blocks.multiply_full(bld, d, r)
        shifted = concat([bld.zeros(e), prod])
        part, _ = blocks.divide(bld, shifted, bld.constant_word(b, b.bit_length()), quotient_bits=w + e)
        base = bld.extend(concat([bld.zeros(e), x_j]), w + e + 1, signed=signed)
        total = bld.add(base, bld.extend(part, w + e + 1))
        return bld.extend(total, spec.width, signed=signed)
