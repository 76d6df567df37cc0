"""Manifest → compiled statistic: the program, each party's input and output layout, decoding, and the digest.

Theory of operation
-------------------
Both parties compile the same manifest to the same *program* (``program(bld)``): everything that shapes it
(capacities, column types, the statistic's parameters, who receives what) is public and in the manifest; the true
row counts are secret and enter only as validity bits. The program is never turned into a gate list: each party
runs it against its backend (garbler, evaluator, plain, count), see ``jointstat.circuit.backend``.

Inputs of a party, in this order (the encoder in ``jointstat.circuit.inputs`` produces exactly this layout):
the validity bit of each of its ``capacity`` rows, then for each column the statistic reads, in the order the
table declares them, ``capacity`` rows × the column's bits, row by row, each value least significant bit first.

The statistic builds its results (``library.statistic``); the program then applies the disclosure rule: allow =
ok ∧ (count ≥ min_count), every result bit is ANDed with allow, and withheld = ¬allow. A party's outputs are its
``withheld`` bit followed by the outputs the manifest gives it, in the order listed, each value least significant
bit first. ``decode`` turns a party's output bits into named Python values (integers, floats for fixed-point
outputs, booleans for flags, strings for choices), or ``None`` everywhere but ``withheld`` when the result was
withheld.

Size and digest: ``size()`` runs the program once on the count backend (gates, inputs, outputs, and the SHA-256
of the program's structure: every gate batch, input and output in order). ``digest`` is SHA-256 (FIPS 180-4) over
"jointstat.manifest.v2\\n", the manifest's canonical JSON (RFC 8785 style, see ``agreement.canonical_json``), a zero
byte and that structure digest. Both nodes compare it before anything secret moves; the same file gives the same
digest on any machine and any run of the same program version, and two programs that would meet their AND gates
in a different order cannot share it.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from jointstat.circuit.agreement import Manifest
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.bits import Bits
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int
from jointstat.circuit.library import blocks
from jointstat.circuit.library.registry import statistic_for
from jointstat.circuit.library.statistic import (
    BuildContext,
    OutputSpec,
    Statistic,
    StatisticResult,
    TableNeeds,
    TableWires,
)
from jointstat.circuit.model import CircuitError, Party
from jointstat.circuit.program import Program, ProgramSize, measure

DIGEST_DOMAIN = b"jointstat.manifest.v2\n"
WITHHELD = "withheld"


@dataclass(frozen=True)
class InputField:
    """A block of a party's input bits: ``rows`` × ``width`` bits from ``offset`` (``name`` 'valid' or a column)."""

    name: str
    rows: int
    width: int
    offset: int

    @property
    def bits(self) -> int:
        return self.rows * self.width


@dataclass(frozen=True)
class InputLayout:
    party: Party
    capacity: int
    fields: tuple[InputField, ...]
    needs: TableNeeds

    @property
    def bits(self) -> int:
        return sum(f.bits for f in self.fields)

    @property
    def columns(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.fields if f.name != "valid")


@dataclass(frozen=True)
class OutputField:
    spec: OutputSpec
    offset: int

    @property
    def name(self) -> str:
        return self.spec.name


@dataclass
class CompiledStatistic:
    manifest: Manifest
    statistic: Statistic[Any]
    inputs: dict[Party, InputLayout]
    outputs: dict[Party, tuple[OutputField, ...]]
    _size: list[ProgramSize] = field(default_factory=list, repr=False)

    # -- the program ------------------------------------------------------------------------------------------
    def program(self, bld: Builder) -> dict[str, Any]:
        """The whole job as a program: inputs in layout order, the statistic, the disclosure gate, the outputs.

        Returns the statistic's extra figures (comparators, merge size…) for tests and benchmarks.
        """
        manifest, stat = self.manifest, self.statistic
        tables: dict[Party, TableWires] = {}
        for party in Party:
            layout = self.inputs[party]
            table = manifest.table(party)
            valid = bld.input(party, table.capacity)
            cols = {f.name: bld.input(party, (f.rows, f.width)) for f in layout.fields[1:]}
            tables[party] = TableWires(
                party, table.capacity, valid, cols, {c.name: c for c in table.columns if c.name in cols}
            )
        wanted = frozenset(manifest.outputs.garbler) | frozenset(manifest.outputs.evaluator)
        min_count = manifest.disclosure.min_count
        ctx = BuildContext(bld, manifest, tables, wanted, needs_count=min_count > 0)
        result: StatisticResult = stat.build(ctx)
        allow = bld.ones(()) if result.ok is None else result.ok
        if min_count > 0:
            if result.count is None:
                raise ValueError(
                    f"statistic {stat.name!r} gives no count, so the disclosure rule cannot be applied"
                )
            allow = bld.and_(allow, blocks.at_least(bld, result.count, min_count))
        withheld = bld.not_(allow)
        gated: dict[str, Bits] = {}
        for party in Party:
            fields = self.outputs[party]
            if fields:
                bld.output(party, withheld.reshape(1))
            for f in fields[1:]:
                spec = f.spec
                wires = result.values[f.name]
                if wires.shape != (*spec.shape, spec.width):
                    raise CircuitError(
                        f"statistic {stat.name!r} output {f.name!r}: built {wires.shape},"
                        f" declared {(*spec.shape, spec.width)}"
                    )
                if f.name not in gated:
                    gated[f.name] = blocks.gate(bld, wires, allow)
                bld.output(party, gated[f.name])
        return dict(result.extra)

    def size(self) -> ProgramSize:
        """The program measured on the count backend (computed once)."""
        if not self._size:
            self._size.append(measure(self.program))
        return self._size[0]

    @property
    def extra(self) -> dict[str, Any]:
        return self.size().extra

    def as_program(self) -> Program:
        """The program with its measured size, as a session runs it."""
        return Program(self.program, self.size(), name=f"manifest {self.manifest.job.name!r}")

    def n_inputs(self, party: Party) -> int:
        return self.inputs[Party(party)].bits

    def n_outputs(self, party: Party) -> int:
        return sum(f.spec.bits for f in self.outputs[Party(party)])

    def run_plain(self, inputs: dict[Party, np.ndarray]) -> dict[Party, np.ndarray]:
        """Evaluate in the clear on each party's input bits (the reference answer): each party's output bits."""
        backend = PlainBackend(inputs)
        self.program(Builder(backend))
        backend.check_inputs_used()
        return {p: backend.outputs(p) for p in Party}

    @cached_property
    def digest(self) -> str:
        """Hex SHA-256 over the domain, the manifest's canonical JSON and the program's structure digest."""
        h = hashlib.sha256(DIGEST_DOMAIN)
        h.update(self.manifest.canonical())
        h.update(b"\0")
        h.update(self.size().structure)
        return h.hexdigest()

    def decode(self, party: Party, bits: object) -> dict[str, Any]:
        """A party's output bits → {"withheld": bool, name: value or None, …}."""
        values = self.decode_raw(party, bits)
        if not values:  # this party receives nothing
            return {}
        if values[WITHHELD]:
            return {name: (True if name == WITHHELD else None) for name in values}
        out: dict[str, Any] = {WITHHELD: False}
        for f in self.outputs[Party(party)]:
            if f.name == WITHHELD:
                continue
            out[f.name] = to_value(f.spec, values[f.name])
        return out

    def decode_raw(self, party: Party, bits: object) -> dict[str, Any]:
        """Output bits → integers (fixed-point outputs as their scaled integers; arrays for shaped outputs)."""
        arr = np.asarray(bits, dtype=np.uint8).reshape(-1)
        fields = self.outputs[Party(party)]
        expected = sum(f.spec.bits for f in fields)
        if arr.shape[0] != expected:
            raise ValueError(
                f"{Party(party).role_name} outputs: expected {expected} bits, got {arr.shape[0]}"
            )
        out: dict[str, Any] = {}
        for f in fields:
            chunk = arr[f.offset : f.offset + f.spec.bits].reshape(*f.spec.shape, f.spec.width)
            ints = bits_to_int(chunk, signed=f.spec.signed)
            out[f.name] = bool(ints) if f.name == WITHHELD else (ints.tolist() if f.spec.shape else int(ints))
        return out


def to_value(spec: OutputSpec, raw: Any) -> Any:
    if isinstance(raw, list):
        return [
            to_value(OutputSpec(spec.name, spec.width, spec.signed, spec.frac, (), spec.choices), r)
            for r in raw
        ]
    if spec.choices:
        return spec.choices[int(raw)] if 0 <= int(raw) < len(spec.choices) else None
    if spec.frac:
        return int(raw) / (1 << spec.frac)
    return int(raw)


def input_layout(manifest: Manifest, party: Party, needs: TableNeeds) -> InputLayout:
    table = manifest.table(party)
    fields = [InputField("valid", table.capacity, 1, 0)]
    offset = table.capacity
    for col in table.columns:  # declaration order
        if col.name in needs.columns:
            fields.append(InputField(col.name, table.capacity, col.bits, offset))
            offset += table.capacity * col.bits
    return InputLayout(party, table.capacity, tuple(fields), needs)


def compile_manifest(manifest: Manifest) -> CompiledStatistic:
    """The statistic's program and layouts (see the module docstring); nothing runs until it is used."""
    stat = statistic_for(manifest)
    needs = stat.needs()
    layouts = {party: input_layout(manifest, party, needs[party]) for party in Party}
    specs = stat.output_specs()
    outputs: dict[Party, tuple[OutputField, ...]] = {}
    for party in Party:
        names = manifest.outputs.garbler if party == Party.GARBLER else manifest.outputs.evaluator
        fields: list[OutputField] = []
        if names:
            fields.append(OutputField(OutputSpec(WITHHELD, 1, description="1 when results are withheld"), 0))
        offset = 1 if names else 0
        for name in names:
            fields.append(OutputField(specs[name], offset))
            offset += specs[name].bits
        outputs[party] = tuple(fields)
    return CompiledStatistic(manifest, stat, layouts, outputs)
