"""Manifest → compiled statistic: the circuit, each party's input and output layout, decoding, and the digest.

Theory of operation
-------------------
Both parties compile the same manifest to the same circuit: everything that shapes it (capacities, column types,
the statistic's parameters, who receives what) is public and in the manifest; the true row counts are secret and
enter only as validity bits.

Inputs of a party, in this order (the encoder in ``jointstat.circuit.inputs`` produces exactly this layout):
the validity bit of each of its ``capacity`` rows, then for each column the statistic reads, in the order the
table declares them, ``capacity`` rows × the column's bits, row by row, each value least significant bit first.

The statistic builds its results (``library.registry``); the compiler then applies the disclosure rule inside the
circuit: allow = ok ∧ (count ≥ min_count), every result bit is ANDed with allow, and withheld = ¬allow. A party's
outputs are its ``withheld`` bit followed by the outputs the manifest gives it, in the order listed, each value
least significant bit first. ``decode`` turns a party's output bits into named Python values (integers, floats for
fixed-point outputs, booleans for flags, strings for choices), or ``None`` everywhere but ``withheld`` when the
result was withheld.

Digest: SHA-256 (FIPS 180-4) over "jointstat.manifest.v1\\n", the manifest's canonical JSON (RFC 8785 style, see
``manifest.canonical_json``), a zero byte and the circuit's digest (``Circuit.digest``). Both nodes compare it
before anything secret moves; the same file gives the same digest on any machine and any run.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import bits_to_int
from jointstat.circuit.layers import LayeredCircuit, schedule
from jointstat.circuit.library import blocks
from jointstat.circuit.library.registry import (
    ROLES,
    BuildContext,
    OutputSpec,
    Statistic,
    StatisticResult,
    TableNeeds,
    TableWires,
    statistic_for,
)
from jointstat.circuit.manifest import Manifest
from jointstat.circuit.model import ONE_WIRE, Circuit, Party

DIGEST_DOMAIN = b"jointstat.manifest.v1\n"
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
    statistic: Statistic
    circuit: Circuit
    inputs: dict[Party, InputLayout]
    outputs: dict[Party, tuple[OutputField, ...]]
    extra: dict[str, Any] = field(default_factory=dict)

    @cached_property
    def layered(self) -> LayeredCircuit:
        return schedule(self.circuit)

    @cached_property
    def digest(self) -> str:
        """Hex SHA-256 over the domain, the manifest's canonical JSON and the circuit digest (module docstring)."""
        h = hashlib.sha256(DIGEST_DOMAIN)
        h.update(self.manifest.canonical())
        h.update(b"\0")
        h.update(self.circuit.digest())
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
            raise ValueError(f"{ROLES[Party(party)]} outputs: expected {expected} bits, got {arr.shape[0]}")
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
    """Build the statistic's circuit (see the module docstring for the layouts)."""
    stat = statistic_for(manifest)
    needs = stat.needs()
    bld = Builder()
    layouts: dict[Party, InputLayout] = {}
    tables: dict[Party, TableWires] = {}
    for party in Party:
        layout = input_layout(manifest, party, needs[party])
        table = manifest.table(party)
        valid = bld.input(party, table.capacity)
        cols = {}
        for f in layout.fields[1:]:
            cols[f.name] = bld.input(party, (f.rows, f.width))
        layouts[party] = layout
        tables[party] = TableWires(
            party, table.capacity, valid, cols, {c.name: c for c in table.columns if c.name in cols}
        )
    wanted = frozenset(manifest.outputs.garbler) | frozenset(manifest.outputs.evaluator)
    min_count = manifest.disclosure.min_count
    ctx = BuildContext(bld, manifest, tables, wanted, needs_count=min_count > 0)
    result: StatisticResult = stat.build(ctx)
    allow = np.asarray(ONE_WIRE if result.ok is None else result.ok, dtype=np.int64)
    if min_count > 0:
        if result.count is None:
            raise ValueError(
                f"statistic {stat.name!r} gives no count, so the disclosure rule cannot be applied"
            )
        allow = bld.and_(allow, blocks.at_least(bld, result.count, min_count))
    withheld = bld.not_(allow)
    specs = {s.name: s for s in stat.outputs()}
    outputs: dict[Party, tuple[OutputField, ...]] = {}
    gated: dict[str, np.ndarray] = {}
    for party in Party:
        names = manifest.outputs.garbler if party == Party.GARBLER else manifest.outputs.evaluator
        fields: list[OutputField] = []
        if names:
            bld.output(party, np.atleast_1d(withheld))
            fields.append(OutputField(OutputSpec(WITHHELD, 1, description="1 when results are withheld"), 0))
        offset = 1 if names else 0
        for name in names:
            spec = specs[name]
            wires = np.asarray(result.values[name], dtype=np.int64)
            if wires.shape != (*spec.shape, spec.width):
                raise ValueError(
                    f"statistic {stat.name!r} output {name!r}: built {wires.shape}, declared {(*spec.shape, spec.width)}"
                )
            if name not in gated:
                gated[name] = blocks.gate(bld, wires, allow)
            bld.output(party, gated[name])
            fields.append(OutputField(spec, offset))
            offset += spec.bits
        outputs[party] = tuple(fields)
    circuit = bld.build()
    return CompiledStatistic(manifest, stat, circuit, layouts, outputs, dict(result.extra))
