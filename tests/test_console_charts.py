"""The Results page's charts and the console's number and time formats.

Specification: a run's dot lies inside the plot box, further right for a later run and higher for a larger
value (the smallest value on the bottom edge, the largest on the top edge, all at the middle when they are
equal); a withheld run is a mark on the time axis that breaks the line; the SVG's text is escaped. The formats
write counts with thousands separators, sizes in binary units, durations from milliseconds to hours.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from hypothesis import given
from hypothesis import strategies as st
from jointstat.node.console import present
from jointstat.node.console.charts import (
    BOTTOM,
    HEIGHT,
    LEFT,
    RIGHT,
    TOP,
    WIDTH,
    ChartPoint,
    geometry,
    line_chart,
    time_labels,
)

T0 = datetime(2025, 3, 3, 2, 15, tzinfo=UTC)


def nightly(values: list[float | None]) -> list[ChartPoint]:
    return [ChartPoint(T0 + timedelta(days=i), v) for i, v in enumerate(values)]


def test_the_smallest_value_is_on_the_bottom_edge_the_largest_on_the_top_and_time_runs_left_to_right() -> (
    None
):
    g = geometry(nightly([40.0, 10.0, 25.0]))
    xs = [x for x, _, _ in g.dots]
    ys = {p.value: y for _, y, p in g.dots}
    assert xs == sorted(xs) and xs[0] == LEFT and xs[-1] == WIDTH - RIGHT
    assert ys[10.0] == HEIGHT - BOTTOM and ys[40.0] == TOP
    assert ys[25.0] == (HEIGHT - BOTTOM) - 0.5 * (HEIGHT - BOTTOM - TOP)  # linear: halfway value, halfway up
    assert g.lines == [[(x, y) for x, y, _ in g.dots]]


def test_runs_are_placed_by_time_so_a_missed_night_leaves_a_gap() -> None:
    points = [
        ChartPoint(T0, 1.0),
        ChartPoint(T0 + timedelta(days=1), 2.0),
        ChartPoint(T0 + timedelta(days=4), 3.0),
    ]
    (x0, _, _), (x1, _, _), (x2, _, _) = geometry(points).dots
    assert x1 - x0 == (x2 - x0) / 4


def test_equal_values_and_a_single_run_sit_in_the_middle() -> None:
    g = geometry(nightly([7.0, 7.0]))
    middle = (TOP + HEIGHT - BOTTOM) / 2
    assert [y for _, y, _ in g.dots] == [middle, middle]
    ((x, y, _),) = geometry(nightly([7.0])).dots
    assert (x, y) == ((LEFT + WIDTH - RIGHT) / 2, middle)


def test_a_withheld_run_is_a_mark_on_the_time_axis_that_breaks_the_line() -> None:
    g = geometry(nightly([3.0, 4.0, None, 6.0, 5.0]))
    assert len(g.dots) == 4 and len(g.marks) == 1
    assert len(g.lines) == 2 and [len(line) for line in g.lines] == [2, 2]
    svg = line_chart("matches", nightly([3.0, 4.0, None, 6.0, 5.0]))
    assert svg.count('class="dot"') == 4 and svg.count('class="withheld"') == 1
    assert svg.count("<polyline") == 2 and "withheld</title>" in svg
    assert 'aria-label="matches across 5 runs, from 3 to 6; 1 withheld"' in svg


def test_a_chart_with_only_withheld_runs_says_there_is_no_value_yet() -> None:
    svg = line_chart("sum", nightly([None, None]))
    assert "no released value yet" in svg and 'class="dot"' not in svg and svg.count('class="withheld"') == 2


def test_the_charts_text_is_escaped() -> None:
    svg = line_chart('<script>alert("x")</script>', nightly([1.0, 2.0]))
    assert "<script>" not in svg and "&lt;script&gt;" in svg


@given(
    st.lists(
        st.tuples(
            st.integers(min_value=0, max_value=10**8),
            st.one_of(st.none(), st.floats(min_value=-1e12, max_value=1e12, allow_nan=False)),
        ),
        min_size=1,
        max_size=40,
    )
)
def test_every_dot_and_mark_lies_inside_the_plot_box(runs: list[tuple[int, float | None]]) -> None:
    points = [ChartPoint(T0 + timedelta(seconds=s), v) for s, v in runs]
    g = geometry(points)
    for x, y, _ in g.dots:
        assert LEFT - 1e-6 <= x <= WIDTH - RIGHT + 1e-6 and TOP - 1e-6 <= y <= HEIGHT - BOTTOM + 1e-6
    for x, _ in g.marks:
        assert LEFT - 1e-6 <= x <= WIDTH - RIGHT + 1e-6
    assert len(g.dots) + len(g.marks) == len(points)
    released = [v for _, v in runs if v is not None]
    if released and max(released) > min(released):
        for _, y, p in g.dots:
            if p.value == max(released):
                assert abs(y - TOP) < 1e-9
            if p.value == min(released):
                assert abs(y - (HEIGHT - BOTTOM)) < 1e-9
        by_value = sorted(g.dots, key=lambda d: d[2].value)  # type: ignore[arg-type, return-value]
        heights = [y for _, y, _ in by_value]
        assert heights == sorted(heights, reverse=True)  # a larger value is never drawn lower


def test_the_time_axis_is_labelled_in_dates_or_in_times_as_the_runs_span() -> None:
    assert time_labels(T0, T0 + timedelta(days=6)) == ("2025-03-03", "2025-03-09")
    assert time_labels(T0, T0 + timedelta(hours=3)) == ("2025-03-03 02:15", "05:15")
    assert time_labels(T0, T0 + timedelta(seconds=40)) == ("2025-03-03 02:15:00", "02:15:40")
    assert time_labels(T0, T0) == ("2025-03-03 02:15", "")


def test_counts_sizes_durations_and_rates_are_written_for_people() -> None:
    assert present.count(5_796_267) == "5,796,267" and present.count(None) == "—"
    assert present.size(512) == "512 B" and present.size(183 * 1024 * 1024 + 524288) == "183.5 MiB"
    assert [present.duration(s) for s in (0.0421, 12.46, 200, 7500)] == [
        "0.042 s",
        "12.5 s",
        "3 min 20 s",
        "2 h 05 min",
    ]
    assert present.rate(1_961_650.4) == "1,961,650 AND gates/s" and present.rate(None) == "—"
    assert present.percent(1, 3) == "33%" and present.percent(5, None) == "—"
    assert present.phase_name("oblivious_transfer") == "oblivious transfer"


def test_output_values_are_written_by_their_kind() -> None:
    assert present.output(1234567) == "1,234,567"
    assert present.output(8.832) == "8.832" and present.output(2 / 3) == "0.666667"
    assert present.output(True) == "yes" and present.output(False) == "no"
    assert present.output([1, 2000, None]) == "1, 2,000, —"
    assert present.output(None) == "—" and present.output("above") == "above"


def test_times_are_written_in_utc_and_in_a_jobs_own_time_zone() -> None:
    # Paris is UTC+1 (CET) in early March and London UTC+1 (BST) in July: the EU summer-time rule, checked against
    # the time-zone database in tests/test_node_schedule.py.
    assert present.when(T0) == "2025-03-03 02:15:00 UTC"
    assert present.when_in(T0, "Europe/Paris") == "2025-03-03 03:15 CET"
    assert present.when_in(datetime(2025, 7, 1, 1, 0, tzinfo=UTC), "Europe/London") == "2025-07-01 02:00 BST"
