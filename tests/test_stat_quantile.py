"""Quantiles of the union of both parties' values against numpy.percentile and the statistics module; the same
answer on the plain backend and garbled in one process."""

from __future__ import annotations

import math
import statistics
from fractions import Fraction
from functools import cache

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.library.quantile import percentile_name
from jointstat.circuit.model import Party

from tests.test_stat_support import (
    garbled_examples,
    manifest,
    records,
    run_garbled,
    run_plain,
    run_plain_raw,
    table,
)

CAP_G, CAP_E = 5, 4
PERCENTILES = [0, 25, 50, 90, 100]


@cache
def quantile_circuit(
    method: str, signed: bool = True, cap_g: int = CAP_G, cap_e: int = CAP_E
) -> CompiledStatistic:
    kind = {"type": "signed", "width": 10} if signed else {"type": "unsigned", "width": 10}
    return compile_manifest(
        manifest(
            {
                "garbler": table(cap_g, {"name": "x", **kind}),
                "evaluator": table(cap_e, {"name": "y", **kind}),
            },
            {
                "name": "quantile",
                "column": {"garbler": "x", "evaluator": "y"},
                "percentiles": PERCENTILES,
                "method": method,
                "precision_bits": 6,
            },
            {"evaluator": ["count", *[percentile_name(p) for p in PERCENTILES]], "garbler": ["p50"]},
        )
    )


values = st.integers(-512, 511)


def check_against_numpy(got: dict[str, object], g: list[int], e: list[int], method: str) -> None:
    """The evaluator's decoded outputs against numpy.percentile of the union with the same method."""
    union = np.array(g + e)
    if union.size == 0:  # every percentile withheld on its own; the count (0) is still released
        assert got["count"] == 0 and got["withheld"] is False
        assert got["withheld_by"] == {percentile_name(p): "no_rows" for p in PERCENTILES}
        return
    assert got["count"] == union.size
    for p in PERCENTILES:
        ref = float(np.percentile(union, p, method=method))  # numpy.percentile
        if method == "linear":  # rounded down to 6 fraction bits
            assert ref - 2**-6 < got[percentile_name(p)] <= ref + 1e-9, (p, union)  # type: ignore[operator]
        else:
            assert got[percentile_name(p)] == ref, (p, union)


methods = st.sampled_from(["lower", "higher", "midpoint", "linear"])


@settings(max_examples=25)
@given(methods, st.lists(values, min_size=0, max_size=CAP_G), st.lists(values, min_size=0, max_size=CAP_E))
def test_percentiles_match_numpy(method: str, g: list[int], e: list[int]) -> None:
    got = run_plain(quantile_circuit(method), records("g", x=g), records("e", y=e))[Party.EVALUATOR]
    check_against_numpy(got, g, e, method)


@settings(max_examples=garbled_examples())
@given(methods, st.integers(1, 6), st.integers(1, 5), st.data())
def test_plain_garbled_and_numpy_agree_for_any_capacities(
    method: str, cap_g: int, cap_e: int, data: st.DataObject
) -> None:
    g = data.draw(st.lists(values, max_size=cap_g))
    e = data.draw(st.lists(values, max_size=cap_e))
    c = quantile_circuit(method, cap_g=cap_g, cap_e=cap_e)
    g_rec, e_rec = records("g", x=g), records("e", y=e)
    plain = run_plain(c, g_rec, e_rec)
    assert run_garbled(c, g_rec, e_rec) == plain
    check_against_numpy(plain[Party.EVALUATOR], g, e, method)


@settings(max_examples=25)
@given(st.lists(values, min_size=1, max_size=CAP_G), st.lists(values, min_size=0, max_size=CAP_E))
def test_linear_percentiles_are_the_exact_value_rounded_down(g: list[int], e: list[int]) -> None:
    raw = run_plain_raw(quantile_circuit("linear"), records("g", x=g), records("e", y=e))[Party.EVALUATOR]
    xs = sorted(g + e)
    n = len(xs)
    for p in PERCENTILES:
        h = Fraction(n - 1) * p / 100
        j = math.floor(h)
        exact = xs[j] + (xs[min(j + 1, n - 1)] - xs[j]) * (h - j)
        assert raw[percentile_name(p)] == math.floor(exact * 64)  # exact rational value, fractions.Fraction


def test_the_median_is_the_statistics_module_median() -> None:
    g, e = [7, -3, 12, 12, 40], [1, 12, -100, 5]
    got = run_plain(quantile_circuit("midpoint"), records("g", x=g), records("e", y=e))
    assert got[Party.GARBLER]["p50"] == statistics.median(g + e)
    assert run_garbled(quantile_circuit("midpoint"), records("g", x=g), records("e", y=e)) == got
    got = run_plain(quantile_circuit("lower"), records("g", x=g[:4]), records("e", y=e))
    assert got[Party.GARBLER]["p50"] == statistics.median_low(g[:4] + e)
    got = run_plain(quantile_circuit("higher"), records("g", x=g[:4]), records("e", y=e))
    assert got[Party.GARBLER]["p50"] == statistics.median_high(g[:4] + e)


def test_ties_at_the_quantile_and_extreme_values() -> None:
    g, e = [-512, -512, 511, 511, 511], [511, -512, -512, 0]
    got = run_plain(quantile_circuit("linear"), records("g", x=g), records("e", y=e))[Party.EVALUATOR]
    assert got == {"withheld": False, "count": 9, "p0": -512, "p25": -512, "p50": 0, "p90": 511, "p100": 511}
    same = run_plain(quantile_circuit("midpoint"), records("g", x=[3] * 5), records("e", y=[3] * 4))
    assert all(v == 3 for k, v in same[Party.EVALUATOR].items() if k.startswith("p"))


def test_one_party_may_hold_every_value() -> None:
    got = run_plain(
        quantile_circuit("lower", signed=False), records("g", x=[]), records("e", y=[9, 1, 1000, 4])
    )
    assert got[Party.EVALUATOR]["p50"] == 4 and got[Party.EVALUATOR]["p100"] == 1000


def test_a_garbled_run_gives_the_clear_result() -> None:
    g, e = records("g", x=[5, -9, 300]), records("e", y=[2, 2, 17])
    c = quantile_circuit("linear")
    assert run_garbled(c, g, e) == run_plain(c, g, e)


def test_percentiles_with_a_non_power_of_two_denominator() -> None:
    c = compile_manifest(
        manifest(
            {
                "garbler": table(6, {"name": "x", "type": "fixed", "width": 12, "fraction_bits": 2}),
                "evaluator": table(5, {"name": "x", "type": "unsigned", "width": 8}),
            },
            {"name": "quantile", "column": "x", "percentiles": [33.3, 99.5], "method": "lower"},
            {"evaluator": ["p33_3", "p99_5"]},
        )
    )
    g = [-17, 3, 400, 401, 2047]  # scaled by 4
    e = [0, 255, 7]
    got = run_plain(c, records("g", x=g), records("e", x=e))[Party.EVALUATOR]
    assert run_garbled(c, records("g", x=g), records("e", x=e))[Party.EVALUATOR] == got
    union = np.array([v / 4 for v in g] + e, dtype=float)
    assert got["p33_3"] == float(np.percentile(union, 33.3, method="lower"))
    assert got["p99_5"] == float(np.percentile(union, 99.5, method="lower"))
