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
from jointstat.circuit.library.registry import register_statistic
from jointstat.circuit.library.statistic import BuildContext, ColumnStatistic, OutputSpec, StatisticResult
from jointstat.circuit.parameters import ColumnParameters
from pydantic import Field


class SpreadParameters(ColumnParameters):
    name: Literal["spread"] = Field(
        description="spread: the largest value minus the smallest, over both tables"
    )


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
class Spread(ColumnStatistic[SpreadParameters]):
    """Checks and reads its one column as every ``ColumnStatistic`` does; declares and builds its outputs."""

    name = "spread"
    Parameters = SpreadParameters
    description = "largest minus smallest value over both parties' rows (custom example)"

    def outputs(self) -> list[OutputSpec]:
        fmt = self.column_format(self.params.column)
        return [
            OutputSpec("spread", fmt.width, False, fmt.frac, description="largest − smallest"),
            OutputSpec("count", self.rows().bit_length(), description="rows"),
        ]

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        keys = concat([blocks.order_key(bld, x) for x in self.aligned(ctx, self.params.column)], axis=0)
        valid = ctx.valid()
        w = keys.shape[1]
        ones = bld.ones((keys.shape[0], w))
        zeros = bld.zeros((keys.shape[0], w))
        low = tree_reduce(bld, bld.select(valid, ones, keys), take_larger=False)
        high = tree_reduce(bld, bld.select(valid, zeros, keys), take_larger=True)
        count = blocks.count_bits(bld, valid)
        return StatisticResult(
            {"spread": bld.sub(high, low), "count": bld.extend(count, self.output_specs()["count"].width)},
            count=count,
            ok=blocks.at_least(bld, count, 1),
        )
