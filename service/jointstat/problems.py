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


class WrittenFloat(float):
    """A YAML decimal number that remembers the text it was written as (``text``), for fields that take the
    decimal exactly (a privacy parameter, a threshold): as a binary float 0.1 is no longer one tenth."""

    text: str

    def __new__(cls, value: float, text: str) -> WrittenFloat:
        number = super().__new__(cls, value)
        number.text = text
        return number


class _TextKeepingLoader(_UniqueKeyLoader):
    pass


def _written_float(loader: yaml.SafeLoader, node: yaml.ScalarNode) -> float:
    value = loader.construct_yaml_float(node)
    text = str(node.value).replace("_", "")
    return WrittenFloat(value, text) if value == value and abs(value) != float("inf") else value


_TextKeepingLoader.add_constructor("tag:yaml.org,2002:float", _written_float)


def read_yaml(text: str, *, keep_number_text: bool = False) -> Any:
    """Parse YAML safely, refusing duplicate keys; raises ``ValueError`` with "not valid YAML: line L, column C: …".

    With ``keep_number_text`` every finite decimal number is a ``WrittenFloat`` carrying the text as written.
    """
    loader = _TextKeepingLoader if keep_number_text else _UniqueKeyLoader
    try:
        return yaml.load(text, Loader=loader)  # a SafeLoader subclass
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark is not None else ""
        problem = getattr(exc, "problem", None) or str(exc)
        raise ValueError(f"not valid YAML: {where}{problem}") from None


def field_path(loc: tuple[Any, ...], data: Any = None) -> str:
    """('jobs', 1, 'schedule', 'cron') → 'jobs[1].schedule.cron'.

    Union members' descriptions that pydantic puts in the location are dropped; with ``data`` (the validated input)
    so are discriminator tags (the value of a ``type``, ``name`` or ``compute`` field that chose the union member).
    """
    out = ""
    node = data
    for i, item in enumerate(loc):
        if data is not None and _union_tag(node, item, last=i == len(loc) - 1):
            continue
        if isinstance(item, int):
            out += f"[{item}]"
            node = node[item] if isinstance(node, list) and 0 <= item < len(node) else None
            continue
        tags = (node.get("type"), node.get("name"), node.get("compute")) if isinstance(node, dict) else ()
        if isinstance(node, dict) and item not in node and item in tags:
            continue
        if "[" in str(item) or "," in str(item):
            continue
        out += ("." if out else "") + str(item)
        node = node.get(item) if isinstance(node, dict) else None
    return out


def _union_tag(node: Any, item: Any, *, last: bool) -> bool:
    """Whether ``item`` of an error location is a union member's tag rather than a key or index of the data: a
    name that is not a key of the mapping it is read from (unless it is the last item: a missing field), or a name
    read from a list or a single value."""
    if isinstance(node, dict):
        return item not in node and not last
    return isinstance(item, str) and isinstance(node, list | str | int | float)


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
