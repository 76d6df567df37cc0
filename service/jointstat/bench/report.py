"""Shared output for the benchmarks: one JSON object with ``--json``, else a readable two-column table."""

from __future__ import annotations

import json
import resource
import sys
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from jointstat.transport.stream import SessionResult


def peak_rss_mib() -> float:
    """Peak resident set size of this process so far, in MiB (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def session_outcome(role: str, result: SessionResult, start: float, end: float) -> dict[str, Any]:
    """The figures a session benchmark's side opens with: its role, whether its session completed (else why it
    was aborted) and when it started and ended (``time.monotonic``)."""
    abort = result.abort
    return {
        "role": role,
        "completed": result.completed,
        "abort": None if abort is None else f"{abort.reason.name}: {abort.message}",
        "start": start,
        "end": end,
    }


def emit(title: str, figures: dict[str, Any], as_json: bool) -> None:
    if as_json:
        json.dump(figures, sys.stdout, sort_keys=False)
        sys.stdout.write("\n")
        return
    width = max(len(k) for k in figures)
    print(title)
    for key, value in figures.items():
        shown = (
            f"{value:,.3f}" if isinstance(value, float) else f"{value:,}" if isinstance(value, int) else value
        )
        print(f"  {key:<{width}}  {shown}")
