"""Problems with a file a person wrote (a manifest, a node config): field paths, YAML reading, pydantic errors.

Theory of operation: validation collects every ``Problem`` it finds — a dotted field path such as
``jobs[1].schedule.cron`` and what is wrong there — and raises them together in one ``ProblemError`` naming the
file, so a person fixes a file in one pass. YAML is read with a safe loader that also refuses a key given twice in
one mapping (PyYAML would silently keep the last); syntax errors name line and column. Pydantic's error locations
become field paths, with the union-member tags pydantic inserts dropped. ``UserError`` is a problem of a command's
file or option, which the command line prints without a traceback.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import yaml


@dataclass(frozen=True)
class Problem:
    """One thing wrong with a file: the dotted field path and what is wrong there."""

    path: str
    message: str

    def __str__(self) -> str:
        return f"{self.path}: {self.message}" if self.path else self.message


class ProblemError(ValueError):
    """A file that cannot be used; ``problems`` lists every field path found wrong, each line naming the file."""

    def __init__(self, source: str, problems: Iterable[Problem]) -> None:
        self.source = source
        self.problems = list(problems)
        super().__init__("\n".join(f"{source}: {p}" for p in self.problems))


class UserError(Exception):
    """A problem the user can fix (a bad file, a bad option): the CLI prints it without a traceback, exit code 2.

    Raised by the command-line adapters (``jointstat.commands``) and the benchmarks; it lives here, below every room,
    so that nothing needs to import ``jointstat.cli`` for it.
    """


class _UniqueKeyLoader(yaml.SafeLoader):
    pass


def _mapping(loader: yaml.SafeLoader, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
    seen: set[Any] = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in seen:
            mark = key_node.start_mark
            raise yaml.constructor.ConstructorError(
                None, None, f"key {key!r} appears twice (line {mark.line + 1})", mark
            )
        seen.add(key)
    return loader.construct_mapping(node, deep=deep)


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _mapping)


def read_yaml(text: str) -> Any:
    """Parse YAML safely, refusing duplicate keys; raises ``ValueError`` with "not valid YAML: line L, column C: …"."""
    try:
        return yaml.load(text, Loader=_UniqueKeyLoader)  # a SafeLoader subclass
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark is not None else ""
        problem = getattr(exc, "problem", None) or str(exc)
        raise ValueError(f"not valid YAML: {where}{problem}") from None


def field_path(loc: tuple[Any, ...], data: Any = None) -> str:
    """('jobs', 1, 'schedule', 'cron') → 'jobs[1].schedule.cron'.

    Union members' descriptions that pydantic puts in the location are dropped; with ``data`` (the validated input)
    so are discriminator tags (the value of a ``type`` or ``name`` field that chose the union member).
    """
    out = ""
    node = data
    for item in loc:
        if isinstance(item, int):
            out += f"[{item}]"
            node = node[item] if isinstance(node, list) and 0 <= item < len(node) else None
            continue
        if isinstance(node, dict) and item not in node and item in (node.get("type"), node.get("name")):
            continue
        if "[" in str(item) or "," in str(item):
            continue
        out += ("." if out else "") + str(item)
        node = node.get(item) if isinstance(node, dict) else None
    return out


def pydantic_message(err: Any) -> str:
    """A plain message for one pydantic error (lower-case, no "Value error, " prefix)."""
    kind = err["type"]
    ctx = err.get("ctx") or {}
    if kind == "missing":
        return "required field is missing"
    if kind == "extra_forbidden":
        return "unknown field"
    if kind == "too_short" and isinstance(err.get("input"), list):
        return "must list at least one entry"
    if kind == "union_tag_invalid":
        expected = ctx.get("expected_tags", "")
        return f"unknown {ctx.get('discriminator', 'tag').strip(chr(39))} {ctx.get('tag')!r}; expected one of {expected}"
    if kind == "union_tag_not_found":
        return f"missing the field {ctx.get('discriminator', '')} that says which kind this is"
    msg = str(err["msg"])
    for prefix in ("Value error, ", "Assertion failed, "):
        if msg.startswith(prefix):
            msg = msg[len(prefix) :]
    return msg[:1].lower() + msg[1:]
