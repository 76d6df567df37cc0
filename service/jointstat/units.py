"""How byte counts are written for people: ``512 B``, ``1.5 KiB``, ``12.0 MiB``, ``3.2 GiB``.

Shared by the operator commands and the console. Binary prefixes as in IEC 80000-13:2008 (Ki = 2^10, Mi = 2^20,
Gi = 2^30).
"""

from __future__ import annotations


def human_bytes(n: int | None) -> str:
    """``n`` bytes with a binary prefix, one decimal above 1 KiB; ``-`` for None."""
    if n is None:
        return "-"
    value = float(n)
    for unit in ("B", "KiB", "MiB", "GiB"):
        if value < 1024 or unit == "GiB":
            return f"{value:.0f} {unit}" if unit == "B" else f"{value:.1f} {unit}"
        value /= 1024
    raise AssertionError("unreachable")


def plural(n: int, word: str) -> str:
    """``1 session``, ``2 sessions``: a count and a noun that takes an ``s`` in the plural."""
    return f"{n} {word}" if n == 1 else f"{n} {word}s"
