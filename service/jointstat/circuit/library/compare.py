"""Comparison of what each party holds: which is larger, by how much, their ratio, or whether an operator holds —
of one value each, or of an aggregate of each party's own table computed inside the circuit.

Theory of operation
-------------------
Each party's side is one number, read from its own table only:

* ``value`` (the default) — the table's single row (capacity 1); both rows must be present (rule
  ``missing_value``), and the disclosure count is the number of values present (0 to 2);
* ``count`` — the rows that count (valid, and every ``where`` condition holding);
* ``sum`` — the sum of the column over those rows;
* ``mean`` — that sum over that count, kept as the exact fraction S/n;
* ``quantile`` — the ``percentile`` of the party's own values by ``method`` (``blocks.percentile`` on the party's
  rows, which it sorts before encoding, as the pooled quantile does after its merge).

For aggregates the disclosure count is the smaller of the two sides' counts (each side's aggregate must stand for
at least ``min_count`` rows), and a mean or a quantile needs a row on each side (rule ``no_rows``).

Outputs, each computed only when some party receives it (listing it in the outputs is what releases it):

* ``larger`` — a choice: "equal", "garbler" or "evaluator" (encoded as garbler-larger + 2·evaluator-larger);
* ``difference`` — garbler's − evaluator's, signed; ``gap`` — its magnitude;
* ``ratio`` — garbler's ÷ evaluator's, rounded toward zero to ``precision_bits`` fraction bits, withheld on its own
  when the evaluator's side is 0 (rule ``zero_divisor``);
* with ``op`` — a flag named after the operator (``parameters.OPERATOR_WORDS``): whether garbler's op evaluator's
  holds, e.g. ``op: ">"`` gives ``more_than``. One bit leaks less than ``larger``.

Numbers are aligned to one scale (``blocks.align``) and compared as signed or unsigned words (one comparator each
way, n AND gates each, Kolesnikov–Sadeghi–Schneider 2009). Two means S_g/n_g and S_e/n_e are compared exactly by
their cross products D = S_g·n_e − S_e·n_g (no rounding decides an order); their difference is D/(n_g·n_e) and
their ratio (S_g·n_e)/(S_e·n_g), each rounded toward zero once.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from jointstat.circuit.bits import Bits, stack
from jointstat.circuit.builder import Builder
from jointstat.circuit.library import blocks
from jointstat.circuit.library.blocks import Number, NumberFormat, common_format
from jointstat.circuit.library.statistic import (
    BuildContext,
    OutputSpec,
    Statistic,
    StatisticResult,
    TableNeeds,
)
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import (
    OPERATOR_WORDS,
    ColumnPair,
    Operator,
    PrecisionBits,
    StatisticParameters,
    Where,
    later_field,
)
from jointstat.problems import Problem

CHOICES = ("equal", "garbler", "evaluator")
Aggregate = Literal["value", "count", "sum", "mean", "quantile"]


class CompareParameters(StatisticParameters):
    name: Literal["compare"] = Field(description="compare: the garbler's side against the evaluator's")
    column: ColumnPair | None = Field(
        None,
        description="the number column each side reads from its own table (not needed to compare counts)",
    )
    aggregate: Aggregate = later_field(
        "value",
        "what each side is: value (its table's single row, the default), count, sum, mean or quantile of its own "
        "table, computed inside the circuit",
    )
    percentile: float | None = later_field(
        None, "with aggregate: quantile, which percentile (0 to 100; 50 = median)"
    )
    method: Literal["lower", "higher", "midpoint", "linear"] = later_field(
        "linear",
        "with aggregate: quantile, how a percentile between two values is taken (as numpy.percentile)",
    )
    where: Where | None = later_field(
        None, "with aggregate count, sum or mean: which rows count (a boolean column, a condition, or a list)"
    )
    op: Operator | None = later_field(
        None, "adds a flag output named after the operator: whether garbler's op evaluator's holds"
    )
    precision_bits: PrecisionBits = later_field(8, "fraction bits of a ratio or a difference of means")


class Compare(Statistic[CompareParameters]):
    name = "compare"
    Parameters = CompareParameters
    description = "compare each party's value or aggregate: which is larger, difference, ratio, an operator"

    @property
    def kind(self) -> str:
        return self.params.aggregate

    def ok_rule(self) -> str | None:
        return {"value": "missing_value", "mean": "no_rows", "quantile": "no_rows"}.get(self.kind)

    def problems(self) -> list[Problem]:
        path, p = self.path, self.params
        problems: list[Problem] = []
        if p.column is not None:
            problems += self.check_columns(p.column, f"{path}.column")
        elif self.kind != "count":
            problems.append(Problem(f"{path}.column", f"required field is missing (aggregate {self.kind})"))
        if self.kind == "value":
            for party in Party:
                if self.manifest.table(party).capacity != 1:
                    problems.append(
                        Problem(
                            f"tables.{party.role_name}.capacity",
                            "must be 1 for the compare statistic of single values (one value each); give "
                            f"{path}.aggregate to compare an aggregate of each table",
                        )
                    )
        if self.kind in ("value", "quantile") and p.where is not None:
            problems.append(Problem(f"{path}.where", f"does not apply to aggregate {self.kind}"))
        problems += self.condition_problems(p.where, f"{path}.where")
        if (p.percentile is None) == (self.kind == "quantile"):
            what = (
                "required field is missing (aggregate quantile)"
                if p.percentile is None
                else "only with quantile"
            )
            problems.append(Problem(f"{path}.percentile", what))
        elif p.percentile is not None and not 0 <= p.percentile <= 100:
            problems.append(Problem(f"{path}.percentile", "must be between 0 and 100"))
        return problems

    def needs(self) -> dict[Party, TableNeeds]:
        names = self.column_names(self.params.column) if self.params.column is not None else None
        out = {}
        for party in Party:
            cols = [names[party]] if names is not None else []
            cols += [c for c in self.condition_columns(self.params.where, party) if c not in cols]
            sort = names[party] if names is not None and self.kind == "quantile" else None
            out[party] = TableNeeds(tuple(cols), sort_by=sort)
        return out

    # -- formats ------------------------------------------------------------------------------------------------
    def side_format(self, party: Party) -> NumberFormat:
        """The format of one side's number (the numerator S of a mean)."""
        cap = self.manifest.table(party).capacity
        if self.kind == "count":
            return NumberFormat(cap.bit_length(), False)
        assert self.params.column is not None
        if self.kind == "value":
            col = self.column(party, self.params.column)
            return NumberFormat(col.bits, col.signed, col.frac)
        fmt = self.column_format(self.params.column)
        if self.kind == "quantile":
            w, f = blocks.percentile_width(
                fmt.width, fmt.frac, self.params.method, self.params.precision_bits
            )
            return NumberFormat(w, fmt.signed, f)
        return NumberFormat(fmt.width + (cap - 1).bit_length(), fmt.signed, fmt.frac)  # sum, mean

    def count_width(self, party: Party) -> int:
        return int(self.manifest.table(party).capacity.bit_length())

    def outputs(self) -> list[OutputSpec]:
        fmt = common_format(*(self.side_format(p) for p in Party))
        e = self.params.precision_bits
        specs = [OutputSpec("larger", 2, choices=CHOICES, description="whose side is larger")]
        if self.kind == "mean":
            col = self.column_format(self.params.column) if self.params.column is not None else fmt
            products = fmt.width + max(self.count_width(p) for p in Party)
            specs += [
                OutputSpec(
                    "gap", col.width + e, False, col.frac + e, description="|garbler's − evaluator's|"
                ),
                OutputSpec(
                    "difference", col.width + 1 + e, True, col.frac + e, description="garbler's − evaluator's"
                ),
                OutputSpec(
                    "ratio",
                    products + e + 1,
                    True,
                    e,
                    description="garbler's ÷ evaluator's",
                    rule="zero_divisor",
                ),
            ]
        else:
            sign = 1 if fmt.signed else 0
            specs += [
                OutputSpec("gap", fmt.width, False, fmt.frac, description="|garbler's − evaluator's|"),
                OutputSpec(
                    "difference", fmt.width + 1, True, fmt.frac, description="garbler's − evaluator's"
                ),
                OutputSpec(
                    "ratio",
                    fmt.width + e + sign,
                    fmt.signed,
                    e,
                    description="garbler's ÷ evaluator's",
                    rule="zero_divisor",
                ),
            ]
        if self.params.op is not None:
            word = OPERATOR_WORDS[self.params.op]
            specs.append(
                OutputSpec(word, 1, flag=True, description=f"garbler's {self.params.op} evaluator's")
            )
        return specs

    # -- circuit ------------------------------------------------------------------------------------------------
    def build(self, ctx: BuildContext) -> StatisticResult:
        if self.kind == "value":
            return self._build_values(ctx)
        bld = ctx.builder
        specs = self.output_specs()
        sides: list[Number] = []
        counts: list[Bits] = []
        for party in Party:
            number, n = self._side(ctx, party)
            sides.append(number)
            counts.append(n)
        values: dict[str, Bits] = {}
        release: dict[str, Bits] = {}
        if self.kind == "mean":
            self._means(bld, sides, counts, ctx.wanted, specs, values, release)
        else:
            g, e = blocks.align(bld, *sides)
            self._numbers(bld, g, e, ctx.wanted, specs, values, release)
        ok = None
        if self.kind in ("mean", "quantile"):
            ok = bld.and_(blocks.at_least(bld, counts[0], 1), blocks.at_least(bld, counts[1], 1))
        count = None
        if ctx.needs_count:
            width = max(c.shape[-1] for c in counts)
            a, b = (bld.extend(c, width) for c in counts)
            count = bld.select(bld.greater_than(a, b), a, b)  # the smaller side's count
        return StatisticResult(values, count=count, ok=ok, release=release)

    def _side(self, ctx: BuildContext, party: Party) -> tuple[Number, Bits]:
        """One side's number (a mean's sum) and its count."""
        bld = ctx.builder
        table = ctx.table(party)
        flags = self.row_flags(ctx, party, self.params.where)
        n = bld.extend(blocks.count_bits(bld, flags), self.count_width(party))
        if self.kind == "count":
            return Number(n, False), n
        assert self.params.column is not None
        fmt = self.column_format(self.params.column)
        x = table.number(self.column_names(self.params.column)[party])
        x = blocks.widen(bld, blocks.rescale(bld, x, fmt.frac), fmt.width, signed=fmt.signed)
        side = self.side_format(party)
        if self.kind == "quantile":
            assert self.params.percentile is not None
            n_minus_1 = bld.sub(n, bld.constant_word(1, n.shape[-1]))
            wires = blocks.percentile(
                bld,
                x.wires,
                n_minus_1,
                blocks.rank_fraction(self.params.percentile),
                method=self.params.method,
                signed=x.signed,
                precision_bits=self.params.precision_bits,
                width=side.width,
            )
            return Number(wires, side.signed, side.frac), n
        masked = bld.and_(x.wires, flags[:, None])
        total = bld.extend(blocks.tree_sum(bld, masked, signed=x.signed), side.width, signed=x.signed)
        return Number(total, x.signed, x.frac), n

    def _numbers(
        self,
        bld: Builder,
        g: Number,
        e: Number,
        wanted: frozenset[str],
        specs: dict[str, OutputSpec],
        values: dict[str, Bits],
        release: dict[str, Bits],
    ) -> None:
        """The outputs of two aligned numbers (every aggregate but the mean)."""
        gw, ew = g.wires, e.wires
        order = _Order(bld, gw, ew, g.signed)
        if "larger" in wanted:
            values["larger"] = stack([order.garbler_larger(), order.evaluator_larger()])
        if wanted & {"gap", "difference"}:
            w = g.width + 1
            diff = bld.sub(bld.extend(gw, w, signed=g.signed), bld.extend(ew, w, signed=g.signed))
            if "difference" in wanted:
                values["difference"] = diff
            if "gap" in wanted:
                mag, _ = blocks.magnitude(bld, Number(diff, True, g.frac))
                values["gap"] = bld.extend(mag, g.width)
        if "ratio" in wanted:
            values["ratio"], release["ratio"] = signed_ratio(
                bld,
                Number(gw, g.signed),
                Number(ew, g.signed),
                self.params.precision_bits,
                specs["ratio"].width,
            )
        self._operator(bld, order, wanted, values)

    def _means(
        self,
        bld: Builder,
        sums: list[Number],
        counts: list[Bits],
        wanted: frozenset[str],
        specs: dict[str, OutputSpec],
        values: dict[str, Bits],
        release: dict[str, Bits],
    ) -> None:
        """The outputs of two means S_g/n_g and S_e/n_e, through their cross products (module docstring)."""
        g, e = blocks.align(bld, *sums)
        a = scale(bld, g, counts[1])  # S_g·n_e
        b = scale(bld, e, counts[0])  # S_e·n_g
        w = a.width + 1
        d = bld.sub(bld.extend(a.wires, w, signed=a.signed), bld.extend(b.wires, w, signed=b.signed))
        zero = bld.zeros(d.shape)
        order = _Order(bld, d, zero, True)
        prec = self.params.precision_bits
        if "larger" in wanted:
            values["larger"] = stack([order.garbler_larger(), order.evaluator_larger()])
        if wanted & {"gap", "difference"}:
            both = blocks.multiply_full(bld, counts[0], counts[1])
            diff = blocks.divide_fixed(bld, Number(d, True, g.frac), both, prec, specs["difference"].width)
            if "difference" in wanted:
                values["difference"] = diff.wires
            if "gap" in wanted:
                mag, _ = blocks.magnitude(bld, diff)
                values["gap"] = bld.extend(mag, specs["gap"].width)
        if "ratio" in wanted:
            values["ratio"], release["ratio"] = signed_ratio(bld, a, b, prec, specs["ratio"].width)
        self._operator(bld, order, wanted, values)

    def _operator(self, bld: Builder, order: _Order, wanted: frozenset[str], values: dict[str, Bits]) -> None:
        op = self.params.op
        if op is None or OPERATOR_WORDS[op] not in wanted:
            return
        holds = {
            ">": order.garbler_larger,
            "<": order.evaluator_larger,
            ">=": lambda: bld.not_(order.evaluator_larger()),
            "<=": lambda: bld.not_(order.garbler_larger()),
            "==": order.equal,
            "!=": lambda: bld.not_(order.equal()),
        }[op]()
        values[OPERATOR_WORDS[op]] = holds.reshape(1)

    def _build_values(self, ctx: BuildContext) -> StatisticResult:
        """One row each (the original compare; its gates in their original order)."""
        bld = ctx.builder
        assert self.params.column is not None
        g, e = self.aligned(ctx, self.params.column)
        gw, ew = g.wires[0], e.wires[0]
        values: dict[str, Bits] = {}
        release: dict[str, Bits] = {}
        order = _Order(bld, gw, ew, g.signed)
        if "larger" in ctx.wanted or self.params.op is None:
            values["larger"] = stack([order.garbler_larger(), order.evaluator_larger()])
        if "gap" in ctx.wanted:
            w = g.width + 1
            diff = bld.sub(bld.extend(gw, w, signed=g.signed), bld.extend(ew, w, signed=g.signed))
            mag, _ = blocks.magnitude(bld, Number(diff, True, g.frac))
            values["gap"] = bld.extend(mag, g.width)
        specs = self.output_specs()
        rest = ctx.wanted & {"difference", "ratio"}
        if rest:
            self._numbers(bld, g.with_wires(gw), e.with_wires(ew), frozenset(rest), specs, values, release)
        self._operator(bld, order, ctx.wanted, values)
        valid = ctx.valid()  # (2,): one row each
        count = blocks.count_bits(bld, valid)
        ok = bld.and_(valid[0], valid[1])
        return StatisticResult(values, count=count, ok=ok, release=release)


class _Order:
    """Comparisons of two words, each computed once when first asked for."""

    def __init__(self, bld: Builder, x: Bits, y: Bits, signed: bool) -> None:
        self.bld, self.x, self.y, self.signed = bld, x, y, signed
        self._gt: Bits | None = None
        self._lt: Bits | None = None
        self._eq: Bits | None = None

    def garbler_larger(self) -> Bits:
        if self._gt is None:
            self._gt = self.bld.greater_than(self.x, self.y, signed=self.signed)
        return self._gt

    def evaluator_larger(self) -> Bits:
        if self._lt is None:
            self._lt = self.bld.greater_than(self.y, self.x, signed=self.signed)
        return self._lt

    def equal(self) -> Bits:
        if self._eq is None:
            if self._gt is not None and self._lt is not None:  # neither is larger: one AND gate
                self._eq = self.bld.and_(self.bld.not_(self._gt), self.bld.not_(self._lt))
            else:
                self._eq = self.bld.equal(self.x, self.y)
        return self._eq


def scale(bld: Builder, x: Number, factor: Bits) -> Number:
    """x times an unsigned word (the same fraction bits): |x|·factor with x's sign."""
    mag, sign = blocks.magnitude(bld, x)
    product = blocks.multiply_full(bld, mag, factor)
    if not x.signed:
        return Number(product, False, x.frac)
    wide = bld.extend(product, product.shape[-1] + 1)
    return Number(blocks.negate_if(bld, wide, sign), True, x.frac)


def signed_ratio(
    bld: Builder, num: Number, den: Number, precision_bits: int, width: int
) -> tuple[Bits, Bits]:
    """(num ÷ den rounded toward zero with ``precision_bits`` fraction bits in ``width`` bits, den ≠ 0): the scales
    of num and den cancel, so the quotient has exactly ``precision_bits`` fraction bits."""
    den_mag, den_sign = blocks.magnitude(bld, den)
    nonzero = bld.reduce_or(den_mag)
    q = blocks.divide_fixed(bld, Number(num.wires, num.signed, 0), den_mag, precision_bits, width)
    if not den.signed:
        return bld.extend(q.wires, width, signed=q.signed), nonzero
    wires = q.wires if q.signed else bld.extend(q.wires, width)
    return bld.extend(blocks.negate_if(bld, wires, den_sign), width, signed=True), nonzero
