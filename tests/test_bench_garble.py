"""``jointstat bench garble`` and its timer: the benchmark, not the garbling core, reads the clock.

Specification: ``timed_run`` steps a one-process run (``garble.local.LocalSession``) and gives the same outputs as
``run_locally`` and the plain backend, with each side's own time; the command prints the figures it promises for
the program it was asked for (no speed is asserted here).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from jointstat import cli
from jointstat.bench.garble import timed_run, wide_program
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.garble.local import run_locally


def test_a_timed_run_gives_the_plain_answer_and_both_sides_time() -> None:
    program = wide_program(3000, 256)
    rng = np.random.default_rng(5)
    bits = {p: rng.integers(0, 2, program.n_inputs(p), dtype=np.uint8) for p in Party}
    plain = PlainBackend(bits)
    program.run(Builder(plain))
    timed = timed_run(program, bits, chunk_bytes=4096)
    untimed = run_locally(program.run, bits, chunk_bytes=4096)
    for p in Party:
        assert np.array_equal(timed.run.outputs[p], plain.outputs(p))
        assert np.array_equal(untimed.outputs[p], plain.outputs(p))
    assert timed.run.and_gates == untimed.and_gates == 3000
    assert timed.run.table_bytes == untimed.table_bytes == 32 * 3000
    assert timed.run.chunks == untimed.chunks == -(-32 * 3000 // 4096)
    assert timed.garble_s > 0 and timed.evaluate_s > 0


def test_bench_garble_reports_json_figures_of_the_program_asked_for(
    capsys: pytest.CaptureFixture[str],
) -> None:
    assert cli.main(["bench", "garble", "--and-gates", "4096", "--width", "512", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["and_gates"] == 4096 and figures["width"] == 512
    assert figures["table_bytes_per_and"] == 32  # half-gates: two 16-byte ciphertexts per AND gate
    for key in ("garble_and_per_s", "evaluate_and_per_s", "aes_blocks_per_s"):
        assert figures[key] > 0
