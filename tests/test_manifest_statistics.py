"""Several named statistics in one manifest (issue 14): one program, one session, one oblivious-transfer phase,
outputs addressed ``<statistic>.<output>``, each statistic's release rule on its own, and the same figures as the
single-statistic jobs it replaces with no more AND gates; checked against numpy, ``statistics`` and Python sets on
the invented ``configs/dairy-night`` data; bad manifests refused with their field paths."""

from __future__ import annotations

import copy
import csv
import json
import statistics
from collections import defaultdict
from decimal import ROUND_HALF_EVEN, Decimal
from fractions import Fraction
from functools import cache
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.inputs import Records, encode_inputs, read_csv
from jointstat.circuit.manifest import ManifestError, load_manifest, parse_manifest
from jointstat.circuit.model import Party
from jointstat.circuit.plan import padded_ots
from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
from jointstat.protocol import frames as fr
from jointstat.protocol.pipe import run_in_memory

from tests.test_stat_support import SECRET, manifest, records, run_garbled, run_plain, table

ROOT = Path(__file__).resolve().parents[1]
DAIRY = ROOT / "configs" / "dairy-night"
ENTRY_ONLY = ("name", "compute", "outputs", "disclosure")


@cache
def dairy() -> CompiledStatistic:
    return compile_manifest(load_manifest(DAIRY / "manifest.yaml"))


def dairy_records() -> dict[Party, Records]:
    m = dairy().manifest
    return {p: read_csv(DAIRY / f"{p.role_name}.csv", m.table(p), key_secret=SECRET) for p in Party}


def csv_rows(party: str) -> list[dict[str, str]]:
    with (DAIRY / f"{party}.csv").open(newline="") as f:
        return list(csv.DictReader(f))


def halves(text: str) -> Fraction:
    """A litres value as the column stores it: rounded to the nearest half, a tie to even (``rounding: nearest``),
    with the decimal module's ROUND_HALF_EVEN (General Decimal Arithmetic specification)."""
    return Fraction(int((Decimal(text) * 2).quantize(Decimal(1), rounding=ROUND_HALF_EVEN)), 2)


def truncate(value: Fraction, frac: int) -> float:
    scaled = value * 2**frac
    whole = int(scaled) if scaled >= 0 else -int(-scaled)
    return whole / 2**frac


class Recorder:
    """An ``intercept`` for ``run_in_memory`` recording every frame's kind and payload bytes by destination."""

    def __init__(self) -> None:
        self.kinds: list[tuple[Party, str]] = []
        self.payload_bytes: dict[tuple[Party, str], int] = defaultdict(int)

    def __call__(self, to: Party, data: bytes) -> list[bytes]:
        kind, frame = fr.decode(data)
        self.kinds.append((to, kind))
        if kind in fr.PAYLOAD_FIELD:
            self.payload_bytes[(to, kind)] += len(fr.payload_of(kind, frame))
        return [data]


def run_session(compiled: CompiledStatistic, recs: dict[Party, Records]) -> tuple[dict[Party, Any], Recorder]:
    """Both parties' sans-I/O sessions through the in-memory pipe: each side's decoded result and the frames."""
    bits = {p: encode_inputs(compiled, p, recs[p]) for p in Party}
    digest = bytes.fromhex(compiled.digest)
    g_key, e_key = Ed25519PrivateKey.generate(), Ed25519PrivateKey.generate()
    sid = b"dairy-night-2031-03-02"
    program = compiled.as_program()
    garbler = GarblerSession(
        session_id=sid,
        program=program,
        manifest_digest=digest,
        inputs=bits[Party.GARBLER],
        sign=signer(g_key),
        verify=verifier(e_key.public_key()),
    )
    evaluator = EvaluatorSession(
        session_id=sid,
        program=program,
        manifest_digest=digest,
        inputs=bits[Party.EVALUATOR],
        sign=signer(e_key),
        verify=verifier(g_key.public_key()),
    )
    seen = Recorder()
    run_in_memory(garbler, evaluator, intercept=seen)
    assert garbler.done and evaluator.done
    return {
        Party.GARBLER: compiled.decode(Party.GARBLER, garbler.outputs),
        Party.EVALUATOR: compiled.decode(Party.EVALUATOR, evaluator.outputs),
    }, seen


def expected_dairy() -> dict[str, Any]:
    """The night's figures in the clear, from the CSV files (references named beside each)."""
    g, e = csv_rows("garbler"), csv_rows("evaluator")
    litres = [halves(r["litres"]) for r in g + e]
    shared = {r["farm"].lower() for r in g} & {r["farm"].lower() for r in e}  # Python sets, fold_case
    positive = [v for v in litres if v > 0]  # where: {column: litres, op: ">", value: 0}
    sums = [sum(halves(r["litres"]) for r in rows) for rows in (g, e)]
    counts, _ = np.histogram([float(v) for v in litres], bins=[0, 1000, 2500, 5000, 10000])  # numpy.histogram
    return {
        "shared_farms.matches": len(shared),
        "delivery.count": len(positive),
        "delivery.sum": float(sum(positive)),
        "delivery.mean": truncate(statistics.mean(positive), 1 + 8),  # statistics.mean, toward zero
        "median.p50": float(np.percentile([float(v) for v in litres], 50, method="midpoint")),  # numpy
        "organic_farms.count": sum(r["organic"] == "yes" for r in g + e),
        "bands.counts": [int(c) for c in counts],
        "bigger_collector.larger": "garbler"
        if sums[0] > sums[1]
        else "evaluator"
        if sums[1] > sums[0]
        else "equal",
        "bigger_collector.difference": float(sums[0] - sums[1]),
        "bigger_collector.more_than": sums[0] > sums[1],
    }


def test_a_manifest_with_several_statistics_runs_in_one_session_with_one_oblivious_transfer_phase() -> None:
    compiled = dairy()
    results, seen = run_session(compiled, dairy_records())
    expected = expected_dairy()
    for party in Party:
        got = results[party]
        names = [part.use.address(n) for part in compiled.parts for n in part.received(party)]
        assert list(got) == ["withheld", *names]  # addressed <statistic>.<output>, in manifest order
        assert got["withheld"] is False
        assert {k: got[k] for k in names} == {k: expected[k] for k in names}
    # One OT phase: every OT frame comes before the first garbled table, and the evaluator's input bits of all
    # six statistics are transferred once (16 bytes per OT, batches padded to 128; the plan's figure).
    kinds = [kind for _, kind in seen.kinds]
    ot_positions = [i for i, k in enumerate(kinds) if k in (fr.BASE_OT, fr.OT_EXTENSION)]
    assert ot_positions and max(ot_positions) < kinds.index(fr.GARBLED_TABLES)
    assert ot_positions == list(range(ot_positions[0], ot_positions[-1] + 1))  # one contiguous phase
    n_ot = compiled.n_inputs(Party.EVALUATOR)
    assert seen.payload_bytes[(Party.GARBLER, fr.OT_EXTENSION)] == 16 * padded_ots(n_ot)
    assert seen.payload_bytes[(Party.EVALUATOR, fr.GARBLED_TABLES)] == 32 * compiled.size().and_gates


def single_manifests(compiled: CompiledStatistic) -> dict[str, CompiledStatistic]:
    """Each entry of the manifest as the single-statistic job it replaces (same tables, same parameters)."""
    base = yaml.safe_load((DAIRY / "manifest.yaml").read_text())
    out = {}
    for entry in base["statistics"]:
        data = copy.deepcopy(base)
        del data["statistics"]
        params = {k: v for k, v in entry.items() if k not in ENTRY_ONLY}
        data["statistic"] = {"name": entry["compute"], **params}
        data["outputs"] = {"garbler": [], "evaluator": [], **entry["outputs"]}
        out[entry["name"]] = compile_manifest(parse_manifest(yaml.safe_dump(data), f"<{entry['name']}>"))
    return out


def test_several_statistics_give_the_figures_of_the_single_jobs_they_replace_with_no_more_and_gates() -> None:
    compiled = dairy()
    recs = dairy_records()
    together = run_plain(compiled, recs[Party.GARBLER], recs[Party.EVALUATOR])
    singles = single_manifests(compiled)
    assert len(singles) >= 3
    for name, single in singles.items():
        alone = run_plain(single, recs[Party.GARBLER], recs[Party.EVALUATOR])
        for party in Party:
            for output, value in alone[party].items():
                if output != "withheld":
                    assert together[party][f"{name}.{output}"] == value, (name, output)
    assert compiled.size().and_gates <= sum(s.size().and_gates for s in singles.values())
    # the statistics share their work: each table's rows are read once, not once per statistic
    assert compiled.n_inputs(Party.EVALUATOR) < sum(s.n_inputs(Party.EVALUATOR) for s in singles.values())
    by_statistic = compiled.size().extra["and_gates_by_statistic"]
    assert list(by_statistic) == list(singles)


def test_a_single_statistic_is_a_list_of_one_with_bare_output_names() -> None:
    m = manifest(
        {"garbler": table(3, {"name": "x", "type": "unsigned", "width": 4})}
        | {"evaluator": table(2, {"name": "x", "type": "unsigned", "width": 4})},
        {"name": "sum", "column": "x"},
        {"evaluator": ["count", "sum"]},
    )
    (use,) = m.uses()
    assert use.label is None and use.path == "statistic" and use.address("sum") == "sum"
    got = run_plain(compile_manifest(m), records("g", x=[1, 2]), records("e", x=[3]))
    assert got[Party.EVALUATOR] == {"withheld": False, "count": 3, "sum": 6}


def multi(entries: list[dict[str, Any]], **extra: Any) -> dict[str, Any]:
    data: dict[str, Any] = {
        "job": {"name": "two-shops", "version": 1},
        "parties": {"garbler": {"name": "Shop One"}, "evaluator": {"name": "Shop Two"}},
        "tables": {
            side: table(
                4,
                {"name": "amount", "type": "fixed", "width": 12, "fraction_bits": 2},
                {"name": "member", "type": "boolean"},
                *([{"name": "till", "type": "unsigned", "width": 4}] if side == "garbler" else []),
            )
            for side in ("garbler", "evaluator")
        },
        "statistics": entries,
    }
    data.update(extra)
    return data


def parse(data: dict[str, Any]) -> Any:
    return parse_manifest(yaml.safe_dump(data, sort_keys=False), "<test>")


def problems_of(data: dict[str, Any]) -> list[str]:
    with pytest.raises(ManifestError) as info:
        parse(data)
    return [str(p) for p in info.value.problems]


COUNT = {"name": "members", "compute": "count", "where": "member", "outputs": {"garbler": ["count"]}}
TOTAL = {"name": "total", "compute": "sum", "column": "amount", "outputs": {"evaluator": ["sum"]}}


def test_each_statistic_has_its_own_disclosure_rule_and_results_say_which_rule_withheld_what() -> None:
    small = {**TOTAL, "disclosure": {"min_count": 4}}
    compiled = compile_manifest(parse(multi([COUNT, small, {**TOTAL, "name": "total_any"}])))
    g = records("g", amount=[4, 8], member=[1, 0], till=[1, 2])
    e = records("e", amount=[-2], member=[1])
    got = run_plain(compiled, g, e)
    assert got[Party.GARBLER] == {"withheld": False, "members.count": 2}
    assert got[Party.EVALUATOR] == {
        "withheld": False,  # total_any.sum is released: not every output is withheld
        "withheld_by": {"total.sum": "min_count"},
        "total.sum": None,
        "total_any.sum": 2.5,  # (4 + 8 − 2) / 4: Python's exact sum of the quarter steps
    }
    assert run_garbled(compiled, g, e) == got


def test_an_empty_join_withholds_only_the_mean_and_keeps_the_other_partys_match_count() -> None:
    ident = {"name": "id", "type": "identifier", "width": 32}
    value = {"name": "v", "type": "unsigned", "width": 8}
    data = multi(
        [
            {
                "name": "join",
                "compute": "keyed_join",
                "key": "id",
                "value": {"party": "evaluator", "column": "v"},
                "outputs": {"garbler": ["matches"], "evaluator": ["matches", "mean"]},
            }
        ]
    )
    data["tables"] = {"garbler": table(2, ident), "evaluator": table(2, ident, value)}
    compiled = compile_manifest(parse(data))
    from tests.test_stat_support import key_records

    got = run_plain(compiled, key_records("g", "id", ["a"]), key_records("e", "id", ["b"], v=[5]))
    assert got[Party.GARBLER] == {"withheld": False, "join.matches": 0}
    assert got[Party.EVALUATOR] == {
        "withheld": False,
        "withheld_by": {"join.mean": "no_rows"},
        "join.matches": 0,
        "join.mean": None,
    }


def test_the_digest_follows_the_canonical_form_of_the_list() -> None:
    data = multi([COUNT, TOTAL])
    a = compile_manifest(parse(data)).digest
    reordered = {k: data[k] for k in reversed(list(data))}
    reordered["statistics"] = [{k: e[k] for k in reversed(list(e))} for e in data["statistics"]]
    assert compile_manifest(parse(reordered)).digest == a  # key order and layout do not matter
    renamed = copy.deepcopy(data)
    renamed["statistics"][1]["name"] = "takings"
    assert compile_manifest(parse(renamed)).digest != a  # names are part of what is agreed
    swapped = multi([TOTAL, COUNT])
    assert compile_manifest(parse(swapped)).digest != a  # so is the order (it orders the outputs)


@pytest.mark.parametrize(
    ("entries", "extra", "expected"),
    [
        (
            [COUNT, {**TOTAL, "name": "members"}],
            {},
            "statistics[1].name: 'members' is also the name of statistics[0]",
        ),
        (
            [{**COUNT, "where": {"column": "member", "op": ">", "value": True}}],
            {},
            "statistics[0].where.op: '>' does not apply to the boolean column 'member' (use == or !=)",
        ),
        (
            [{**TOTAL, "where": {"column": "amount", "op": "==", "value": True}}],
            {},
            "statistics[0].where.value: the fixed column 'amount' compares with a number",
        ),
        (
            [
                {
                    "name": "tills",
                    "compute": "compare",
                    "aggregate": "sum",
                    "column": "till",
                    "outputs": {"garbler": ["larger"]},
                }
            ],
            {},
            "statistics[0].column: 'till' is a column of the garbler's table, not the evaluator's: each party's "
            "side reads only its own table",
        ),
        (
            [{**TOTAL, "outputs": {"evaluator": ["mean"]}}],
            {},
            "statistics[0].outputs.evaluator[0]: sum has no output 'mean'; it has count, sum",
        ),
        (
            [COUNT],
            {"statistic": {"name": "count"}, "outputs": {"garbler": ["count"]}},
            "statistic: give either `statistic:` with `outputs:` or `statistics:`, not both",
        ),
        (
            [{**COUNT, "where": {"column": "member", "op": "=>", "value": True}}],
            {},
            "statistics[0].where.op: must be one of >, >=, <, <=, ==, !=",
        ),
        ([{**COUNT, "compute": "median"}], {}, "statistics[0].compute"),
    ],
)
def test_bad_statistics_are_refused_with_their_field_paths(
    entries: list[dict[str, Any]], extra: dict[str, Any], expected: str
) -> None:
    problems = problems_of(multi(entries, **extra))
    assert any(p.startswith(expected) for p in problems), problems


def test_no_statistic_at_all_is_refused() -> None:
    data = multi([COUNT])
    del data["statistics"]
    assert any(p.startswith("statistics: required field is missing") for p in problems_of(data))


def test_plan_and_check_show_the_totals_and_each_statistic(capsys: pytest.CaptureFixture[str]) -> None:
    from jointstat.cli import main

    path = str(DAIRY / "manifest.yaml")
    assert main(["plan", path, "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    parts = figures["statistics"]
    assert [p["name"] for p in parts] == [e.use.label for e in dairy().parts]
    assert [p["kind"] for p in parts] == ["keyed_join", "mean", "quantile", "count", "histogram", "compare"]
    assert sum(p["and_gates"] for p in parts) + figures["and_gates_release"] == figures["and_gates"]
    assert all(p["table_bytes"] == 32 * p["and_gates"] for p in parts) and figures["epsilon"] == "0"
    assert parts[1]["outputs"] == {"garbler": ["delivery.count", "delivery.sum", "delivery.mean"]} | {
        "evaluator": ["delivery.count", "delivery.sum", "delivery.mean"]
    }
    assert main(["plan", path]) == 0
    text = capsys.readouterr().out
    assert "by statistic" in text and "bigger_collector" in text and "release rules" in text
    assert main(["manifest", "check", path]) == 0
    text = capsys.readouterr().out
    assert "statistics shared_farms (keyed_join), delivery (mean)" in text
    assert "evaluator (Saltings Milk Collective) receives: withheld, shared_farms.matches" in text
