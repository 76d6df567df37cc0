"""The layer schedule: every layer holds independent gates, its outputs are one contiguous slot range, and plain
evaluation over the schedule equals naive gate-by-gate evaluation."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from jointstat.circuit.layers import evaluate_plain, gate_levels, schedule
from jointstat.circuit.model import Circuit, GateKind, Party

from tests.circuits import random_bits, random_circuits, reference_eval


@given(random_circuits())
def test_layered_plain_evaluation_equals_gate_by_gate_evaluation(c: Circuit) -> None:
    rng = np.random.default_rng(c.n_gates)
    g = random_bits(rng, c.n_inputs(Party.GARBLER))
    e = random_bits(rng, c.n_inputs(Party.EVALUATOR))
    got = evaluate_plain(schedule(c), {Party.GARBLER: g, Party.EVALUATOR: e})
    ref = reference_eval(c, g, e)
    for p in Party:
        assert np.array_equal(got[p], ref[p])


@given(random_circuits())
def test_every_gate_reads_only_wires_of_earlier_layers(c: Circuit) -> None:
    levels = gate_levels(c)
    wire_level = np.zeros(c.n_wires, dtype=np.int64)
    wire_level[c.out] = levels
    reads = [c.in0, np.where(c.in1 < 0, 0, c.in1)]
    for arr in reads:
        assert (wire_level[arr] < levels).all()
    # and levels are tight: each gate sits one above its highest input
    highest = np.maximum(wire_level[reads[0]], wire_level[reads[1]])
    assert np.array_equal(levels, highest + 1)


@given(random_circuits())
def test_slots_are_compact_and_layer_outputs_contiguous(c: Circuit) -> None:
    lc = schedule(c)
    assert lc.n_slots == 2 + c.n_inputs(Party.GARBLER) + c.n_inputs(Party.EVALUATOR) + c.n_gates
    assert lc.layer_start[0] == lc.first_gate_slot and lc.layer_start[-1] == lc.n_slots
    sizes = np.diff(lc.layer_start)
    per_kind = np.diff(lc.and_start) + np.diff(lc.xor_start) + np.diff(lc.not_start)
    assert np.array_equal(sizes, per_kind)
    assert lc.n_and == c.count(GateKind.AND)
    for k in range(lc.n_layers):
        s, e = lc.layer_start[k], lc.layer_start[k + 1]
        a0, a1 = lc.and_start[k], lc.and_start[k + 1]
        for reads in (lc.and_a[a0:a1], lc.and_b[a0:a1]):
            assert (reads < s).all()
        x0, x1 = lc.xor_start[k], lc.xor_start[k + 1]
        assert (lc.xor_a[x0:x1] < s).all() and (lc.xor_b[x0:x1] < s).all()
        assert e - s == (a1 - a0) + (x1 - x0) + (lc.not_start[k + 1] - lc.not_start[k])


def test_plain_evaluation_runs_many_input_vectors_at_once() -> None:
    # w4 = g AND e, w5 = g XOR e: the truth tables of AND and XOR over all four input pairs in one call.
    c = Circuit.create(
        n_wires=6,
        kinds=[GateKind.AND, GateKind.XOR],
        in0=[2, 2],
        in1=[3, 3],
        out=[4, 5],
        inputs={Party.GARBLER: [2], Party.EVALUATOR: [3]},
        outputs={Party.EVALUATOR: [4, 5]},
    )
    got = evaluate_plain(
        schedule(c), {Party.GARBLER: np.array([[0, 0, 1, 1]]), Party.EVALUATOR: np.array([[0, 1, 0, 1]])}
    )
    assert got[Party.EVALUATOR].tolist() == [[0, 0, 0, 1], [0, 1, 1, 0]]
