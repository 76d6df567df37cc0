"""The statistic registry: names a manifest uses → statistic classes that build their circuits.

Theory of operation
-------------------
A statistic is a subclass of ``Statistic`` with a pydantic ``Parameters`` model (its ``name`` field a ``Literal``
of the statistic's name) and four methods:

* ``problems()`` — checks that need the whole manifest (columns exist, types fit), as field-path problems;
* ``needs()`` — per party, the columns it reads, the column rows must be sorted by (each party sorts its own rows
  before encoding; the merges rely on it) and the column whose values must be unique;
* ``outputs()`` — every output it can produce, with width, signedness and fraction bits;
* ``build(ctx)`` — emits the circuit with the builder in ``ctx`` from the party tables' wires, computing only the
  outputs some party receives (``ctx.wanted``), and returns them with the count the disclosure rule tests and any
  extra condition under which the result is meaningful (e.g. at least one row for a mean).

``register_statistic`` adds a class under its name; a custom statistic written against the builder API registers
itself the same way from a plugin file the manifest lists (see ``configs/delivery-spread/spread.py``). The compiler
(``jointstat.circuit.compile``) declares the inputs, applies the disclosure gate and lays out the outputs, so a
statistic deals only with its own arithmetic.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, ClassVar, get_args

import numpy as np

from jointstat.circuit.bits import Bits
from jointstat.circuit.builder import Builder
from jointstat.circuit.library.blocks import Number
from jointstat.circuit.manifest import (
    ColumnPair,
    Manifest,
    Problem,
    SideColumns,
    StatisticParameters,
    _Column,
)
from jointstat.circuit.model import Party

if TYPE_CHECKING:
    from collections.abc import Iterator

ROLES = {Party.GARBLER: "garbler", Party.EVALUATOR: "evaluator"}


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
    schema: dict[str, _Column]

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


@dataclass
class StatisticResult:
    values: dict[str, Bits]
    count: Bits | None = None  # the count the disclosure rule compares with min_count
    ok: Bits | None = None  # an extra condition (one bit) for the result to be released
    extra: dict[str, Any] = field(default_factory=dict)  # figures for tests and benchmarks


class Statistic(ABC):
    """Base class of statistics; see the module docstring."""

    name: ClassVar[str]
    Parameters: ClassVar[type[StatisticParameters]]
    description: ClassVar[str] = ""

    def __init__(self, params: StatisticParameters, manifest: Manifest) -> None:
        self.params = params
        self.manifest = manifest

    @abstractmethod
    def problems(self) -> list[Problem]: ...

    @abstractmethod
    def needs(self) -> dict[Party, TableNeeds]: ...

    @abstractmethod
    def outputs(self) -> list[OutputSpec]: ...

    @abstractmethod
    def build(self, ctx: BuildContext) -> StatisticResult: ...

    # -- helpers for subclasses -------------------------------------------------------------------------------
    def column_names(self, ref: ColumnPair) -> dict[Party, str]:
        if isinstance(ref, SideColumns):
            return {Party.GARBLER: ref.garbler, Party.EVALUATOR: ref.evaluator}
        return {Party.GARBLER: ref, Party.EVALUATOR: ref}

    def check_columns(
        self, ref: ColumnPair, path: str, *, numeric: bool = True, parties: tuple[Party, ...] = tuple(Party)
    ) -> Iterator[Problem]:
        names = self.column_names(ref)
        for party in parties:
            table = self.manifest.table(party)
            col = table.column(names[party])
            role = ROLES[party]
            if col is None:
                known = ", ".join(c.name for c in table.columns)
                yield Problem(path, f"tables.{role} has no column {names[party]!r} (it has {known})")
            elif numeric and (not col.numeric or col.type == "boolean"):  # type: ignore[attr-defined]
                yield Problem(path, f"tables.{role} column {col.name!r} is a {col.type} column, not a number")  # type: ignore[attr-defined]

    def column(self, party: Party, ref: ColumnPair) -> _Column:
        col = self.manifest.table(party).column(self.column_names(ref)[party])
        assert col is not None  # checked by problems()
        return col


_REGISTRY: dict[str, type[Statistic]] = {}


def register_statistic(cls: type[Statistic]) -> type[Statistic]:
    """Class decorator: make ``cls`` available to manifests under ``cls.name``."""
    tag = cls.Parameters.model_fields["name"].annotation
    names = get_args(tag)
    if names != (cls.name,):
        raise ValueError(f"statistic {cls.name!r}: Parameters.name must be Literal[{cls.name!r}], got {tag}")
    existing = _REGISTRY.get(cls.name)
    if existing is not None and existing is not cls and existing.__qualname__ != cls.__qualname__:
        raise ValueError(f"a statistic named {cls.name!r} is registered already ({existing.__module__})")
    _REGISTRY[cls.name] = cls
    return cls


def _ensure_builtins() -> None:
    # Importing the library modules registers the built-in statistics.
    from jointstat.circuit.library import aggregate, compare, histogram, join, quantile  # noqa: F401


def registered() -> dict[str, type[Statistic]]:
    _ensure_builtins()
    return dict(_REGISTRY)


def parameter_models() -> list[type[StatisticParameters]]:
    return [cls.Parameters for _, cls in sorted(registered().items())]


def statistic_for(manifest: Manifest) -> Statistic:
    cls = registered()[manifest.statistic.name]
    return cls(manifest.statistic, manifest)
