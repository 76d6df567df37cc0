"""Keyed-join statistics over the keys both parties hold: how many, the sum and mean of a value, how many pass a
threshold.

Theory of operation
-------------------
Sort–compare in the manner of Huang–Evans–Katz (NDSS 2012). Each party sorts its rows by key (the encoder does
it; keys are unique within a party). An element is the key with the row's invalid bit above it as the most
significant bit, so padding sorts after every real key. The garbler's list, padding with the largest key up to a
power of two M, and the evaluator's list reversed form a bitonic sequence, which Batcher's bitonic merger sorts
((M/2)·log2 M compare-and-swaps on k + 1 key bits, 2(k + 1) AND gates each — the bulk of the circuit).

Neighbours are then compared: a pair (i, i + 1) matches when its words are equal (which includes both invalid
bits) and element i is valid; as keys are unique per party, a matching pair holds one row of each party, and no
element can match both neighbours. ``matches`` is the count of matching pairs.

For the value statistics, each merged position gets the bit "my element matched" (m_i = match_{i−1} ⊕ match_i)
and that bit is carried back through the merger to the element's input position (``blocks.route_back``: the
stages replayed in reverse with the same swap bits, one AND per comparator). The value party's rows then see
whether they matched, without carrying their values through the network: ``sum`` = Σ m·v (one AND per value bit
and a tree sum; with ``clamp`` each v is first bounded to [min, max]), ``mean`` = sum / matches (rounded toward
zero, ``precision_bits`` more fraction bits; released only when some key matched, rule ``no_rows``) and, with a
``threshold: {op, value}``, how many matched rows have v op value — an output named after the operator
(``parameters.OPERATOR_WORDS``: more_than, at_least, less_than, at_most, equal_to, not_equal_to), compared exactly
(``blocks.compare_constant``). A bare number as the threshold is the former form: v ≥ it, output ``above``.

Several keyed joins on the same identifier columns in one manifest share one merge (``ctx.shared``): the merge,
the matches and the bits carried back are computed once.

Noise: keys are unique per party, so one person is at most one match: ``matches`` and the threshold count have
sensitivity 1 and a sum clamped to [L, U] has max(|L|, |U|) (× 2^F on the encoded scale); a noisy mean is a noisy
sum over noisy matches, each at half its ε (see ``library.aggregate``).

Widths: matches ≤ min(capacities), so ⌈log2(min + 1)⌉ bits; the sum of at most c value-party rows of w bits has
w + ⌈log2 c⌉ bits.
"""

from __future__ import annotations

from fractions import Fraction
from typing import Any, Literal

from pydantic import Field

from jointstat.circuit.bits import Bits, concat
from jointstat.circuit.library import blocks
from jointstat.circuit.library.blocks import Number, NumberFormat
from jointstat.circuit.library.statistic import (
    BuildContext,
    OutputSpec,
    StatisticResult,
    SummedStatistic,
    TableNeeds,
)
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import (
    OPERATOR_WORDS,
    Clamp,
    ColumnPair,
    PartyColumn,
    PrecisionBits,
    StatisticParameters,
    Threshold,
    exact,
    later_field,
)
from jointstat.problems import Problem

LEGACY_THRESHOLD = "above"  # the output of a bare-number threshold (value ≥ threshold)


class JoinParameters(StatisticParameters):
    name: Literal["keyed_join"] = Field(
        description="keyed_join: the identifiers both parties hold, and a value of one party's matched rows"
    )
    key: ColumnPair = Field(description="the identifier column matched across the two tables")
    value: PartyColumn | None = Field(
        None, description="a number column of one party's table summed over matched rows: {party, column}"
    )
    threshold: float | Threshold | None = Field(
        None,
        description="count the matched rows whose value compares with a public value: {op, value}; the output is "
        "named after the operator (more_than, at_least, less_than, at_most, equal_to, not_equal_to). A bare number "
        "is the former form, counting values at least it as `above`",
    )
    precision_bits: PrecisionBits = 8
    clamp: Clamp | None = later_field(
        None,
        "bounds {min, max} every matched value is clamped to before it is summed; a noisy sum or mean needs them",
    )


class KeyedJoin(SummedStatistic[JoinParameters]):
    name = "keyed_join"
    Parameters = JoinParameters
    description = "matches, sum, mean and threshold count of a value over the keys both parties hold"
    sensitivity = (
        "matches and the threshold count: 1 (identifiers are unique per table, so one person is at most one "
        "match; counting queries, Dwork–Roth 2014 section 3.3); sum of values clamped to [L, U]: max(|L|, |U|) "
        "(ℓ1 sensitivity, definition 3.1); mean: noisy sum ÷ noisy matches at ε/2 each (composition, theorem "
        "3.16)"
    )
    count_output = "matches"
    noisy_mean_description = "noisy sum ÷ noisy matches"

    def ok_rule(self) -> str | None:
        return None  # every release condition is an output's own

    def value_party(self) -> Party | None:
        return None if self.params.value is None else Party[self.params.value.party.upper()]

    def threshold(self) -> tuple[str, str, Fraction] | None:
        """(output name, operator, exact value) of the threshold, if any."""
        t = self.params.threshold
        if t is None:
            return None
        if isinstance(t, Threshold):
            return OPERATOR_WORDS[t.op], t.op, exact(t.value)
        return LEGACY_THRESHOLD, ">=", Fraction(repr(float(t)))

    def problems(self) -> list[Problem]:
        path = self.path
        problems = list(self.check_columns(self.params.key, f"{path}.key", numeric=False))
        if problems:
            return problems
        cols = [self.column(party, self.params.key) for party in Party]
        for party, col in zip(Party, cols, strict=True):
            if not col.identifier:
                problems.append(
                    Problem(
                        f"{path}.key",
                        f"tables.{party.role_name} column {col.name!r} is not an identifier column",
                    )
                )
        if not problems and cols[0].bits != cols[1].bits:
            problems.append(
                Problem(f"{path}.key", f"the key columns differ in width ({cols[0].bits}, {cols[1].bits})")
            )
        vp = self.value_party()
        if vp is not None and self.params.value is not None:
            value = self.manifest.table(vp).column(self.params.value.column)
            if value is None:
                problems.append(
                    Problem(f"{path}.value.column", self.missing_column(vp, self.params.value.column))
                )
            elif not value.number:
                problems.append(Problem(f"{path}.value.column", f"{value.name!r} is not a number column"))
            elif self.params.clamp is not None:
                fmt = NumberFormat(value.bits, value.signed, value.frac)
                problems += self.clamp_problems(self.params.clamp, [fmt], f"{path}.clamp")
        for field in ("threshold", "clamp"):
            if getattr(self.params, field) is not None and self.params.value is None:
                problems.append(Problem(f"{path}.{field}", f"a {field} needs a value column"))
        return problems

    def needs(self) -> dict[Party, TableNeeds]:
        out = {}
        vp = self.value_party()
        for party in Party:
            key = self.column_names(self.params.key)[party]
            cols = [key]
            if party == vp and self.params.value is not None and self.params.value.column != key:
                cols.append(self.params.value.column)
            out[party] = TableNeeds(tuple(cols), sort_by=key, unique=key)
        return out

    def outputs(self) -> list[OutputSpec]:
        caps = [self.manifest.table(p).capacity for p in Party]
        specs = [OutputSpec("matches", min(caps).bit_length(), description="keys both parties hold")]
        vp = self.value_party()
        if vp is None or self.params.value is None:
            return specs
        col = self.manifest.table(vp).column(self.params.value.column)
        assert col is not None
        cap = self.manifest.table(vp).capacity
        w, e = col.bits, self.params.precision_bits
        specs.append(
            OutputSpec(
                "sum", w + (cap - 1).bit_length(), col.signed, col.frac, description="sum over matches"
            )
        )
        specs.append(
            OutputSpec(
                "mean", w + e, col.signed, col.frac + e, description="mean over matches", rule="no_rows"
            )
        )
        threshold = self.threshold()
        if threshold is not None:
            name, op, value = threshold
            specs.append(
                OutputSpec(name, min(caps).bit_length(), description=f"matches whose value is {op} {value}")
            )
        return specs

    # -- noise ----------------------------------------------------------------------------------------------------
    def counted_outputs(self) -> set[str]:
        threshold = self.threshold()
        return {"matches"} if threshold is None else {"matches", threshold[0]}

    def count_sensitivity(self) -> int:
        return 1  # identifiers are unique per table: one person is at most one match

    def sum_magnitude(self) -> int | None:
        clamp, vp, value = self.params.clamp, self.value_party(), self.params.value
        if clamp is None or vp is None or value is None:
            return None
        col = self.manifest.table(vp).column(value.column)
        assert col is not None
        return self.clamp_magnitude(clamp, col.frac)

    def mean_precision_bits(self) -> int:
        return self.params.precision_bits

    # -- circuit ------------------------------------------------------------------------------------------------
    def carries_back(self) -> bool:
        """Whether any keyed join of the manifest on these key columns receives a value output: the shared
        merge then carries the match bits back for all of them."""
        mine = self.column_names(self.params.key)
        for use in self.manifest.uses():
            params = use.params
            if use.kind != self.name or params.value is None:  # type: ignore[attr-defined]
                continue
            if self.column_names(params.key) != mine:  # type: ignore[attr-defined]
                continue
            released = set(use.outputs.garbler) | set(use.outputs.evaluator)
            if released - {"matches"}:
                return True
        return False

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        specs = self.output_specs()
        names = self.column_names(self.params.key)
        vp = self.value_party()
        threshold = self.threshold()
        value_outputs = {"sum", "mean"} | ({threshold[0]} if threshold else set())
        wants_values = vp is not None and self.params.value is not None and bool(ctx.wanted & value_outputs)
        key = ("join", tuple(names.values()), tuple(ctx.table(p).order for p in Party))
        merged = ctx.memo.get(key)
        if merged is None or (wants_values and merged["back"] is None):
            merged = self._merge(ctx, specs["matches"].width, wants_values or self.carries_back())
            ctx.memo[key] = merged
        matches: Bits = merged["matches"]
        values: dict[str, Bits] = {"matches": matches}
        noisy = self.noise_settings()
        count, count_signed = matches, False
        if "matches" in noisy:
            values["matches"] = count = ctx.noisy("matches", matches, signed=False)
            count_signed = True
        release: dict[str, Bits] = {}
        if wants_values:
            assert vp is not None and self.params.value is not None
            layout = merged["layout"]
            back = merged["back"]
            mine = back[layout.first] if vp == Party.GARBLER else back[layout.second][::-1]
            v = ctx.table(vp).number(self.params.value.column)
            if self.params.clamp is not None:
                low, high = self.params.clamp.bounds()
                v = blocks.clamp(bld, v, int(low * (1 << v.frac)), int(high * (1 << v.frac)))
            masked = bld.and_(v.wires, mine[:, None])
            exact_sum = {s.name: s for s in self.outputs()}["sum"]
            s = Number(
                bld.extend(blocks.tree_sum(bld, masked, signed=v.signed), exact_sum.width, signed=v.signed),
                v.signed,
                v.frac,
            )
            values["sum"] = ctx.noisy("sum", s.wires, signed=v.signed) if "sum" in noisy else s.wires
            if "mean" in ctx.wanted:
                values["mean"], release["mean"] = self._mean(ctx, s, matches, specs["mean"].width)
            if threshold is not None and threshold[0] in ctx.wanted:
                name, op, bound = threshold
                holds = blocks.compare_constant(bld, v, op, bound)
                counted = blocks.count_bits(bld, bld.and_(holds, mine))
                counted = bld.extend(counted, matches.shape[-1])  # as many as the matches at most
                values[name] = ctx.noisy(name, counted, signed=False) if name in noisy else counted
        extra = dict(merged["extra"])
        return StatisticResult(values, count=count, count_signed=count_signed, release=release, extra=extra)

    def _mean(self, ctx: BuildContext, s: Number, matches: Bits, width: int) -> tuple[Bits, Bits]:
        bld = ctx.builder
        e = self.params.precision_bits
        if "mean" not in self.noise_settings():
            mean = blocks.divide_fixed(bld, s, matches, e, width)
            return mean.wires, blocks.at_least(bld, matches, 1)
        total = ctx.noisy("mean.sum", s.wires, signed=s.signed)
        rows = ctx.noisy("mean.count", matches, signed=False)
        ok = blocks.at_least(bld, rows, 1, signed=True)
        mean = blocks.divide_fixed(bld, Number(total, True, s.frac), rows, e, width)
        return bld.extend(mean.wires, width, signed=True), ok

    def _merge(self, ctx: BuildContext, matches_width: int, carry_back: bool) -> dict[str, Any]:
        """The merge, the matches and (with ``carry_back``) each merged position's match bit carried back."""
        bld = ctx.builder
        names = self.column_names(self.params.key)
        elements = []
        for party in Party:
            t = ctx.table(party)
            elements.append(concat([t.bits(names[party]), bld.not_(t.valid)[:, None]], axis=1))
        kw = elements[0].shape[1]
        pad = bld.constant([0] * (kw - 1) + [1])
        layout = blocks.merge_layout(elements[0].shape[0], elements[1].shape[0])
        # The arranged sequence is handed straight to the merge, which frees it piece by piece.
        merged = blocks.bitonic_merge(bld, blocks.arrange(elements.pop(0), elements.pop(0), pad)[0])
        k = merged.keys

        def neighbours_match(low: Bits, high: Bits) -> Bits:
            eq = bld.equal(low, high)
            return bld.xor(eq, bld.and_(eq, low[:, -1]))  # match = eq ∧ valid_i = eq ⊕ (eq ∧ invalid_i)

        match = blocks.lanewise(neighbours_match, k[:-1], k[1:])
        del k
        swaps = merged.swaps  # all the merge leaves behind: route_back needs its swap bits, not its keys
        extra = {"comparators": merged.comparators, "key_bits": kw, "merge_size": layout.size}
        del merged
        matches = bld.extend(blocks.count_bits(bld, match), matches_width)
        back = None
        if carry_back:
            # m_i = match_{i−1} ⊕ match_i, with match_{−1} = match_{M−1} = 0
            zero = bld.zeros(1)
            flag = bld.xor(concat([match, zero]), concat([zero, match]))
            back = blocks.route_back(bld, flag, swaps)
        return {"matches": matches, "back": back, "layout": layout, "extra": extra}
