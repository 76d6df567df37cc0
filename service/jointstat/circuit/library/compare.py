"""Comparison of two private values: which party's value is larger; the gap only when the manifest releases it.

Theory of operation
-------------------
Each party's table holds one row (capacity 1) with the value to compare. The two values are aligned to one scale
(``blocks.align``) and compared as signed or unsigned words (one comparator each way, n AND gates each,
Kolesnikov–Sadeghi–Schneider 2009). ``larger`` is a choice: "equal", "garbler" or "evaluator" (encoded as
garbler-larger + 2·evaluator-larger). ``gap`` = |g − e| is computed only when some party receives it: listing it
in the manifest's outputs is what releases it. Both rows must be present, otherwise everything is withheld; the
disclosure count is the number of values present (0 to 2).
"""

from __future__ import annotations

from typing import Literal

from jointstat.circuit.bits import stack
from jointstat.circuit.library import blocks
from jointstat.circuit.library.blocks import Number
from jointstat.circuit.library.statistic import BuildContext, ColumnStatistic, OutputSpec, StatisticResult
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import ColumnParameters
from jointstat.problems import Problem

CHOICES = ("equal", "garbler", "evaluator")


class CompareParameters(ColumnParameters):
    name: Literal["compare"]


class Compare(ColumnStatistic[CompareParameters]):
    name = "compare"
    Parameters = CompareParameters
    description = "which party's single value is larger (and by how much, if released)"

    def problems(self) -> list[Problem]:
        problems = super().problems()
        for party in Party:
            if self.manifest.table(party).capacity != 1:
                problems.append(
                    Problem(
                        f"tables.{party.role_name}.capacity",
                        "must be 1 for the compare statistic (one value each)",
                    )
                )
        return problems

    def outputs(self) -> list[OutputSpec]:
        fmt = self.column_format(self.params.column)
        return [
            OutputSpec("larger", 2, choices=CHOICES, description="whose value is larger"),
            OutputSpec("gap", fmt.width, False, fmt.frac, description="|garbler − evaluator|"),
        ]

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        g, e = self.aligned(ctx, self.params.column)
        gw, ew = g.wires[0], e.wires[0]
        g_gt = bld.greater_than(gw, ew, signed=g.signed)
        e_gt = bld.greater_than(ew, gw, signed=g.signed)
        values = {"larger": stack([g_gt, e_gt])}
        if "gap" in ctx.wanted:
            w = g.width + 1
            diff = bld.sub(bld.extend(gw, w, signed=g.signed), bld.extend(ew, w, signed=g.signed))
            mag, _ = blocks.magnitude(bld, Number(diff, True, g.frac))
            values["gap"] = bld.extend(mag, g.width)
        valid = ctx.valid()  # (2,): one row each
        count = blocks.count_bits(bld, valid)
        return StatisticResult(values, count=count, ok=bld.and_(valid[0], valid[1]))
