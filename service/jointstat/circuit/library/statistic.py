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
the parameter types and the blocks.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any, ClassVar, Generic, TypeVar

import numpy as np

from jointstat.circuit.agreement import BaseColumn, Manifest
from jointstat.circuit.bits import Bits, concat
from jointstat.circuit.builder import Builder
from jointstat.circuit.library.blocks import Number, NumberFormat, align, common_format
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import ColumnPair, ColumnParameters, SideColumns, StatisticParameters
from jointstat.problems import Problem

P = TypeVar("P", bound=StatisticParameters)
C = TypeVar("C", bound=ColumnParameters)


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

    def number(self, name: str) -> Number:
        col = self.schema[name]
        return Number(self.columns[name], col.signed, col.frac)

    def bits(self, name: str) -> Bits:
        return self.columns[name]


@dataclass
class BuildContext:
    builder: Builder
    manifest: Manifest
    tables: dict[Party, TableWires]
    wanted: frozenset[str]
    needs_count: bool

    def table(self, party: Party) -> TableWires:
        return self.tables[Party(party)]

    def valid(self) -> Bits:
        """The validity bits of both tables' rows, the garbler's first."""
        return concat([self.tables[party].valid for party in Party])


@dataclass
class StatisticResult:
    values: dict[str, Bits]
    count: Bits | None = None  # the count the disclosure rule compares with min_count
    ok: Bits | None = None  # an extra condition (one bit) for the result to be released
    extra: dict[str, Any] = field(default_factory=dict)  # figures for tests and benchmarks


class Statistic(ABC, Generic[P]):
    """Base class of statistics; see the module docstring."""

    name: ClassVar[str]
    Parameters: ClassVar[type[StatisticParameters]]  # the model of P (a class variable cannot name P itself)
    description: ClassVar[str] = ""

    def __init__(self, params: P, manifest: Manifest) -> None:
        self.params: P = params
        self.manifest = manifest

    @abstractmethod
    def problems(self) -> list[Problem]: ...

    @abstractmethod
    def needs(self) -> dict[Party, TableNeeds]: ...

    @abstractmethod
    def outputs(self) -> list[OutputSpec]: ...

    @abstractmethod
    def build(self, ctx: BuildContext) -> StatisticResult: ...

    def output_specs(self) -> dict[str, OutputSpec]:
        """``outputs()`` by name."""
        return {spec.name: spec for spec in self.outputs()}

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
                known = ", ".join(c.name for c in table.columns)
                yield Problem(path, f"tables.{role} has no column {names[party]!r} (it has {known})")
            elif numeric and not col.number:
                yield Problem(path, f"tables.{role} column {col.name!r} is a {col.type} column, not a number")

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


class ColumnStatistic(Statistic[C]):
    """A statistic over one number column of both tables (``params.column``): checks that both tables have it as
    a number column and reads it, with each party's rows sorted by it when ``sorted_rows`` is set."""

    sorted_rows: ClassVar[bool] = False

    def problems(self) -> list[Problem]:
        return list(self.check_columns(self.params.column, "statistic.column"))

    def needs(self) -> dict[Party, TableNeeds]:
        names = self.column_names(self.params.column)
        return {
            party: TableNeeds((names[party],), sort_by=names[party] if self.sorted_rows else None)
            for party in Party
        }
