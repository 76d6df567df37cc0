"""How the console writes numbers, sizes, times and durations (Jinja filters; plain functions, no state)."""

from __future__ import annotations

import math
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

from jointstat.units import human_bytes

DASH = "—"


def when(t: datetime | None) -> str:
    """``2025-03-01 02:00:05 UTC``."""
    if t is None:
        return DASH
    return t.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S UTC")


def when_in(t: datetime | None, zone: str) -> str:
    """The time in an IANA zone, with the zone's abbreviation: ``2025-03-01 03:00 CET``."""
    if t is None:
        return DASH
    local = t.astimezone(ZoneInfo(zone))
    return f"{local:%Y-%m-%d %H:%M} {local.tzname() or zone}"


def count(n: int | None) -> str:
    return DASH if n is None else f"{n:,}"


def size(n: int | None) -> str:
    return DASH if n is None else human_bytes(n)


def duration(seconds: float | None) -> str:
    """``0.042 s``, ``12.5 s``, ``3 min 20 s``, ``2 h 05 min``."""
    if seconds is None:
        return DASH
    if seconds < 1:
        return f"{seconds:.3f} s"
    if seconds < 60:
        return f"{seconds:.1f} s"
    whole = round(seconds)
    if whole < 3600:
        return f"{whole // 60} min {whole % 60} s"
    return f"{whole // 3600} h {whole % 3600 // 60:02d} min"


def rate(per_s: float | None) -> str:
    return DASH if per_s is None else f"{per_s:,.0f} AND gates/s"


def number(value: float) -> str:
    """An integer with thousands separators; a float to 6 significant digits."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if not math.isfinite(value):
        return str(value)
    return f"{value:,.6g}" if abs(value) < 1e15 else f"{value:.6g}"


def output(value: object) -> str:
    """One output value as text: numbers as ``number``, flags yes/no, lists comma-separated, None a dash."""
    if value is None:
        return DASH
    if isinstance(value, bool | int | float):
        return number(value)
    if isinstance(value, list):
        return ", ".join(output(v) for v in value)
    return str(value)


def percent(done: int, total: int | None) -> str:
    if not total:
        return DASH
    return f"{100 * done / total:.0f}%"


def phase_name(name: str | None) -> str:
    """``oblivious_transfer`` → ``oblivious transfer``."""
    return DASH if not name else name.replace("_", " ")
