"""The house's layering (DEVELOPERS.md, "Layout"): imports point downward only, and the sans-I/O core stays so.

Specification, read from the source of ``service/jointstat`` with ``ast``: the core rooms (primitives, garble, ot,
protocol, circuit, and the shared modules below them) and audit import none of transport, node, harness, bench,
commands or the CLI; only ``cli`` and ``__main__`` import ``jointstat.cli``, and no room but the CLI imports
``jointstat.commands``; the generated wire code imports nothing of jointstat. The sans-I/O core (primitives, garble, ot, protocol, machine) imports no module that reaches a socket,
a clock, a thread, a process or a file, and calls no ``open``. No hand-written module is longer than 1,000 lines.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "service" / "jointstat"
CORE = {
    "primitives",
    "garble",
    "ot",
    "protocol",
    "circuit",
    "wire",
    "machine",
    "canonical",
    "exact",
    "problems",
}
CORE |= {"statements", "units"}
UPPER = {"transport", "node", "harness", "bench", "commands", "cli", "__main__"}
SANS_IO = {"primitives", "garble", "ot", "protocol", "machine"}
# Modules that reach the outside world or its time (a clock, a thread, a socket, a process, the file system).
WORLD = {
    "socket",
    "time",
    "threading",
    "asyncio",
    "concurrent",
    "selectors",
    "select",
    "subprocess",
    "multiprocessing",
}
WORLD |= {"queue", "signal", "datetime", "pathlib", "shutil", "tempfile", "grpc"}


def modules() -> list[tuple[str, Path]]:
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE)
        room = rel.parts[0] if len(rel.parts) > 1 else rel.stem
        found.append((room, path))
    return found


def imported(path: Path) -> set[str]:
    """Every module name an ``import`` or ``from … import`` in the file names (any depth, functions included)."""
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names |= {alias.name for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module is not None and node.level == 0:
            names.add(node.module)
            names |= {f"{node.module}.{alias.name}" for alias in node.names}
    return names


def rooms_of(names: set[str]) -> set[str]:
    return {name.split(".")[1] for name in names if name.startswith("jointstat.") and name.count(".") >= 1}


def test_the_checks_see_every_room() -> None:
    rooms = {room for room, _ in modules()}
    assert {"primitives", "garble", "ot", "protocol", "circuit", "transport", "node", "commands"} <= rooms
    assert {"audit", "bench", "harness", "wire", "machine", "cli"} <= rooms


@pytest.mark.parametrize(("room", "path"), modules(), ids=[str(p.relative_to(PACKAGE)) for _, p in modules()])
def test_imports_point_downward(room: str, path: Path) -> None:
    used = rooms_of(imported(path))
    if room in CORE:
        assert not used & UPPER, f"{room} imports {sorted(used & UPPER)}"
    if room == "audit":
        assert not used & UPPER, f"audit imports {sorted(used & UPPER)}"
    if room not in ("cli", "__main__"):
        assert "cli" not in used, "only the CLI's entry points import jointstat.cli"
        assert "commands" not in used or room == "commands", "only the CLI imports the command adapters"
    if room == "wire":
        assert not used, "the generated wire code imports nothing of jointstat"


@pytest.mark.parametrize(
    ("room", "path"),
    [(r, p) for r, p in modules() if r in SANS_IO],
    ids=[str(p.relative_to(PACKAGE)) for r, p in modules() if r in SANS_IO],
)
def test_the_sans_io_core_touches_no_socket_clock_thread_or_file(room: str, path: Path) -> None:
    reached = {name.split(".")[0] for name in imported(path)} & WORLD
    assert not reached, f"{path.name} imports {sorted(reached)}"
    calls = [
        node
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8")))
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "open"
    ]
    assert not calls, f"{path.name} opens a file"


def test_no_hand_written_module_is_longer_than_a_thousand_lines() -> None:
    long = {
        str(path.relative_to(PACKAGE)): n
        for _, path in modules()
        if "_pb2" not in path.name and (n := path.read_text(encoding="utf-8").count("\n")) > 1000
    }
    assert not long
