"""Reading a manifest: what two organisations agree to compute, on which columns, and who receives which result.

Theory of operation
-------------------
A manifest is a YAML file validated by pydantic models: the sections of ``circuit.agreement`` (the job, the two
parties and which one garbles, each party's typed input table with a public row capacity, the outputs each party
receives, the disclosure rule) with the ``statistic`` section validated by the parameter model of the statistic it
names, one of the registered statistics (``library.registry``). ``plugins`` lists Python files (relative to the
manifest) that register custom statistics before the section is read. Errors name the field path and say what is
wrong, e.g. ``tables.evaluator.columns[2].width: must be between 1 and 64``; a YAML key given twice is an error too
(a silently dropped key could hide a typo). After the models, ``cross_check`` applies the rules that span
sections: the statistic's own checks, then the outputs against what it produces.

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
have the same canonical form. The manifest digest (``jointstat.circuit.compile``) hashes this together with the
program's structure digest.
"""

from __future__ import annotations

import importlib.util
import re
import sys
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Union

from pydantic import Field, ValidationError, create_model
from pydantic_core import ErrorDetails

from jointstat.circuit.agreement import MAX_WIDTH, MIN_KEY_WIDTH, Manifest
from jointstat.circuit.library.registry import parameter_models, statistic_for
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import StatisticParameters
from jointstat.problems import Problem, ProblemError, field_path, pydantic_message, read_yaml


class ManifestError(ProblemError):
    """A manifest that cannot be used; ``problems`` lists every field path found wrong."""


# -- the dynamic model with the registered statistics ----------------------------------------------------------------

_model_cache: dict[tuple[type[StatisticParameters], ...], type[Manifest]] = {}


def manifest_model() -> type[Manifest]:
    """The Manifest model whose ``statistic`` is the union of every registered statistic's parameters."""
    models = tuple(parameter_models())
    if models not in _model_cache:
        union: Any = models[0] if len(models) == 1 else Annotated[Union[models], Field(discriminator="name")]  # noqa: UP007
        _model_cache[models] = create_model("Manifest", __base__=Manifest, statistic=(union, ...))
    return _model_cache[models]


def schema() -> dict[str, Any]:
    """The JSON Schema of manifests with the statistics registered now."""
    return manifest_model().model_json_schema(by_alias=True)


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
    stat = statistic_for(manifest)
    problems = list(stat.problems())
    if problems:
        return problems
    known = set(stat.output_specs())
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
    """The false-match figures of a manifest whose statistic matches key columns across the two tables (the
    column each side needs unique, when both are keys), or None."""
    needs = statistic_for(manifest).needs()
    tables = [manifest.table(party) for party in Party]
    columns = [table.column(needs[party].unique or "") for party, table in zip(Party, tables, strict=True)]
    keys = [col for col in columns if col is not None and col.type == "key"]
    if len(keys) != len(columns):
        return None
    width = min(col.bits for col in keys)
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
