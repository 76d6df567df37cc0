"""The manifest: what two organisations agree to compute, on which columns, and who receives which result.

Theory of operation
-------------------
A manifest is a YAML file validated by pydantic models (``Manifest``). It names the job and its version, the two
parties and which one garbles, each party's input table (typed columns and a public row capacity), the statistic
with its parameters, which outputs go to which party, and the disclosure rule. Column types:

* ``unsigned`` / ``signed`` — integers of ``width`` bits (two's complement when signed);
* ``fixed`` — fixed-point numbers: the integer value × 2^-``fraction_bits`` in ``width`` bits (signed by default);
* ``boolean`` — one bit;
* ``key`` — an identifier (e-mail address, account number…) turned into a ``width``-bit integer by HMAC-SHA-256
  under a secret both organisations hold (``jointstat.circuit.inputs``); the secret is never in the manifest.

The ``statistic`` section is one of the registered statistics (``library.registry``), told apart by its ``name``;
``plugins`` lists Python files (relative to the manifest) that register custom statistics before the section is
read. Errors name the field path and say what is wrong, e.g. ``tables.evaluator.columns[2].width: must be between
1 and 64``; a YAML key given twice is an error too (a silently dropped key could hide a typo).

False key matches: a ``key`` column keeps ``width`` bits of a MAC, so two different identifiers, one in each table,
share a hash with probability 2^-w, and a statistic that matches keys across the tables expects
n_g·n_e/2^w false matches at full capacity (n_g, n_e the tables' capacities; an upper bound, as pairs of equal
identifiers cannot match falsely). ``expected_false_matches`` and ``width_for_false_matches`` compute it and the
narrowest width that keeps it within a bound; ``key_matching`` gives a manifest's figures. The bound is
``matching.max_false_matches`` (default 10^-6, common practice); a manifest above it is refused with the width
that meets it. It is part of the manifest, hence of its digest: both organisations agree on it.

Identity: ``canonical_json`` serialises the validated manifest (defaults filled in) in the style of RFC 8785 —
object keys sorted, no whitespace, UTF-8, integers as digits and other numbers in the shortest round-trip form
with ECMAScript exponent rules — so two files that differ only in layout, comments or key order have the same
canonical form. The manifest digest (``jointstat.circuit.compile``) hashes this together with the circuit digest.
"""

from __future__ import annotations

import importlib.util
import math
import re
import sys
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, ClassVar, Literal, Union

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationError,
    create_model,
    model_validator,
)

from jointstat.canonical import canonicalize
from jointstat.problems import Problem, ProblemError, field_path, pydantic_message, read_yaml

MAX_CAPACITY = (
    1 << 24
)  # rows per party table (what fits is decided by the memory and time limits, see circuit.plan)
MAX_WIDTH = 64
MIN_KEY_WIDTH = 16
DEFAULT_MAX_FALSE_MATCHES = 1e-6  # common practice: a false match in about one job in a million

# -- errors ------------------------------------------------------------------------------------------------------------


class ManifestError(ProblemError):
    """A manifest that cannot be used; ``problems`` lists every field path found wrong."""


# -- field validators ----------------------------------------------------------------------------------------------


def _between(lo: int, hi: int) -> AfterValidator:
    def check(v: int) -> int:
        if not lo <= v <= hi:
            raise ValueError(f"must be between {lo} and {hi}")
        return v

    return AfterValidator(check)


def _matches(pattern: str, what: str) -> AfterValidator:
    rx = re.compile(pattern)

    def check(v: str) -> str:
        if not rx.fullmatch(v):
            raise ValueError(f"must be {what}")
        return v

    return AfterValidator(check)


Identifier = Annotated[
    str, _matches(r"[A-Za-z_][A-Za-z0-9_]{0,63}", "a name of letters, digits and _ (not a digit first)")
]
JobName = Annotated[
    str, _matches(r"[a-z0-9][a-z0-9._-]{0,63}", "lower-case letters, digits, '.', '_' or '-'")
]
PartyName = Annotated[str, _matches(r"[^\x00-\x1f\x7f]{1,80}", "1 to 80 printable characters")]


class StrictModel(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


# -- columns and tables --------------------------------------------------------------------------------------------


class _Column(StrictModel):
    name: Identifier

    numeric: ClassVar[bool] = True

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


class UnsignedColumn(_Column):
    type: Literal["unsigned"]
    width: Annotated[int, _between(1, MAX_WIDTH)]


class SignedColumn(_Column):
    type: Literal["signed"]
    width: Annotated[int, _between(2, MAX_WIDTH)]

    @property
    def signed(self) -> bool:
        return True


class FixedColumn(_Column):
    """A fixed-point number: the stored integer is the value × 2^fraction_bits."""

    type: Literal["fixed"]
    width: Annotated[int, _between(2, MAX_WIDTH)]
    fraction_bits: Annotated[int, _between(0, MAX_WIDTH - 1)]
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


class BooleanColumn(_Column):
    type: Literal["boolean"]


class KeyColumn(_Column):
    """An identifier, hashed to ``width`` bits with HMAC-SHA-256 (see ``jointstat.circuit.inputs``)."""

    type: Literal["key"]
    width: Annotated[int, _between(MIN_KEY_WIDTH, MAX_WIDTH)] = 32
    fold_case: bool = False

    numeric: ClassVar[bool] = False


Column = Annotated[
    Union[UnsignedColumn, SignedColumn, FixedColumn, BooleanColumn, KeyColumn],  # noqa: UP007
    Field(discriminator="type"),
]


class Table(StrictModel):
    """One party's input: typed columns and a public row capacity (rows are padded to it)."""

    capacity: Annotated[int, _between(1, MAX_CAPACITY)]
    columns: Annotated[list[Column], Field(min_length=1)]

    @model_validator(mode="after")
    def _unique_names(self) -> Table:
        seen: dict[str, int] = {}
        for i, col in enumerate(self.columns):
            if col.name in seen:
                raise ValueError(f"columns[{i}].name: column {col.name!r} is also columns[{seen[col.name]}]")
            seen[col.name] = i
        return self

    def column(self, name: str) -> _Column | None:
        for col in self.columns:
            if col.name == name:
                return col
        return None

    def index(self, name: str) -> int:
        return [c.name for c in self.columns].index(name)


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

    garbler: list[str] = []
    evaluator: list[str] = []


class Disclosure(StrictModel):
    """Withhold every result inside the circuit when fewer than ``min_count`` rows contribute (or keys match)."""

    min_count: Annotated[int, _between(0, 2 * MAX_CAPACITY)] = 0


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


def expected_false_matches(n_garbler: int, n_evaluator: int, width: int) -> float:
    """Expected false matches between tables of these sizes with ``width``-bit key hashes: n_g·n_e/2^w."""
    return n_garbler * n_evaluator / 2.0**width


def width_for_false_matches(n_garbler: int, n_evaluator: int, bound: float) -> int | None:
    """The narrowest key width (16 to 64 bits) whose expected false matches are at most ``bound``, else None."""
    for width in range(MIN_KEY_WIDTH, MAX_WIDTH + 1):
        if expected_false_matches(n_garbler, n_evaluator, width) <= bound:
            return width
    return None


@dataclass(frozen=True)
class KeyMatching:
    """A manifest's false-match figures at full capacity (see the module docstring)."""

    width: int
    garbler_rows: int
    evaluator_rows: int
    expected: float
    bound: float
    width_needed: int | None  # the narrowest width within the bound (None: no width up to 64 bits is)

    @property
    def within_bound(self) -> bool:
        return self.expected <= self.bound


class Job(StrictModel):
    name: JobName
    version: Annotated[int, _between(1, 2**31 - 1)]
    description: str | None = None


class StatisticParameters(StrictModel):
    """Base of every statistic's parameter model; subclasses fix ``name`` to a ``Literal``."""

    name: str


class SideColumns(StrictModel):
    """A column named per party, when the two tables call it differently."""

    garbler: Identifier
    evaluator: Identifier


ColumnPair = Identifier | SideColumns


class Manifest(StrictModel):
    """A validated manifest (build through ``load_manifest`` / ``parse_manifest``)."""

    job: Job
    parties: Parties
    tables: Tables
    statistic: StatisticParameters
    outputs: Outputs
    disclosure: Disclosure = Disclosure()
    matching: Matching = Matching()
    plugins: list[str] = []

    def table(self, party: Any) -> Table:
        from jointstat.circuit.model import Party

        return self.tables.garbler if Party(party) == Party.GARBLER else self.tables.evaluator

    def canonical(self) -> bytes:
        return canonical_json(self.model_dump(mode="json", by_alias=True))


# -- the dynamic model with the registered statistics ----------------------------------------------------------------

_model_cache: dict[tuple[type[StatisticParameters], ...], type[Manifest]] = {}


def manifest_model() -> type[Manifest]:
    """The Manifest model whose ``statistic`` is the union of every registered statistic's parameters."""
    from jointstat.circuit.library.registry import parameter_models

    models = tuple(parameter_models())
    if models not in _model_cache:
        union: Any = models[0] if len(models) == 1 else Annotated[Union[models], Field(discriminator="name")]  # noqa: UP007
        _model_cache[models] = create_model("Manifest", __base__=Manifest, statistic=(union, ...))
    return _model_cache[models]


def schema() -> dict[str, Any]:
    """The JSON Schema of manifests with the statistics registered now."""
    return manifest_model().model_json_schema(by_alias=True)


# -- loading ------------------------------------------------------------------------------------------------------


def _error_path(err: dict[str, Any], data: Any) -> str:
    path = field_path(err["loc"], data)
    if err["type"] in ("union_tag_invalid", "union_tag_not_found"):  # the error is about the tag field itself
        tag = str((err.get("ctx") or {}).get("discriminator", "")).strip("'")
        path = f"{path}.{tag}" if path else tag
    return path


def load_plugins(paths: Iterable[str], base: Path | None, where: str = "plugins") -> list[Problem]:
    """Import plugin files (relative to ``base``) once each; returns problems instead of raising."""
    problems = []
    for i, name in enumerate(paths):
        path = Path(name) if Path(name).is_absolute() or base is None else base / name
        if not path.is_file():
            problems.append(Problem(f"{where}[{i}]", f"no such file: {path}"))
            continue
        try:
            load_plugin(path)
        except Exception as exc:  # a plugin's own error, reported where it is named
            problems.append(Problem(f"{where}[{i}]", f"{path} failed to load: {type(exc).__name__}: {exc}"))
    return problems


_loaded_plugins: dict[Path, object] = {}


def load_plugin(path: Path) -> None:
    """Import one plugin file (which registers statistics as it is imported); a file is imported once."""
    real = path.resolve()
    if real in _loaded_plugins:
        return
    module_name = "jointstat_plugin_" + re.sub(r"\W", "_", real.stem) + f"_{abs(hash(str(real))) % 10**8}"
    spec = importlib.util.spec_from_file_location(module_name, real)
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot import {real}")
    module = importlib.util.module_from_spec(spec)
    sys.modules[module_name] = module
    spec.loader.exec_module(module)
    _loaded_plugins[real] = module


def parse_manifest(text: str, source: str = "<manifest>", base: Path | None = None) -> Manifest:
    """Validate manifest text; raises ``ManifestError`` listing every problem with its field path."""
    try:
        data = read_yaml(text)
    except ValueError as exc:
        raise ManifestError(source, [Problem("", str(exc))]) from None
    if not isinstance(data, dict):
        raise ManifestError(source, [Problem("", "a manifest is a YAML mapping (job, parties, tables, …)")])
    plugins = data.get("plugins", [])
    if isinstance(plugins, list) and all(isinstance(p, str) for p in plugins):
        problems = load_plugins(plugins, base)
        if problems:
            raise ManifestError(source, problems)
    try:
        manifest = manifest_model().model_validate(data)
    except ValidationError as exc:
        problems = [Problem(_error_path(e, data), pydantic_message(e)) for e in exc.errors()]
        raise ManifestError(source, problems) from None
    problems = cross_check(manifest)
    if problems:
        raise ManifestError(source, problems)
    return manifest


def load_manifest(path: str | Path) -> Manifest:
    """Read and validate a manifest file (plugins are resolved relative to it)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ManifestError(str(p), [Problem("", f"cannot read the file: {exc}")]) from None
    return parse_manifest(text, str(p), p.parent)


def cross_check(manifest: Manifest) -> list[Problem]:
    """Rules that span sections: the statistic's own checks, then the outputs against what it produces."""
    from jointstat.circuit.library.registry import statistic_for

    stat = statistic_for(manifest)
    problems = list(stat.problems())
    if problems:
        return problems
    known = {spec.name for spec in stat.outputs()}
    for role in ("garbler", "evaluator"):
        names = getattr(manifest.outputs, role)
        for i, name in enumerate(names):
            if name == "withheld":
                problems.append(
                    Problem(f"outputs.{role}[{i}]", "'withheld' is always delivered; do not list it")
                )
            elif name not in known:
                problems.append(
                    Problem(
                        f"outputs.{role}[{i}]",
                        f"{stat.name} has no output {name!r}; it has {', '.join(sorted(known))}",
                    )
                )
            elif names.index(name) != i:
                problems.append(Problem(f"outputs.{role}[{i}]", f"{name!r} is listed twice"))
    if not manifest.outputs.garbler and not manifest.outputs.evaluator:
        problems.append(Problem("outputs", "no party receives any output"))
    figures = key_matching(manifest)
    if figures is not None and not figures.within_bound:
        problems.append(Problem("matching.max_false_matches", _over_bound(figures)))
    return problems


def key_matching(manifest: Manifest) -> KeyMatching | None:
    """The false-match figures of a manifest whose statistic matches key columns across the two tables (the
    column each side needs unique, when both are keys), or None."""
    from jointstat.circuit.library.registry import statistic_for
    from jointstat.circuit.model import Party

    needs = statistic_for(manifest).needs()
    tables = [manifest.table(party) for party in Party]
    columns = [table.column(needs[party].unique or "") for party, table in zip(Party, tables, strict=True)]
    if any(col is None or getattr(col, "type", None) != "key" for col in columns):
        return None
    width = min(col.bits for col in columns if col is not None)
    rows = [table.capacity for table in tables]
    bound = manifest.matching.max_false_matches
    return KeyMatching(
        width=width,
        garbler_rows=rows[0],
        evaluator_rows=rows[1],
        expected=expected_false_matches(rows[0], rows[1], width),
        bound=bound,
        width_needed=width_for_false_matches(rows[0], rows[1], bound),
    )


def _over_bound(f: KeyMatching) -> str:
    what = (
        f"identifiers hashed to {f.width}-bit keys give about {f.expected:.3g} false matches in expectation at full "
        f"capacity ({f.garbler_rows:,} × {f.evaluator_rows:,} rows: n_g·n_e/2^w), above the agreed bound of "
        f"{f.bound:g}"
    )
    if f.width_needed is None:
        return f"{what}; no key width up to {MAX_WIDTH} bits meets it at these capacities: lower them or agree a larger bound"
    return (
        f"{what}; key columns of {f.width_needed} bits or more meet it (both tables' key column width), or the "
        "parties may agree a larger bound"
    )


# -- canonical JSON ----------------------------------------------------------------------------------------------


def canonical_json(value: Any) -> bytes:
    """RFC 8785 canonical JSON of the manifest's values (decimal parameters allowed), see ``jointstat.canonical``."""
    return canonicalize(value, allow_floats=True)
