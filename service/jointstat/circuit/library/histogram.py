"""Histogram of a value column over public bin edges, over both parties' rows.

Theory of operation
-------------------
Bins follow numpy.histogram: with edges e_0 < … < e_k, bin i holds e_i ≤ x < e_{i+1}, and the last bin also
holds x = e_k; values outside [e_0, e_k] are not counted. Each row is compared with every edge as a public
constant (comparators against constants fold to fewer AND gates): g_i = [x ≥ ⌈e_i·2^F⌉] for i < k and
g_k = [x ≥ ⌊e_k·2^F⌋ + 1], on the column's encoded scale (F fraction bits; an edge is read as the decimal
written). The g_i are monotone in i, so bin i is g_i ⊕ g_{i+1}: no AND gate. Each bin bit is ANDed with the
row's counting bit (valid and, with ``where``, every condition holding) and counted (``blocks.count_bits``).
``count`` is the number of rows in some bin; it is the disclosure count.

Noise: one row falls in one bin, so with r = ``privacy.rows_per_person`` the vector of bins has ℓ1 sensitivity r
(histogram queries, Dwork–Roth 2014 §3.3): every bin gets its own draw at the full ε with Δ = r, and the whole
vector is ε-differentially private. ``count`` has sensitivity r too.
"""

from __future__ import annotations

from fractions import Fraction
from typing import Annotated, Literal

from pydantic import Field, field_validator

from jointstat.circuit.bits import concat, stack
from jointstat.circuit.library import blocks
from jointstat.circuit.library.noise import NoiseError
from jointstat.circuit.library.statistic import (
    BuildContext,
    ColumnStatistic,
    NoiseDraw,
    OutputSpec,
    StatisticResult,
    TableNeeds,
)
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import ColumnParameters, Where, later_field
from jointstat.problems import Problem


class HistogramParameters(ColumnParameters):
    name: Literal["histogram"] = Field(description="histogram: counts of both parties' values in public bins")
    edges: Annotated[list[float], Field(min_length=2, max_length=257)] = Field(
        description="the bins' edges, increasing: bin i holds edge i ≤ value < edge i+1, the last bin also its top "
        "edge (as numpy.histogram); values outside are not counted"
    )
    where: Where | None = later_field(
        None,
        "which rows count: a boolean column's name, a condition {column, op, value}, or a list of conditions that "
        "must all hold",
    )

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
    sensitivity = (
        "counts: r for the whole vector of bins, one row falling in one bin, each bin noised at the full ε "
        "(histogram queries, Dwork–Roth 2014 section 3.3); count: r (r = `privacy.rows_per_person`)"
    )
    count_output = "count"

    def ok_rule(self) -> str | None:
        return None  # every release condition is an output's own

    def problems(self) -> list[Problem]:
        return super().problems() + self.condition_problems(self.params.where, f"{self.path}.where")

    def needs(self) -> dict[Party, TableNeeds]:
        out = super().needs()
        for party in Party:
            extra = [
                c for c in self.condition_columns(self.params.where, party) if c not in out[party].columns
            ]
            out[party] = TableNeeds((*out[party].columns, *extra))
        return out

    def outputs(self) -> list[OutputSpec]:
        n = self.rows()
        bins = len(self.params.edges) - 1
        return [
            OutputSpec("counts", n.bit_length(), shape=(bins,), description="rows per bin"),
            OutputSpec("count", n.bit_length(), description="rows in some bin"),
        ]

    def noise_draws(self, output: str, epsilon: Fraction) -> list[NoiseDraw]:
        r = self.rows_per_person()
        if output == "counts":
            return [self.draw(output, "counts", epsilon, r, lanes=len(self.params.edges) - 1)]
        if output == "count":
            return [self.draw(output, "count", epsilon, r)]
        raise NoiseError(f"{self.name} has no output {output!r}")

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        x = blocks.concat_rows(self.aligned(ctx, self.params.column))
        thresholds = edge_thresholds(self.params.edges, x.frac)
        ge = stack([blocks.at_least(bld, x.wires, t, signed=x.signed) for t in thresholds], axis=-1)
        if self.params.where is None:
            rows = ctx.valid()
        else:
            rows = concat([self.row_flags(ctx, party, self.params.where) for party in Party])
        in_bin = bld.and_(bld.xor(ge[:, :-1], ge[:, 1:]), rows[:, None])  # (rows, bins)
        width = self.rows().bit_length()
        counts = stack(
            [bld.extend(blocks.count_bits(bld, in_bin[:, i]), width) for i in range(in_bin.shape[1])]
        )
        total = bld.extend(blocks.count_bits(bld, bld.reduce_xor(in_bin, axis=-1)), width)
        noisy = self.noise_settings()
        values = {"counts": counts, "count": total}
        if "counts" in noisy:
            values["counts"] = ctx.noisy("counts", counts, signed=False)
        if "count" in noisy:
            values["count"] = ctx.noisy("count", total, signed=False)
        return StatisticResult(values, count=values["count"], count_signed="count" in noisy)
