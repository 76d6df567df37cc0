"""Histogram of a value column over public bin edges, over both parties' rows.

Theory of operation
-------------------
Bins follow numpy.histogram: with edges e_0 < … < e_k, bin i holds e_i ≤ x < e_{i+1}, and the last bin also
holds x = e_k; values outside [e_0, e_k] are not counted. Each row is compared with every edge as a public
constant (comparators against constants fold to fewer AND gates): g_i = [x ≥ ⌈e_i·2^F⌉] for i < k and
g_k = [x ≥ ⌊e_k·2^F⌋ + 1], on the column's encoded scale (F fraction bits; an edge is read as the decimal
written). The g_i are monotone in i, so bin i is g_i ⊕ g_{i+1}: no AND gate. Each bin bit is ANDed with the
row's validity bit and counted (``blocks.count_bits``). ``count`` is the number of rows in some bin; it is the
disclosure count.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, field_validator

from jointstat.circuit.bits import stack
from jointstat.circuit.library import blocks
from jointstat.circuit.library.statistic import BuildContext, ColumnStatistic, OutputSpec, StatisticResult
from jointstat.circuit.parameters import ColumnParameters


class HistogramParameters(ColumnParameters):
    name: Literal["histogram"]
    edges: Annotated[list[float], Field(min_length=2, max_length=257)]

    @field_validator("edges")
    @classmethod
    def _increasing(cls, v: list[float]) -> list[float]:
        for i in range(1, len(v)):
            if not v[i] > v[i - 1]:
                raise ValueError(f"[{i}] must be greater than the edge before it")
        return v


def edge_thresholds(edges: list[float], frac: int) -> list[int]:
    """The k + 1 encoded thresholds t_i with bin i = [x ≥ t_i] ⊕ [x ≥ t_{i+1}] (the last bin holds its top edge)."""
    return [blocks.encoded_bound(e, frac) for e in edges[:-1]] + [
        blocks.encoded_bound(edges[-1], frac, strict=True)
    ]


class Histogram(ColumnStatistic[HistogramParameters]):
    name = "histogram"
    Parameters = HistogramParameters
    description = "counts of both parties' values in public bins (numpy.histogram's bins)"

    def outputs(self) -> list[OutputSpec]:
        n = self.rows()
        bins = len(self.params.edges) - 1
        return [
            OutputSpec("counts", n.bit_length(), shape=(bins,), description="rows per bin"),
            OutputSpec("count", n.bit_length(), description="rows in some bin"),
        ]

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        x = blocks.concat_rows(self.aligned(ctx, self.params.column))
        thresholds = edge_thresholds(self.params.edges, x.frac)
        ge = stack([blocks.at_least(bld, x.wires, t, signed=x.signed) for t in thresholds], axis=-1)
        in_bin = bld.and_(bld.xor(ge[:, :-1], ge[:, 1:]), ctx.valid()[:, None])  # (rows, bins)
        width = self.rows().bit_length()
        counts = stack(
            [bld.extend(blocks.count_bits(bld, in_bin[:, i]), width) for i in range(in_bin.shape[1])]
        )
        total = bld.extend(blocks.count_bits(bld, bld.reduce_xor(in_bin, axis=-1)), width)
        return StatisticResult({"counts": counts, "count": total}, count=total)
