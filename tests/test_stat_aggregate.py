"""Count, sum, mean and variance over both parties' rows, against the statistics module and numpy; the same
answer on the plain backend and garbled in one process."""

from __future__ import annotations

import statistics
from fractions import Fraction
from functools import cache

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.model import Party

from tests.test_stat_support import (
    garbled_examples,
    manifest,
    records,
    run_garbled,
    run_garbled_raw,
    run_plain,
    run_plain_raw,
    table,
)

CAP_G, CAP_E = 5, 4
G_COL = {"name": "x", "type": "fixed", "width": 10, "fraction_bits": 2}  # signed, −128 … 127.75
E_COL = {"name": "y", "type": "unsigned", "width": 7}


@cache
def variance_circuit(
    sample: bool = False, min_count: int = 0, cap_g: int = CAP_G, cap_e: int = CAP_E
) -> CompiledStatistic:
    return compile_manifest(
        manifest(
            {"garbler": table(cap_g, G_COL), "evaluator": table(cap_e, E_COL)},
            {
                "name": "variance",
                "column": {"garbler": "x", "evaluator": "y"},
                "precision_bits": 5,
                "sample": sample,
            },
            {"garbler": ["mean"], "evaluator": ["count", "sum", "mean", "variance"]},
            disclosure={"min_count": min_count},
        )
    )


def truncate(value: Fraction, frac: int) -> int:
    """value · 2^frac rounded toward zero."""
    scaled = value * 2**frac
    return int(scaled) if scaled >= 0 else -int(-scaled)


def check_against_statistics(raw: dict[str, object], union: list[Fraction], sample: bool) -> None:
    """The evaluator's raw outputs against the statistics module on the exact union of both parties' values."""
    # Each output is released or withheld on its own: the count and the sum always, the mean when there is a
    # row, the variance when there are enough rows (two for a sample variance); a withheld value is zero.
    assert raw["withheld"] is False and raw["count"] == len(union)
    assert Fraction(raw["sum"], 4) == sum(union)  # type: ignore[arg-type]
    if not union:
        assert raw["mean:no_rows"] is True and raw["mean"] == 0
    else:
        assert raw["mean:no_rows"] is False
        assert raw["mean"] == truncate(statistics.mean(union), 2 + 5)  # statistics.mean
    rule = "variance:too_few_rows" if sample else "variance:no_rows"
    if len(union) < (2 if sample else 1):
        assert raw[rule] is True and raw["variance"] == 0  # gated to zero inside the program
        return
    assert raw[rule] is False
    var = statistics.variance(union) if sample else statistics.pvariance(union)  # statistics.(p)variance
    assert raw["variance"] == truncate(var, 4 + 5)


g_vals = st.lists(st.integers(-512, 511), max_size=CAP_G)  # scaled by 4
e_vals = st.lists(st.integers(0, 127), max_size=CAP_E)


@settings(max_examples=30)
@given(g_vals, e_vals, st.booleans())
def test_aggregates_match_the_statistics_module(g: list[int], e: list[int], sample: bool) -> None:
    c = variance_circuit(sample)
    union = [Fraction(v, 4) for v in g] + [Fraction(v) for v in e]
    raw = run_plain_raw(c, records("g", x=g), records("e", y=e))[Party.EVALUATOR]
    check_against_statistics(raw, union, sample)


@cache
def aggregate_circuit(name: str, sample: bool, cap_g: int, cap_e: int) -> CompiledStatistic:
    outputs = ["count", "sum", "mean", "variance"][: ["count", "sum", "mean", "variance"].index(name) + 1]
    statistic: dict[str, object] = {"name": name, "precision_bits": 5}
    if name != "count":
        statistic["column"] = {"garbler": "x", "evaluator": "y"}
    if sample:
        statistic["sample"] = True
    return compile_manifest(
        manifest(
            {"garbler": table(cap_g, G_COL), "evaluator": table(cap_e, E_COL)},
            statistic,
            {"garbler": outputs[-1:], "evaluator": outputs},
        )
    )


@settings(max_examples=garbled_examples())
@given(st.sampled_from(["count", "sum", "mean", "variance"]), st.integers(1, 7), st.integers(1, 6), st.data())
def test_plain_garbled_and_statistics_agree_for_every_aggregate_and_any_capacities(
    name: str, cap_g: int, cap_e: int, data: st.DataObject
) -> None:
    sample = name == "variance" and data.draw(st.booleans())
    g = data.draw(st.lists(st.integers(-512, 511), max_size=cap_g))
    e = data.draw(st.lists(st.integers(0, 127), max_size=cap_e))
    c = aggregate_circuit(name, sample, cap_g, cap_e)
    g_rec, e_rec = records("g", x=g), records("e", y=e)
    plain = run_plain_raw(c, g_rec, e_rec)
    assert run_garbled_raw(c, g_rec, e_rec) == plain
    raw = plain[Party.EVALUATOR]
    union = [Fraction(v, 4) for v in g] + [Fraction(v) for v in e]
    if name == "variance":
        check_against_statistics(raw, union, sample)
        return
    assert raw["withheld"] is False and raw["count"] == len(union)
    if name != "count":
        assert Fraction(raw["sum"], 4) == sum(union)  # Python's exact sum of fractions
    if name == "mean":
        assert raw["mean:no_rows"] is (not union)  # withheld on its own, the count and sum still released
        expected = truncate(statistics.mean(union), 2 + 5) if union else 0  # statistics.mean
        assert raw["mean"] == expected


def test_decoded_values_are_numbers_on_the_output_scale() -> None:
    g, e = records("g", x=[-512, 511]), records("e", y=[127, 0])
    got = run_plain(variance_circuit(), g, e)
    union = [-128, 127.75, 127, 0]
    assert got[Party.EVALUATOR] == {
        "withheld": False,
        "count": 4,
        "sum": sum(union),
        "mean": 31.6875,  # 126.75 / 4 = 31.6875 exactly
        "variance": 11204.16796875,  # numpy.var([-128, 127.75, 127, 0]), exact in binary
    }
    assert float(np.var(union)) == 11204.16796875 and float(np.mean(union)) == 31.6875  # numpy
    assert got[Party.GARBLER] == {"withheld": False, "mean": 31.6875}
    assert run_garbled(variance_circuit(), g, e) == got


def test_all_rows_padding_withholds_the_mean_and_variance_but_not_the_count_and_sum() -> None:
    got = run_plain(variance_circuit(), records("g", x=[]), records("e", y=[]))
    assert got[Party.EVALUATOR] == {
        "withheld": False,
        "withheld_by": {"mean": "no_rows", "variance": "no_rows"},
        "count": 0,
        "sum": 0.0,
        "mean": None,
        "variance": None,
    }
    assert got[Party.GARBLER] == {"withheld": True, "withheld_by": {"mean": "no_rows"}, "mean": None}


def test_the_disclosure_rule_says_it_withheld_every_output() -> None:
    got = run_plain(variance_circuit(min_count=3), records("g", x=[4]), records("e", y=[1]))
    assert got[Party.EVALUATOR]["withheld"] is True
    assert got[Party.EVALUATOR]["withheld_by"] == {
        name: "min_count" for name in ("count", "sum", "mean", "variance")
    }


def test_the_disclosure_rule_counts_contributing_rows() -> None:
    c = variance_circuit(min_count=3)
    assert run_plain(c, records("g", x=[4]), records("e", y=[1]))[Party.EVALUATOR]["withheld"] is True
    assert run_plain(c, records("g", x=[4]), records("e", y=[1, 2]))[Party.EVALUATOR]["count"] == 3
    g, e = records("g", x=[4]), records("e", y=[1])
    assert run_garbled(c, g, e) == run_plain(c, g, e)


def test_sum_and_count_of_extreme_values_do_not_overflow() -> None:
    c = compile_manifest(
        manifest(
            {
                "garbler": table(3, {"name": "v", "type": "signed", "width": 64}),
                "evaluator": table(3, {"name": "v", "type": "unsigned", "width": 64}),
            },
            {"name": "sum", "column": "v"},
            {"evaluator": ["count", "sum"]},
        )
    )
    g = [-(2**63)] * 3
    e = [2**64 - 1] * 3
    got = run_plain(c, records("g", v=g), records("e", v=e))[Party.EVALUATOR]
    assert got == {"withheld": False, "count": 6, "sum": sum(g) + sum(e)}  # Python's exact sum
    assert run_garbled(c, records("g", v=g), records("e", v=e))[Party.EVALUATOR] == got


def test_count_where_a_boolean_column_is_true() -> None:
    c = compile_manifest(
        manifest(
            {
                "garbler": table(4, {"name": "member", "type": "boolean"}),
                "evaluator": table(
                    4, {"name": "member", "type": "boolean"}, {"name": "n", "type": "unsigned", "width": 3}
                ),
            },
            {"name": "count", "where": "member"},
            {"garbler": ["count"]},
        )
    )
    g, e = records("g", member=[1, 0, 1]), records("e", member=[1, 1, 0, 1])
    got = run_plain(c, g, e)
    assert got[Party.GARBLER] == {"withheld": False, "count": 5}  # 2 + 3 true values
    assert run_garbled(c, g, e) == got
    assert [f.name for f in c.inputs[Party.EVALUATOR].fields] == [
        "valid",
        "member",
    ]  # unread columns are no input


def test_a_garbled_run_gives_the_clear_result() -> None:
    g, e = records("g", x=[-3, 17, 400]), records("e", y=[5, 99])
    assert run_garbled(variance_circuit(), g, e) == run_plain(variance_circuit(), g, e)
