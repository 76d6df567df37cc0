"""Histograms over public bin edges against numpy.histogram."""

from __future__ import annotations

from functools import cache

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.model import Party

from tests.test_stat_support import manifest, records, run_garbled, run_plain, table

EDGES = [-10, -2.5, 0, 7.25, 20]


@cache
def histogram_circuit(min_count: int = 0) -> CompiledStatistic:
    return compile_manifest(
        manifest(
            {
                "garbler": table(6, {"name": "x", "type": "fixed", "width": 9, "fraction_bits": 2}),
                "evaluator": table(5, {"name": "x", "type": "signed", "width": 6}),
            },
            {"name": "histogram", "column": "x", "edges": EDGES},
            {"garbler": ["counts"], "evaluator": ["counts", "count"]},
            disclosure={"min_count": min_count},
        )
    )


@settings(max_examples=40)
@given(st.lists(st.integers(-256, 255), max_size=6), st.lists(st.integers(-32, 31), max_size=5))
def test_counts_match_numpy_histogram(g: list[int], e: list[int]) -> None:
    got = run_plain(histogram_circuit(), records("g", x=g), records("e", x=e))[Party.EVALUATOR]
    union = np.array([v / 4 for v in g] + e, dtype=float)
    ref, _ = np.histogram(union, bins=EDGES)
    assert got["counts"] == list(ref)
    assert got["count"] == int(ref.sum())


def test_values_at_the_bin_edges() -> None:
    # numpy.histogram: half-open bins [a, b) except the last, which includes its right edge.
    g = [-40, -10, 0, 29, 80]  # −10, −2.5, 0, 7.25, 20 (scaled by 4)
    e = [-10, 20, 21, -11]
    got = run_plain(histogram_circuit(), records("g", x=g), records("e", x=e))[Party.EVALUATOR]
    ref, _ = np.histogram(np.array([v / 4 for v in g] + e, dtype=float), bins=EDGES)
    assert got["counts"] == list(ref) == [2, 1, 1, 3]
    assert got["count"] == 7  # 21 and −11 lie outside


def test_the_disclosure_rule_withholds_every_bin() -> None:
    got = run_plain(histogram_circuit(min_count=3), records("g", x=[0]), records("e", x=[1, 50]))
    assert got[Party.GARBLER] == {"withheld": True, "counts": None}


def test_a_garbled_run_gives_the_clear_result() -> None:
    g, e = records("g", x=[-3, 17, 40]), records("e", x=[5, -9])
    assert run_garbled(histogram_circuit(), g, e) == run_plain(histogram_circuit(), g, e)
