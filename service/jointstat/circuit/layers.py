"""The layer schedule: a circuit renumbered so that every layer is processed as whole arrays.

Theory of operation
-------------------
A gate's level is one more than the highest level of the wires it reads (constants and inputs are level 0). All
gates of one level are independent, so a layer can be garbled or evaluated by a handful of numpy operations. Levels
are found segment by segment: a segment is a maximal run of consecutive gates none of which reads a wire defined
inside the run (the builder emits whole lane-parallel operations, so segments are long), and one segment's levels
are one vectorised maximum.

The wires are then renumbered into *slots*: slot 0 and 1 hold the constants, then the garbler's inputs, then the
evaluator's inputs, then layer by layer the outputs of the layer's AND gates, XOR gates and NOT gates. Each layer
therefore writes one contiguous slice of the label array (a slice store is far cheaper than a scatter), and only
its reads are gathers. AND gates are numbered globally in slot order; that number is the gate's tweak in the hash.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from jointstat.circuit.model import ONE_WIRE, ZERO_WIRE, Circuit, GateKind, Party

SLOT_DTYPE = np.dtype(np.int32)  # slots never outnumber wires, which are 32-bit


CHUNK = 1 << 20  # gates per vectorised pass where a whole-array temporary would cost memory


def gate_levels(circuit: Circuit) -> np.ndarray:
    """Level of each gate (1 = reads only constants and inputs), computed one dependency-free segment at a time.

    Memory: 4 bytes per wire and 8 per gate besides the circuit. A NOT gate's missing second input (-1) reads the
    sentinel entry appended at the end of each per-wire array.
    """
    g = circuit.n_gates
    levels = np.zeros(g, dtype=np.int32)
    if g == 0:
        return levels
    defined_by = np.full(circuit.n_wires + 1, -1, dtype=np.int32)
    defined_by[circuit.out] = np.arange(g, dtype=np.int32)
    dep = np.empty(g, dtype=np.int32)  # latest gate this gate depends on (-1: none)
    for c0 in range(0, g, CHUNK):
        c1 = min(g, c0 + CHUNK)
        np.maximum(defined_by[circuit.in0[c0:c1]], defined_by[circuit.in1[c0:c1]], out=dep[c0:c1])
    del defined_by
    wire_level = np.zeros(circuit.n_wires + 1, dtype=np.int32)
    start = 0
    while start < g:
        # The segment ends at the first gate that depends on a gate inside it.
        window = 256
        stop = g
        while True:
            end = min(g, start + window)
            inside = np.flatnonzero(dep[start:end] >= start)
            if inside.size:
                stop = start + int(inside[0])
                break
            if end == g:
                break
            window *= 4
        seg_levels = np.maximum(wire_level[circuit.in0[start:stop]], wire_level[circuit.in1[start:stop]]) + 1
        levels[start:stop] = seg_levels
        wire_level[circuit.out[start:stop]] = seg_levels
        start = stop
    return levels


@dataclass(frozen=True, eq=False)
class LayeredCircuit:
    """A circuit renumbered into slots and cut into layers (see the module docstring).

    Per layer ``k``: AND gates ``and_start[k] : and_start[k+1]`` of the flat ``and_a``/``and_b`` arrays write slots
    ``layer_start[k] + [0, n_and)``; XOR gates (``xor_a``/``xor_b``) write the next ``n_xor`` slots; NOT gates
    (``not_a``) the next ``n_not``.
    """

    circuit: Circuit
    n_slots: int
    first_gate_slot: int
    layer_start: np.ndarray  # slot of the first output of each layer, plus the end
    and_start: np.ndarray  # index into and_a/and_b of each layer's first AND gate, plus the total
    xor_start: np.ndarray
    not_start: np.ndarray
    and_a: np.ndarray
    and_b: np.ndarray
    xor_a: np.ndarray
    xor_b: np.ndarray
    not_a: np.ndarray
    input_slots: dict[Party, np.ndarray]
    output_slots: dict[Party, np.ndarray]

    @property
    def n_layers(self) -> int:
        return int(self.layer_start.shape[0] - 1)

    @property
    def n_and(self) -> int:
        return int(self.and_a.shape[0])

    def layer_counts(self, k: int) -> tuple[int, int, int]:
        return (
            int(self.and_start[k + 1] - self.and_start[k]),
            int(self.xor_start[k + 1] - self.xor_start[k]),
            int(self.not_start[k + 1] - self.not_start[k]),
        )

    def and_width_stats(self) -> dict[str, int]:
        widths = np.diff(self.and_start)
        nonzero = widths[widths > 0]
        return {
            "layers": self.n_layers,
            "layers_with_and": int(nonzero.size),
            "min_and_per_layer": int(nonzero.min()) if nonzero.size else 0,
            "max_and_per_layer": int(nonzero.max()) if nonzero.size else 0,
        }


_KIND_RANK = np.array([1, 0, 2], dtype=np.int8)  # within a layer: AND first, then XOR, then NOT


def schedule(circuit: Circuit) -> LayeredCircuit:
    """Cut ``circuit`` into layers and renumber its wires into slots (see the module docstring).

    Memory: about 16 bytes per gate at the peak besides the circuit (the sort order), 12 per gate kept.
    """
    g = circuit.n_gates
    levels = gate_levels(circuit)
    n_layers = int(levels.max()) if g else 0
    # Sort gates by (level, kind rank): one int32 key, a stable sort, and the order kept as int32.
    key_type = np.int32 if 3 * n_layers + 3 < 2**31 else np.int64
    key = levels.astype(key_type) * key_type(3)
    key += _KIND_RANK[circuit.kinds]
    del levels
    order = np.argsort(key, kind="stable").astype(np.int32) if g else np.zeros(0, dtype=np.int32)
    key = key[order]  # sorted keys: level = key // 3, kind rank = key % 3

    slot_of = np.full(circuit.n_wires, -1, dtype=SLOT_DTYPE)
    slot_of[ZERO_WIRE] = 0
    slot_of[ONE_WIRE] = 1
    next_slot = 2
    input_slots: dict[Party, np.ndarray] = {}
    for party in Party:
        wires = circuit.inputs[party]
        slots = np.arange(next_slot, next_slot + wires.size, dtype=SLOT_DTYPE)
        slot_of[wires] = slots
        input_slots[party] = slots
        next_slot += wires.size
    first_gate_slot = next_slot
    for c0 in range(0, g, CHUNK):
        c1 = min(g, c0 + CHUNK)
        slot_of[circuit.out[order[c0:c1]]] = np.arange(
            first_gate_slot + c0, first_gate_slot + c1, dtype=SLOT_DTYPE
        )

    # Layer k (1-based level k + 1) holds sorted keys 3(k+1) .. 3(k+1)+2; the rank boundaries split it by kind.
    bounds = np.searchsorted(key, 3 * np.arange(1, n_layers + 2, dtype=np.int64), side="left")
    layer_start = (first_gate_slot + bounds).astype(SLOT_DTYPE)

    def gather(kind: GateKind) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        rank = int(_KIND_RANK[kind])
        levels_1 = np.arange(1, n_layers + 1, dtype=np.int64)
        lo = np.searchsorted(key, 3 * levels_1 + rank, side="left")
        hi = np.searchsorted(key, 3 * levels_1 + rank + 1, side="left")
        per_layer = hi - lo
        starts = np.concatenate([[0], np.cumsum(per_layer)]).astype(np.int64)
        total = int(starts[-1])
        a = np.empty(total, dtype=SLOT_DTYPE)
        b = np.empty(total if kind != GateKind.NOT else 0, dtype=SLOT_DTYPE)
        pos = 0
        # Walk the layers' runs of this kind in chunks of whole runs, gathering their input slots.
        for k0 in range(0, n_layers, 4096):
            k1 = min(n_layers, k0 + 4096)
            runs = [order[lo[k] : hi[k]] for k in range(k0, k1) if hi[k] > lo[k]]
            if not runs:
                continue
            gates = np.concatenate(runs)
            m = gates.size
            a[pos : pos + m] = slot_of[circuit.in0[gates]]
            if kind != GateKind.NOT:
                b[pos : pos + m] = slot_of[circuit.in1[gates]]
            pos += m
        return a, b, starts

    and_a, and_b, and_start = gather(GateKind.AND)
    xor_a, xor_b, xor_start = gather(GateKind.XOR)
    not_a, _, not_start = gather(GateKind.NOT)
    return LayeredCircuit(
        circuit=circuit,
        n_slots=first_gate_slot + g,
        first_gate_slot=first_gate_slot,
        layer_start=layer_start,
        and_start=and_start,
        xor_start=xor_start,
        not_start=not_start,
        and_a=and_a,
        and_b=and_b,
        xor_a=xor_a,
        xor_b=xor_b,
        not_a=not_a,
        input_slots=input_slots,
        output_slots={p: slot_of[circuit.outputs[p]] for p in Party},
    )


def evaluate_plain(layered: LayeredCircuit, inputs: dict[Party, np.ndarray]) -> dict[Party, np.ndarray]:
    """Evaluate in the clear: ``inputs[party]`` is a 0/1 array of shape (n_inputs,) or (n_inputs, k) for k runs.

    Returns each party's output bits in the same layout. This is the reference the garbled evaluation is tested
    against; it shares only the layer schedule with it.
    """
    c = layered.circuit
    given = {
        p: np.asarray(inputs.get(p, np.zeros(c.n_inputs(p), dtype=np.uint8)), dtype=np.uint8) for p in Party
    }
    extra = (
        given[Party.GARBLER].shape[1:] if given[Party.GARBLER].ndim > 1 else given[Party.EVALUATOR].shape[1:]
    )
    for p in Party:
        if given[p].shape[0] != c.n_inputs(p):
            raise ValueError(
                f"{p.name.lower()} inputs: expected {c.n_inputs(p)} bits, got {given[p].shape[0]}"
            )
        if given[p].size and given[p].max() > 1:
            raise ValueError(f"{p.name.lower()} inputs: bits must be 0 or 1")
        if given[p].ndim == 1:
            given[p] = given[p].reshape(given[p].shape[0], *([1] * len(extra)))
        given[p] = np.broadcast_to(given[p], (c.n_inputs(p), *extra))
    values = np.zeros((layered.n_slots, *extra), dtype=np.uint8)
    values[1] = 1
    for p in Party:
        values[layered.input_slots[p]] = given[p]
    for k in range(layered.n_layers):
        s = int(layered.layer_start[k])
        a0, a1 = layered.and_start[k], layered.and_start[k + 1]
        x0, x1 = layered.xor_start[k], layered.xor_start[k + 1]
        n0, n1 = layered.not_start[k], layered.not_start[k + 1]
        na, nx = a1 - a0, x1 - x0
        values[s : s + na] = values[layered.and_a[a0:a1]] & values[layered.and_b[a0:a1]]
        values[s + na : s + na + nx] = values[layered.xor_a[x0:x1]] ^ values[layered.xor_b[x0:x1]]
        values[s + na + nx : s + na + nx + (n1 - n0)] = values[layered.not_a[n0:n1]] ^ 1
    return {p: values[layered.output_slots[p]].copy() for p in Party}
