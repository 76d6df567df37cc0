"""Reading a manifest: what two organisations agree to compute, on which columns, and who receives which result.

Theory of operation
-------------------
A manifest is a YAML file validated by pydantic models: the sections of ``circuit.agreement`` (the job, the two
parties and which one garbles, each party's typed input table with a public row capacity, the statistics and the
outputs each party receives, the disclosure rule, the privacy settings) with each statistic validated by the
parameter model of the statistic it names, one of the registered statistics (``library.registry``). The single
form ``statistic:`` picks the model by its ``name``; each entry of ``statistics:`` picks it by its ``compute`` and
adds its own ``name``, ``outputs`` and ``disclosure`` (``entry_model``). ``plugins`` lists Python files (relative
to the manifest) that register custom statistics before the statistics are read. Numbers keep the text they were
written as (``problems.read_yaml``), so exact decimals (ε, thresholds, bounds) are the decimals written. Errors
name the field path and say what is wrong, e.g. ``tables.evaluator.columns[2].width: must be between 1 and 64``;
a YAML key given twice is an error too (a silently dropped key could hide a typo). After the models,
``cross_check`` applies the rules that span sections: the form and the statistics' names, each statistic's own
checks, its outputs against what it produces, and its noise settings against its sensitivity and disclosure rule.
``deprecations`` lists the former spellings a manifest still uses (read as before, with what to write instead).

False key matches: a ``key`` column keeps ``width`` bits of a MAC, so two different identifiers, one in each table,
share a hash with probability 2^-w, and a statistic that matches keys across the tables expects
n_g·n_e/2^w false matches at full capacity (n_g, n_e the tables' capacities; an upper bound, as pairs of equal
identifiers cannot match falsely). ``expected_false_matches`` and ``width_for_false_matches`` compute it and the
narrowest width that keeps it within a bound; ``key_matching`` gives a manifest's figures. The bound is
``matching.max_false_matches`` (default 10^-6, common practice); a manifest above it is refused with the width
that meets it. It is part of the manifest, hence of its digest: both organisations agree on it.

Identity: ``agreement.canonical_json`` serialises the validated manifest (defaults filled in) in the style of
RFC 8785 — object keys sorted, no whitespace, UTF-8, integers as digits and other numbers in the shortest
round-trip form with ECMAScript exponent rules — so two files that differ only in layout, comments or key order
have the same canonical form. Fields added after digests v2 are left out while they hold their defaults
(``parameters.later_field``), so a manifest that uses none of them keeps its canonical form. The manifest digest
(``jointstat.circuit.compile``) hashes this together with the program's structure digest; ``canonical_differences``
lists the field paths where two manifests' canonical forms differ (``jointstat manifest diff``).
"""

from __future__ import annotations

import importlib.util
import json
import re
import sys
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Union

from pydantic import Field, ValidationError, create_model
from pydantic_core import ErrorDetails

from jointstat.circuit.agreement import (
    MAX_STATISTICS,
    MAX_WIDTH,
    MIN_KEY_WIDTH,
    Manifest,
    StatisticUse,
    entry_fields,
)
from jointstat.circuit.library.registry import BUILT_IN, parameter_models, statistics_for
from jointstat.circuit.library.statistic import Statistic
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import StatisticParameters
from jointstat.problems import Problem, ProblemError, field_path, pydantic_message, read_yaml


class ManifestError(ProblemError):
    """A manifest that cannot be used; ``problems`` lists every field path found wrong."""


# -- the dynamic model with the registered statistics ----------------------------------------------------------------

_model_cache: dict[tuple[type[StatisticParameters], ...], type[Manifest]] = {}
_entry_cache: dict[type[StatisticParameters], type[StatisticParameters]] = {}


def entry_model(params: type[StatisticParameters]) -> type[StatisticParameters]:
    """The model of one entry of ``statistics:`` computing the statistic of ``params``: its parameters, with
    ``name`` (the entry's own), ``compute`` (the statistic), ``outputs`` and ``disclosure``."""
    if params not in _entry_cache:
        kind = params.model_fields["name"].annotation.__args__[0]  # type: ignore[union-attr]
        _entry_cache[params] = create_model(
            params.__name__.removesuffix("Parameters") + "Entry",
            __base__=params,
            __doc__=f"An entry of `statistics:` computing {kind}.",
            **entry_fields(kind),
        )
    return _entry_cache[params]


def manifest_model(models: tuple[type[StatisticParameters], ...] | None = None) -> type[Manifest]:
    """The Manifest model whose statistics are the union of every registered statistic's parameters (or of
    ``models``)."""
    models = tuple(parameter_models()) if models is None else models
    if models not in _model_cache:
        single: Any = models[0] if len(models) == 1 else Annotated[Union[models], Field(discriminator="name")]  # noqa: UP007
        entries = tuple(entry_model(m) for m in models)
        union: Any = Union[entries]  # noqa: UP007
        entry: Any = entries[0] if len(entries) == 1 else Annotated[union, Field(discriminator="compute")]
        base = Manifest.model_fields
        _model_cache[models] = create_model(
            "Manifest",
            __base__=Manifest,
            statistic=(single | None, base["statistic"]),
            statistics=(
                Annotated[list[entry], Field(min_length=1, max_length=MAX_STATISTICS)] | None,
                base["statistics"],
            ),
        )
    return _model_cache[models]


def schema(*, built_in_only: bool = False) -> dict[str, Any]:
    """The JSON Schema of manifests with the statistics registered now (or only the built-in ones, as the
    reference page shows them whatever plugins are loaded)."""
    models = (
        tuple(sorted((cls.Parameters for cls in BUILT_IN), key=lambda m: m.__name__))
        if built_in_only
        else None
    )
    return manifest_model(models).model_json_schema(by_alias=True)


# -- loading ------------------------------------------------------------------------------------------------------


def _error_path(err: ErrorDetails, data: Any) -> str:
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


def read_manifest_data(text: str, source: str = "<manifest>", base: Path | None = None) -> dict[str, Any]:
    """The YAML mapping of a manifest, its plugins loaded; raises ``ManifestError``."""
    try:
        data = read_yaml(text, keep_number_text=True)
    except ValueError as exc:
        raise ManifestError(source, [Problem("", str(exc))]) from None
    if not isinstance(data, dict):
        raise ManifestError(source, [Problem("", "a manifest is a YAML mapping (job, parties, tables, …)")])
    plugins = data.get("plugins", [])
    if isinstance(plugins, list) and all(isinstance(p, str) for p in plugins):
        problems = load_plugins(plugins, base)
        if problems:
            raise ManifestError(source, problems)
    return data


def parse_manifest(text: str, source: str = "<manifest>", base: Path | None = None) -> Manifest:
    """Validate manifest text; raises ``ManifestError`` listing every problem with its field path."""
    data = read_manifest_data(text, source, base)
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
    return parse_manifest(read_text(p), str(p), p.parent)


def read_text(path: Path) -> str:
    try:
        return path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ManifestError(str(path), [Problem("", f"cannot read the file: {exc}")]) from None


def cross_check(manifest: Manifest) -> list[Problem]:
    """Rules that span sections (see the module docstring)."""
    problems = manifest.structure_problems()
    if problems:
        return problems
    stats = statistics_for(manifest)
    for stat in stats:
        problems += stat.problems()
    if problems:
        return problems
    for use, stat in zip(manifest.uses(), stats, strict=True):
        problems += _output_problems(use, stat)
    if not any(use.outputs.garbler or use.outputs.evaluator for use in manifest.uses()):
        problems.append(
            Problem(
                "outputs" if manifest.statistic is not None else "statistics", "no party receives any output"
            )
        )
    figures = key_matching(manifest)
    if figures is not None and not figures.within_bound:
        problems.append(Problem("matching.max_false_matches", _over_bound(figures)))
    return problems


def _output_problems(use: StatisticUse, stat: Statistic[Any]) -> list[Problem]:
    """A statistic's outputs against what it produces, and its noise against its outputs and rules."""
    problems: list[Problem] = []
    known = set(stat.output_specs())
    for role in ("garbler", "evaluator"):
        names = getattr(use.outputs, role)
        for i, name in enumerate(names):
            path = f"{use.outputs_path}.{role}[{i}]"
            if name == "withheld":
                problems.append(Problem(path, "'withheld' is always delivered; do not list it"))
            elif name not in known:
                problems.append(
                    Problem(path, f"{stat.name} has no output {name!r}; it has {', '.join(sorted(known))}")
                )
            elif names.index(name) != i:
                problems.append(Problem(path, f"{name!r} is listed twice"))
    if use.label is not None and not use.outputs.garbler and not use.outputs.evaluator:
        problems.append(Problem(use.outputs_path, "no party receives any output of this statistic"))
    released = (set(use.outputs.garbler) | set(use.outputs.evaluator)) & known
    problems += stat.noise_problems(released)
    settings = stat.noise_settings()
    if settings and use.disclosure.min_count > 0 and stat.count_output not in settings:
        own_rule = use.label is not None and getattr(use.params, "disclosure", None) is not None
        where = f"{use.path}.disclosure.min_count" if own_rule else "disclosure.min_count"
        remedy = "set min_count: 0"
        if stat.count_output:
            remedy = f"noise {stat.count_output!r} too (the rule then compares the noisy count), or {remedy}"
        problems.append(
            Problem(
                where,
                f"{use.title} has noisy outputs, and a disclosure rule decided on the exact count would reveal what "
                f"the noise hides: {remedy}",
            )
        )
    return problems


def deprecations(manifest: Manifest) -> list[Problem]:
    """Former spellings the manifest still uses: read as before (same digest), with what to write instead."""
    notes = []
    for role in ("garbler", "evaluator"):
        for i, col in enumerate(manifest.table(Party[role.upper()]).columns):
            if col.type == "key":
                notes.append(
                    Problem(
                        f"tables.{role}.columns[{i}].type",
                        "'key' is the former name of the identifier type: write type: identifier (it changes the "
                        "manifest's digest, so both organisations change it together)",
                    )
                )
    for use in manifest.uses():
        threshold = getattr(use.params, "threshold", None)
        if isinstance(threshold, float):
            notes.append(
                Problem(
                    f"{use.path}.threshold",
                    f"a bare number counts values at least {threshold:g} as 'above': write threshold: {{op: \">=\", "
                    f"value: {threshold:g}}} and list 'at_least' (or another operator: \">\" gives 'more_than')",
                )
            )
    return notes


def canonical_differences(a: Manifest, b: Manifest) -> list[tuple[str, Any, Any]]:
    """The field paths where two manifests' canonical forms differ, with each side's value (``ABSENT`` where a side
    has no such field): what makes their digests differ, unless their programs do."""
    left = json.loads(a.canonical())
    right = json.loads(b.canonical())
    out: list[tuple[str, Any, Any]] = []
    _differences("", left, right, out)
    return out


class _Absent:
    """Where one side's canonical form has no such field (told apart from a field that is null)."""

    def __repr__(self) -> str:
        return "(absent)"


ABSENT: Any = _Absent()


def _differences(path: str, left: Any, right: Any, out: list[tuple[str, Any, Any]]) -> None:
    if isinstance(left, dict) and isinstance(right, dict):
        for key in sorted(set(left) | set(right)):
            sub = f"{path}.{key}" if path else key
            if key not in left or key not in right:
                out.append((sub, left.get(key, ABSENT), right.get(key, ABSENT)))
            else:
                _differences(sub, left[key], right[key], out)
    elif isinstance(left, list) and isinstance(right, list) and len(left) == len(right):
        for i, (x, y) in enumerate(zip(left, right, strict=True)):
            _differences(f"{path}[{i}]", x, y, out)
    elif left != right or type(left) is not type(right):
        out.append((path, left, right))


# -- false key matches ------------------------------------------------------------------------------------------


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


def key_matching(manifest: Manifest) -> KeyMatching | None:
    """The false-match figures of a manifest whose statistics match identifier columns across the two tables (the
    columns each side needs unique, when both are identifiers; the narrowest such columns), or None."""
    tables = [manifest.table(party) for party in Party]
    widths = []
    for stat in statistics_for(manifest):
        needs = stat.needs()
        columns = [
            table.column(needs[party].unique or "") for party, table in zip(Party, tables, strict=True)
        ]
        keys = [col for col in columns if col is not None and col.identifier]
        if len(keys) == len(columns):
            widths.append(min(col.bits for col in keys))
    if not widths:
        return None
    width = min(widths)
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
