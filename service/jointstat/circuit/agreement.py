"""The manifest's sections as validated models: the job, the two parties, their tables and columns, the
statistics and their parameters, who receives which output, the disclosure rule, the false-match bound and the
privacy settings of noisy outputs.

Theory of operation
-------------------
Each section is a ``StrictModel`` (``jointstat.fields``) whose fields carry the descriptions the JSON Schema and the
reference page (``docs/manifest.md``, ``circuit.reference``) show. Column types, told apart by ``type``:

* ``unsigned`` / ``signed`` — integers of ``width`` bits (two's complement when signed);
* ``fixed`` — fixed-point numbers: the integer value × 2^-``fraction_bits`` in ``width`` bits (signed by default);
* ``boolean`` — one bit;
* ``identifier`` — an identifier (e-mail address, account number…) turned into a ``width``-bit integer by
  HMAC-SHA-256 under a secret both organisations hold (``jointstat.circuit.inputs``); the secret is never in the
  manifest. ``key`` is its former name, still read (``deprecations`` says so) and kept as written in the
  canonical form, so the digest of a manifest written with it does not change.

A manifest computes one statistic (``statistic:`` with the top-level ``outputs:``, the form of digests v2) or a
list of named ones (``statistics:``, each with its ``compute:`` tag, parameters, ``outputs:`` and optionally its
own ``disclosure:``). ``Manifest.uses`` gives both forms as one list of ``StatisticUse``: the single form is a
list of one whose outputs keep their bare names; in the list form an output is addressed ``<statistic>.<output>``.

``Manifest`` here carries its statistics as the ``StatisticParameters`` base; reading a file
(``jointstat.circuit.manifest``) validates them with models built from every registered statistic's parameters.
Statistics read the tables through this model, so it depends on nothing above the parameter types
(``circuit.parameters``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Annotated, Any, ClassVar, Literal, Union

from pydantic import AfterValidator, BeforeValidator, ConfigDict, Field, model_validator

from jointstat.canonical import canonicalize
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import Identifier, StatisticParameters, later_field
from jointstat.fields import StrictModel, between, matches
from jointstat.problems import Problem

MAX_CAPACITY = (
    1 << 24
)  # rows per party table (what fits is decided by the memory and time limits, see circuit.plan)
MAX_WIDTH = 64
MIN_KEY_WIDTH = 16
DEFAULT_MAX_FALSE_MATCHES = 1e-6  # common practice: a false match in about one job in a million
MAX_STATISTICS = 64
DEFAULT_ROWS_PER_PERSON = 2  # common practice: one row in each table, the cautious default

JobName = Annotated[str, matches(r"[a-z0-9][a-z0-9._-]{0,63}", "lower-case letters, digits, '.', '_' or '-'")]
PartyName = Annotated[str, matches(r"[^\x00-\x1f\x7f]{1,80}", "1 to 80 printable characters")]
Rounding = Literal["nearest", "down", "up", "toward_zero"]
ROUNDING_WORDS = {
    "nearest": "to the nearest value the column holds, a tie to the even one",
    "down": "down, toward minus infinity",
    "up": "up, toward plus infinity",
    "toward_zero": "toward zero",
}


# -- columns and tables --------------------------------------------------------------------------------------------


class BaseColumn(StrictModel):
    """What every column type has: a name, its type tag, and its encoding (bits, signedness, fraction bits)."""

    name: Identifier = Field(description="the column's name: the CSV header or the SQL result column")
    type: str  # each column type fixes it to a Literal

    number: ClassVar[bool] = True  # a statistic may compute with its values (not a flag, not an identifier)
    identifier: ClassVar[bool] = (
        False  # hashed identifiers (matched across the tables, never compared otherwise)
    )

    @property
    def bits(self) -> int:
        return int(getattr(self, "width", 1))

    @property
    def signed(self) -> bool:
        return False

    @property
    def frac(self) -> int:
        return 0

    @property
    def rounding_rule(self) -> str | None:
        """How a value with more precision than the column holds is rounded (None: such a value is refused)."""
        return getattr(self, "rounding", None)

    def range(self) -> tuple[int, int]:
        """Smallest and largest encoded integer."""
        if self.signed:
            return -(1 << (self.bits - 1)), (1 << (self.bits - 1)) - 1
        return 0, (1 << self.bits) - 1


def _rounding_field() -> Any:
    return later_field(
        None,
        "how a value with more precision than the column holds is rounded: nearest (a tie to the even "
        "neighbour), down, up or toward_zero; without it such a value is refused with its file, line and column",
    )


class UnsignedColumn(BaseColumn):
    """A whole number from 0 to 2^width − 1."""

    type: Literal["unsigned"] = Field(description="unsigned: whole numbers from 0 to 2^width − 1")
    width: Annotated[int, between(1, MAX_WIDTH)] = Field(description="bits of each value (1 to 64)")
    rounding: Rounding | None = _rounding_field()


class SignedColumn(BaseColumn):
    """A whole number from −2^(width−1) to 2^(width−1) − 1 (two's complement)."""

    type: Literal["signed"] = Field(description="signed: whole numbers from −2^(width−1) to 2^(width−1) − 1")
    width: Annotated[int, between(2, MAX_WIDTH)] = Field(
        description="bits of each value, sign included (2 to 64)"
    )
    rounding: Rounding | None = _rounding_field()

    @property
    def signed(self) -> bool:
        return True


class FixedColumn(BaseColumn):
    """A fixed-point number: the stored integer is the value × 2^fraction_bits."""

    type: Literal["fixed"] = Field(
        description="fixed: numbers with fraction_bits binary fraction digits (steps of 2^-fraction_bits)"
    )
    width: Annotated[int, between(2, MAX_WIDTH)] = Field(description="bits of each stored value (2 to 64)")
    fraction_bits: Annotated[int, between(0, MAX_WIDTH - 1)] = Field(
        description="binary fraction digits: 1 holds halves (41.5), 2 quarters, 8 steps of 1/256"
    )
    signed_: bool = Field(default=True, alias="signed", description="whether negative values are allowed")
    rounding: Rounding | None = _rounding_field()

    model_config = ConfigDict(populate_by_name=True, serialize_by_alias=True)

    @model_validator(mode="after")
    def _fraction_fits(self) -> FixedColumn:
        if self.fraction_bits >= self.width:
            raise ValueError(f"fraction_bits ({self.fraction_bits}) must be less than width ({self.width})")
        return self

    @property
    def signed(self) -> bool:
        return self.signed_

    @property
    def frac(self) -> int:
        return self.fraction_bits


class BooleanColumn(BaseColumn):
    """true or false (also yes/no, 1/0)."""

    type: Literal["boolean"] = Field(description="boolean: true/false, yes/no or 1/0")

    number: ClassVar[bool] = False


class IdentifierColumn(BaseColumn):
    """An identifier, hashed to ``width`` bits with HMAC-SHA-256 (see ``jointstat.circuit.inputs``)."""

    type: Literal["identifier", "key"] = Field(
        description="identifier: an e-mail address, account number or other identifier, hashed under the secret "
        "both organisations hold and matched across the tables (`key` is its former name, still read)"
    )
    width: Annotated[int, between(MIN_KEY_WIDTH, MAX_WIDTH)] = Field(
        default=32,
        description="bits of each identifier's hash (16 to 64); wider hashes make false matches rarer",
    )
    fold_case: bool = Field(
        default=False, description="whether letter case is ignored (Ann@X.org matches ann@x.org)"
    )

    number: ClassVar[bool] = False
    identifier: ClassVar[bool] = True


KeyColumn = IdentifierColumn  # the former name

Column = Annotated[
    Union[UnsignedColumn, SignedColumn, FixedColumn, BooleanColumn, IdentifierColumn],  # noqa: UP007
    Field(discriminator="type"),
]


class Table(StrictModel):
    """One party's input: typed columns and a public row capacity (rows are padded to it)."""

    capacity: Annotated[int, between(1, MAX_CAPACITY)] = Field(
        description="the most rows this party may feed; public (the circuit's size shows it), while the true "
        "row count stays secret"
    )
    columns: Annotated[list[Column], Field(min_length=1)] = Field(description="the table's typed columns")

    @model_validator(mode="after")
    def _unique_names(self) -> Table:
        seen: dict[str, int] = {}
        for i, col in enumerate(self.columns):
            if col.name in seen:
                raise ValueError(f"columns[{i}].name: column {col.name!r} is also columns[{seen[col.name]}]")
            seen[col.name] = i
        return self

    def column(self, name: str) -> BaseColumn | None:
        for col in self.columns:
            if col.name == name:
                return col
        return None

    def index(self, name: str) -> int:
        return [c.name for c in self.columns].index(name)


# -- the other sections --------------------------------------------------------------------------------------------


class Job(StrictModel):
    """What the job is called; both organisations' nodes know it by this name and version."""

    name: JobName = Field(description="the job's name: lower-case letters, digits, '.', '_' or '-'")
    version: Annotated[int, between(1, 2**31 - 1)] = Field(description="a number raised with every change")
    description: str | None = Field(default=None, description="what the job is for, in words")


class PartyInfo(StrictModel):
    """One organisation."""

    name: PartyName = Field(description="the organisation's name, as both agree to write it")


class Parties(StrictModel):
    """The two organisations; ``garbler`` garbles the circuit, ``evaluator`` evaluates it."""

    garbler: PartyInfo = Field(description="the organisation whose node garbles the circuit")
    evaluator: PartyInfo = Field(description="the organisation whose node evaluates it")

    @model_validator(mode="after")
    def _distinct(self) -> Parties:
        if self.garbler.name == self.evaluator.name:
            raise ValueError("the garbler and the evaluator must be different parties")
        return self


class Tables(StrictModel):
    """Each party's input table."""

    garbler: Table = Field(description="the garbler's table")
    evaluator: Table = Field(description="the evaluator's table")


class Outputs(StrictModel):
    """Which named outputs each party receives (what withheld them, if anything, goes with them)."""

    garbler: list[str] = Field(
        default=[], description="the outputs the garbler's organisation receives, by name"
    )
    evaluator: list[str] = Field(
        default=[], description="the outputs the evaluator's organisation receives, by name"
    )

    def receivers(self) -> dict[Party, list[str]]:
        return {Party.GARBLER: list(self.garbler), Party.EVALUATOR: list(self.evaluator)}


class Disclosure(StrictModel):
    """The disclosure rule: withhold a statistic's outputs inside the circuit when fewer than ``min_count`` rows
    contribute (or keys match). It guards against the plainest exposures; it is no formal privacy guarantee."""

    min_count: Annotated[int, between(0, 2 * MAX_CAPACITY)] = Field(
        default=0,
        description="the fewest rows that must count (matched keys for a join, values present for a compare, the "
        "smaller side's rows for a compare of aggregates) before the outputs are released; 0 releases always",
    )


def _number(value: Any) -> Any:
    """A YAML number as a float; also the text of one, as YAML 1.1 reads ``1e-6`` (no dot) as a string."""
    if isinstance(value, bool):
        raise ValueError("must be a number, not true or false")
    if isinstance(value, int):
        return float(value)
    if isinstance(value, str):
        try:
            return float(value.strip())
        except ValueError:
            raise ValueError("must be a number, e.g. 1.0e-6") from None
    return value


def _positive_finite(value: float) -> float:
    if not math.isfinite(value) or value <= 0:
        raise ValueError("must be a positive number, e.g. 1.0e-6")
    return value


class Matching(StrictModel):
    """The false key matches (two different identifiers whose hashes collide) both parties accept in expectation."""

    max_false_matches: Annotated[float, BeforeValidator(_number), AfterValidator(_positive_finite)] = Field(
        default=DEFAULT_MAX_FALSE_MATCHES,
        description="the expected false matches at full capacity both accept (n_g·n_e/2^width); a manifest "
        "above it is refused with the identifier width that meets it",
    )


class Privacy(StrictModel):
    """What the sensitivity of noisy outputs assumes about the people behind the rows."""

    rows_per_person: Annotated[int, between(1, 1 << 20)] = Field(
        default=DEFAULT_ROWS_PER_PERSON,
        description="the most rows one person can have in the two tables together: 1 when each person is in at "
        "most one row of one table, 2 when a person can be in both tables (the default). The sensitivity of "
        "pooled counts and sums grows with it",
    )


# -- statistics ----------------------------------------------------------------------------------------------------

EntryLabel = Annotated[
    str, matches(r"[a-z][a-z0-9_]{0,39}", "lower-case letters, digits and _ (a letter first, at most 40)")
]


def entry_fields(kind: str) -> dict[str, Any]:
    """The fields a statistic of the ``statistics:`` list has besides its parameters (for ``create_model``)."""
    return {
        "name": (
            EntryLabel,
            Field(
                description="this statistic's name in the manifest; its outputs are addressed <name>.<output>"
            ),
        ),
        "compute": (Literal[kind], Field(description="which statistic: " + kind)),
        "outputs": (Outputs, Field(description="which of this statistic's outputs each party receives")),
        "disclosure": (
            Disclosure | None,
            Field(default=None, description="this statistic's own disclosure rule (default: the manifest's)"),
        ),
    }


@dataclass(frozen=True)
class StatisticUse:
    """One statistic of a manifest, whichever form wrote it."""

    label: str | None  # None: the single `statistic:` form, whose outputs keep their bare names
    kind: str
    params: StatisticParameters
    outputs: Outputs
    disclosure: Disclosure
    path: str  # where its parameters are: "statistic" or "statistics[i]"
    outputs_path: str  # where its outputs are: "outputs" or "statistics[i].outputs"

    def address(self, output: str) -> str:
        """How results and logs name one of its outputs."""
        return output if self.label is None else f"{self.label}.{output}"

    @property
    def title(self) -> str:
        return self.kind if self.label is None else f"{self.label} ({self.kind})"


class Manifest(StrictModel):
    """A validated manifest (build through ``manifest.load_manifest`` / ``manifest.parse_manifest``)."""

    job: Job = Field(description="the job's name and version")
    parties: Parties = Field(description="the two organisations and which one garbles")
    tables: Tables = Field(description="each party's input table: typed columns and a row capacity")
    statistic: StatisticParameters | None = Field(
        default=None,
        exclude_if=lambda v: v is None,
        description="the one statistic of a single-statistic manifest (its `name` says which); use `statistics` "
        "for several",
    )
    statistics: (
        Annotated[list[StatisticParameters], Field(min_length=1, max_length=MAX_STATISTICS)] | None
    ) = later_field(None, "the statistics computed in one session, each named, with its own outputs")
    outputs: Outputs | None = Field(
        default=None,
        exclude_if=lambda v: v is None,
        description="with `statistic`: which outputs each party receives (in `statistics`, each lists its own)",
    )
    disclosure: Disclosure = Field(
        default=Disclosure(), description="the disclosure rule of every statistic that has none of its own"
    )
    matching: Matching = Field(default=Matching(), description="the bound on false identifier matches")
    privacy: Privacy | None = later_field(None, "what noisy outputs' sensitivities assume")
    plugins: list[str] = Field(
        default=[], description="Python files (relative to the manifest) that register custom statistics"
    )

    def table(self, party: Party) -> Table:
        return self.tables.garbler if Party(party) == Party.GARBLER else self.tables.evaluator

    def uses(self) -> list[StatisticUse]:
        """Every statistic, in order (the single form is a list of one)."""
        if self.statistics is not None:
            return [
                StatisticUse(
                    label=getattr(entry, "name", None),
                    kind=str(getattr(entry, "compute", entry.name)),
                    params=entry,
                    outputs=getattr(entry, "outputs", Outputs()),
                    disclosure=getattr(entry, "disclosure", None) or self.disclosure,
                    path=f"statistics[{i}]",
                    outputs_path=f"statistics[{i}].outputs",
                )
                for i, entry in enumerate(self.statistics)
            ]
        if self.statistic is None:
            return []
        return [
            StatisticUse(
                None,
                self.statistic.name,
                self.statistic,
                self.outputs or Outputs(),
                self.disclosure,
                "statistic",
                "outputs",
            )
        ]

    def rows_per_person(self) -> int:
        return (self.privacy or Privacy()).rows_per_person

    def canonical(self) -> bytes:
        return canonical_json(self.model_dump(mode="json", by_alias=True))

    def structure_problems(self) -> list[Problem]:
        """Which form the manifest uses, and the statistics' names (the rules pydantic cannot say by field)."""
        if self.statistic is None and self.statistics is None:
            return [
                Problem("statistics", "required field is missing (or give one `statistic:` with `outputs:`)")
            ]
        if self.statistic is not None and self.statistics is not None:
            return [
                Problem("statistic", "give either `statistic:` with `outputs:` or `statistics:`, not both")
            ]
        if self.statistic is not None:
            return [] if self.outputs is not None else [Problem("outputs", "required field is missing")]
        problems = []
        if self.outputs is not None:
            problems.append(
                Problem(
                    "outputs",
                    "with `statistics:` each statistic lists its own outputs (statistics[i].outputs)",
                )
            )
        seen: dict[str, int] = {}
        for i, use in enumerate(self.uses()):
            assert use.label is not None
            first = seen.setdefault(use.label, i)
            if first != i:
                problems.append(
                    Problem(f"{use.path}.name", f"{use.label!r} is also the name of statistics[{first}]")
                )
        return problems


def canonical_json(value: Any) -> bytes:
    """RFC 8785 canonical JSON of the manifest's values (decimal parameters allowed), see ``jointstat.canonical``."""
    return canonicalize(value, allow_floats=True)
