"""The circuit model: AND, XOR and NOT gates over numbered wires, held as numpy arrays.

Theory of operation
-------------------
A circuit has ``n_wires`` wires. Wire 0 carries the public constant 0 and wire 1 the public constant 1 (a
constant's wire number is its value, which the builder exploits for constant folding). Each party's inputs are an
ordered array of wire numbers (bit k of that party's input vector drives ``inputs[party][k]``); each party's
outputs likewise (bit k of that party's output vector is read from ``outputs[party][k]``), so a party can be given
the decoding of its own outputs only.

Gate g has kind ``kinds[g]``, reads ``in0[g]`` (and ``in1[g]``; -1 for NOT) and defines ``out[g]``. Gates are
stored in an order in which every wire is defined before it is read; ``validate`` checks this and every other
structural rule and names the first offending gate. Nothing is one Python object per gate: a circuit of 10^7 gates
is four arrays.

``canonical_bytes`` is a fixed, versioned, little-endian serialisation; ``digest`` is its SHA-256 (FIPS 180-4), the
same on every machine and run. Both parties compare it before any secret moves.
"""

from __future__ import annotations

import hashlib
import struct
from collections.abc import Iterator
from dataclasses import dataclass, field
from enum import IntEnum

import numpy as np

ZERO_WIRE = 0
ONE_WIRE = 1
CANONICAL_MAGIC = b"jointstat.circuit.v1\n"
WIRE_DTYPE = np.dtype(np.int32)
WIRE_LIMIT = 2**31 - 1  # wire numbers are stored as 32-bit integers


class CircuitError(ValueError):
    """A structurally malformed circuit; the message names the gate index (or the input/output) and the rule."""


class GateKind(IntEnum):
    XOR = 0
    AND = 1
    NOT = 2


class Party(IntEnum):
    """The two roles of Yao's protocol. The garbler encrypts the circuit; the evaluator evaluates it."""

    GARBLER = 0
    EVALUATOR = 1


def _wire_array(values: object, what: str, dtype: np.dtype | type = np.int64) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise CircuitError(f"{what}: expected a one-dimensional array of wire numbers, got shape {arr.shape}")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        raise CircuitError(f"{what}: wire numbers must be integers, got dtype {arr.dtype}")
    if arr.size and (int(arr.min()) < -WIRE_LIMIT or int(arr.max()) > WIRE_LIMIT):
        bad = int(np.argmax((arr < -WIRE_LIMIT) | (arr > WIRE_LIMIT)))
        raise CircuitError(f"{what}, entry {bad}: wire number {int(arr[bad])} does not fit in 32 bits")
    return np.ascontiguousarray(arr, dtype=dtype)


@dataclass(frozen=True, eq=False)
class Circuit:
    """A validated Boolean circuit. Construct through ``Circuit.create`` (validates) or the builder."""

    n_wires: int
    kinds: np.ndarray
    in0: np.ndarray
    in1: np.ndarray
    out: np.ndarray
    inputs: dict[Party, np.ndarray]
    outputs: dict[Party, np.ndarray]
    _digest: list[bytes] = field(default_factory=list, repr=False)

    # -- construction -------------------------------------------------------------------------------------------
    @classmethod
    def create(
        cls,
        n_wires: int,
        kinds: object,
        in0: object,
        in1: object,
        out: object,
        inputs: dict[Party, object],
        outputs: dict[Party, object],
    ) -> Circuit:
        """Build and validate; raises ``CircuitError`` naming the first problem."""
        kinds_arr = np.asarray(kinds)
        if kinds_arr.ndim != 1:
            raise CircuitError(f"gate kinds: expected a one-dimensional array, got shape {kinds_arr.shape}")
        g = kinds_arr.shape[0]
        if int(n_wires) > WIRE_LIMIT:
            raise CircuitError(f"circuit has {int(n_wires)} wires; at most {WIRE_LIMIT} are supported")
        arrays = {}
        for name, values in (("in0", in0), ("in1", in1), ("out", out)):
            arr = _wire_array(values, f"gate {name}", WIRE_DTYPE)
            if arr.shape[0] != g:
                raise CircuitError(f"gate {name}: has {arr.shape[0]} entries but there are {g} gate kinds")
            arrays[name] = arr
        circuit = cls(
            n_wires=int(n_wires),
            kinds=np.ascontiguousarray(kinds_arr, dtype=np.uint8),
            in0=arrays["in0"],
            in1=arrays["in1"],
            out=arrays["out"],
            inputs={
                Party(p): _wire_array(inputs.get(p, []), f"{Party(p).name.lower()} inputs") for p in Party
            },
            outputs={
                Party(p): _wire_array(outputs.get(p, []), f"{Party(p).name.lower()} outputs") for p in Party
            },
        )
        if (kinds_arr.astype(np.int64) != circuit.kinds).any():
            raise CircuitError(f"gate {int(np.argmax(kinds_arr != circuit.kinds))}: unknown gate kind")
        circuit.validate()
        return circuit

    # -- sizes --------------------------------------------------------------------------------------------------
    @property
    def n_gates(self) -> int:
        return int(self.kinds.shape[0])

    def count(self, kind: GateKind) -> int:
        return int(np.count_nonzero(self.kinds == kind))

    @property
    def and_count(self) -> int:
        return self.count(GateKind.AND)

    def n_inputs(self, party: Party) -> int:
        return int(self.inputs[party].shape[0])

    def n_outputs(self, party: Party) -> int:
        return int(self.outputs[party].shape[0])

    # -- validation ---------------------------------------------------------------------------------------------
    def validate(self) -> None:
        """Check every structural rule; raise ``CircuitError`` naming the first offending gate or wire list."""
        n, g = self.n_wires, self.n_gates
        if n < 2:
            raise CircuitError(f"circuit has {n} wires; wires 0 and 1 (the constants) must exist")
        bad_kind = ~np.isin(self.kinds, [int(k) for k in GateKind])
        if bad_kind.any():
            i = int(np.argmax(bad_kind))
            raise CircuitError(f"gate {i}: unknown gate kind {int(self.kinds[i])}")
        is_not = self.kinds == GateKind.NOT
        for name, arr, allowed_neg in (
            ("out", self.out, None),
            ("in0", self.in0, None),
            ("in1", self.in1, is_not),
        ):
            low = arr < 0 if allowed_neg is None else (arr < 0) & ~allowed_neg
            bad = low | (arr >= n)
            if bad.any():
                i = int(np.argmax(bad))
                raise CircuitError(
                    f"gate {i}: {name} wire {int(arr[i])} is out of range (the circuit has {n} wires, 0..{n - 1})"
                )
        if (is_not & (self.in1 != -1)).any():
            i = int(np.argmax(is_not & (self.in1 != -1)))
            raise CircuitError(f"gate {i}: a NOT gate has one input; in1 must be -1, got {int(self.in1[i])}")

        # Where each wire is defined: -2 constants, -1 inputs, g for gates; UNDEF if never.
        undefined = np.iinfo(np.int32).max
        defined_at = np.full(n, undefined, dtype=np.int32)
        defined_at[[ZERO_WIRE, ONE_WIRE]] = -2
        for party in Party:
            wires = self.inputs[party]
            label = f"{party.name.lower()} input"
            if wires.size and ((wires < 0) | (wires >= n)).any():
                k = int(np.argmax((wires < 0) | (wires >= n)))
                raise CircuitError(f"{label} {k}: wire {int(wires[k])} is out of range (0..{n - 1})")
            taken = defined_at[wires] != undefined
            if taken.any():
                k = int(np.argmax(taken))
                raise CircuitError(
                    f"{label} {k}: wire {int(wires[k])} is defined twice (a constant or an input)"
                )
            # duplicates within the same list
            uniq, first = np.unique(wires, return_index=True)
            if uniq.size != wires.size:
                dup_pos = np.setdiff1d(np.arange(wires.size), first)[0]
                raise CircuitError(f"{label} {int(dup_pos)}: wire {int(wires[dup_pos])} is defined twice")
            defined_at[wires] = -1
        if g:
            out_prior = defined_at[self.out] != undefined
            if out_prior.any():
                i = int(np.argmax(out_prior))
                raise CircuitError(
                    f"gate {i}: output wire {int(self.out[i])} is defined twice (it is a constant or an input)"
                )
            # Scatter each gate's index onto its output wire; a wire defined by two gates keeps only one of them,
            # so the other gate reads back a different index.
            gate_idx = np.arange(g, dtype=np.int32)
            defined_at[self.out] = gate_idx
            clash = np.flatnonzero(defined_at[self.out] != gate_idx)
            if clash.size:
                i = int(clash[0])
                j = int(defined_at[self.out[i]])
                raise CircuitError(
                    f"gate {max(i, j)}: output wire {int(self.out[i])} is defined twice (also by gate {min(i, j)})"
                )
            for name, arr, mask in (("in0", self.in0, None), ("in1", self.in1, ~is_not)):
                where = defined_at[np.where(arr < 0, 0, arr)]
                if mask is not None:
                    where = np.where(mask, where, -2)
                dangling = where == undefined
                late = (where >= gate_idx) & ~dangling
                if dangling.any() or late.any():
                    i_d = int(np.argmax(dangling)) if dangling.any() else g
                    i_l = int(np.argmax(late)) if late.any() else g
                    i = min(i_d, i_l)
                    w = int(arr[i])
                    if i == i_d:
                        raise CircuitError(
                            f"gate {i}: {name} reads dangling wire {w}: no gate, input or constant defines it"
                        )
                    raise CircuitError(
                        f"gate {i}: {name} reads wire {w} before gate {int(defined_at[w])} defines it"
                    )
        for party in Party:
            wires = self.outputs[party]
            label = f"{party.name.lower()} output"
            bad = (wires < 0) | (wires >= n)
            if bad.any():
                k = int(np.argmax(bad))
                raise CircuitError(f"{label} {k}: wire {int(wires[k])} is out of range (0..{n - 1})")
            undef = defined_at[wires] == undefined
            if undef.any():
                k = int(np.argmax(undef))
                raise CircuitError(f"{label} {k}: dangling wire {int(wires[k])}: nothing defines it")

    # -- identity -----------------------------------------------------------------------------------------------
    def _canonical_parts(self, chunk: int = 1 << 20) -> Iterator[bytes]:
        """The canonical serialisation in pieces: header, gate arrays, then inputs and outputs per party.

        Every integer is little-endian; wire numbers are 64-bit so the format does not depend on the circuit's size.
        """
        yield CANONICAL_MAGIC
        yield struct.pack(
            "<QQQQQQ",
            self.n_wires,
            self.n_gates,
            self.n_inputs(Party.GARBLER),
            self.n_inputs(Party.EVALUATOR),
            self.n_outputs(Party.GARBLER),
            self.n_outputs(Party.EVALUATOR),
        )
        yield self.kinds.astype("<u1").tobytes()
        arrays = [self.in0, self.in1, self.out]
        arrays += [self.inputs[p] for p in Party] + [self.outputs[p] for p in Party]
        for arr in arrays:
            for start in range(0, arr.shape[0], chunk):
                yield arr[start : start + chunk].astype("<i8").tobytes()

    def canonical_bytes(self) -> bytes:
        """The versioned little-endian serialisation the digest is taken over."""
        return b"".join(self._canonical_parts())

    def digest(self) -> bytes:
        """SHA-256 of ``canonical_bytes``, computed once and in pieces (no buffer of the whole serialisation)."""
        if not self._digest:
            h = hashlib.sha256()
            for part in self._canonical_parts():
                h.update(part)
            self._digest.append(h.digest())
        return self._digest[0]

    def hexdigest(self) -> str:
        return self.digest().hex()

    def summary(self) -> dict[str, int]:
        return {
            "wires": self.n_wires,
            "gates": self.n_gates,
            "and_gates": self.count(GateKind.AND),
            "xor_gates": self.count(GateKind.XOR),
            "not_gates": self.count(GateKind.NOT),
            "garbler_inputs": self.n_inputs(Party.GARBLER),
            "evaluator_inputs": self.n_inputs(Party.EVALUATOR),
            "garbler_outputs": self.n_outputs(Party.GARBLER),
            "evaluator_outputs": self.n_outputs(Party.EVALUATOR),
        }
