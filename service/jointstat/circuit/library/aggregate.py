"""Count, sum, mean and variance of a column over both parties' rows.

Theory of operation
-------------------
The column is read from both tables and brought to one scale (``blocks.align``: common fraction bits, signedness
and width). Each row counts when its validity bit is set (and, with ``where``, when its boolean column is true);
a row that does not count contributes zero, so padding never changes a result whatever its bits are.

* count n — the tree sum of the counting bits: ⌈log2(N + 1)⌉ bits for N = capacity_g + capacity_e rows.
* sum S — the tree sum of the masked values with growing width: w + ⌈log2 N⌉ bits, so it cannot overflow.
* mean — S / n with ``precision_bits`` more fraction bits, rounded toward zero (restoring division). The mean of
  w-bit values is a w-bit value, so the result has w + precision_bits bits.
* variance — (n·Q − S²) / (n·(n − d)) with Q = Σ x² (d = 0 population, d = 1 sample), rounded toward zero with
  2·F + precision_bits fraction bits (F: the column's fraction bits): exact integer arithmetic up to the one
  division, so no cancellation error. n·Q ≥ S² (Cauchy–Schwarz), so the numerator is unsigned; a variance of
  w-bit values is below 2^(2w−1), so the result has 2w + precision_bits bits. Squares cost about 2w² AND gates
  per row (schoolbook), which dominates for wide columns.

Release conditions (besides the manifest's disclosure rule, which compares n with ``min_count``): when a party
receives the mean, n ≥ 1 is needed, when it receives a sample variance n ≥ 2; otherwise every result is withheld.
"""

from __future__ import annotations

from typing import Literal

from jointstat.circuit.bits import Bits, concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.library import blocks
from jointstat.circuit.library.blocks import Number
from jointstat.circuit.library.statistic import (
    BuildContext,
    OutputSpec,
    Statistic,
    StatisticResult,
    TableNeeds,
)
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import ColumnPair, PrecisionBits, StatisticParameters
from jointstat.problems import Problem


class _AggregateParameters(StatisticParameters):
    column: ColumnPair | None = None
    where: ColumnPair | None = None  # a boolean column: only rows where it is true count
    precision_bits: PrecisionBits = 8
    sample: bool = False  # variance: divide by n − 1 instead of n


class CountParameters(_AggregateParameters):
    name: Literal["count"]


class SumParameters(_AggregateParameters):
    name: Literal["sum"]
    column: ColumnPair


class MeanParameters(_AggregateParameters):
    name: Literal["mean"]
    column: ColumnPair


class VarianceParameters(_AggregateParameters):
    name: Literal["variance"]
    column: ColumnPair


class _Aggregate(Statistic[_AggregateParameters]):
    """Shared machinery; ``level`` is how far along count → sum → mean → variance the statistic goes."""

    level: int = 0

    def problems(self) -> list[Problem]:
        problems: list[Problem] = []
        if self.params.column is not None:
            problems += self.check_columns(self.params.column, "statistic.column")
        elif self.level > 0:
            problems.append(Problem("statistic.column", "required field is missing"))
        if self.params.where is not None:
            for party in Party:
                col = self.manifest.table(party).column(self.column_names(self.params.where)[party])
                if col is None or col.type != "boolean":
                    problems.append(
                        Problem(
                            "statistic.where", f"tables.{party.role_name} needs a boolean column of that name"
                        )
                    )
        if self.params.sample and self.level < 3:
            problems.append(Problem("statistic.sample", "only the variance statistic takes 'sample'"))
        return problems

    def needs(self) -> dict[Party, TableNeeds]:
        out = {}
        for party in Party:
            cols = []
            if self.params.column is not None:
                cols.append(self.column_names(self.params.column)[party])
            if self.params.where is not None:
                name = self.column_names(self.params.where)[party]
                if name not in cols:
                    cols.append(name)
            out[party] = TableNeeds(tuple(cols))
        return out

    # -- widths (declared before building; the build fits its wires to them) ----------------------------------
    def outputs(self) -> list[OutputSpec]:
        n = self.rows()
        specs = [OutputSpec("count", n.bit_length(), description="rows that count")]
        if self.level == 0:
            return specs
        assert self.params.column is not None  # checked by problems()
        fmt = self.column_format(self.params.column)
        w, signed, frac = fmt.width, fmt.signed, fmt.frac
        log_n = (n - 1).bit_length()
        e = self.params.precision_bits
        specs.append(OutputSpec("sum", w + log_n, signed, frac, description="sum of the column"))
        if self.level >= 2:
            specs.append(OutputSpec("mean", w + e, signed, frac + e, description="mean, rounded toward zero"))
        if self.level >= 3:
            specs.append(
                OutputSpec(
                    "variance", 2 * w + e, False, 2 * frac + e, description="variance, rounded toward zero"
                )
            )
        return specs

    # -- circuit ------------------------------------------------------------------------------------------------
    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        specs = self.output_specs()
        counts = []
        for party in Party:
            t = ctx.table(party)
            flag = t.valid
            if self.params.where is not None:
                flag = bld.and_(flag, t.bits(self.column_names(self.params.where)[party])[:, 0])
            counts.append(flag)
        flags = concat(counts)
        n = fit(bld, blocks.count_bits(bld, flags), specs["count"].width)
        values: dict[str, Bits] = {"count": n}
        ok = bld.ones(())
        if self.level == 0:
            return StatisticResult(values, count=n)
        assert self.params.column is not None
        x = blocks.concat_rows(self.aligned(ctx, self.params.column))
        masked = bld.and_(x.wires, flags[:, None])
        s = Number(
            fit(bld, blocks.tree_sum(bld, masked, signed=x.signed), specs["sum"].width, x.signed),
            x.signed,
            x.frac,
        )
        values["sum"] = s.wires
        e = self.params.precision_bits
        wanted = ctx.wanted
        if "mean" in wanted:
            ok = blocks.at_least(bld, n, 1)
            mean = blocks.divide_fixed(bld, s, n, e, result_bits=specs["mean"].width)
            values["mean"] = fit(bld, mean.wires, specs["mean"].width, x.signed)
        if "variance" in wanted:
            ok = blocks.at_least(bld, n, 2 if self.params.sample else 1)
            values["variance"] = self._variance(bld, x, masked, s, n, specs["variance"].width)
        return StatisticResult(values, count=n, ok=ok)

    def _variance(self, bld: Builder, x: Number, masked: Bits, s: Number, n: Bits, width: int) -> Bits:
        mag, _ = blocks.magnitude(bld, x.with_wires(masked))
        squares = bld.square(mag)
        q = blocks.tree_sum(bld, squares)
        nq = blocks.multiply_full(bld, q, n)
        s_mag, _ = blocks.magnitude(bld, s)
        s2 = bld.square(s_mag)
        wv = max(nq.shape[-1], s2.shape[-1])
        numerator = bld.sub(bld.extend(nq, wv), bld.extend(s2, wv))
        if self.params.sample:
            den = blocks.multiply_full(bld, n, bld.sub(n, bld.constant_word(1, n.shape[-1])))
        else:
            den = blocks.multiply_full(bld, n, n)
        var = blocks.divide_fixed(
            bld, Number(numerator, False, 2 * x.frac), den, self.params.precision_bits, width
        )
        return fit(bld, var.wires, width)


def fit(bld: Builder, wires: Bits, width: int, signed: bool = False) -> Bits:
    """Pin a result to its declared width; the declared widths are bounds, so only known-zero bits are cut."""
    return bld.extend(wires, width, signed=signed)


class Count(_Aggregate):
    name = "count"
    Parameters = CountParameters
    description = "how many rows both parties hold (optionally where a boolean column is true)"
    level = 0


class Sum(_Aggregate):
    name = "sum"
    Parameters = SumParameters
    description = "count and sum of a column over both parties' rows"
    level = 1


class Mean(_Aggregate):
    name = "mean"
    Parameters = MeanParameters
    description = "count, sum and mean of a column over both parties' rows"
    level = 2


class Variance(_Aggregate):
    name = "variance"
    Parameters = VarianceParameters
    description = "count, sum, mean and variance of a column over both parties' rows"
    level = 3
