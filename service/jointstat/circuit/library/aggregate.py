"""Count, sum, mean and variance of a column over both parties' rows.

Theory of operation
-------------------
The column is read from both tables and brought to one scale (``blocks.align``: common fraction bits, signedness
and width). Each row counts when its validity bit is set and, with ``where``, when every condition holds (a
boolean column's name, or {column, op, value} comparisons, ``Statistic.row_flags``); a row that does not count
contributes zero, so padding never changes a result whatever its bits are. With ``clamp: {min: L, max: U}`` every
value is first bounded to [L, U] inside the circuit (``blocks.clamp``).

* count n — the tree sum of the counting bits: ⌈log2(N + 1)⌉ bits for N = capacity_g + capacity_e rows.
* sum S — the tree sum of the masked values with growing width: w + ⌈log2 N⌉ bits, so it cannot overflow.
* mean — S / n with ``precision_bits`` more fraction bits, rounded toward zero (restoring division). The mean of
  w-bit values is a w-bit value, so the result has w + precision_bits bits.
* variance — (n·Q − S²) / (n·(n − d)) with Q = Σ x² (d = 0 population, d = 1 sample), rounded toward zero with
  2·F + precision_bits fraction bits (F: the column's fraction bits): exact integer arithmetic up to the one
  division, so no cancellation error. n·Q ≥ S² (Cauchy–Schwarz), so the numerator is unsigned; a variance of
  w-bit values is below 2^(2w−1), so the result has 2w + precision_bits bits. Squares cost about 2w² AND gates
  per row (schoolbook), which dominates for wide columns.

Release rules (besides the disclosure rule, which compares n with ``min_count`` and holds back every output): the
mean needs n ≥ 1 and the variance n ≥ 1 (n ≥ 2 for a sample variance), each on its own (``no_rows``,
``too_few_rows``), so a count or a sum is still released when the mean cannot be.

Noise (docs/privacy-noise.md): with r = ``privacy.rows_per_person``, the count has sensitivity r (counting queries,
Dwork–Roth 2014 §3.3) and a sum of values clamped to [L, U] has r·max(|L|, |U|) (ℓ1 sensitivity, Dwork–Roth
definition 3.1), on the encoded scale (× 2^F); a sum without clamping bounds has no finite sensitivity and is
refused. A noisy mean is a noisy sum divided by a noisy count, each drawn at half the mean's ε (post-processing
and composition, Dwork–Roth proposition 2.1 and theorem 3.16); it needs a noisy count of at least 1. The variance
is not offered with noise. With noise, the disclosure rule compares the noisy count (the count output must then
carry noise), never the exact one.
"""

from __future__ import annotations

from fractions import Fraction
from typing import Literal

from pydantic import Field

from jointstat.circuit.bits import Bits, concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.library import blocks
from jointstat.circuit.library.blocks import Number
from jointstat.circuit.library.noise import NoiseError
from jointstat.circuit.library.statistic import (
    BuildContext,
    NoiseDraw,
    OutputSpec,
    StatisticResult,
    SummedStatistic,
    TableNeeds,
)
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import (
    Clamp,
    ColumnPair,
    PrecisionBits,
    StatisticParameters,
    Where,
    later_field,
)
from jointstat.problems import Problem


class _AggregateParameters(StatisticParameters):
    column: ColumnPair | None = Field(
        None,
        description="the number column, named the same in both tables or per party as {garbler: …, evaluator: …}",
    )
    where: Where | None = Field(
        default=None,
        description="which rows count: a boolean column's name (rows where it is true), a condition {column, op, "
        "value} or a list of conditions that must all hold; without it every row counts",
    )
    precision_bits: PrecisionBits = 8
    sample: bool = Field(
        False,
        description="variance only: divide by n − 1 (the sample variance) instead of n (the population's)",
    )
    clamp: Clamp | None = later_field(
        None,
        "bounds {min, max} every value is clamped to inside the circuit before it is summed; a noisy sum or mean "
        "needs them (they bound what one person can add)",
    )


class CountParameters(_AggregateParameters):
    name: Literal["count"] = Field(
        description="count: how many rows both parties hold (where the filter holds)"
    )


class SumParameters(_AggregateParameters):
    name: Literal["sum"] = Field(description="sum: the count and the sum of a column over both parties' rows")
    column: ColumnPair = Field(
        description="the number column, named the same in both tables or per party as {garbler: …, evaluator: …}"
    )


class MeanParameters(_AggregateParameters):
    name: Literal["mean"] = Field(
        description="mean: the count, sum and mean of a column over both parties' rows"
    )
    column: ColumnPair = Field(
        description="the number column, named the same in both tables or per party as {garbler: …, evaluator: …}"
    )


class VarianceParameters(_AggregateParameters):
    name: Literal["variance"] = Field(
        description="variance: the count, sum, mean and variance of a column over both parties' rows"
    )
    column: ColumnPair = Field(
        description="the number column, named the same in both tables or per party as {garbler: …, evaluator: …}"
    )


class _Aggregate(SummedStatistic[_AggregateParameters]):
    """Shared machinery; ``level`` is how far along count → sum → mean → variance the statistic goes."""

    level: int = 0
    count_output = "count"
    noisy_mean_description = "noisy sum ÷ noisy count, rounded toward zero"

    def ok_rule(self) -> str | None:
        return None  # every release condition is an output's own

    def problems(self) -> list[Problem]:
        problems: list[Problem] = []
        path = self.path
        if self.params.column is not None:
            problems += self.check_columns(self.params.column, f"{path}.column")
        elif self.level > 0:
            problems.append(Problem(f"{path}.column", "required field is missing"))
        problems += self.condition_problems(self.params.where, f"{path}.where")
        if self.params.sample and self.level < 3:
            problems.append(Problem(f"{path}.sample", "only the variance statistic takes 'sample'"))
        if self.params.clamp is not None:
            if self.params.column is None:
                problems.append(
                    Problem(f"{path}.clamp", "clamping bounds apply to a column's values (give column)")
                )
            elif not problems:
                fmts = [self.column_format(self.params.column)]
                problems += self.clamp_problems(self.params.clamp, fmts, f"{path}.clamp")
        return problems

    def needs(self) -> dict[Party, TableNeeds]:
        out = {}
        for party in Party:
            cols = []
            if self.params.column is not None:
                cols.append(self.column_names(self.params.column)[party])
            for name in self.condition_columns(self.params.where, party):
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
            specs.append(
                OutputSpec(
                    "mean", w + e, signed, frac + e, description="mean, rounded toward zero", rule="no_rows"
                )
            )
        if self.level >= 3:
            rule = "too_few_rows" if self.params.sample else "no_rows"
            specs.append(
                OutputSpec(
                    "variance",
                    2 * w + e,
                    False,
                    2 * frac + e,
                    description="variance, rounded toward zero",
                    rule=rule,
                )
            )
        return specs

    # -- noise ----------------------------------------------------------------------------------------------------
    def counted_outputs(self) -> set[str]:
        return {"count"}

    def count_sensitivity(self) -> int:
        return self.rows_per_person()

    def sum_magnitude(self) -> int | None:
        clamp, column = self.params.clamp, self.params.column
        if clamp is None or column is None:
            return None
        return self.clamp_magnitude(clamp, self.column_format(column).frac)

    def mean_precision_bits(self) -> int:
        return self.params.precision_bits

    def noise_draws(self, output: str, epsilon: Fraction) -> list[NoiseDraw]:
        if output == "variance":
            raise NoiseError("the variance is not offered with noise; noise the count and the sum instead")
        return super().noise_draws(output, epsilon)

    # -- circuit ------------------------------------------------------------------------------------------------
    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        specs = self.output_specs()
        exact = {spec.name: spec for spec in self.outputs()}
        noisy = self.noise_settings()
        where = self.params.where
        flags = concat([self.row_flags(ctx, party, where) for party in Party])
        n = ctx.shared(
            ("count", tuple(ctx.table(p).order for p in Party), repr(self.conditions(where))),
            lambda: fit(bld, blocks.count_bits(bld, flags), exact["count"].width),
        )
        values: dict[str, Bits] = {"count": n}
        count, count_signed = n, False
        if "count" in noisy:
            values["count"] = count = ctx.noisy("count", n, signed=False)
            count_signed = True
        release: dict[str, Bits] = {}
        if self.level == 0:
            return StatisticResult(values, count=count, count_signed=count_signed)
        assert self.params.column is not None
        x = blocks.concat_rows(self.aligned(ctx, self.params.column))
        if self.params.clamp is not None:
            low, high = self.params.clamp.bounds()
            x = blocks.clamp(bld, x, int(low * (1 << x.frac)), int(high * (1 << x.frac)))
        masked = bld.and_(x.wires, flags[:, None])
        s = Number(
            fit(bld, blocks.tree_sum(bld, masked, signed=x.signed), exact["sum"].width, x.signed),
            x.signed,
            x.frac,
        )
        values["sum"] = ctx.noisy("sum", s.wires, signed=x.signed) if "sum" in noisy else s.wires
        e = self.params.precision_bits
        wanted = ctx.wanted
        some_row: Bits | None = None
        if "mean" in wanted and "mean" in noisy:
            total = ctx.noisy("mean.sum", s.wires, signed=x.signed)
            rows = ctx.noisy("mean.count", n, signed=False)
            release["mean"] = blocks.at_least(bld, rows, 1, signed=True)
            mean = blocks.divide_fixed(
                bld, Number(total, True, x.frac), rows, e, result_bits=specs["mean"].width
            )
            values["mean"] = fit(bld, mean.wires, specs["mean"].width, True)
        elif "mean" in wanted:
            release["mean"] = some_row = blocks.at_least(bld, n, 1)
            mean = blocks.divide_fixed(bld, s, n, e, result_bits=specs["mean"].width)
            values["mean"] = fit(bld, mean.wires, specs["mean"].width, x.signed)
        if "variance" in wanted:
            if self.params.sample:
                release["variance"] = blocks.at_least(bld, n, 2)
            else:
                release["variance"] = some_row if some_row is not None else blocks.at_least(bld, n, 1)
            values["variance"] = self._variance(bld, x, masked, s, n, specs["variance"].width)
        return StatisticResult(values, count=count, count_signed=count_signed, release=release)

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
    description = "how many rows both parties hold (optionally where the rows meet a condition)"
    sensitivity = "count: r (r = `privacy.rows_per_person`); counting queries, Dwork–Roth 2014 section 3.3"
    level = 0


class Sum(_Aggregate):
    name = "sum"
    Parameters = SumParameters
    description = "count and sum of a column over both parties' rows"
    sensitivity = (
        "count: r; sum of values clamped to [L, U]: r·max(|L|, |U|) (r = `privacy.rows_per_person`; ℓ1 sensitivity, Dwork–Roth 2014 "
        "definition 3.1); without clamping bounds a sum cannot be noised"
    )
    level = 1


class Mean(_Aggregate):
    name = "mean"
    Parameters = MeanParameters
    description = "count, sum and mean of a column over both parties' rows"
    sensitivity = (
        "count and sum as for `sum`; mean: the clamped sum and the count noised separately at ε/2 each, then "
        "divided (composition, Dwork–Roth 2014 theorem 3.16; post-processing, proposition 2.1)"
    )
    level = 2


class Variance(_Aggregate):
    name = "variance"
    Parameters = VarianceParameters
    description = "count, sum, mean and variance of a column over both parties' rows"
    sensitivity = "count, sum and mean as for `mean`; the variance is not offered with noise"
    level = 3
