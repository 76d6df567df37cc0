"""Manifest → compiled job: one program for all its statistics, each party's input and output layout, decoding,
the run's privacy parameter ε and the digest.

Theory of operation
-------------------
Both parties compile the same manifest to the same *program* (``program(bld)``): everything that shapes it
(capacities, column types, the statistics' parameters, who receives what) is public and in the manifest; the true
row counts are secret and enter only as validity bits. The program is never turned into a gate list: each party
runs it against its backend (garbler, evaluator, plain, count), see ``jointstat.circuit.backend``. However many
statistics a manifest lists, they run in one program, hence in one session with one oblivious-transfer phase and
one input encoding, and they share work that is the same (``BuildContext.shared``).

Inputs of a party, in this order (the encoder in ``jointstat.circuit.inputs`` produces exactly this layout): the
validity bit of each of its ``capacity`` rows; then, for each *row order* its statistics need (the rows sorted by
a column, for a merge or a quantile; a statistic that needs no order reads the first), the columns read in that
order, in the order the table declares them, ``capacity`` rows × the column's bits, row by row, each value least
significant bit first; then, when some output carries noise, the party's fresh random bits for every draw (the
statistics' draws in order, each output's in the order of the outputs' names). A manifest with one statistic has
one row order, so its layout is the layout of digests v2.

Release. For each statistic the program applies its disclosure rule (rule = count ≥ min_count; the statistic's
own ``min_count`` or the manifest's) and its release condition ``ok``: allow = ok ∧ rule, and every output is ANDed
with allow; an output with its own rule (a mean over no rows) is ANDed with allow ∧ its own bit instead. A party's
outputs are, for each statistic it receives outputs of, in manifest order: the bit withheld = ¬allow; when the
statistic has both a rule and an ``ok``, the bit rule ∧ ¬ok (which of the two withheld it); for each output it
receives that has its own rule, the bit allow ∧ ¬own (free XORs of bits already computed); then its outputs, in
the order listed, each value least significant bit first. ``decode`` turns a party's output bits into named
values (integers, floats for fixed-point outputs, booleans for flags, strings for choices, ``None`` for a withheld
output) under their addresses (the bare name in the single form, ``<statistic>.<output>`` in the list form), with
``withheld`` (true when every output the party receives is withheld) and ``withheld_by`` (each withheld output and
the rule that withheld it; absent when nothing is).

Size and digest: ``size()`` runs the program once on the count backend (gates, inputs, outputs, and the SHA-256
of the program's structure: every gate batch, input and output in order); the AND gates each statistic adds are
recorded as it runs (work shared with an earlier statistic counts where it was first done). ``digest`` is SHA-256
(FIPS 180-4) over "jointstat.manifest.v2\\n", the manifest's canonical JSON (RFC 8785 style, see
``agreement.canonical_json``; fields added since are left out while at their defaults), a zero byte and that
structure digest. Both nodes compare it before anything secret moves; the same file gives the same digest on any
machine and any run of the same program version, and two programs that would meet their AND gates in a different
order cannot share it.

Privacy: ``epsilon`` is the run's total ε, the sum over noisy outputs (basic composition, Dwork–Roth 2014 theorem
3.16); each node charges it to its job's budget before a run.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from fractions import Fraction
from functools import cached_property
from typing import Any

import numpy as np

from jointstat.circuit.agreement import BaseColumn, Manifest, StatisticUse
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.bits import Bits
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int
from jointstat.circuit.library import blocks
from jointstat.circuit.library.registry import statistics_for
from jointstat.circuit.library.statistic import (
    MIN_COUNT,
    NOT_RELEASED,
    BuildContext,
    NoiseDraw,
    NoiseInputs,
    OutputSpec,
    Statistic,
    StatisticResult,
    TableNeeds,
    TableWires,
)
from jointstat.circuit.model import CircuitError, Party
from jointstat.circuit.program import Program, ProgramSize, measure

DIGEST_DOMAIN = b"jointstat.manifest.v2\n"
WITHHELD = "withheld"
WITHHELD_BY = "withheld_by"
VALID, COLUMN, RANDOM = "valid", "column", "random"


@dataclass(frozen=True)
class InputField:
    """A block of a party's input bits: ``rows`` × ``width`` bits from ``offset``: the validity bits, a column's
    values in one row order, or the random bits of the noise draws (``kind``)."""

    name: str
    rows: int
    width: int
    offset: int
    order: str | None = None  # the column the rows of this block are sorted by (None: as read)
    kind: str = COLUMN

    @property
    def bits(self) -> int:
        return self.rows * self.width


@dataclass(frozen=True)
class InputLayout:
    party: Party
    capacity: int
    fields: tuple[InputField, ...]
    orders: tuple[str | None, ...]  # the row orders, in layout order
    unique: tuple[str, ...]  # columns whose values must be unique (a join's identifiers)

    @property
    def bits(self) -> int:
        return sum(f.bits for f in self.fields)

    @property
    def columns(self) -> tuple[str, ...]:
        """The columns read, each once, in the table's order."""
        seen: list[str] = []
        for f in self.fields:
            if f.kind == COLUMN and f.name not in seen:
                seen.append(f.name)
        return tuple(seen)

    @property
    def random_bits(self) -> int:
        return sum(f.bits for f in self.fields if f.kind == RANDOM)


@dataclass(frozen=True)
class OutputField:
    """One block of a party's output bits: a flag of the release rules or an output's value (``kind``)."""

    spec: OutputSpec
    offset: int
    part: int = 0  # which statistic
    kind: str = "value"  # "withheld" (every output of the statistic), "rule" (a rule's flag) or "value"
    output: str = ""  # the output a "rule" flag or a value is about ("" for the statistic's withheld flag)
    rule: str = ""  # a "rule" flag: the rule it reports

    @property
    def name(self) -> str:
        return self.spec.name


@dataclass
class CompiledPart:
    """One statistic of the job, with where it reads its rows and the noise it draws."""

    use: StatisticUse
    statistic: Statistic[Any]
    order: dict[Party, int]  # the row order each party's table is read in
    draws: list[NoiseDraw]  # in input-layout order

    @property
    def title(self) -> str:
        return self.use.title

    def wanted(self) -> frozenset[str]:
        return frozenset(self.use.outputs.garbler) | frozenset(self.use.outputs.evaluator)

    def received(self, party: Party) -> list[str]:
        return self.use.outputs.receivers()[Party(party)]


@dataclass
class _Release:
    """What the program computed of one statistic's release rules."""

    allow: Bits
    withheld: Bits
    ok_failed: Bits | None
    allow_of: dict[str, Bits]  # outputs with their own rule
    own_failed: dict[str, Bits]


@dataclass
class CompiledStatistic:
    manifest: Manifest
    parts: list[CompiledPart]
    inputs: dict[Party, InputLayout]
    outputs: dict[Party, tuple[OutputField, ...]]
    _size: list[ProgramSize] = field(default_factory=list, repr=False)

    @property
    def statistic(self) -> Statistic[Any]:
        """The first statistic (the only one of a single-statistic manifest)."""
        return self.parts[0].statistic

    @property
    def kinds(self) -> str:
        """The statistics by kind, for reports ("sum", or "members (keyed_join), spend (mean)")."""
        return ", ".join(part.title for part in self.parts)

    # -- the program ------------------------------------------------------------------------------------------
    def program(self, bld: Builder) -> dict[str, Any]:
        """The whole job as a program: inputs in layout order, the statistics, their release rules, the outputs.

        Returns the statistics' extra figures (comparators, merge size…) and the AND gates of each statistic.
        """
        manifest = self.manifest
        valid: dict[Party, Bits] = {}
        orders: dict[Party, list[dict[str, Bits]]] = {}
        random: dict[Party, Bits | None] = {}
        for party in Party:
            layout = self.inputs[party]
            valid[party] = bld.input(party, layout.capacity)
            orders[party] = [{} for _ in layout.orders]
            random[party] = None
            for block in layout.fields:
                if block.kind == COLUMN:
                    index = layout.orders.index(block.order)
                    orders[party][index][block.name] = bld.input(party, (block.rows, block.width))
                elif block.kind == RANDOM:
                    random[party] = bld.input(party, block.width)
        memo: dict[tuple[Any, ...], Any] = {}
        releases: list[_Release] = []
        results: list[StatisticResult] = []
        by_statistic: dict[str, int] = {}
        extra: dict[str, Any] = {}
        drawn = 0
        for part in self.parts:
            tables = {}
            for party in Party:
                table = manifest.table(party)
                k = part.order[party]
                cols = orders[party][k]
                schema: dict[str, BaseColumn] = {c.name: c for c in table.columns if c.name in cols}
                order = self.inputs[party].orders[k]
                tables[party] = TableWires(party, table.capacity, valid[party], cols, schema, order)
            noise = None
            if part.draws:
                noise = NoiseInputs({})
                for draw in part.draws:
                    g, e = random[Party.GARBLER], random[Party.EVALUATOR]
                    assert g is not None and e is not None
                    noise.draws[draw.key] = (draw, g[drawn : drawn + draw.bits], e[drawn : drawn + draw.bits])
                    drawn += draw.bits
            min_count = part.use.disclosure.min_count
            ctx = BuildContext(bld, manifest, tables, part.wanted(), min_count > 0, memo, noise)
            before = bld.and_gates
            result = part.statistic.build(ctx)
            releases.append(self._release(bld, part, result, min_count))
            by_statistic[part.use.label or part.use.kind] = bld.and_gates - before
            results.append(result)
            if len(self.parts) == 1:
                extra.update(result.extra)
            else:
                extra.setdefault("by_statistic", {})[part.use.label] = dict(result.extra)
        before = bld.and_gates
        gated: dict[tuple[int, str], Bits] = {}
        for party in Party:
            for f in self.outputs[party]:
                part, rel = self.parts[f.part], releases[f.part]
                if f.kind == WITHHELD:
                    bld.output(party, rel.withheld.reshape(1))
                elif f.kind == "rule":
                    bit = rel.ok_failed if f.rule == "ok" else rel.own_failed[f.output]
                    assert bit is not None
                    bld.output(party, bit.reshape(1))
                else:
                    wires = results[f.part].values[f.output]
                    spec = f.spec
                    if wires.shape != (*spec.shape, spec.width):
                        raise CircuitError(
                            f"statistic {part.statistic.name!r} output {f.output!r}: built {wires.shape},"
                            f" declared {(*spec.shape, spec.width)}"
                        )
                    if (f.part, f.output) not in gated:
                        gated[f.part, f.output] = blocks.gate(
                            bld, wires, rel.allow_of.get(f.output, rel.allow)
                        )
                    bld.output(party, gated[f.part, f.output])
        extra["and_gates_by_statistic"] = by_statistic
        extra["and_gates_release"] = bld.and_gates - before
        return extra

    def _release(self, bld: Builder, part: CompiledPart, result: StatisticResult, min_count: int) -> _Release:
        """The statistic's release bits (see the module docstring)."""
        rule = None
        if min_count > 0:
            if result.count is None:
                raise ValueError(
                    f"statistic {part.statistic.name!r} gives no count, so the disclosure rule cannot be applied"
                )
            rule = blocks.at_least(bld, result.count, min_count, signed=result.count_signed)
        if result.ok is not None and part.statistic.ok_rule() is None:
            raise CircuitError(
                f"statistic {part.statistic.name!r} gave an ok condition but declares no ok_rule()"
            )
        allow = bld.ones(()) if result.ok is None else result.ok
        if rule is not None:
            allow = bld.and_(
                allow, rule
            )  # folds when there is no ok (the digest records the call all the same)
        ok_failed = None
        if rule is not None and part.statistic.ok_rule() is not None:
            ok_failed = bld.xor(rule, allow)  # rule ∧ ¬ok (0 when there is no ok)
        allow_of: dict[str, Bits] = {}
        own_failed: dict[str, Bits] = {}
        shared: dict[int, Bits] = {}
        wanted = part.wanted()
        for name, own in result.release.items():
            if name not in wanted:
                continue
            if id(own) not in shared:
                shared[id(own)] = bld.and_(allow, own)
            allow_of[name] = shared[id(own)]
            own_failed[name] = bld.xor(allow, allow_of[name])  # allow ∧ ¬own
        return _Release(allow, bld.not_(allow), ok_failed, allow_of, own_failed)

    def size(self) -> ProgramSize:
        """The program measured on the count backend (computed once)."""
        if not self._size:
            self._size.append(measure(self.program))
        return self._size[0]

    @property
    def extra(self) -> dict[str, Any]:
        return self.size().extra

    def as_program(self) -> Program:
        """The program with its measured size, as a session runs it."""
        return Program(self.program, self.size(), name=f"manifest {self.manifest.job.name!r}")

    def n_inputs(self, party: Party) -> int:
        return self.inputs[Party(party)].bits

    def n_outputs(self, party: Party) -> int:
        return sum(f.spec.bits for f in self.outputs[Party(party)])

    def run_plain(self, inputs: dict[Party, np.ndarray]) -> dict[Party, np.ndarray]:
        """Evaluate in the clear on each party's input bits (the reference answer): each party's output bits."""
        backend = PlainBackend(inputs)
        self.program(Builder(backend))
        backend.check_inputs_used()
        return {p: backend.outputs(p) for p in Party}

    @cached_property
    def digest(self) -> str:
        """Hex SHA-256 over the domain, the manifest's canonical JSON and the program's structure digest."""
        h = hashlib.sha256(DIGEST_DOMAIN)
        h.update(self.manifest.canonical())
        h.update(b"\0")
        h.update(self.size().structure)
        return h.hexdigest()

    def epsilon(self) -> Fraction:
        """The run's total ε, exact: the sum of the ε of every noisy output (0 when nothing is noised). Each node
        charges it to its job's privacy budget before a run (stable API: ``compiled.epsilon()``)."""
        return sum((part.statistic.epsilon() for part in self.parts), Fraction(0))

    @property
    def noisy_outputs(self) -> dict[str, Fraction]:
        """Each noisy output's address and its ε."""
        out = {}
        for part in self.parts:
            for name, setting in part.statistic.noise_settings().items():
                out[part.use.address(name)] = Fraction(setting.epsilon)
        return out

    # -- decoding -----------------------------------------------------------------------------------------------
    def decode(self, party: Party, bits: object) -> dict[str, Any]:
        """A party's output bits → {"withheld": bool, ["withheld_by": {address: rule}], address: value or None}."""
        raw = self._raw_fields(party, bits)
        if not raw:  # this party receives nothing
            return {}
        values: dict[str, Any] = {}
        withheld_by: dict[str, str] = {}
        for part_index, part in enumerate(self.parts):
            fields = [(f, v) for f, v in raw if f.part == part_index]
            if not fields:
                continue
            flags = {(f.kind, f.output, f.rule): bool(v) for f, v in fields if f.kind != "value"}
            everything = flags[WITHHELD, "", ""]
            reason = self._reason(part, flags) if everything else ""
            for f, v in fields:
                if f.kind != "value":
                    continue
                address = part.use.address(f.output)
                if everything:
                    values[address] = None
                    withheld_by[address] = reason
                elif flags.get(("rule", f.output, f.spec.rule)):
                    values[address] = None
                    withheld_by[address] = f.spec.rule
                else:
                    values[address] = to_value(f.spec, v)
        out: dict[str, Any] = {WITHHELD: bool(values) and len(withheld_by) == len(values)}
        if withheld_by:
            out[WITHHELD_BY] = withheld_by
        out.update(values)
        return out

    @staticmethod
    def _reason(part: CompiledPart, flags: dict[tuple[str, str, str], bool]) -> str:
        """Which rule withheld every output of a statistic."""
        ok_rule = part.statistic.ok_rule() or NOT_RELEASED
        ok_failed = flags.get(("rule", "", "ok"))
        if ok_failed is not None:
            return ok_rule if ok_failed else MIN_COUNT
        return MIN_COUNT if part.use.disclosure.min_count > 0 else ok_rule

    def decode_raw(self, party: Party, bits: object) -> dict[str, Any]:
        """Output bits → integers by field (fixed-point outputs as their scaled integers; arrays for shaped outputs;
        the release flags as booleans under ``withheld`` and ``<output>:withheld``-style names)."""
        out: dict[str, Any] = {}
        for f, v in self._raw_fields(party, bits):
            use = self.parts[f.part].use
            if f.kind == WITHHELD:
                out[use.address(WITHHELD)] = bool(v)
            elif f.kind == "rule":
                out[f"{use.address(f.output or WITHHELD)}:{f.rule}"] = bool(v)
            else:
                out[use.address(f.output)] = v
        return out

    def _raw_fields(self, party: Party, bits: object) -> list[tuple[OutputField, Any]]:
        arr = np.asarray(bits, dtype=np.uint8).reshape(-1)
        fields = self.outputs[Party(party)]
        expected = sum(f.spec.bits for f in fields)
        if arr.shape[0] != expected:
            raise ValueError(
                f"{Party(party).role_name} outputs: expected {expected} bits, got {arr.shape[0]}"
            )
        out = []
        for f in fields:
            chunk = arr[f.offset : f.offset + f.spec.bits].reshape(*f.spec.shape, f.spec.width)
            ints = bits_to_int(chunk, signed=f.spec.signed)
            out.append((f, ints.tolist() if f.spec.shape else int(ints)))
        return out


def to_value(spec: OutputSpec, raw: Any) -> Any:
    if isinstance(raw, list):
        return [
            to_value(OutputSpec(spec.name, spec.width, spec.signed, spec.frac, (), spec.choices), r)
            for r in raw
        ]
    if spec.flag:
        return bool(raw)
    if spec.choices:
        return spec.choices[int(raw)] if 0 <= int(raw) < len(spec.choices) else None
    if spec.frac:
        return int(raw) / (1 << spec.frac)
    return int(raw)


# -- layouts --------------------------------------------------------------------------------------------------------


def row_orders(needs: list[TableNeeds]) -> tuple[list[str | None], list[int]]:
    """The row orders of one party's table and the one each statistic reads: every distinct ``sort_by`` in
    statistic order (or one unsorted order if none needs one); a statistic that needs no order reads the first."""
    orders: list[str | None] = []
    for need in needs:
        if need.sort_by is not None and need.sort_by not in orders:
            orders.append(need.sort_by)
    if not orders:
        orders.append(None)
    return orders, [0 if need.sort_by is None else orders.index(need.sort_by) for need in needs]


def input_layout(
    manifest: Manifest, party: Party, needs: list[TableNeeds], random_bits: int = 0
) -> tuple[InputLayout, list[int]]:
    """One party's layout (module docstring) and the row order each statistic reads."""
    table = manifest.table(party)
    orders, chosen = row_orders(needs)
    fields = [InputField(VALID, table.capacity, 1, 0, kind=VALID)]
    offset = table.capacity
    for k, order in enumerate(orders):
        read = {name for need, c in zip(needs, chosen, strict=True) if c == k for name in need.columns}
        for col in table.columns:  # declaration order
            if col.name in read:
                fields.append(InputField(col.name, table.capacity, col.bits, offset, order))
                offset += table.capacity * col.bits
    if random_bits:
        fields.append(InputField(RANDOM, 1, random_bits, offset, kind=RANDOM))
    unique = tuple(dict.fromkeys(need.unique for need in needs if need.unique is not None))
    return InputLayout(party, table.capacity, tuple(fields), tuple(orders), unique), chosen


def output_layout(parts: list[CompiledPart], party: Party) -> tuple[OutputField, ...]:
    """One party's output fields (module docstring)."""
    fields: list[OutputField] = []
    offset = 0

    def add(spec: OutputSpec, index: int, kind: str, output: str = "", rule: str = "") -> None:
        nonlocal offset
        fields.append(OutputField(spec, offset, index, kind, output, rule))
        offset += spec.bits

    for index, part in enumerate(parts):
        names = part.received(party)
        if not names:
            continue
        stat = part.statistic
        specs = stat.output_specs()
        add(
            OutputSpec(WITHHELD, 1, description="1 when every output of the statistic is withheld"),
            index,
            WITHHELD,
        )
        if part.use.disclosure.min_count > 0 and stat.ok_rule() is not None:
            add(
                OutputSpec(f"{WITHHELD}:ok", 1, description="its own condition failed"),
                index,
                "rule",
                "",
                "ok",
            )
        for name in names:
            if specs[name].rule:
                add(OutputSpec(f"{name}:{specs[name].rule}", 1), index, "rule", name, specs[name].rule)
        for name in names:
            add(specs[name], index, "value", name)
    return tuple(fields)


def compile_manifest(manifest: Manifest) -> CompiledStatistic:
    """The job's program and layouts (see the module docstring); nothing runs until it is used."""
    uses = manifest.uses()
    stats = statistics_for(manifest)
    needs = [stat.needs() for stat in stats]
    draws = [[d for name in sorted(stat.draws) for d in stat.draws[name]] for stat in stats]
    random_bits = sum(d.bits for ds in draws for d in ds)
    layouts: dict[Party, InputLayout] = {}
    chosen: dict[Party, list[int]] = {}
    for party in Party:
        layouts[party], chosen[party] = input_layout(manifest, party, [n[party] for n in needs], random_bits)
    parts = [
        CompiledPart(use, stat, {party: chosen[party][i] for party in Party}, draws[i])
        for i, (use, stat) in enumerate(zip(uses, stats, strict=True))
    ]
    outputs = {party: output_layout(parts, party) for party in Party}
    return CompiledStatistic(manifest, parts, layouts, outputs)
