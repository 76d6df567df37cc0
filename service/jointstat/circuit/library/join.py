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
and a tree sum), ``mean`` = sum / matches (rounded toward zero, ``precision_bits`` more fraction bits) and
``above`` = how many matched rows have v ≥ ``threshold``.

Widths: matches ≤ min(capacities), so ⌈log2(min + 1)⌉ bits; the sum of at most c value-party rows of w bits has
w + ⌈log2 c⌉ bits.
"""

from __future__ import annotations

from typing import Literal

from jointstat.circuit.bits import Bits, concat
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
from jointstat.circuit.parameters import ColumnPair, PartyColumn, PrecisionBits, StatisticParameters
from jointstat.problems import Problem


class JoinParameters(StatisticParameters):
    name: Literal["keyed_join"]
    key: ColumnPair
    value: PartyColumn | None = None
    threshold: float | None = None  # ``above`` counts matched rows whose value is at least this
    precision_bits: PrecisionBits = 8


class KeyedJoin(Statistic[JoinParameters]):
    name = "keyed_join"
    Parameters = JoinParameters
    description = "matches, sum, mean and threshold count of a value over the keys both parties hold"

    def value_party(self) -> Party | None:
        return None if self.params.value is None else Party[self.params.value.party.upper()]

    def problems(self) -> list[Problem]:
        problems = list(self.check_columns(self.params.key, "statistic.key", numeric=False))
        if problems:
            return problems
        cols = [self.column(party, self.params.key) for party in Party]
        for party, col in zip(Party, cols, strict=True):
            if col.type != "key":
                problems.append(
                    Problem("statistic.key", f"tables.{party.role_name} column {col.name!r} is not a key")
                )
        if not problems and cols[0].bits != cols[1].bits:
            problems.append(
                Problem("statistic.key", f"the key columns differ in width ({cols[0].bits}, {cols[1].bits})")
            )
        vp = self.value_party()
        if vp is not None and self.params.value is not None:
            value = self.manifest.table(vp).column(self.params.value.column)
            if value is None:
                problems.append(
                    Problem("statistic.value.column", f"tables.{vp.role_name} has no such column")
                )
            elif not value.number:
                problems.append(Problem("statistic.value.column", f"{value.name!r} is not a number column"))
        if self.params.threshold is not None and self.params.value is None:
            problems.append(Problem("statistic.threshold", "a threshold needs a value column"))
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
        specs.append(OutputSpec("mean", w + e, col.signed, col.frac + e, description="mean over matches"))
        if self.params.threshold is not None:
            specs.append(
                OutputSpec("above", min(caps).bit_length(), description="matches with value ≥ threshold")
            )
        return specs

    def build(self, ctx: BuildContext) -> StatisticResult:
        bld = ctx.builder
        specs = self.output_specs()
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
        matches = bld.extend(blocks.count_bits(bld, match), specs["matches"].width)
        values: dict[str, Bits] = {"matches": matches}
        ok: Bits | None = None
        vp = self.value_party()
        if vp is not None and self.params.value is not None and ctx.wanted & {"sum", "mean", "above"}:
            # m_i = match_{i−1} ⊕ match_i, with match_{−1} = match_{M−1} = 0
            zero = bld.zeros(1)
            flag = bld.xor(concat([match, zero]), concat([zero, match]))
            back = blocks.route_back(bld, flag, swaps)
            mine = back[layout.first] if vp == Party.GARBLER else back[layout.second][::-1]
            v = ctx.table(vp).number(self.params.value.column)
            masked = bld.and_(v.wires, mine[:, None])
            s = Number(
                bld.extend(
                    blocks.tree_sum(bld, masked, signed=v.signed), specs["sum"].width, signed=v.signed
                ),
                v.signed,
                v.frac,
            )
            values["sum"] = s.wires
            if "mean" in ctx.wanted:
                mean = blocks.divide_fixed(bld, s, matches, self.params.precision_bits, specs["mean"].width)
                values["mean"] = mean.wires
                ok = blocks.at_least(bld, matches, 1)
            if "above" in ctx.wanted and self.params.threshold is not None:
                bound = blocks.encoded_bound(self.params.threshold, v.frac)
                ge = blocks.at_least(bld, v.wires, bound, signed=v.signed)
                above = blocks.count_bits(bld, bld.and_(ge, mine))
                values["above"] = bld.extend(above, specs["above"].width)
        return StatisticResult(values, count=matches, ok=ok, extra=extra)
