"""Helpers shared by the statistic tests: manifests from dicts, and running a compiled statistic on records.

``run_plain`` runs the statistic's program on the plain backend (``CompiledStatistic.run_plain``): the answer in
the clear. ``run_garbled`` garbles and evaluates the same program in one process (``garble.local.run_locally``:
the garbler's backend streams its tables into the evaluator's backend, the evaluator's input labels handed over
directly, standing in for OT) and also checks that the garbler sent exactly one 32-byte half-gates table per AND
gate the count backend counted. The tests at the bottom check that the two agree and that inputs are laid out as
the compiler declares them.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest
import yaml
from hypothesis import settings
from jointstat.circuit.agreement import Manifest
from jointstat.circuit.compile import CompiledStatistic, compile_manifest
from jointstat.circuit.inputs import Records, encode_inputs, hash_key
from jointstat.circuit.manifest import parse_manifest
from jointstat.circuit.model import CircuitError, Party
from jointstat.garble.local import LocalRun, run_locally

SECRET = b"test secret of the two organisations"  # common practice: any 16+ bytes
TABLE_BYTES_PER_AND = 32  # half-gates: two 16-byte ciphertexts per AND gate (Zahur–Rosulek–Evans 2015)

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
    """Both parties' input bits; the random bits of any noise come from a fixed seed, so that a plain and a
    garbled run of the same records draw the same noise (a node draws them from the OS on every encoding)."""
    return {
        Party.GARBLER: encode_inputs(compiled, Party.GARBLER, g, random_source=np.random.default_rng(1)),
        Party.EVALUATOR: encode_inputs(compiled, Party.EVALUATOR, e, random_source=np.random.default_rng(2)),
    }


def run_plain(compiled: CompiledStatistic, g: Records, e: Records) -> dict[Party, dict[str, Any]]:
    """Decoded outputs of the program on the plain backend."""
    out = compiled.run_plain(encode(compiled, g, e))
    return {p: compiled.decode(p, out[p]) for p in Party}


def run_plain_raw(compiled: CompiledStatistic, g: Records, e: Records) -> dict[Party, dict[str, Any]]:
    """Outputs of the program on the plain backend as integers (fixed-point values unscaled)."""
    out = compiled.run_plain(encode(compiled, g, e))
    return {p: compiled.decode_raw(p, out[p]) for p in Party}


def garble_locally(compiled: CompiledStatistic, g: Records, e: Records, **options: Any) -> LocalRun:
    """The program garbled and evaluated in one process; asserts one table per AND gate of the count backend."""
    run = run_locally(compiled.program, encode(compiled, g, e), **options)
    and_gates = compiled.size().and_gates
    assert run.and_gates == and_gates, (run.and_gates, and_gates)
    assert run.table_bytes == TABLE_BYTES_PER_AND * and_gates, (run.table_bytes, and_gates)
    return run


def run_garbled(compiled: CompiledStatistic, g: Records, e: Records) -> dict[Party, dict[str, Any]]:
    """Decoded outputs of the program garbled and evaluated in one process (tables streamed in 64 KiB chunks)."""
    out = garble_locally(compiled, g, e, chunk_bytes=1 << 16).outputs
    return {p: compiled.decode(p, out[p]) for p in Party}


def run_garbled_raw(compiled: CompiledStatistic, g: Records, e: Records) -> dict[Party, dict[str, Any]]:
    """Outputs of the garbled program as integers, like ``run_plain_raw``."""
    out = garble_locally(compiled, g, e, chunk_bytes=1 << 16).outputs
    return {p: compiled.decode_raw(p, out[p]) for p in Party}


def garbled_examples() -> int:
    """Examples for hypothesis properties that garble every example: a quarter of the profile's, at least 8
    (10 in the ci profile, 125 in the thorough one)."""
    return max(8, settings.default.max_examples // 4)


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
    # sum(): -5 + 100 - 128 + 63 + 0 = 30, five rows
    assert run_plain(c, g, e)[Party.EVALUATOR] == {"withheld": False, "count": 5, "sum": 30}


def test_the_garbled_run_sends_one_table_per_and_gate_of_the_count_backend() -> None:
    c = compiled_sum()
    run = garble_locally(c, records("g.csv", x=[1]), records("e.csv", x=[2]), chunk_bytes=100)
    assert run.and_gates > 0
    assert run.chunks == -(-run.table_bytes // 100)  # every chunk full but the last


def test_input_bits_follow_the_declared_layout() -> None:
    c = compiled_sum()
    bits = encode_inputs(c, Party.GARBLER, records("g.csv", x=[-1, 2]))
    layout = c.inputs[Party.GARBLER]
    assert [f.name for f in layout.fields] == ["valid", "x"]
    assert bits.shape == (c.n_inputs(Party.GARBLER),) == (c.size().inputs[Party.GARBLER],)
    assert list(bits[:4]) == [1, 1, 0, 0]  # two records, two padding rows
    x = bits[4:].reshape(4, 8)
    assert list(x[0]) == [1] * 8  # -1, least significant bit first
    assert list(x[1]) == [0, 1, 0, 0, 0, 0, 0, 0]
    assert not x[2:].any()  # padding is all zero


def test_the_program_reads_exactly_the_declared_input_bits() -> None:
    c = compiled_sum()
    bits = encode(c, records("g.csv", x=[1]), records("e.csv", x=[2]))
    short = {Party.GARBLER: bits[Party.GARBLER][:-1], Party.EVALUATOR: bits[Party.EVALUATOR]}
    with pytest.raises(CircuitError, match="garbler inputs: the program reads 36 bits but 35 were given"):
        c.run_plain(short)
    long = {Party.GARBLER: bits[Party.GARBLER], Party.EVALUATOR: np.append(bits[Party.EVALUATOR], 0)}
    with pytest.raises(CircuitError, match="evaluator inputs: 22 bits given, the program read 21"):
        c.run_plain(long)
