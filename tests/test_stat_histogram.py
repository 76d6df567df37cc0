"""Histograms over public bin edges against numpy.histogram; the same answer on the plain backend and garbled
in one process."""

from __future__ import annotations

from functools import cache

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.model import Party

from tests.test_stat_support import garbled_examples, manifest, records, run_garbled, run_plain, table

EDGES = [-10, -2.5, 0, 7.25, 20]


@cache
def histogram_circuit(
    min_count: int = 0, cap_g: int = 6, cap_e: int = 5, edges: tuple[float, ...] = tuple(EDGES)
) -> CompiledStatistic:
    return compile_manifest(
        manifest(
            {
                "garbler": table(cap_g, {"name": "x", "type": "fixed", "width": 9, "fraction_bits": 2}),
                "evaluator": table(cap_e, {"name": "x", "type": "signed", "width": 6}),
            },
            {"name": "histogram", "column": "x", "edges": list(edges)},
            {"garbler": ["counts"], "evaluator": ["counts", "count"]},
            disclosure={"min_count": min_count},
        )
    )


def numpy_histogram(g: list[int], e: list[int], edges: list[float]) -> list[int]:
    """numpy.histogram of the union (garbler values scaled by 4) over the edges."""
    ref, _ = np.histogram(np.array([v / 4 for v in g] + e, dtype=float), bins=edges)
    return [int(v) for v in ref]


@settings(max_examples=40)
@given(st.lists(st.integers(-256, 255), max_size=6), st.lists(st.integers(-32, 31), max_size=5))
def test_counts_match_numpy_histogram(g: list[int], e: list[int]) -> None:
    got = run_plain(histogram_circuit(), records("g", x=g), records("e", x=e))[Party.EVALUATOR]
    ref = numpy_histogram(g, e, EDGES)
    assert got["counts"] == ref
    assert got["count"] == sum(ref)


edge_lists = st.lists(st.integers(-160, 160), min_size=2, max_size=6, unique=True).map(
    lambda xs: tuple(v / 4 for v in sorted(xs))
)


@settings(max_examples=garbled_examples())
@given(st.integers(1, 7), st.integers(1, 6), edge_lists, st.data())
def test_plain_garbled_and_numpy_agree_for_any_capacities_and_edges(
    cap_g: int, cap_e: int, edges: tuple[float, ...], data: st.DataObject
) -> None:
    g = data.draw(st.lists(st.integers(-256, 255), max_size=cap_g))
    e = data.draw(st.lists(st.integers(-32, 31), max_size=cap_e))
    c = histogram_circuit(cap_g=cap_g, cap_e=cap_e, edges=edges)
    g_rec, e_rec = records("g", x=g), records("e", x=e)
    plain = run_plain(c, g_rec, e_rec)
    assert run_garbled(c, g_rec, e_rec) == plain
    ref = numpy_histogram(g, e, list(edges))
    assert plain[Party.EVALUATOR] == {"withheld": False, "counts": ref, "count": sum(ref)}
    assert plain[Party.GARBLER] == {"withheld": False, "counts": ref}


def test_values_at_the_bin_edges() -> None:
    # numpy.histogram: half-open bins [a, b) except the last, which includes its right edge.
    g = [-40, -10, 0, 29, 80]  # −10, −2.5, 0, 7.25, 20 (scaled by 4)
    e = [-10, 20, 21, -11]
    got = run_plain(histogram_circuit(), records("g", x=g), records("e", x=e))[Party.EVALUATOR]
    assert got["counts"] == numpy_histogram(g, e, EDGES) == [2, 1, 1, 3]
    assert got["count"] == 7  # 21 and −11 lie outside


def test_the_disclosure_rule_withholds_every_bin() -> None:
    c = histogram_circuit(min_count=3)
    got = run_plain(c, records("g", x=[0]), records("e", x=[1, 50]))
    assert got[Party.GARBLER] == {"withheld": True, "withheld_by": {"counts": "min_count"}, "counts": None}
    assert run_garbled(c, records("g", x=[0]), records("e", x=[1, 50])) == got


def test_a_garbled_run_gives_the_clear_result() -> None:
    g, e = records("g", x=[-3, 17, 40]), records("e", x=[5, -9])
    assert run_garbled(histogram_circuit(), g, e) == run_plain(histogram_circuit(), g, e)
