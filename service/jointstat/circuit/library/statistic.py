"""The statistic base: what a statistic declares about itself, the wires it builds from, and what it gives back.

Theory of operation
-------------------
A statistic is a subclass of ``Statistic[P]``, generic over its pydantic parameter model ``P`` (a subclass of
``StatisticParameters`` whose ``name`` field is a ``Literal`` of the statistic's name; ``self.params`` has that
type), with four methods:

* ``problems()`` — checks that need the whole manifest (columns exist, types fit), as field-path problems;
* ``needs()`` — per party, the columns it reads, the column rows must be sorted by (each party sorts its own rows
  before encoding; the merges rely on it) and the column whose values must be unique;
* ``outputs()`` — every output it can produce, with width, signedness and fraction bits;
* ``build(ctx)`` — runs its program with the builder in ``ctx`` on the party tables' wires, computing only the
  outputs some party receives (``ctx.wanted``), and returns them with the count the disclosure rule tests and any
  extra condition under which the result is meaningful (e.g. at least one row for a mean).

The compiler (``jointstat.circuit.compile``) declares the inputs, applies the disclosure gate and lays out the
outputs, so a statistic deals only with its own arithmetic; the registry (``library.registry``) maps names to
statistic classes. This module sits below both and below every statistic: it imports only the manifest's model,
the parameter types, the blocks and the noise sampler.

Release rules. Every output of a statistic is withheld when the disclosure rule fails (its count below
``min_count``, rule ``min_count``) or when the statistic's ``ok`` bit is 0 (``ok_rule``); an output whose spec
names a ``rule`` is also withheld, on its own, when its bit in ``StatisticResult.release`` is 0 (a mean over no
rows, a ratio to zero), and only that output. ``RULES`` says what each rule name means; results name the rule that
withheld each output.

Paths and shared work. A statistic knows where the manifest wrote it (``self.path``: ``statistic`` or
``statistics[i]``) and names its problems from there. Statistics of one manifest run in one program; ``ctx.memo``
lets them share work that is the same for several (a row filter, a count, a join's merge) — both parties run the
same program, so the sharing is the same on both sides.

Conditions (``where`` filters, thresholds): ``condition_problems`` checks that an operator applies to the column's
type (any operator for numbers, == and != for booleans, none for identifiers) and ``row_flags`` builds each row's
bit: a number column is compared with the exact decimal (``blocks.compare_constant``), a boolean column is the bit
or its negation.

Noise: a statistic that can noise an output gives, in ``noise_draws``, the draws of discrete Laplace noise it
needs (each with its ε, its sensitivity on the output's encoded integer scale and its lanes; see
docs/privacy-noise.md), and adds them in ``build`` with ``ctx.noisy``. The compiler feeds each party's fresh random
bits for the draws as extra inputs. ``SummedStatistic`` gives the draws of a statistic that counts rows and sums a
clamped column over them (aggregate, keyed_join): counts at the rows one person can add, the sum at that times
max(|L|, |U|) (ℓ1 sensitivity, Dwork–Roth 2014 definition 3.1), a mean as a noisy sum over a noisy count at ε/2
each (composition, theorem 3.16).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, replace
from fractions import Fraction
from functools import cached_property
from typing import Any, ClassVar, Generic, TypeVar

import numpy as np

from jointstat.circuit.agreement import BaseColumn, Manifest, StatisticUse
from jointstat.circuit.bits import Bits, concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.library import blocks
from jointstat.circuit.library.blocks import Number, NumberFormat, align, common_format
from jointstat.circuit.library.noise import (
    NoiseError,
    NoiseParameters,
    add_noise,
    noise_parameters,
    noisy_width,
)
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import (
    Clamp,
    ColumnPair,
    ColumnParameters,
    Condition,
    SideColumns,
    StatisticParameters,
    exact,
)
from jointstat.exact import decimal_text
from jointstat.problems import Problem

P = TypeVar("P", bound=StatisticParameters)
C = TypeVar("C", bound=ColumnParameters)

MIN_COUNT = "min_count"
NOT_RELEASED = "not_released"
RULES = {
    MIN_COUNT: "fewer rows counted than the disclosure rule's min_count",
    "no_rows": "no row to compute it from",
    "too_few_rows": "fewer than two rows (a sample variance needs two)",
    "missing_value": "a party's value is missing",
    "zero_divisor": "the value it is divided by is zero",
    "not_released": "the statistic's own release condition does not hold",
}


@dataclass(frozen=True)
class TableNeeds:
    """What a statistic reads from one party's table."""

    columns: tuple[str, ...]
    sort_by: str | None = None  # rows sorted ascending by this column before encoding
    unique: str | None = None  # the statistic needs each value of this column once


@dataclass(frozen=True)
class OutputSpec:
    """One named output: a number (``width`` bits, maybe signed, with fraction bits), a flag, or a choice."""

    name: str
    width: int
    signed: bool = False
    frac: int = 0
    shape: tuple[int, ...] = ()
    choices: tuple[str, ...] = ()  # a choice output decodes to choices[value]
    description: str = ""
    rule: str = ""  # the output's own release rule (a key of RULES), if it has one
    flag: bool = False  # decodes to true/false

    @property
    def bits(self) -> int:
        return self.width * int(np.prod(self.shape, dtype=np.int64))


@dataclass
class TableWires:
    """One party's table as wires: the validity bit of each row and each column read by the statistic."""

    party: Party
    capacity: int
    valid: Bits  # (capacity,)
    columns: dict[str, Bits]  # name → (capacity, bits)
    schema: dict[str, BaseColumn]
    order: str | None = None  # the column the rows are sorted by, if any

    def number(self, name: str) -> Number:
        col = self.schema[name]
        return Number(self.columns[name], col.signed, col.frac)

    def bits(self, name: str) -> Bits:
        return self.columns[name]


@dataclass(frozen=True)
class NoiseDraw:
    """Discrete Laplace noise a statistic adds to one of its values: ``lanes`` samples at ``params``."""

    key: str  # what it is added to ("count", "sum", "mean.sum", …)
    output: str  # the output whose noise setting it serves
    lanes: int
    params: NoiseParameters

    @property
    def epsilon(self) -> Fraction:
        return self.params.epsilon

    @property
    def bits(self) -> int:
        """Random bits each party feeds for it."""
        return self.lanes * self.params.bits_per_sample


@dataclass
class NoiseInputs:
    """Each party's random bits for one statistic's draws, by draw key."""

    draws: dict[str, tuple[NoiseDraw, Bits, Bits]]


@dataclass
class BuildContext:
    builder: Builder
    manifest: Manifest
    tables: dict[Party, TableWires]
    wanted: frozenset[str]
    needs_count: bool
    memo: dict[tuple[Any, ...], Any] = field(default_factory=dict)  # work shared by the manifest's statistics
    noise: NoiseInputs | None = None

    def table(self, party: Party) -> TableWires:
        return self.tables[Party(party)]

    def valid(self) -> Bits:
        """The validity bits of both tables' rows, the garbler's first."""
        return concat([self.tables[party].valid for party in Party])

    def shared(self, key: tuple[Any, ...], make: Callable[[], Any]) -> Any:
        """``make()`` once per key in the whole program; later statistics asking for the same key reuse it."""
        if key not in self.memo:
            self.memo[key] = make()
        return self.memo[key]

    def noisy(self, key: str, value: Bits, *, signed: bool) -> Bits:
        """``value`` plus its draw of noise (see ``noise.add_noise``): signed words of ``noisy_width`` bits."""
        if self.noise is None or key not in self.noise.draws:
            raise NoiseError(f"noise: no draw {key!r} was planned for this statistic")
        draw, g, e = self.noise.draws[key]
        lanes = value.shape[:-1]
        shape = (*lanes, draw.params.bits_per_sample)
        return add_noise(self.builder, draw.params, value, g.reshape(shape), e.reshape(shape), signed=signed)


@dataclass
class StatisticResult:
    values: dict[str, Bits]
    count: Bits | None = None  # the count the disclosure rule compares with min_count
    ok: Bits | None = None  # an extra condition (one bit) for every output to be released
    extra: dict[str, Any] = field(default_factory=dict)  # figures for tests and benchmarks
    release: dict[str, Bits] = field(default_factory=dict)  # the own release bit of each output with a rule
    count_signed: bool = False  # the count is a noisy (signed) count


class Statistic(ABC, Generic[P]):
    """Base class of statistics; see the module docstring."""

    name: ClassVar[str]
    Parameters: ClassVar[type[StatisticParameters]]  # the model of P (a class variable cannot name P itself)
    description: ClassVar[str] = ""
    count_output: ClassVar[str | None] = None  # the output that is the disclosure count, if there is one
    # The sensitivity of each output that can carry noise, with its source (shown in docs/manifest.md).
    sensitivity: ClassVar[str] = "not offered with noise (no useful additive sensitivity)"

    def __init__(self, params: P, manifest: Manifest, use: StatisticUse | None = None) -> None:
        self.params: P = params
        self.manifest = manifest
        self.use = use
        self.path = "statistic" if use is None else use.path

    @abstractmethod
    def problems(self) -> list[Problem]: ...

    @abstractmethod
    def needs(self) -> dict[Party, TableNeeds]: ...

    @abstractmethod
    def outputs(self) -> list[OutputSpec]: ...

    @abstractmethod
    def build(self, ctx: BuildContext) -> StatisticResult: ...

    def ok_rule(self) -> str | None:
        """The rule (a key of ``RULES``) of the ``ok`` condition ``build`` returns, or None when it returns none.
        A statistic that does not say may return one (``not_released``)."""
        return NOT_RELEASED

    def output_specs(self) -> dict[str, OutputSpec]:
        """``outputs()`` by name, noisy outputs as what they release (``noisy_output``)."""
        specs = {spec.name: spec for spec in self.outputs()}
        for name in self.noise_settings():
            if name in specs and name in self.draws:  # a setting that cannot be drawn is a problem, reported
                specs[name] = self.noisy_output(specs[name])
        return specs

    # -- noise ------------------------------------------------------------------------------------------------
    def noise_settings(self) -> dict[str, Any]:
        return dict(self.params.noise or {})

    def noise_draws(self, output: str, epsilon: Fraction) -> list[NoiseDraw]:
        """The draws that noise ``output`` at ``epsilon``; ``NoiseError`` when it cannot be noised (default)."""
        raise NoiseError(f"{self.name} does not offer noise (it has no known sensitivity)")

    def noisy_output(self, spec: OutputSpec) -> OutputSpec:
        """What a noisy output releases: by default the value plus its draw, a signed word (``noise.noisy_width``)."""
        draw = self.draws[spec.name][0]
        return replace(spec, width=noisy_width(spec.width, spec.signed, draw.params), signed=True)

    @cached_property
    def draws(self) -> dict[str, list[NoiseDraw]]:
        """The draws of every noisy output (computed once; ``noise_problems`` reports what fails)."""
        out = {}
        for name, setting in self.noise_settings().items():
            try:
                out[name] = self.noise_draws(name, exact(setting.epsilon))
            except NoiseError:
                continue
        return out

    def draw(self, output: str, key: str, epsilon: Fraction, sensitivity: int, lanes: int = 1) -> NoiseDraw:
        """One draw for ``output`` (errors name its noise setting's ε)."""
        where = f"{self.path}.noise.{output}"
        return NoiseDraw(key, output, lanes, noise_parameters(epsilon, sensitivity, field=where))

    def rows_per_person(self) -> int:
        return self.manifest.rows_per_person()

    def noise_problems(self, released: set[str]) -> list[Problem]:
        """What is wrong with the noise settings, given the outputs some party receives."""
        settings = self.noise_settings()
        if not settings:
            return []
        problems = []
        known = {spec.name for spec in self.outputs()}
        for name, setting in settings.items():
            path = f"{self.path}.noise.{name}"
            if name not in known:
                problems.append(Problem(path, f"{self.name} has no output {name!r}"))
                continue
            try:
                self.noise_draws(name, exact(setting.epsilon))
            except NoiseError as exc:
                text = str(exc)
                if text.startswith(path):  # the sampler names the field itself (…noise.<output>.epsilon)
                    field, text = text.split(": ", 1)
                    problems.append(Problem(field, text))
                else:
                    problems.append(Problem(path, text))
        for name in sorted(released - set(settings)):
            problems.append(
                Problem(
                    f"{self.path}.noise",
                    f"{name!r} is released without noise: a statistic with noise must noise every output it releases",
                )
            )
        return problems

    def epsilon(self) -> Fraction:
        """The ε this statistic's noisy outputs spend in one run (basic composition: the ε's add)."""
        return sum((exact(setting.epsilon) for setting in self.noise_settings().values()), Fraction(0))

    # -- helpers for subclasses -------------------------------------------------------------------------------
    def column_names(self, ref: ColumnPair) -> dict[Party, str]:
        if isinstance(ref, SideColumns):
            return {Party.GARBLER: ref.garbler, Party.EVALUATOR: ref.evaluator}
        return {Party.GARBLER: ref, Party.EVALUATOR: ref}

    def check_columns(
        self, ref: ColumnPair, path: str, *, numeric: bool = True, parties: tuple[Party, ...] = tuple(Party)
    ) -> Iterator[Problem]:
        """Problems at ``path`` where a party's table lacks the column (or, with ``numeric``, it is no number)."""
        names = self.column_names(ref)
        for party in parties:
            table = self.manifest.table(party)
            col = table.column(names[party])
            role = party.role_name
            if col is None:
                yield Problem(path, self.missing_column(party, names[party]))
            elif numeric and not col.number:
                yield Problem(path, f"tables.{role} column {col.name!r} is a {col.type} column, not a number")

    def missing_column(self, party: Party, name: str) -> str:
        """Why ``name`` is not a column of ``party``'s table, saying so when it is the other party's column."""
        table = self.manifest.table(party)
        other = Party.EVALUATOR if party == Party.GARBLER else Party.GARBLER
        if self.manifest.table(other).column(name) is not None:
            return (
                f"{name!r} is a column of the {other.role_name}'s table, not the {party.role_name}'s: each party's side reads "
                "only its own table"
            )
        known = ", ".join(c.name for c in table.columns)
        return f"tables.{party.role_name} has no column {name!r} (it has {known})"

    def column(self, party: Party, ref: ColumnPair) -> BaseColumn:
        col = self.manifest.table(party).column(self.column_names(ref)[party])
        assert col is not None  # checked by problems()
        return col

    def column_format(self, ref: ColumnPair) -> NumberFormat:
        """The format of a column once both parties' versions are aligned (``blocks.align`` builds it)."""
        cols = [self.column(party, ref) for party in Party]
        return common_format(*(NumberFormat(c.bits, c.signed, c.frac) for c in cols))

    def aligned(self, ctx: BuildContext, ref: ColumnPair) -> list[Number]:
        """Both parties' wires of a column as numbers in their common format (``column_format``), garbler first."""
        names = self.column_names(ref)
        return align(ctx.builder, *[ctx.table(party).number(names[party]) for party in Party])

    def rows(self) -> int:
        """Rows of both tables together (their capacities)."""
        return sum(self.manifest.table(party).capacity for party in Party)

    # -- conditions -------------------------------------------------------------------------------------------
    def conditions(self, where: Any) -> list[Condition]:
        """A ``where`` value as conditions (a boolean column's name is ``column == true``)."""
        if where is None:
            return []
        if isinstance(where, Condition):
            return [where]
        if isinstance(where, list):
            return list(where)
        return [Condition(column=where, op="==", value=True)]

    def condition_columns(self, where: Any, party: Party) -> list[str]:
        return [self.column_names(c.column)[party] for c in self.conditions(where)]

    def condition_problems(
        self, where: Any, path: str, parties: tuple[Party, ...] = tuple(Party)
    ) -> list[Problem]:
        """Columns exist and each operator applies to its column's type (see the module docstring)."""
        problems: list[Problem] = []
        bare = where is not None and not isinstance(where, Condition | list)
        for i, cond in enumerate(self.conditions(where)):
            at = path if bare or isinstance(where, Condition) else f"{path}[{i}]"
            names = self.column_names(cond.column)
            for party in parties:
                col = self.manifest.table(party).column(names[party])
                if col is None:
                    problems.append(
                        Problem(at if bare else f"{at}.column", self.missing_column(party, names[party]))
                    )
                elif bare and col.type != "boolean":
                    problems.append(
                        Problem(
                            at,
                            f"tables.{party.role_name} needs a boolean column of that name ({col.type} given)",
                        )
                    )
                elif col.identifier:
                    problems.append(
                        Problem(
                            f"{at}.op", f"{cond.op!r} does not apply to the identifier column {col.name!r}"
                        )
                    )
                elif not col.number and cond.op not in ("==", "!="):
                    problems.append(
                        Problem(
                            f"{at}.op",
                            f"{cond.op!r} does not apply to the boolean column {col.name!r} (use == or !=)",
                        )
                    )
                elif not col.number and not isinstance(cond.value, bool):
                    problems.append(
                        Problem(f"{at}.value", f"the boolean column {col.name!r} compares with true or false")
                    )
                elif col.number and isinstance(cond.value, bool):
                    problems.append(
                        Problem(f"{at}.value", f"the {col.type} column {col.name!r} compares with a number")
                    )
        return problems

    def row_flags(self, ctx: BuildContext, party: Party, where: Any) -> Bits:
        """Each row of ``party``'s table that is valid and meets every condition (shared across statistics)."""
        conds = self.conditions(where)
        t = ctx.table(party)
        key = ("rows", party, t.order, tuple((str(c.column), c.op, c.value) for c in conds))
        return ctx.shared(key, lambda: self._row_flags(ctx, t, party, conds))

    def _row_flags(self, ctx: BuildContext, t: TableWires, party: Party, conds: list[Condition]) -> Bits:
        bld = ctx.builder
        flag = t.valid
        for cond in conds:
            name = self.column_names(cond.column)[party]
            col = t.schema[name]
            if col.number:
                # where_problems refuses true or false for a number column
                assert not isinstance(cond.value, bool)
                holds = blocks.compare_constant(bld, t.number(name), cond.op, exact(cond.value))
            else:
                bit = t.bits(name)[:, 0]
                holds = bit if (cond.op == "==") == bool(cond.value) else bld.not_(bit)
            flag = bld.and_(flag, holds)
        return flag

    # -- clamping ---------------------------------------------------------------------------------------------
    def clamp_problems(self, clamp: Clamp | None, formats: list[NumberFormat], path: str) -> list[Problem]:
        """Bounds each party's values can be clamped to exactly (multiples of the finest step of the columns)."""
        if clamp is None:
            return []
        problems = []
        frac = max(f.frac for f in formats)
        for side, bound in (("min", exact(clamp.min)), ("max", exact(clamp.max))):
            scaled = bound * (1 << frac)
            if scaled.denominator != 1:
                problems.append(
                    Problem(
                        f"{path}.{side}",
                        f"{decimal_text(bound)} is not a multiple of the column's step 2^-{frac} (values are "
                        "clamped exactly, so a bound must be a value the column can hold)",
                    )
                )
        if any(not f.signed for f in formats) and exact(clamp.max) < 0:
            problems.append(
                Problem(f"{path}.max", "an unsigned column's values cannot all be clamped below 0")
            )
        return problems

    def clamp_magnitude(self, clamp: Clamp, frac: int) -> int:
        """max(|L|, |U|) on the encoded integer scale (values × 2^frac): how much one row can add to a sum."""
        low, high = clamp.bounds()
        return int(max(abs(low), abs(high)) * (1 << frac))


class SummedStatistic(Statistic[P]):
    """A statistic that counts rows and sums a column clamped to public bounds over them: the noise of its counts,
    its sum and its mean (module docstring, "Noise")."""

    noisy_mean_description: ClassVar[str] = "noisy sum ÷ noisy count"

    @abstractmethod
    def counted_outputs(self) -> set[str]:
        """The outputs that count rows."""

    @abstractmethod
    def count_sensitivity(self) -> int:
        """How many rows one person can add to a count."""

    @abstractmethod
    def sum_magnitude(self) -> int | None:
        """max(|L|, |U|) of the clamping bounds on the summed column's encoded scale (``clamp_magnitude``); None
        without bounds or without a summed column."""

    @abstractmethod
    def mean_precision_bits(self) -> int:
        """The fraction bits the mean has beyond the sum's."""

    def noise_draws(self, output: str, epsilon: Fraction) -> list[NoiseDraw]:
        rows = self.count_sensitivity()
        if output in self.counted_outputs():
            return [self.draw(output, output, epsilon, rows)]
        if output not in ("sum", "mean"):
            raise NoiseError(f"{self.name} has no output {output!r}")
        magnitude = self.sum_magnitude()
        if magnitude is None:
            raise NoiseError(
                f"a noisy {output} needs clamping bounds: add clamp: {{min: …, max: …}} to the statistic (without "
                "them one person could move the sum by any amount)"
            )
        if magnitude == 0:
            raise NoiseError("clamping bounds of 0 and 0 leave nothing to add noise to")
        if output == "sum":
            return [self.draw(output, "sum", epsilon, rows * magnitude)]
        half = epsilon / 2
        return [
            self.draw(output, "mean.sum", half, rows * magnitude),
            self.draw(output, "mean.count", half, rows),
        ]

    def noisy_output(self, spec: OutputSpec) -> OutputSpec:
        if spec.name != "mean":
            return super().noisy_output(spec)
        exact_sum = {s.name: s for s in self.outputs()}["sum"]
        sum_width = noisy_width(exact_sum.width, exact_sum.signed, self.draws["mean"][0].params)
        e = self.mean_precision_bits()
        return OutputSpec(
            "mean",
            sum_width + e,
            True,
            exact_sum.frac + e,
            description=self.noisy_mean_description,
            rule="no_rows",
        )


class ColumnStatistic(Statistic[C]):
    """A statistic over one number column of both tables (``params.column``): checks that both tables have it as
    a number column and reads it, with each party's rows sorted by it when ``sorted_rows`` is set."""

    sorted_rows: ClassVar[bool] = False

    def problems(self) -> list[Problem]:
        return list(self.check_columns(self.params.column, f"{self.path}.column"))

    def needs(self) -> dict[Party, TableNeeds]:
        names = self.column_names(self.params.column)
        return {
            party: TableNeeds((names[party],), sort_by=names[party] if self.sorted_rows else None)
            for party in Party
        }
