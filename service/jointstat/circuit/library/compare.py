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
from jointstat.circuit.library.registry import (
    ROLES,
    BuildContext,
    OutputSpec,
    Statistic,
    StatisticResult,
    TableNeeds,
    register_statistic,
)
from jointstat.circuit.manifest import ColumnPair, Problem, StatisticParameters
from jointstat.circuit.model import Party

CHOICES = ("equal", "garbler", "evaluator")


class CompareParameters(StatisticParameters):
    name: Literal["compare"]
    column: ColumnPair


@register_statistic
class Compare(Statistic):
    name = "compare"
    Parameters = CompareParameters
    description = "which party's single value is larger (and by how much, if released)"

    @property
    def p(self) -> CompareParameters:
        return self.params  # type: ignore[return-value]

    def problems(self) -> list[Problem]:
        problems = list(self.check_columns(self.p.column, "statistic.column"))
        for party in Party:
            if self.manifest.table(party).capacity != 1:
                problems.append(
                    Problem(
                        f"tables.{ROLES[party]}.capacity",
                        "must be 1 for the compare statistic (one value each)",
                    )
                )
        return problems

    def needs(self) -> dict[Party, TableNeeds]:
        return {party: TableNeeds((self.column_names(self.p.column)[party],)) for party in Party}

    def _format(self) -> tuple[int, bool, int]:
        cols = [self.column(party, self.p.column) for party in Party]
        frac = max(c.frac for c in cols)
        signed = any(c.signed for c in cols)
        width = max(c.bits + (frac - c.frac) + (1 if signed and not c.signed else 0) for c in cols)
        return width, signed, frac

    def outputs(self) -> list[OutputSpec]:
        w, _, frac = self._format()
        return [
            OutputSpec("larger", 2, choices=CHOICES, description="whose value is larger"),
            OutputSpec("gap", w, False, frac, description="|garbler − evaluator|"),
        ]

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        names = self.column_names(self.p.column)
        g, e = blocks.align(bld, *[ctx.table(party).number(names[party]) for party in Party])
        gw, ew = g.wires[0], e.wires[0]
        g_gt = bld.greater_than(gw, ew, signed=g.signed)
        e_gt = bld.greater_than(ew, gw, signed=g.signed)
        values = {"larger": stack([g_gt, e_gt])}
        if "gap" in ctx.wanted:
            w = g.width + 1
            diff = bld.sub(bld.extend(gw, w, signed=g.signed), bld.extend(ew, w, signed=g.signed))
            mag, _ = blocks.magnitude(bld, Number(diff, True, g.frac))
            values["gap"] = bld.extend(mag, g.width)
        valid = stack([ctx.table(p).valid[0] for p in Party])
        count = blocks.count_bits(bld, valid)
        return StatisticResult(values, count=count, ok=bld.and_(valid[0], valid[1]))
