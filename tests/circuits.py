"""Test helpers: random programs that replay a random gate list through any backend, and a deliberately naive
second evaluator of the same gate list.

A ``RandomProgram`` is a list of gates over numbered wires: wire 0 is the public constant 0, wire 1 the public
constant 1, then the garbler's input bits, then the evaluator's, then one wire per gate in order. Every gate reads
earlier wires only. ``run(bld)`` replays the list through the builder's backend primitives in *batches*: at most
``batch`` consecutive gates of one kind whose operands all exist before the batch starts become one primitive call
over a 1-d (or, with ``square``, a 2-d) array of bits — ``batch`` = 1 replays gate by gate. Inputs are declared in
two calls per party and the outputs given at the end, garbler's first.

``garble_and_evaluate`` runs any program on the garbler's backend, collecting its table stream, then on the
evaluator's backend reading that stream (one after the other, no greenlets), with fresh Δ and labels and the
evaluator's active labels handed over directly in place of OT.

``reference_eval`` evaluates the list one gate at a time on Python integers, and ``expected_and_gates`` counts
its AND gates of two secret operands by applying the folding rules written out here once more (a public 0 makes
an AND public 0, a public 1 passes the other operand, operations on public bits stay public); neither uses any
code of the project.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from hypothesis import strategies as st
from jointstat.circuit.bits import Bits, stack
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.garble.backends import EvaluatorBackend, GarblerBackend
from jointstat.garble.halfgates import fresh_delta
from jointstat.garble.outputs import decode, decode_returned, make_decoding
from jointstat.primitives.blocks import random_blocks

AND, XOR, NOT = "and", "xor", "not"
KINDS = (AND, XOR, NOT)


@dataclass(frozen=True)
class Gate:
    kind: str
    a: int
    b: int  # equal to ``a`` for NOT (unused)


@dataclass(frozen=True)
class RandomProgram:
    n_inputs: dict[Party, int]
    gates: tuple[Gate, ...]
    outputs: dict[Party, tuple[int, ...]]
    batch: int = 1
    square: bool = False  # give even batches to the backend as a (2, k/2) array instead of (k,)

    @property
    def first_gate_wire(self) -> int:
        return 2 + self.n_inputs[Party.GARBLER] + self.n_inputs[Party.EVALUATOR]

    def with_batch(self, batch: int, square: bool = False) -> RandomProgram:
        return RandomProgram(self.n_inputs, self.gates, self.outputs, batch, square)

    def batches(self) -> list[tuple[str, list[int]]]:
        """(kind, gate indices) per primitive call, in order."""
        out: list[tuple[str, list[int]]] = []
        first = self.first_gate_wire
        current: list[int] = []
        for i, g in enumerate(self.gates):
            ready = first + (current[0] if current else i)  # wires defined before the batch starts
            if current and (
                len(current) == self.batch
                or self.gates[current[0]].kind != g.kind
                or g.a >= ready
                or g.b >= ready
            ):
                out.append((self.gates[current[0]].kind, current))
                current = []
            current.append(i)
        if current:
            out.append((self.gates[current[0]].kind, current))
        return out

    def run_collect(self, bld: Builder) -> dict[Party, Bits]:
        """Replay the gate list (module docstring); returns each party's output bits as given to the backend."""
        values: list[Bits] = [bld.constant(0), bld.constant(1)]
        for party in Party:
            n = self.n_inputs[party]
            half = n // 2
            for part in (half, n - half):
                values.extend(bld.input(party, part))
        for kind, idx in self.batches():
            a = stack([values[self.gates[i].a] for i in idx])
            b = stack([values[self.gates[i].b] for i in idx])
            if self.square and len(idx) % 2 == 0:
                a, b = a.reshape(2, len(idx) // 2), b.reshape(2, len(idx) // 2)
            if kind == AND:
                result = bld.and_(a, b)
            elif kind == XOR:
                result = bld.xor(a, b)
            else:
                result = bld.not_(a)
            values.extend(result.reshape(-1))
        given: dict[Party, Bits] = {}
        for party in Party:
            wires = self.outputs[party]
            if wires:
                given[party] = stack([values[w] for w in wires])
                bld.output(party, given[party])
        return given

    def run(self, bld: Builder) -> None:
        self.run_collect(bld)


@st.composite
def random_programs(draw: st.DrawFn, max_gates: int = 120) -> RandomProgram:
    """A random program: inputs of both parties, gates reading earlier wires (constants now and then), outputs
    split between the parties, replayed in a random batch size."""
    n_in = {Party.GARBLER: draw(st.integers(0, 8)), Party.EVALUATOR: draw(st.integers(0, 8))}
    n_gates = draw(st.integers(0, max_gates))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    constants = draw(st.sampled_from([0.0, 0.05, 0.3]))
    first = 2 + n_in[Party.GARBLER] + n_in[Party.EVALUATOR]
    gates = []
    for i in range(n_gates):
        kind = KINDS[int(rng.integers(3))]
        pick = []
        for _ in range(2):
            if first + i == 2 or rng.random() < constants:
                pick.append(int(rng.integers(2)))
            else:
                pick.append(int(rng.integers(2, first + i)))
        gates.append(Gate(kind, pick[0], pick[0] if kind == NOT else pick[1]))
    n_wires = first + n_gates
    n_out = draw(st.integers(0, min(12, n_wires)))
    outs = [int(w) for w in rng.integers(0, n_wires, n_out)]
    split = draw(st.integers(0, n_out))
    return RandomProgram(
        n_in,
        tuple(gates),
        {Party.GARBLER: tuple(outs[:split]), Party.EVALUATOR: tuple(outs[split:])},
        batch=draw(st.sampled_from([1, 2, 3, 8, 1000])),
        square=draw(st.booleans()),
    )


def reference_eval(program: RandomProgram, g_bits: np.ndarray, e_bits: np.ndarray) -> dict[Party, np.ndarray]:
    """Evaluate the gate list one gate at a time on Python integers (a deliberately naive second implementation)."""
    values = [0, 1, *(int(v) for v in g_bits), *(int(v) for v in e_bits)]
    for g in program.gates:
        if g.kind == AND:
            values.append(values[g.a] & values[g.b])
        elif g.kind == XOR:
            values.append(values[g.a] ^ values[g.b])
        else:
            values.append(1 - values[g.a])
    return {p: np.array([values[w] for w in program.outputs[p]], dtype=np.uint8) for p in Party}


def public_wires(program: RandomProgram) -> list[int | None]:
    """Per wire, its value when it is public (known without the inputs by the folding rules), else None."""
    known: list[int | None] = [0, 1] + [None] * (program.first_gate_wire - 2)
    for g in program.gates:
        a, b = known[g.a], known[g.b]
        if g.kind == NOT:
            known.append(None if a is None else 1 - a)
        elif g.kind == XOR:
            known.append(None if a is None or b is None else a ^ b)
        elif a == 0 or b == 0:
            known.append(0)
        elif a == 1:
            known.append(b)
        elif b == 1:
            known.append(a)
        else:
            known.append(None)
    return known


def expected_and_gates(program: RandomProgram) -> int:
    """AND gates whose two operands are both secret: the ones that cost a garbled table."""
    known = public_wires(program)
    return sum(1 for g in program.gates if g.kind == AND and known[g.a] is None and known[g.b] is None)


def random_bits(rng: np.random.Generator, n: int) -> np.ndarray:
    return rng.integers(0, 2, n, dtype=np.uint8)


def random_inputs(program: RandomProgram, seed: int) -> dict[Party, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {p: random_bits(rng, program.n_inputs[p]) for p in Party}


@dataclass
class GarbledRun:
    """Both backends after a run, the table stream between them and what each run of the program returned."""

    garbler: GarblerBackend
    evaluator: EvaluatorBackend
    delta: np.ndarray
    stream: bytes
    chunk_sizes: list[int]
    returned: dict[Party, Any] = field(default_factory=dict)  # keyed by the role that ran the program

    def outputs(self) -> dict[Party, np.ndarray]:
        """Both parties' outputs, decoded with check tags (evaluator) and checked labels (garbler)."""
        g, e = self.garbler, self.evaluator
        return {
            Party.EVALUATOR: decode(
                e.output_labels(Party.EVALUATOR), make_decoding(g.output_labels(Party.EVALUATOR), self.delta)
            ),
            Party.GARBLER: decode_returned(
                g.output_labels(Party.GARBLER), self.delta, e.output_labels(Party.GARBLER)
            ),
        }


def garble_and_evaluate(
    run: Callable[[Builder], Any],
    bits: dict[Party, np.ndarray],
    *,
    chunk_bytes: int = 64,
    tamper: Callable[[bytes], bytes] | None = None,
) -> GarbledRun:
    """Run ``run`` on the garbler's backend, then on the evaluator's backend fed the (maybe tampered) stream."""
    delta = fresh_delta()
    zero = {p: random_blocks(int(np.asarray(bits[p]).size)) for p in Party}
    chunks: list[bytes] = []
    garbler = GarblerBackend(
        delta=delta, input_labels=zero, sink=lambda c: chunks.append(bytes(c)), chunk_bytes=chunk_bytes
    )
    returned = {Party.GARBLER: run(Builder(garbler))}
    garbler.check_inputs_used()
    garbler.flush()
    stream = b"".join(chunks)
    fed = memoryview(tamper(stream) if tamper else stream)
    taken = 0

    def source(n: int) -> memoryview:
        nonlocal taken
        taken += n
        return fed[taken - n : taken]

    active = {p: garbler.input_labels(p, bits[p]) for p in Party}
    evaluator = EvaluatorBackend(input_labels=active, source=source)
    returned[Party.EVALUATOR] = run(Builder(evaluator))
    evaluator.check_inputs_used()
    assert taken == len(stream), (
        taken,
        len(stream),
    )  # the evaluator took exactly the tables the garbler made
    return GarbledRun(garbler, evaluator, delta, stream, [len(c) for c in chunks], returned)
