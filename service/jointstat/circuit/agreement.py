"""The manifest's sections as validated models: the job, the two parties, their tables and columns, the
statistic's parameters, who receives which output, the disclosure rule and the false-match bound.

Theory of operation
-------------------
Each section is a ``StrictModel`` (``jointstat.fields``). Column types, told apart by ``type``:

* ``unsigned`` / ``signed`` — integers of ``width`` bits (two's complement when signed);
* ``fixed`` — fixed-point numbers: the integer value × 2^-``fraction_bits`` in ``width`` bits (signed by default);
* ``boolean`` — one bit;
* ``key`` — an identifier (e-mail address, account number…) turned into a ``width``-bit integer by HMAC-SHA-256
  under a secret both organisations hold (``jointstat.circuit.inputs``); the secret is never in the manifest.

``Manifest`` here carries its ``statistic`` as the ``StatisticParameters`` base; reading a file
(``jointstat.circuit.manifest``) validates it with a model whose ``statistic`` is the union of every registered
statistic's parameters, a subclass of this one. Statistics read the tables through this model, so it depends on
nothing above the parameter types (``circuit.parameters``).
"""

from __future__ import annotations

import math
from typing import Annotated, Any, ClassVar, Literal, Union

from pydantic import AfterValidator, BeforeValidator, ConfigDict, Field, model_validator

from jointstat.canonical import canonicalize
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import Identifier, StatisticParameters
from jointstat.fields import StrictModel, between, matches

MAX_CAPACITY = (
    1 << 24
)  # rows per party table (what fits is decided by the memory and time limits, see circuit.plan)
MAX_WIDTH = 64
MIN_KEY_WIDTH = 16
DEFAULT_MAX_FALSE_MATCHES = 1e-6  # common practice: a false match in about one job in a million

JobName = Annotated[str, matches(r"[a-z0-9][a-z0-9._-]{0,63}", "lower-case letters, digits, '.', '_' or '-'")]
PartyName = Annotated[str, matches(r"[^\x00-\x1f\x7f]{1,80}", "1 to 80 printable characters")]


# -- columns and tables --------------------------------------------------------------------------------------------


class BaseColumn(StrictModel):
    """What every column type has: a name, its type tag, and its encoding (bits, signedness, fraction bits)."""

    name: Identifier
    type: str  # each column type fixes it to a Literal

    number: ClassVar[bool] = True  # a statistic may compute with its values (not a flag, not a key)

    @property
    def bits(self) -> int:
        return int(getattr(self, "width", 1))

    @property
    def signed(self) -> bool:
        return False

    @property
    def frac(self) -> int:
        return 0

    def range(self) -> tuple[int, int]:
        """Smallest and largest encoded integer."""
        if self.signed:
            return -(1 << (self.bits - 1)), (1 << (self.bits - 1)) - 1
        return 0, (1 << self.bits) - 1


class UnsignedColumn(BaseColumn):
    type: Literal["unsigned"]
    width: Annotated[int, between(1, MAX_WIDTH)]


class SignedColumn(BaseColumn):
    type: Literal["signed"]
    width: Annotated[int, between(2, MAX_WIDTH)]

    @property
    def signed(self) -> bool:
        return True


class FixedColumn(BaseColumn):
    """A fixed-point number: the stored integer is the value × 2^fraction_bits."""

    type: Literal["fixed"]
    width: Annotated[int, between(2, MAX_WIDTH)]
    fraction_bits: Annotated[int, between(0, MAX_WIDTH - 1)]
    signed_: bool = Field(True, alias="signed")

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
    type: Literal["boolean"]

    number: ClassVar[bool] = False


class KeyColumn(BaseColumn):
    """An identifier, hashed to ``width`` bits with HMAC-SHA-256 (see ``jointstat.circuit.inputs``)."""

    type: Literal["key"]
    width: Annotated[int, between(MIN_KEY_WIDTH, MAX_WIDTH)] = 32
    fold_case: bool = False

    number: ClassVar[bool] = False


Column = Annotated[
    Union[UnsignedColumn, SignedColumn, FixedColumn, BooleanColumn, KeyColumn],  # noqa: UP007
    Field(discriminator="type"),
]


class Table(StrictModel):
    """One party's input: typed columns and a public row capacity (rows are padded to it)."""

    capacity: Annotated[int, between(1, MAX_CAPACITY)]
    columns: Annotated[list[Column], Field(min_length=1)]

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
    name: JobName
    version: Annotated[int, between(1, 2**31 - 1)]
    description: str | None = None


class PartyInfo(StrictModel):
    name: PartyName


class Parties(StrictModel):
    """The two organisations; ``garbler`` garbles the circuit, ``evaluator`` evaluates it."""

    garbler: PartyInfo
    evaluator: PartyInfo

    @model_validator(mode="after")
    def _distinct(self) -> Parties:
        if self.garbler.name == self.evaluator.name:
            raise ValueError("the garbler and the evaluator must be different parties")
        return self


class Tables(StrictModel):
    garbler: Table
    evaluator: Table


class Outputs(StrictModel):
    """Which named outputs each party receives (the ``withheld`` flag goes to every receiving party)."""

    garbler: list[str] = []  # noqa: RUF012 (pydantic copies a default for each model)
    evaluator: list[str] = []  # noqa: RUF012 (pydantic copies a default for each model)


class Disclosure(StrictModel):
    """Withhold every result inside the circuit when fewer than ``min_count`` rows contribute (or keys match)."""

    min_count: Annotated[int, between(0, 2 * MAX_CAPACITY)] = 0


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

    max_false_matches: Annotated[float, BeforeValidator(_number), AfterValidator(_positive_finite)] = (
        DEFAULT_MAX_FALSE_MATCHES
    )


class Manifest(StrictModel):
    """A validated manifest (build through ``manifest.load_manifest`` / ``manifest.parse_manifest``)."""

    job: Job
    parties: Parties
    tables: Tables
    statistic: StatisticParameters
    outputs: Outputs
    disclosure: Disclosure = Disclosure()
    matching: Matching = Matching()
    plugins: list[str] = []  # noqa: RUF012 (pydantic copies a default for each model)

    def table(self, party: Party) -> Table:
        return self.tables.garbler if Party(party) == Party.GARBLER else self.tables.evaluator

    def canonical(self) -> bytes:
        return canonical_json(self.model_dump(mode="json", by_alias=True))


def canonical_json(value: Any) -> bytes:
    """RFC 8785 canonical JSON of the manifest's values (decimal parameters allowed), see ``jointstat.canonical``."""
    return canonicalize(value, allow_floats=True)
