"""Comparison of two private values: which is larger, and the gap only when released; the same answer on the
plain backend and garbled in one process, against Python's comparison of the exact values (fractions)."""

from __future__ import annotations

from fractions import Fraction
from functools import cache

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.manifest import ManifestError
from jointstat.circuit.model import Party

from tests.test_stat_support import garbled_examples, manifest, records, run_garbled, run_plain, table


@cache
def compare_circuit(release_gap: bool) -> CompiledStatistic:
    return compile_manifest(
        manifest(
            {
                "garbler": table(1, {"name": "rate", "type": "fixed", "width": 12, "fraction_bits": 3}),
                "evaluator": table(1, {"name": "rate", "type": "unsigned", "width": 8}),
            },
            {"name": "compare", "column": "rate"},
            {"garbler": ["larger"], "evaluator": ["larger", "gap"] if release_gap else ["larger"]},
        )
    )


def larger(g: Fraction, e: Fraction) -> str:
    return "garbler" if g > e else "evaluator" if g < e else "equal"


@settings(max_examples=40)
@given(st.integers(-2048, 2047), st.integers(0, 255))
def test_the_larger_value_and_the_gap(g: int, e: int) -> None:
    got = run_plain(compare_circuit(True), records("g", rate=[g]), records("e", rate=[e]))
    gv = Fraction(g, 8)
    expect = larger(gv, Fraction(e))
    assert got[Party.GARBLER] == {"withheld": False, "larger": expect}
    assert got[Party.EVALUATOR] == {"withheld": False, "larger": expect, "gap": float(abs(gv - e))}


@cache
def typed_circuit(g_type: str, g_width: int, g_frac: int, e_type: str, e_width: int) -> CompiledStatistic:
    g_col = {"name": "v", "type": g_type, "width": g_width}
    if g_type == "fixed":
        g_col["fraction_bits"] = g_frac
    return compile_manifest(
        manifest(
            {
                "garbler": table(1, g_col),
                "evaluator": table(1, {"name": "v", "type": e_type, "width": e_width}),
            },
            {"name": "compare", "column": "v"},
            {"garbler": ["larger"], "evaluator": ["larger", "gap"]},
        )
    )


@settings(max_examples=garbled_examples())
@given(
    st.sampled_from(["signed", "unsigned", "fixed"]),
    st.integers(2, 20),
    st.integers(0, 4),
    st.sampled_from(["signed", "unsigned"]),
    st.integers(2, 20),
    st.data(),
)
def test_plain_garbled_and_exact_comparison_agree_for_any_column_types(
    g_type: str, g_width: int, g_frac: int, e_type: str, e_width: int, data: st.DataObject
) -> None:
    # One row each (the statistic's capacity); what varies is the columns' widths, types and scales.
    g_frac = min(g_frac, g_width - 1) if g_type == "fixed" else 0
    c = typed_circuit(g_type, g_width, g_frac, e_type, e_width)
    signed_g = g_type != "unsigned"
    g = data.draw(
        st.integers(-(2 ** (g_width - 1)), 2 ** (g_width - 1) - 1)
        if signed_g
        else st.integers(0, 2**g_width - 1)
    )
    e = data.draw(
        st.integers(-(2 ** (e_width - 1)), 2 ** (e_width - 1) - 1)
        if e_type == "signed"
        else st.integers(0, 2**e_width - 1)
    )
    present = data.draw(st.sampled_from([(True, True), (True, False), (False, True)]))
    g_rec = records("g", v=[g] if present[0] else [])
    e_rec = records("e", v=[e] if present[1] else [])
    plain = run_plain(c, g_rec, e_rec)
    assert run_garbled(c, g_rec, e_rec) == plain
    if not all(present):  # both values are needed
        assert plain[Party.EVALUATOR] == {
            "withheld": True,
            "withheld_by": {"larger": "missing_value", "gap": "missing_value"},
            "larger": None,
            "gap": None,
        }
        return
    gv, ev = Fraction(g, 2**g_frac), Fraction(e)
    assert plain[Party.EVALUATOR] == {"withheld": False, "larger": larger(gv, ev), "gap": float(abs(gv - ev))}
    assert plain[Party.GARBLER] == {"withheld": False, "larger": larger(gv, ev)}


def test_equal_values_and_a_missing_value() -> None:
    c = compare_circuit(False)
    assert run_plain(c, records("g", rate=[40]), records("e", rate=[5]))[Party.EVALUATOR]["larger"] == "equal"
    missing = run_plain(c, records("g", rate=[]), records("e", rate=[5]))
    assert missing[Party.EVALUATOR] == {
        "withheld": True,
        "withheld_by": {"larger": "missing_value"},
        "larger": None,
    }
    assert run_garbled(c, records("g", rate=[]), records("e", rate=[5])) == missing


def test_the_gap_is_not_computed_unless_released() -> None:
    hidden, released = compare_circuit(False), compare_circuit(True)
    assert hidden.size().and_gates < released.size().and_gates
    assert [f.name for f in hidden.outputs[Party.EVALUATOR]] == ["withheld", "larger"]


def test_compare_needs_one_row_per_party() -> None:
    with pytest.raises(ManifestError, match=r"tables.garbler.capacity: must be 1"):
        manifest(
            {
                "garbler": table(2, {"name": "r", "type": "unsigned", "width": 8}),
                "evaluator": table(1, {"name": "r", "type": "unsigned", "width": 8}),
            },
            {"name": "compare", "column": "r"},
            {"garbler": ["larger"]},
        )


def test_a_garbled_run_gives_the_clear_result() -> None:
    g, e = records("g", rate=[-77]), records("e", rate=[3])
    assert run_garbled(compare_circuit(True), g, e) == run_plain(compare_circuit(True), g, e)
