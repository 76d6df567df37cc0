"""A small line chart of one numeric output across a job's runs, drawn on the server as inline SVG.

Theory of operation
-------------------
``line_chart`` places each run at x proportional to its time between the first and the last run shown (all at
the middle when they share one time) and at y linear in its value between the smallest and the largest value
shown (all at the middle when they are equal); larger values are higher. Consecutive released values are joined
by a line; a withheld run breaks the line and is marked on the time axis instead of a value. Each dot and mark
carries a ``<title>`` (the run's time and value, or "withheld"), which browsers show on hover. The axis labels
are the smallest and largest value and the first and last time (dates when the runs span days, UTC). All text goes through ``markupsafe.escape``; the
SVG has no scripts, no links and no inline styles (the stylesheet colours it through class names), so it is
allowed by the console's Content-Security-Policy.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

from markupsafe import Markup, escape

from jointstat.node.console.present import number, when

WIDTH, HEIGHT = 420, 150
LEFT, RIGHT, TOP, BOTTOM = 64, 14, 12, 30


@dataclass(frozen=True)
class ChartPoint:
    when: datetime
    value: float | None  # None: the run's result was withheld


@dataclass(frozen=True)
class Geometry:
    """Where each point lands: ``dots`` for values, ``marks`` for withheld runs, ``lines`` the joined runs."""

    dots: list[tuple[float, float, ChartPoint]]
    marks: list[tuple[float, ChartPoint]]
    lines: list[list[tuple[float, float]]]
    low: float | None
    high: float | None


def _fraction(value: float, low: float, high: float) -> float:
    return 0.5 if high == low else (value - low) / (high - low)


def geometry(points: Sequence[ChartPoint], width: int = WIDTH, height: int = HEIGHT) -> Geometry:
    """The chart's coordinates (SVG user units; y grows downwards), as the module docstring describes."""
    left, right, top, bottom = LEFT, width - RIGHT, TOP, height - BOTTOM
    times = [p.when.timestamp() for p in points]
    values = [p.value for p in points if p.value is not None]
    low, high = (min(values), max(values)) if values else (None, None)
    t0, t1 = (min(times), max(times)) if times else (0.0, 0.0)
    dots: list[tuple[float, float, ChartPoint]] = []
    marks: list[tuple[float, ChartPoint]] = []
    lines: list[list[tuple[float, float]]] = []
    current: list[tuple[float, float]] = []
    for p, t in sorted(zip(points, times, strict=True), key=lambda pt: pt[1]):
        x = left + _fraction(t, t0, t1) * (right - left)
        if p.value is None:
            marks.append((x, p))
            if current:
                lines.append(current)
            current = []
            continue
        assert low is not None and high is not None
        y = bottom - _fraction(p.value, low, high) * (bottom - top)
        dots.append((x, y, p))
        current.append((x, y))
    if current:
        lines.append(current)
    return Geometry(dots, marks, [line for line in lines if len(line) > 1], low, high)


def time_labels(first: datetime, last: datetime) -> tuple[str, str]:
    """The time axis' two labels (UTC): dates when the runs span days; else the day and times, to the second
    when they span under two minutes; the second label is empty when there is one time."""
    a, b = first.astimezone(UTC), last.astimezone(UTC)
    if a == b:
        return f"{a:%Y-%m-%d %H:%M}", ""
    if b - a >= timedelta(days=1) or a.date() != b.date():
        return f"{a:%Y-%m-%d}", f"{b:%Y-%m-%d}"
    if b - a < timedelta(minutes=2):
        return f"{a:%Y-%m-%d %H:%M:%S}", f"{b:%H:%M:%S}"
    return f"{a:%Y-%m-%d %H:%M}", f"{b:%H:%M}"


def _n(v: float) -> str:
    return f"{v:.1f}"


def line_chart(name: str, points: Sequence[ChartPoint], width: int = WIDTH, height: int = HEIGHT) -> Markup:
    """The SVG of ``name`` across ``points`` (see the module docstring)."""
    g = geometry(points, width, height)
    left, right, top, bottom = LEFT, width - RIGHT, TOP, height - BOTTOM
    released = len(g.dots)
    summary = f"{name} across {len(points)} runs"
    if g.low is not None and g.high is not None:
        summary += f", from {number(g.low)} to {number(g.high)}"
    if g.marks:
        summary += f"; {len(g.marks)} withheld"
    out = [
        f'<svg class="chart" viewBox="0 0 {width} {height}" width="{width}" height="{height}" role="img" '
        f'aria-label="{escape(summary)}" xmlns="http://www.w3.org/2000/svg">',
        f"<title>{escape(summary)}</title>",
        f'<line class="axis" x1="{left}" y1="{bottom}" x2="{right}" y2="{bottom}"/>',
        f'<line class="axis" x1="{left}" y1="{top}" x2="{left}" y2="{bottom}"/>',
    ]
    if g.low is not None and g.high is not None:
        y_high = top + 4 if g.high != g.low else (top + bottom) / 2 + 4  # one value: level with its dots
        out.append(
            f'<text class="label" x="{left - 6}" y="{_n(y_high)}" text-anchor="end">{escape(number(g.high))}</text>'
        )
        if g.high != g.low:
            out.append(
                f'<text class="label" x="{left - 6}" y="{bottom}" text-anchor="end">{escape(number(g.low))}</text>'
            )
    if points:
        start, end = time_labels(min(p.when for p in points), max(p.when for p in points))
        out.append(
            f'<text class="label" x="{left}" y="{height - 8}" text-anchor="start">{escape(start)}</text>'
        )
        if end:
            out.append(
                f'<text class="label" x="{right}" y="{height - 8}" text-anchor="end">{escape(end)}</text>'
            )
    for line in g.lines:
        coords = " ".join(f"{_n(x)},{_n(y)}" for x, y in line)
        out.append(f'<polyline class="line" points="{coords}"/>')
    for x, y, p in g.dots:
        assert p.value is not None
        tip = f"{when(p.when)}: {number(p.value)}"
        out.append(
            f'<circle class="dot" cx="{_n(x)}" cy="{_n(y)}" r="3"><title>{escape(tip)}</title></circle>'
        )
    for x, p in g.marks:
        tip = f"{when(p.when)}: withheld"
        out.append(
            f'<rect class="withheld" x="{_n(x - 3)}" y="{bottom - 3}" width="6" height="6">'
            f"<title>{escape(tip)}</title></rect>"
        )
    if not released:
        out.append(
            f'<text class="label" x="{(left + right) / 2:.0f}" y="{(top + bottom) / 2:.0f}" '
            'text-anchor="middle">no released value yet</text>'
        )
    out.append("</svg>")
    return Markup("".join(out))
