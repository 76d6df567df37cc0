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

The rank, the selection and the methods are ``blocks.percentile`` (compare uses them on one party's rows).
Ties need no care: equal values are adjacent after the merge and the rank picks one of them. Each percentile
needs n ≥ 1 (its own release rule ``no_rows``; ``count`` is released without it); the disclosure count is n.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, field_validator

from jointstat.circuit.bits import Bits, concat
from jointstat.circuit.library import blocks
from jointstat.circuit.library.blocks import rank_fraction
from jointstat.circuit.library.statistic import BuildContext, ColumnStatistic, OutputSpec, StatisticResult
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import ColumnParameters, PrecisionBits

__all__ = ["Quantile", "QuantileParameters", "percentile_name", "rank_fraction"]

Method = Literal["lower", "higher", "midpoint", "linear"]


class QuantileParameters(ColumnParameters):
    name: Literal["quantile"] = Field(description="quantile: percentiles of both parties' values pooled")
    percentiles: Annotated[list[float], Field(min_length=1, max_length=16)] = Field(
        description="the percentiles wanted, from 0 to 100 (50 is the median); each is an output named p50, "
        "p90, p99_5 …"
    )
    method: Method = Field(
        "linear",
        description="how a percentile between two values is taken, as numpy.percentile names it: linear "
        "(interpolate, the default), lower, higher or midpoint (their mean; the statistics module's median at 50)",
    )
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


class Quantile(ColumnStatistic[QuantileParameters]):
    name = "quantile"
    Parameters = QuantileParameters
    description = "percentiles of the union of both parties' values (oblivious merge and selection)"
    sorted_rows = True  # each party's values ascending: the merge needs them so
    count_output = "count"

    def ok_rule(self) -> str | None:
        return None  # every release condition is an output's own

    def outputs(self) -> list[OutputSpec]:
        n = self.rows()
        fmt = self.column_format(self.params.column)
        w, frac = blocks.percentile_width(fmt.width, fmt.frac, self.params.method, self.params.precision_bits)
        specs = [OutputSpec("count", n.bit_length(), description="values in the union")]
        for q in self.params.percentiles:
            specs.append(
                OutputSpec(
                    percentile_name(q), w, fmt.signed, frac, description=f"percentile {q:g}", rule="no_rows"
                )
            )
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
        release: dict[str, Bits] = {}
        some_row: Bits | None = None
        for q in self.params.percentiles:
            name = percentile_name(q)
            if name not in ctx.wanted:
                continue
            values[name] = blocks.percentile(
                bld,
                sorted_vals,
                n_minus_1,
                rank_fraction(q),
                method=self.params.method,
                signed=signed,
                precision_bits=self.params.precision_bits,
                width=specs[name].width,
            )
            if some_row is None:
                some_row = blocks.at_least(bld, n, 1)
            release[name] = some_row
        extra = {"comparators": merged.comparators, "merge_size": m}
        return StatisticResult(values, count=n, release=release, extra=extra)
