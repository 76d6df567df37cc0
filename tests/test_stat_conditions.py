"""Comparison operators (issue 14): `where` filters, keyed-join thresholds and `compare` with >, >=, <, <=, ==, !=,
exactly on the values a column can hold (fixed-point rule: the decimal written is compared exactly with the column's
multiples of 2^-F), boundary values at the threshold for every operator, negative and fixed-point values; and
`compare` of aggregates (count, sum, mean, quantile) with its difference, gap and ratio. References: Python's
``operator`` module on exact ``fractions.Fraction`` values, ``statistics`` and numpy, named beside each check."""

from __future__ import annotations

import operator
import statistics
from collections.abc import Callable
from fractions import Fraction
from functools import cache
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import OPERATOR_WORDS, OPERATORS

from tests.test_stat_support import (
    garbled_examples,
    key_records,
    manifest,
    records,
    run_garbled,
    run_plain,
    table,
)

# Python's operator module: the reference meaning of each operator.
PYTHON: dict[str, Callable[[Any, Any], bool]] = {
    ">": operator.gt,
    ">=": operator.ge,
    "<": operator.lt,
    "<=": operator.le,
    "==": operator.eq,
    "!=": operator.ne,
}
FIXED = {"name": "x", "type": "fixed", "width": 10, "fraction_bits": 2}  # signed, −128 … 127.75 in quarters
CAP = 6


@cache
def count_where(op: str, value: str) -> CompiledStatistic:
    return compile_manifest(
        manifest(
            {"garbler": table(CAP, FIXED), "evaluator": table(CAP, FIXED)},
            {"name": "count", "where": {"column": "x", "op": op, "value": value}},
            {"garbler": ["count"]},
        )
    )


def quarters(values: list[int]) -> list[Fraction]:
    return [Fraction(v, 4) for v in values]


THRESHOLDS = ["2.5", "-2.5", "0", "2.3", "-0.1", "127.75", "-128", "200", "-200"]


@pytest.mark.parametrize("op", OPERATORS)
@pytest.mark.parametrize("value", ["2.5", "-2.5", "2.3"])
def test_every_operator_at_its_boundary_counts_as_python_compares_exact_fractions(
    op: str, value: str
) -> None:
    c = (Fraction(value) * 4).__floor__()
    # the threshold itself (when it is on the quarter grid), one step below and one above, and negatives
    g = [c - 1, c, c + 1, -c]
    e = [c, c + 2, 0]
    union = quarters(g + e)
    expected = sum(PYTHON[op](v, Fraction(value)) for v in union)  # operator module on exact fractions
    compiled = count_where(op, value)
    got = run_plain(compiled, records("g", x=g), records("e", x=e))
    assert got[Party.GARBLER] == {"withheld": False, "count": expected}
    assert run_garbled(compiled, records("g", x=g), records("e", x=e)) == got


@settings(max_examples=40)
@given(
    st.sampled_from(OPERATORS),
    st.sampled_from(THRESHOLDS),
    st.lists(st.integers(-512, 511), max_size=CAP),
    st.lists(st.integers(-512, 511), max_size=CAP),
)
def test_where_filters_agree_with_exact_fractions_for_any_values(
    op: str, value: str, g: list[int], e: list[int]
) -> None:
    expected = sum(PYTHON[op](v, Fraction(value)) for v in quarters(g + e))  # operator module on fractions
    got = run_plain(count_where(op, value), records("g", x=g), records("e", x=e))[Party.GARBLER]
    assert got == {"withheld": False, "count": expected}


def test_a_value_between_the_columns_steps_is_never_equal_and_splits_the_order() -> None:
    # 2.3 lies between the quarters 2.25 and 2.5: == never holds, != always; > and >= agree (both from 2.5 on).
    g = [9, 10]  # 2.25, 2.5
    assert (
        run_plain(count_where("==", "2.3"), records("g", x=g), records("e", x=[]))[Party.GARBLER]["count"]
        == 0
    )
    assert (
        run_plain(count_where("!=", "2.3"), records("g", x=g), records("e", x=[]))[Party.GARBLER]["count"]
        == 2
    )
    for op in (">", ">="):
        assert (
            run_plain(count_where(op, "2.3"), records("g", x=g), records("e", x=[]))[Party.GARBLER]["count"]
            == 1
        )


@settings(max_examples=garbled_examples())
@given(
    st.sampled_from(OPERATORS), st.sampled_from(THRESHOLDS), st.lists(st.integers(-512, 511), max_size=CAP)
)
def test_garbled_where_filters_equal_the_plain_ones(op: str, value: str, g: list[int]) -> None:
    c = count_where(op, value)
    assert run_garbled(c, records("g", x=g), records("e", x=[1])) == run_plain(
        c, records("g", x=g), records("e", x=[1])
    )


@pytest.mark.parametrize(("op", "value"), [("==", True), ("==", False), ("!=", True), ("!=", False)])
def test_boolean_columns_compare_with_true_and_false(op: str, value: bool) -> None:
    c = compile_manifest(
        manifest(
            {side: table(4, {"name": "b", "type": "boolean"}) for side in ("garbler", "evaluator")},
            {"name": "count", "where": [{"column": "b", "op": op, "value": value}]},
            {"evaluator": ["count"]},
        )
    )
    g, e = [1, 0, 1], [0, 0]
    expected = sum(PYTHON[op](bool(v), value) for v in g + e)  # operator module
    assert run_plain(c, records("g", b=g), records("e", b=e))[Party.EVALUATOR]["count"] == expected


def test_a_list_of_conditions_must_all_hold() -> None:
    c = compile_manifest(
        manifest(
            {
                side: table(4, FIXED, {"name": "member", "type": "boolean"})
                for side in ("garbler", "evaluator")
            },
            {
                "name": "sum",
                "column": "x",
                "where": [
                    {"column": "x", "op": ">=", "value": -1},
                    {"column": "x", "op": "<", "value": "10.5"},
                    {"column": "member", "op": "==", "value": True},
                ],
            },
            {"evaluator": ["count", "sum"]},
        )
    )
    g, gm = [-8, -4, 0, 42], [1, 1, 1, 1]  # −2, −1, 0, 10.5
    e, em = [41, 20, -3], [1, 0, 1]  # 10.25, 5, −0.75
    rows = list(zip(quarters(g + e), gm + em, strict=True))
    kept = [v for v, m in rows if v >= -1 and v < Fraction(21, 2) and m]  # plain Python on fractions
    got = run_plain(c, records("g", x=g, member=gm), records("e", x=e, member=em))[Party.EVALUATOR]
    assert got == {"withheld": False, "count": len(kept), "sum": float(sum(kept))}


# -- keyed-join thresholds ---------------------------------------------------------------------------------------


@cache
def join_threshold(op: str) -> CompiledStatistic:
    ident = {"name": "id", "type": "identifier", "width": 32}
    return compile_manifest(
        manifest(
            {
                "garbler": table(5, ident),
                "evaluator": table(5, ident, {"name": "v", "type": "fixed", "width": 12, "fraction_bits": 1}),
            },
            {
                "name": "keyed_join",
                "key": "id",
                "value": {"party": "evaluator", "column": "v"},
                "threshold": {"op": op, "value": "-10.5"},
            },
            {"evaluator": ["matches", OPERATOR_WORDS[op]]},
        )
    )


@pytest.mark.parametrize("op", OPERATORS)
def test_a_join_threshold_counts_matches_by_its_operator_and_names_its_output_after_it(op: str) -> None:
    keys = ["a", "b", "c", "d", "e"]
    halves = [-22, -21, -20, 21, 0]  # −11, −10.5 (the threshold), −10, 10.5, 0
    shared = keys[:4]  # "e" is not matched
    got = run_plain(
        join_threshold(op), key_records("g", "id", shared), key_records("e", "id", keys, v=halves)
    )
    expected = sum(PYTHON[op](Fraction(h, 2), Fraction(-21, 2)) for h in halves[:4])  # operator on fractions
    assert got[Party.EVALUATOR] == {"withheld": False, "matches": 4, OPERATOR_WORDS[op]: expected}


# -- compare: an operator between the two sides, and aggregates ----------------------------------------------------


@pytest.mark.parametrize("op", OPERATORS)
@pytest.mark.parametrize(("g", "e"), [(-6, -6), (-7, -6), (-5, -6), (40, 39)])
def test_compare_of_single_values_gives_the_operators_flag_at_the_boundary(op: str, g: int, e: int) -> None:
    col = {"name": "v", "type": "fixed", "width": 8, "fraction_bits": 1}
    c = compile_manifest(
        manifest(
            {side: table(1, col) for side in ("garbler", "evaluator")},
            {"name": "compare", "column": "v", "op": op},
            {"evaluator": ["larger", OPERATOR_WORDS[op]]},
        )
    )
    got = run_plain(c, records("g", v=[g]), records("e", v=[e]))[Party.EVALUATOR]
    assert got[OPERATOR_WORDS[op]] is PYTHON[op](Fraction(g, 2), Fraction(e, 2))  # operator module
    assert run_garbled(c, records("g", v=[g]), records("e", v=[e])) == run_plain(
        c, records("g", v=[g]), records("e", v=[e])
    )


AGGREGATES = ("count", "sum", "mean", "quantile")
CAP_G, CAP_E = 4, 3


@cache
def compare_aggregate(aggregate: str) -> CompiledStatistic:
    params: dict[str, Any] = {"name": "compare", "aggregate": aggregate, "op": ">=", "precision_bits": 8}
    if aggregate != "count":
        params["column"] = "x"
    if aggregate == "quantile":
        params |= {"percentile": 50, "method": "lower"}
    return compile_manifest(
        manifest(
            {"garbler": table(CAP_G, FIXED), "evaluator": table(CAP_E, FIXED)},
            params,
            {"evaluator": ["larger", "gap", "difference", "ratio", "at_least"], "garbler": ["larger"]},
        )
    )


def side_value(aggregate: str, values: list[Fraction]) -> Fraction | None:
    """One side's aggregate in exact arithmetic (None when it has no value: a mean or median of no rows)."""
    if aggregate == "count":
        return Fraction(len(values))
    if aggregate == "sum":
        return sum(values, Fraction(0))
    if not values:
        return None
    if aggregate == "mean":
        return statistics.mean(values)  # statistics.mean, exact on fractions
    return Fraction(sorted(values)[(len(values) - 1) // 2])  # numpy.percentile(…, 50, method="lower"), below


def toward_zero(value: Fraction, frac: int) -> float:
    scaled = value * 2**frac
    return (int(scaled) if scaled >= 0 else -int(-scaled)) / 2**frac


@settings(max_examples=40)
@given(
    st.sampled_from(AGGREGATES),
    st.lists(st.integers(-512, 511), max_size=CAP_G),
    st.lists(st.integers(-512, 511), max_size=CAP_E),
)
def test_compare_of_aggregates_matches_exact_arithmetic(aggregate: str, g: list[int], e: list[int]) -> None:
    got = run_plain(compare_aggregate(aggregate), records("g", x=g), records("e", x=e))[Party.EVALUATOR]
    a, b = side_value(aggregate, quarters(g)), side_value(aggregate, quarters(e))
    if aggregate == "quantile" and g:
        assert a == Fraction(float(np.percentile([v / 4 for v in g], 50, method="lower")))  # numpy.percentile
    if a is None or b is None:  # a mean or median of no rows: every output withheld, and why
        assert got["withheld"] is True and set(got["withheld_by"].values()) == {"no_rows"}
        return
    assert got["larger"] == ("garbler" if a > b else "evaluator" if b > a else "equal")
    assert got["at_least"] is (a >= b)  # operator module semantics on exact fractions
    frac = 0 if aggregate == "count" else 2
    if aggregate == "mean":  # the difference of two means is rounded toward zero to 2^-(2 + 8)
        assert got["difference"] == toward_zero(a - b, frac + 8)
        assert got["gap"] == toward_zero(abs(a - b), frac + 8)
    else:  # exact
        assert got["difference"] == float(a - b) and got["gap"] == float(abs(a - b))
    if b == 0:
        assert got["ratio"] is None and got["withheld_by"] == {"ratio": "zero_divisor"}
    else:
        assert got["ratio"] == toward_zero(a / b, 8)  # rounded toward zero to 2^-8


@settings(max_examples=garbled_examples())
@given(
    st.sampled_from(AGGREGATES),
    st.lists(st.integers(-512, 511), max_size=CAP_G),
    st.lists(st.integers(-512, 511), max_size=CAP_E),
)
def test_garbled_compare_of_aggregates_equals_the_plain_one(
    aggregate: str, g: list[int], e: list[int]
) -> None:
    c = compare_aggregate(aggregate)
    assert run_garbled(c, records("g", x=g), records("e", x=e)) == run_plain(
        c, records("g", x=g), records("e", x=e)
    )


def test_compare_of_counts_with_a_filter_counts_each_sides_matching_rows() -> None:
    c = compile_manifest(
        manifest(
            {"garbler": table(CAP_G, FIXED), "evaluator": table(CAP_E, FIXED)},
            {"name": "compare", "aggregate": "count", "where": {"column": "x", "op": "<", "value": 0}},
            {"evaluator": ["larger", "difference", "ratio"]},
        )
    )
    got = run_plain(c, records("g", x=[-1, -2, 3]), records("e", x=[-4, 0, 0]))[Party.EVALUATOR]
    assert got == {"withheld": False, "larger": "garbler", "difference": 1, "ratio": 2.0}  # 2 vs 1 negatives
