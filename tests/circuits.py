"""Test helpers: random valid circuits and a per-gate reference evaluator independent of the layer schedule."""

from __future__ import annotations

import numpy as np
from hypothesis import strategies as st
from jointstat.circuit.model import Circuit, GateKind, Party


@st.composite
def random_circuits(draw: st.DrawFn, max_gates: int = 120) -> Circuit:
    """A random valid circuit: inputs of both parties, gates reading earlier wires, outputs split between parties."""
    n_g_in = draw(st.integers(0, 8))
    n_e_in = draw(st.integers(0, 8))
    n_gates = draw(st.integers(0, max_gates))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    n_wires = 2 + n_g_in + n_e_in + n_gates
    # Shuffle which wire numbers serve as inputs and gate outputs, so numbering is not already layered.
    perm = np.concatenate([[0, 1], 2 + rng.permutation(n_wires - 2)])
    g_in = perm[2 : 2 + n_g_in]
    e_in = perm[2 + n_g_in : 2 + n_g_in + n_e_in]
    gate_out = perm[2 + n_g_in + n_e_in :]
    kinds = rng.integers(0, 3, n_gates).astype(np.uint8)
    in0 = np.empty(n_gates, dtype=np.int64)
    in1 = np.empty(n_gates, dtype=np.int64)
    available = list(perm[: 2 + n_g_in + n_e_in])
    for i in range(n_gates):
        in0[i] = available[rng.integers(len(available))]
        in1[i] = available[rng.integers(len(available))] if kinds[i] != GateKind.NOT else -1
        available.append(gate_out[i])
    n_out = draw(st.integers(0, min(12, len(available))))
    outs = rng.choice(np.array(available), size=n_out, replace=True)
    split = draw(st.integers(0, n_out))
    return Circuit.create(
        n_wires=n_wires,
        kinds=kinds,
        in0=in0,
        in1=in1,
        out=gate_out,
        inputs={Party.GARBLER: g_in, Party.EVALUATOR: e_in},
        outputs={Party.GARBLER: outs[:split], Party.EVALUATOR: outs[split:]},
    )


def reference_eval(circuit: Circuit, g_bits: np.ndarray, e_bits: np.ndarray) -> dict[Party, np.ndarray]:
    """Evaluate gate by gate in stored order (a deliberately naive second implementation)."""
    values = np.zeros(circuit.n_wires, dtype=np.uint8)
    values[1] = 1
    values[circuit.inputs[Party.GARBLER]] = g_bits
    values[circuit.inputs[Party.EVALUATOR]] = e_bits
    for kind, a, b, o in zip(circuit.kinds, circuit.in0, circuit.in1, circuit.out, strict=True):
        if kind == GateKind.AND:
            values[o] = values[a] & values[b]
        elif kind == GateKind.XOR:
            values[o] = values[a] ^ values[b]
        else:
            values[o] = 1 - values[a]
    return {p: values[circuit.outputs[p]] for p in Party}


def random_bits(rng: np.random.Generator, n: int) -> np.ndarray:
    return rng.integers(0, 2, n, dtype=np.uint8)
