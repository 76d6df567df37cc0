"""A program and its measured size: what both parties run, and what they agree on before they run it.

Theory of operation
-------------------
A program is a function ``run(bld)`` that declares each party's inputs, computes with the builder's word
operations and gives each party its outputs (``jointstat.circuit.builder``). It returns nothing, or a dict of
figures for tests and benchmarks. ``measure`` runs it once on the count backend: gate counts, input and output
bits per party, and the structure digest (SHA-256 of every gate batch, input and output in order, see
``CountBackend``) — the cheap stand-in for a circuit digest that both parties compare at hello. ``Program``
carries the function with its size, so a session knows how many input labels, tables and outputs to expect before
the first frame.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from jointstat.circuit.backend import CountBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party

Run = Callable[[Builder], Any]


@dataclass(frozen=True)
class ProgramSize:
    """What the count backend measured of a program (see ``CountBackend.counts``) and its structure digest."""

    and_gates: int
    xor_gates: int
    not_gates: int
    and_calls: int
    and_depth: int
    peak_bits: int  # the most bits the program holds at once (Bits.buffer), inputs included
    widest_call: int  # the most bits one primitive call produced
    inputs: dict[Party, int]
    outputs: dict[Party, int]
    structure: bytes
    extra: dict[str, Any] = field(default_factory=dict)

    def label_bytes(self) -> int:
        """Estimated peak memory of one party's labels while running: 16 bytes per bit held at the peak (input
        labels included) and room for the temporaries of the widest call (contiguous copies of its operands and
        its result: 3×)."""
        return 16 * (self.peak_bits + 3 * self.widest_call)


def measure(run: Run) -> ProgramSize:
    """Run ``run(bld)`` on the count backend: gate counts, inputs, outputs and structure digest."""
    backend = CountBackend()
    extra = run(Builder(backend))
    c = backend.counts()
    return ProgramSize(
        and_gates=c["and_gates"],
        xor_gates=c["xor_gates"],
        not_gates=c["not_gates"],
        and_calls=c["and_calls"],
        and_depth=c["and_depth"],
        peak_bits=c["peak_bits"],
        widest_call=c["widest_call"],
        inputs=dict(backend.inputs_used),
        outputs=dict(backend.outputs_given),
        structure=backend.structure_digest(),
        extra=dict(extra) if isinstance(extra, dict) else {},
    )


@dataclass(frozen=True)
class Program:
    """A program with its measured size (``Program.of(run)`` measures it)."""

    run: Run
    size: ProgramSize
    name: str = "program"

    @classmethod
    def of(cls, run: Run, name: str = "program") -> Program:
        return cls(run, measure(run), name)

    def n_inputs(self, party: Party) -> int:
        return self.size.inputs[Party(party)]

    def n_outputs(self, party: Party) -> int:
        return self.size.outputs[Party(party)]

    @property
    def digest(self) -> bytes:
        """The structure digest both parties compare at hello."""
        return self.size.structure
