"""A custom statistic, written against the builder API: the spread (largest − smallest) of both parties' values.

Theory of operation: each row's value becomes an order key (sign bit flipped for signed values, so unsigned order
is numeric order). Rows that do not count are replaced by the largest key for the minimum and by the smallest for
the maximum (one multiplexer each), then a balanced tree of comparators and multiplexers (Kolesnikov–Sadeghi–
Schneider 2009: n AND gates each for an n-bit word) reduces all rows of both parties to one minimum and one
maximum. ``spread`` = max − min fits the aligned width unsigned. The count of rows is the disclosure count, and
at least one row is needed.

A manifest uses it by listing this file under ``plugins:`` and naming ``spread`` in its ``statistic:`` section.
"""

from __future__ import annotations

from typing import Literal

from jointstat.circuit.bits import Bits, concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.library import blocks
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


class SpreadParameters(StatisticParameters):
    name: Literal["spread"]
    column: ColumnPair


def tree_reduce(bld: Builder, keys: Bits, take_larger: bool) -> Bits:
    """The smallest (or largest) of the (n, w) unsigned keys, by a balanced tree of compare-and-select."""
    while keys.shape[0] > 1:
        half = keys.shape[0] // 2
        a, b = keys[:half], keys[half : 2 * half]
        a_larger = bld.greater_than(a, b)
        pick_b = a_larger if not take_larger else bld.not_(a_larger)
        keys = concat([bld.select(pick_b, a, b), keys[2 * half :]], axis=0)
    return keys[0]


@register_statistic
class Spread(Statistic):
    name = "spread"
    Parameters = SpreadParameters
    description = "largest minus smallest value over both parties' rows (custom example)"

    def problems(self) -> list[Problem]:
        return list(self.check_columns(self.params.column, "statistic.column"))  # type: ignore[attr-defined]

    def needs(self) -> dict[Party, TableNeeds]:
        names = self.column_names(self.params.column)  # type: ignore[attr-defined]
        return {party: TableNeeds((names[party],)) for party in Party}

    def _format(self) -> tuple[int, int]:
        cols = [self.column(p, self.params.column) for p in Party]  # type: ignore[attr-defined]
        frac = max(c.frac for c in cols)
        signed = any(c.signed for c in cols)
        width = max(c.bits + (frac - c.frac) + (1 if signed and not c.signed else 0) for c in cols)
        return width, frac

    def outputs(self) -> list[OutputSpec]:
        width, frac = self._format()
        n = sum(self.manifest.table(p).capacity for p in Party)
        return [
            OutputSpec("spread", width, False, frac, description="largest − smallest"),
            OutputSpec("count", n.bit_length(), description="rows"),
        ]

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        names = self.column_names(self.params.column)  # type: ignore[attr-defined]
        nums = blocks.align(bld, *[ctx.table(p).number(names[p]) for p in Party])
        keys = concat([blocks.order_key(bld, x) for x in nums], axis=0)
        valid = concat([ctx.table(p).valid for p in Party])
        w = keys.shape[1]
        ones = bld.ones((keys.shape[0], w))
        zeros = bld.zeros((keys.shape[0], w))
        low = tree_reduce(bld, bld.select(valid, ones, keys), take_larger=False)
        high = tree_reduce(bld, bld.select(valid, zeros, keys), take_larger=True)
        count = blocks.count_bits(bld, valid)
        return StatisticResult(
            {"spread": bld.sub(high, low), "count": bld.extend(count, self.outputs()[1].width)},
            count=count,
            ok=blocks.at_least(bld, count, 1),
        )
