"""Keyed-join statistics (sort–merge–compare, Huang–Evans–Katz 2012) against the same figures computed in the clear;
the same answer on the plain backend and garbled in one process.

The clear reference is Python sets and dicts over the identifiers; values are compared exactly (sums) or against
the rounding the module documents (means rounded toward zero).
"""

from __future__ import annotations

import json
from functools import cache

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.library.blocks import and_per_compare_swap, bitonic_comparators, merge_size
from jointstat.circuit.model import Party
from jointstat.cli import main

from tests.test_stat_support import garbled_examples, key_records, manifest, run_garbled, run_plain, table

CAP_G, CAP_E = 6, 5


@cache
def join_circuit(min_count: int = 0, cap_g: int = CAP_G, cap_e: int = CAP_E) -> CompiledStatistic:
    return compile_manifest(
        manifest(
            {
                "garbler": table(cap_g, {"name": "member", "type": "key", "width": 32}),
                "evaluator": table(
                    cap_e,
                    {"name": "holder", "type": "key", "width": 32},
                    {"name": "spend", "type": "fixed", "width": 12, "fraction_bits": 1},
                ),
            },
            {
                "name": "keyed_join",
                "key": {"garbler": "member", "evaluator": "holder"},
                "value": {"party": "evaluator", "column": "spend"},
                "threshold": 10.5,
                "precision_bits": 4,
            },
            {"garbler": ["matches"], "evaluator": ["matches", "sum", "mean", "above"]},
            disclosure={"min_count": min_count},
        )
    )


def clear_join(g_keys: list[str], e_keys: list[str], spend: list[int]) -> dict[str, object]:
    """The join's figures from Python sets and sums (spend in halves: the column has one fraction bit)."""
    common = set(g_keys) & set(e_keys)
    vals = [v for k, v in zip(e_keys, spend, strict=True) if k in common]
    out: dict[str, object] = {
        "matches": len(common),
        "sum": sum(vals) / 2,
        "above": sum(v >= 21 for v in vals),
    }
    if vals:
        q = abs(sum(vals)) * 16 // len(vals)  # |mean| in units of 2^-(1+4), truncated
        out["mean"] = (q if sum(vals) >= 0 else -q) / 32
    return out


# The evaluator's result when no identifier matches: a mean over no rows withholds the mean only (rules per output).
EMPTY_JOIN = {
    "withheld": False,
    "withheld_by": {"mean": "no_rows"},
    "matches": 0,
    "sum": 0.0,
    "mean": None,
    "above": 0,
}

names = st.sampled_from([f"id-{i}@example.org" for i in range(12)])


@settings(max_examples=30)
@given(
    st.lists(names, max_size=CAP_G, unique=True),
    st.lists(names, max_size=CAP_E, unique=True),
    st.data(),
)
def test_join_matches_the_clear_computation(
    g_keys: list[str], e_keys: list[str], data: st.DataObject
) -> None:
    spend = data.draw(st.lists(st.integers(-2048, 2047), min_size=len(e_keys), max_size=len(e_keys)))
    got = run_plain(
        join_circuit(),
        key_records("g.csv", "member", g_keys),
        key_records("e.csv", "holder", e_keys, spend=spend),
    )
    ref = clear_join(g_keys, e_keys, spend)
    ev = got[Party.EVALUATOR]
    if ref["matches"] == 0:
        assert ev == EMPTY_JOIN
        return
    assert ev == {"withheld": False, **ref}
    assert got[Party.GARBLER] == {"withheld": False, "matches": ref["matches"]}


@settings(max_examples=garbled_examples())
@given(st.integers(1, 7), st.integers(1, 6), st.data())
def test_plain_garbled_and_the_clear_join_agree_for_any_capacities(
    cap_g: int, cap_e: int, data: st.DataObject
) -> None:
    g_keys = data.draw(st.lists(names, max_size=cap_g, unique=True))
    e_keys = data.draw(st.lists(names, max_size=cap_e, unique=True))
    spend = data.draw(st.lists(st.integers(-2048, 2047), min_size=len(e_keys), max_size=len(e_keys)))
    c = join_circuit(cap_g=cap_g, cap_e=cap_e)
    g_rec, e_rec = key_records("g.csv", "member", g_keys), key_records("e.csv", "holder", e_keys, spend=spend)
    plain = run_plain(c, g_rec, e_rec)
    assert run_garbled(c, g_rec, e_rec) == plain
    ref = clear_join(g_keys, e_keys, spend)
    if ref["matches"] == 0:
        assert plain[Party.EVALUATOR] == EMPTY_JOIN
        assert plain[Party.GARBLER] == {"withheld": False, "matches": 0}
    else:
        assert plain[Party.EVALUATOR] == {"withheld": False, **ref}
        assert plain[Party.GARBLER] == {"withheld": False, "matches": ref["matches"]}


@pytest.mark.parametrize(("cap_g", "cap_e"), [(1, 5), (3, 64), (1, 1)])
def test_a_small_table_joins_a_much_larger_one(cap_g: int, cap_e: int) -> None:
    # The mean divides a sum over up to cap_e rows by a count of at most cap_g matches.
    c = join_circuit(cap_g=cap_g, cap_e=cap_e)
    g_keys = [f"id-{i}@example.org" for i in range(cap_g)]
    e_keys = [f"id-{i}@example.org" for i in range(cap_e - 1, -1, -1)]
    spend = [(-1) ** i * (30 * i + 7) for i in range(cap_e)]  # within the 12-bit column
    g, e = key_records("g.csv", "member", g_keys), key_records("e.csv", "holder", e_keys, spend=spend)
    got = run_plain(c, g, e)
    assert got[Party.EVALUATOR] == {"withheld": False, **clear_join(g_keys, e_keys, spend)}
    assert run_garbled(c, g, e) == got


def test_no_keys_in_common_gives_zero_matches() -> None:
    c = compile_manifest(
        manifest(
            {
                "garbler": table(4, {"name": "k", "type": "key"}),
                "evaluator": table(4, {"name": "k", "type": "key"}),
            },
            {"name": "keyed_join", "key": "k"},
            {"evaluator": ["matches"]},
        )
    )
    got = run_plain(c, key_records("g", "k", ["a", "b", "c"]), key_records("e", "k", ["d", "e"]))
    assert got[Party.EVALUATOR] == {"withheld": False, "matches": 0}
    both_empty = run_plain(c, key_records("g", "k", []), key_records("e", "k", []))
    assert both_empty[Party.EVALUATOR] == {"withheld": False, "matches": 0}
    assert run_garbled(c, key_records("g", "k", []), key_records("e", "k", [])) == both_empty
    full = run_plain(c, key_records("g", "k", list("wxyz")), key_records("e", "k", list("zyxw")))
    assert full[Party.EVALUATOR]["matches"] == 4


def test_disclosure_rule_withholds_small_joins_inside_the_circuit() -> None:
    c = join_circuit(min_count=3)
    two = run_plain(
        c, key_records("g", "member", ["a", "b"]), key_records("e", "holder", ["a", "b"], spend=[4, 6])
    )
    assert two[Party.EVALUATOR]["withheld"] is True and two[Party.GARBLER] == {
        "withheld": True,
        "withheld_by": {"matches": "min_count"},
        "matches": None,
    }
    three = run_plain(
        c,
        key_records("g", "member", ["a", "b", "c"]),
        key_records("e", "holder", ["c", "b", "a"], spend=[4, 6, 30]),
    )
    assert three[Party.EVALUATOR] == {
        "withheld": False,
        "matches": 3,
        "sum": 20.0,  # (4 + 6 + 30) / 2
        "mean": 6.65625,  # 20 / 3 = 6.666…, rounded toward zero to 5 fraction bits
        "above": 1,  # 15.0 ≥ 10.5
    }
    assert (
        run_garbled(
            c,
            key_records("g", "member", ["a", "b", "c"]),
            key_records("e", "holder", ["c", "b", "a"], spend=[4, 6, 30]),
        )
        == three
    )


def test_a_garbled_run_gives_the_clear_result() -> None:
    g = key_records("g", "member", ["a", "b", "c", "q"])
    e = key_records("e", "holder", ["b", "z", "q"], spend=[-7, 100, 42])
    assert run_garbled(join_circuit(), g, e) == run_plain(join_circuit(), g, e)
    assert run_plain(join_circuit(), g, e)[Party.EVALUATOR]["sum"] == 17.5


def test_keyed_join_and_count_is_within_1_2_times_the_merge_network() -> None:
    # Target: for 2^16 rows per party the join sum's AND count is within 1.2x of (comparators of the bitonic merge
    # × AND gates per compare-and-swap); `jointstat bench join --rows 65536` measures that size. Beyond the network
    # the circuit costs Θ(M) (neighbour equality, masking, sums) against the network's Θ(M log M), so the ratio
    # falls as the tables grow; a ratio within bound at 2^12 rows bounds it at 2^16 too.
    rows = 1 << 12
    c = compile_manifest(
        manifest(
            {
                "garbler": table(rows, {"name": "k", "type": "key", "width": 32}),
                "evaluator": table(
                    rows,
                    {"name": "k", "type": "key", "width": 32},
                    {"name": "v", "type": "unsigned", "width": 32},
                ),
            },
            {"name": "keyed_join", "key": "k", "value": {"party": "evaluator", "column": "v"}},
            {"evaluator": ["sum"]},
            matching={"max_false_matches": 1.0},  # the circuit's size is measured here, not a job to run
        )
    )
    comparators = bitonic_comparators(merge_size(2 * rows))
    assert comparators == c.extra["comparators"] == (2 * rows // 2) * 13
    per_cas = and_per_compare_swap(33)  # 32 key bits and the invalid bit
    assert per_cas == 66  # a 33-bit comparator (33) and a 33-bit swap (33), Kolesnikov–Sadeghi–Schneider 2009
    ratio = c.size().and_gates / (comparators * per_cas)
    assert 1.0 < ratio <= 1.2, ratio


def test_the_merge_sorts_every_key_once() -> None:
    # The merged network output is sorted: check through the equality-based count on random large-ish tables.
    rng = np.random.default_rng(5)
    ids = [f"acct-{i}" for i in rng.permutation(200)[:60]]
    g, e = ids[:40], ids[25:60]
    c = compile_manifest(
        manifest(
            {
                "garbler": table(40, {"name": "k", "type": "key"}),
                "evaluator": table(40, {"name": "k", "type": "key"}),
            },
            {"name": "keyed_join", "key": "k"},
            {"garbler": ["matches"]},
        )
    )
    got = run_plain(c, key_records("g", "k", g), key_records("e", "k", e))
    assert got[Party.GARBLER]["matches"] == 15 == len(set(g) & set(e))  # Python sets
    assert run_garbled(c, key_records("g", "k", g), key_records("e", "k", e)) == got


def test_the_join_benchmark_reports_its_figures(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["bench", "join", "--rows", "64", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["rows"] == 64 and figures["comparators"] == bitonic_comparators(128)
    assert figures["expected_and_gates"] == figures["comparators"] * 66
    assert figures["ratio"] == round(figures["and_gates"] / figures["expected_and_gates"], 4)
    assert main(["bench", "join", "--rows", "0"]) == 2
