"""Comparison of two private values: which is larger, and the gap only when released."""

from __future__ import annotations

from functools import cache

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.manifest import ManifestError
from jointstat.circuit.model import GateKind, Party

from tests.test_stat_support import manifest, records, run_garbled, run_plain, table


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


@settings(max_examples=40)
@given(st.integers(-2048, 2047), st.integers(0, 255))
def test_the_larger_value_and_the_gap(g: int, e: int) -> None:
    got = run_plain(compare_circuit(True), records("g", rate=[g]), records("e", rate=[e]))
    gv = g / 8
    expect = "garbler" if gv > e else "evaluator" if gv < e else "equal"
    assert got[Party.GARBLER] == {"withheld": False, "larger": expect}
    assert got[Party.EVALUATOR] == {"withheld": False, "larger": expect, "gap": abs(gv - e)}


def test_equal_values_and_a_missing_value() -> None:
    c = compare_circuit(False)
    assert run_plain(c, records("g", rate=[40]), records("e", rate=[5]))[Party.EVALUATOR]["larger"] == "equal"
    missing = run_plain(c, records("g", rate=[]), records("e", rate=[5]))
    assert missing[Party.EVALUATOR] == {"withheld": True, "larger": None}


def test_the_gap_is_not_computed_unless_released() -> None:
    hidden, released = compare_circuit(False), compare_circuit(True)
    assert hidden.circuit.count(GateKind.AND) < released.circuit.count(GateKind.AND)
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
