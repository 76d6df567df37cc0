"""Helpers shared by the statistic tests: manifests from dicts, and running a compiled statistic on records.

``run_plain`` evaluates the compiled circuit in the clear (``evaluate_plain``); ``run_garbled`` runs the half-gates
garbler and evaluator in one process (the evaluator's labels handed over directly, standing in for OT). The tests
at the bottom check that the two agree and that inputs are laid out as the compiler declares them.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import yaml
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.inputs import Records, encode_inputs, hash_key
from jointstat.circuit.layers import evaluate_plain
from jointstat.circuit.manifest import Manifest, parse_manifest
from jointstat.circuit.model import Party
from jointstat.garble import Evaluator, Garbler

SECRET = b"test secret of the two organisations"  # common practice: any 16+ bytes

BASE: dict[str, Any] = {
    "job": {"name": "test-job", "version": 1},
    "parties": {"garbler": {"name": "Garbling Org"}, "evaluator": {"name": "Evaluating Org"}},
    "outputs": {"garbler": [], "evaluator": []},
}


def manifest(
    tables: dict[str, Any], statistic: dict[str, Any], outputs: dict[str, list[str]], **extra: Any
) -> Manifest:
    data = copy.deepcopy(BASE)
    data["tables"] = tables
    data["statistic"] = statistic
    data["outputs"] = {"garbler": [], "evaluator": [], **outputs}
    data.update(extra)
    return parse_manifest(yaml.safe_dump(data), "<test>")


def table(capacity: int, *columns: dict[str, Any]) -> dict[str, Any]:
    return {"capacity": capacity, "columns": list(columns)}


def records(source: str, **columns: list[int]) -> Records:
    n = len(next(iter(columns.values()))) if columns else 0
    return Records(source, {k: list(v) for k, v in columns.items()}, list(range(1, n + 1)))


def key_records(
    source: str, key_column: str, keys: list[str], width: int = 32, **columns: list[int]
) -> Records:
    rec = records(source, **{key_column: [hash_key(SECRET, k, width) for k in keys]}, **columns)
    rec.keys[key_column] = list(keys)
    return rec


def encode(compiled: CompiledStatistic, g: Records, e: Records) -> dict[Party, np.ndarray]:
    return {
        Party.GARBLER: encode_inputs(compiled, Party.GARBLER, g),
        Party.EVALUATOR: encode_inputs(compiled, Party.EVALUATOR, e),
    }


def run_plain(compiled: CompiledStatistic, g: Records, e: Records) -> dict[Party, dict[str, Any]]:
    out = evaluate_plain(compiled.layered, encode(compiled, g, e))
    return {p: compiled.decode(p, out[p]) for p in Party}


def run_plain_raw(compiled: CompiledStatistic, g: Records, e: Records) -> dict[Party, dict[str, Any]]:
    out = evaluate_plain(compiled.layered, encode(compiled, g, e))
    return {p: compiled.decode_raw(p, out[p]) for p in Party}


def run_garbled(compiled: CompiledStatistic, g: Records, e: Records) -> dict[Party, dict[str, Any]]:
    bits = encode(compiled, g, e)
    lc = compiled.layered
    garbler = Garbler(lc)
    evaluator = Evaluator(
        lc,
        constant_labels=garbler.constant_labels(),
        garbler_labels=garbler.input_labels(Party.GARBLER, bits[Party.GARBLER]),
        evaluator_labels=garbler.input_labels(Party.EVALUATOR, bits[Party.EVALUATOR]),
    )
    for chunk in garbler.tables(1 << 16):
        evaluator.feed(chunk)
    evaluator.finish()
    ev = evaluator.decode(garbler.output_decoding(Party.EVALUATOR))
    gb = garbler.decode_returned(Party.GARBLER, evaluator.output_labels(Party.GARBLER))
    return {
        Party.GARBLER: compiled.decode(Party.GARBLER, gb),
        Party.EVALUATOR: compiled.decode(Party.EVALUATOR, ev),
    }


def compiled_sum() -> CompiledStatistic:
    return compile_manifest(
        manifest(
            {
                "garbler": table(4, {"name": "x", "type": "signed", "width": 8}),
                "evaluator": table(3, {"name": "x", "type": "unsigned", "width": 6}),
            },
            {"name": "sum", "column": "x"},
            {"garbler": ["sum"], "evaluator": ["count", "sum"]},
        )
    )


def test_garbled_and_plain_evaluation_agree_on_a_sum() -> None:
    c = compiled_sum()
    g, e = records("g.csv", x=[-5, 100, -128]), records("e.csv", x=[63, 0])
    assert run_garbled(c, g, e) == run_plain(c, g, e)
    assert run_plain(c, g, e)[Party.EVALUATOR] == {"withheld": False, "count": 5, "sum": 30}


def test_input_bits_follow_the_declared_layout() -> None:
    c = compiled_sum()
    bits = encode_inputs(c, Party.GARBLER, records("g.csv", x=[-1, 2]))
    layout = c.inputs[Party.GARBLER]
    assert [f.name for f in layout.fields] == ["valid", "x"]
    assert list(bits[:4]) == [1, 1, 0, 0]  # two records, two padding rows
    x = bits[4:].reshape(4, 8)
    assert list(x[0]) == [1] * 8  # -1, least significant bit first
    assert list(x[1]) == [0, 1, 0, 0, 0, 0, 0, 0]
    assert not x[2:].any()  # padding is all zero
