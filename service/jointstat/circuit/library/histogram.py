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

import math
from decimal import Decimal
from typing import Annotated, Literal

from pydantic import Field, field_validator

from jointstat.circuit.bits import concat, stack
from jointstat.circuit.library import blocks
from jointstat.circuit.library.join import const_at_least
from jointstat.circuit.library.registry import (
    BuildContext,
    OutputSpec,
    Statistic,
    StatisticResult,
    TableNeeds,
    register_statistic,
)
from jointstat.circuit.manifest import ColumnPair, Problem, StatisticParameters
from jointstat.circuit.model import Party


class HistogramParameters(StatisticParameters):
    name: Literal["histogram"]
    column: ColumnPair
    edges: Annotated[list[float], Field(min_length=2, max_length=257)]

    @field_validator("edges")
    @classmethod
    def _increasing(cls, v: list[float]) -> list[float]:
        for i in range(1, len(v)):
            if not v[i] > v[i - 1]:
                raise ValueError(f"[{i}] must be greater than the edge before it")
        return v


def edge_thresholds(edges: list[float], frac: int) -> list[int]:
    """The k + 1 encoded thresholds t_i with bin i = [x ≥ t_i] ⊕ [x ≥ t_{i+1}]."""
    scaled = [Decimal(repr(float(e))) * (1 << frac) for e in edges]
    return [math.ceil(s) for s in scaled[:-1]] + [math.floor(scaled[-1]) + 1]


@register_statistic
class Histogram(Statistic):
    name = "histogram"
    Parameters = HistogramParameters
    description = "counts of both parties' values in public bins (numpy.histogram's bins)"

    @property
    def p(self) -> HistogramParameters:
        return self.params  # type: ignore[return-value]

    def problems(self) -> list[Problem]:
        return list(self.check_columns(self.p.column, "statistic.column"))

    def needs(self) -> dict[Party, TableNeeds]:
        names = self.column_names(self.p.column)
        return {party: TableNeeds((names[party],)) for party in Party}

    def outputs(self) -> list[OutputSpec]:
        n = sum(self.manifest.table(p).capacity for p in Party)
        bins = len(self.p.edges) - 1
        return [
            OutputSpec("counts", n.bit_length(), shape=(bins,), description="rows per bin"),
            OutputSpec("count", n.bit_length(), description="rows in some bin"),
        ]

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        names = self.column_names(self.p.column)
        nums = blocks.align(bld, *[ctx.table(party).number(names[party]) for party in Party])
        x = blocks.Number(concat([v.wires for v in nums], axis=0), nums[0].signed, nums[0].frac)
        valid = concat([ctx.table(p).valid for p in Party])
        ge = stack([const_at_least(bld, x, t) for t in edge_thresholds(self.p.edges, x.frac)], axis=-1)
        in_bin = bld.and_(bld.xor(ge[:, :-1], ge[:, 1:]), valid[:, None])  # (rows, bins)
        width = sum(self.manifest.table(p).capacity for p in Party).bit_length()
        counts = stack(
            [bld.extend(blocks.count_bits(bld, in_bin[:, i]), width) for i in range(in_bin.shape[1])]
        )
        total = bld.extend(blocks.count_bits(bld, bld.reduce_xor(in_bin, axis=-1)), width)
        return StatisticResult({"counts": counts, "count": total}, count=total)
