"""Backends: what a program's AND, XOR and NOT mean, and what it costs.

Theory of operation
-------------------
A statistic is a *program*: Python code that calls the builder's word operations (``jointstat.circuit.builder``)
on ``Bits`` values. The builder reduces every word operation to the three primitives of this module — ``xor``,
``and_`` and ``not_`` over whole arrays — plus ``input``, ``output`` and ``constant``. The same program runs, line
for line, against interchangeable backends:

- ``PlainBackend`` — bits as 0/1 bytes: the answer in the clear, for tests and the reference value;
- ``CountBackend`` — no payload at all, only shapes and which bits are public: counts AND, XOR and NOT gates,
  inputs and outputs at any size in a fraction of the time, and a structural digest of the program;
- the garbler's and the evaluator's backends (``jointstat.garble.backends``): zero labels in, garbled tables out
  in AND order; active labels and the same tables in, in the same order.

Both parties run the same deterministic program, so they meet the AND gates in the same order without ever
writing the circuit down: gate j is the j-th secret AND lane the program asks for (lanes of one call in C order).
Memory follows what the program holds, not the size of the circuit (pipelined garbling, Huang–Evans–Katz–Malka,
USENIX Security 2011).

Folding. Every backend applies the same rules on the public bits (``Bits.pub``), so all of them agree on which
lanes become gates: AND with a public 0 is 0, AND with a public 1 passes the other operand through, XOR of two
public bits is public, NOT of a public bit is public. Only an AND of two secret bits costs anything (two
ciphertexts with half-gates); XOR and NOT are free with free-XOR (Kolesnikov–Schneider, ICALP 2008). Public bits
carry the backend's payload for their value (``_const_data``), chosen so that XOR with a public 0 leaves the other
payload unchanged and XOR with a public 1 is its NOT; so moving and XORing bits never needs to look at ``pub``.

A subclass supplies the payload operations: ``_const_data`` (public values → payload), ``_xor_data``,
``_not_data``, ``_and_data`` (an AND of secret bits only), ``_input_data`` and ``_output_data``.
"""

from __future__ import annotations

import hashlib
import math
import struct
from abc import ABC, abstractmethod
from collections.abc import Mapping

import numpy as np

from jointstat.circuit.bits import PUB_DTYPE, SECRET, Bits, Meter, broadcast
from jointstat.circuit.model import CircuitError, Party

DIGEST_DOMAIN = b"jointstat.program.v2\n"

_OP_AND, _OP_XOR, _OP_NOT, _OP_INPUT, _OP_OUTPUT = range(5)


def _as_bits(value: object) -> Bits:
    if not isinstance(value, Bits):
        raise CircuitError(f"expected Bits, got {type(value).__name__} (make constants with the builder)")
    return value


class Backend(ABC):
    """The three primitives with constant folding, gate counts and input/output bookkeeping."""

    def __init__(self) -> None:
        self.and_gates = 0  # AND gates of two secret operands: the ones that cost ciphertexts
        self.xor_gates = 0  # XOR gates with a secret result (free)
        self.not_gates = 0  # NOT gates with a secret result (free)
        self.and_calls = 0  # primitive AND calls that made at least one gate
        self.depth = 0  # deepest AND depth of any value so far (an upper bound, see Bits.depth)
        self.inputs_used = {p: 0 for p in Party}
        self.outputs_given = {p: 0 for p in Party}
        self.meter = Meter()  # bits the program holds (see Bits.buffer)
        self.widest_call = 0  # the most bits one primitive call produced (its temporaries scale with it)
        self._structure = hashlib.sha256(DIGEST_DOMAIN)

    # -- payload operations supplied by a backend -------------------------------------------------------------
    @abstractmethod
    def _const_data(self, values: np.ndarray) -> np.ndarray | None:
        """The payload of public bits with the given 0/1 values (any shape)."""

    @abstractmethod
    def _xor_data(self, a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray | None: ...

    @abstractmethod
    def _not_data(self, a: np.ndarray | None) -> np.ndarray | None: ...

    @abstractmethod
    def _and_data(self, a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray | None:
        """AND of secret bits only: ``a`` and ``b`` have one shape; gates are numbered in C order."""

    @abstractmethod
    def _input_data(self, party: Party, n: int) -> np.ndarray | None:
        """The payload of ``party``'s next ``n`` input bits, flat."""

    @abstractmethod
    def _output_data(self, party: Party, data: np.ndarray | None) -> None:
        """Record ``data`` (flat) as ``party``'s next output bits."""

    # -- structure ---------------------------------------------------------------------------------------------
    def _note(self, op: int, count: int, extra: int = 0) -> None:
        self._structure.update(struct.pack("<BQQ", op, count, extra))

    def structure_digest(self) -> bytes:
        """SHA-256 of the sequence of gate batches, inputs and outputs so far (FIPS 180-4)."""
        return self._structure.copy().digest()

    # -- inputs, outputs, constants ----------------------------------------------------------------------------
    def input(self, party: Party, shape: int | tuple[int, ...]) -> Bits:
        """The next input bits of ``party`` in the given shape (C order is the party's input bit order)."""
        shape = (shape,) if isinstance(shape, int) else tuple(int(s) for s in shape)
        party = Party(party)
        n = math.prod(shape)
        data = self._input_data(party, n)
        self.inputs_used[party] += n
        self._note(_OP_INPUT, n, int(party))
        return Bits(shape, None if data is None else data.reshape(shape), buffer=self.meter.buffer(n))

    def output(self, party: Party, bits: Bits) -> slice:
        """Give ``bits`` (flattened in C order) to ``party`` as its next output bits; returns their slice."""
        party = Party(party)
        b = _as_bits(bits)
        start = self.outputs_given[party]
        self._output_data(party, None if b.data is None else b.data.reshape(-1))
        self.outputs_given[party] += b.size
        self._note(_OP_OUTPUT, b.size, int(party))
        return slice(start, start + b.size)

    def constant(self, values: object) -> Bits:
        """Public bits with the given 0/1 values (any shape)."""
        arr = np.asarray(values)
        if arr.size and (not np.issubdtype(arr.dtype, np.integer) and arr.dtype != np.bool_):
            raise CircuitError(f"constant bits must be 0 or 1, got dtype {arr.dtype}")
        bits = arr.astype(np.uint8)
        if bits.size and int(bits.max()) > 1:
            raise CircuitError("constant bits must be 0 or 1")
        return Bits(
            bits.shape, self._const_data(bits), bits.astype(PUB_DTYPE), buffer=self.meter.buffer(bits.size)
        )

    def zeros(self, shape: int | tuple[int, ...]) -> Bits:
        """Public zero bits; costs no memory beyond one payload however large the shape."""
        shape = (shape,) if isinstance(shape, int) else tuple(shape)
        one = self._const_data(np.zeros((), dtype=np.uint8))
        data = None if one is None else np.broadcast_to(one, shape)
        return Bits(shape, data, np.broadcast_to(np.int8(0), shape), buffer=self.meter.buffer(1))

    def ones(self, shape: int | tuple[int, ...]) -> Bits:
        shape = (shape,) if isinstance(shape, int) else tuple(shape)
        one = self._const_data(np.ones((), dtype=np.uint8))
        data = None if one is None else np.broadcast_to(one, shape)
        return Bits(shape, data, np.broadcast_to(np.int8(1), shape), buffer=self.meter.buffer(1))

    # -- the primitives ------------------------------------------------------------------------------------------
    def _finish(
        self, shape: tuple[int, ...], data: np.ndarray | None, pub: np.ndarray | None, depth: int
    ) -> Bits:
        if data is not None and data.shape != shape:
            raise CircuitError(
                f"internal: a backend made payload of shape {data.shape} for bits of shape {shape}"
            )
        if pub is not None and not bool((pub >= 0).any()):
            pub = None
        if depth > self.depth:
            self.depth = depth
        n = math.prod(shape)
        if n > self.widest_call:
            self.widest_call = n
        return Bits(shape, data, pub, depth, self.meter.buffer(n))

    def not_(self, a: Bits) -> Bits:
        a = _as_bits(a)
        data = self._not_data(a.data)
        if a.pub is None:
            self.not_gates += a.size
            self._note(_OP_NOT, a.size)
            return self._finish(a.shape, data, None, a.depth)
        secret = int((a.pub < 0).sum())
        self.not_gates += secret
        self._note(_OP_NOT, secret)
        pub = np.where(a.pub >= 0, 1 - a.pub, SECRET).astype(PUB_DTYPE)
        return self._finish(a.shape, data, pub, a.depth)

    def xor(self, a: Bits, b: Bits) -> Bits:
        a, b = broadcast(_as_bits(a), _as_bits(b))
        data = self._xor_data(a.data, b.data)
        depth = max(a.depth, b.depth)
        if a.pub is None and b.pub is None:
            self.xor_gates += a.size
            self._note(_OP_XOR, a.size)
            return self._finish(a.shape, data, None, depth)
        pa = a.pub if a.pub is not None else np.int8(SECRET)
        pb = b.pub if b.pub is not None else np.int8(SECRET)
        both = (pa >= 0) & (pb >= 0)
        pub = np.broadcast_to(np.where(both, pa ^ pb, SECRET).astype(PUB_DTYPE), a.shape)
        secret = a.size - int(np.count_nonzero(both)) if np.ndim(both) else (0 if both else a.size)
        self.xor_gates += secret
        self._note(_OP_XOR, secret)
        return self._finish(a.shape, data, pub, depth)

    def and_(self, a: Bits, b: Bits) -> Bits:
        a, b = broadcast(_as_bits(a), _as_bits(b))
        shape = a.shape
        depth = max(a.depth, b.depth) + 1
        if a.pub is None and b.pub is None:
            n = a.size
            data = self._and_data(a.data, b.data) if n else a.data
            self._count_and(n)
            return self._finish(shape, data, None, depth if n else max(a.depth, b.depth))
        pa = a.pub if a.pub is not None else np.broadcast_to(np.int8(SECRET), shape)
        pb = b.pub if b.pub is not None else np.broadcast_to(np.int8(SECRET), shape)
        gate = (pa < 0) & (pb < 0)
        zero = (pa == 0) | (pb == 0)
        # Result: 0 where an operand is public 0; the other operand where one is public 1; a gate where both are
        # secret.
        pub = np.where(zero, 0, np.where(pa == 1, pb, np.where(pb == 1, pa, SECRET))).astype(PUB_DTYPE)
        n = int(np.count_nonzero(gate))
        data = None
        if a.data is not None and b.data is not None:
            data = np.where(pa == 1, b.data, a.data)
            if zero.any():
                data[zero] = self._const_data(np.zeros((), dtype=np.uint8))
            if n:
                data[gate] = self._and_data(a.data[gate], b.data[gate])
        self._count_and(n)
        return self._finish(shape, data, pub, depth if n else max(a.depth, b.depth))

    def _count_and(self, n: int) -> None:
        self.and_gates += n
        if n:
            self.and_calls += 1
        self._note(_OP_AND, n)

    # -- summary -------------------------------------------------------------------------------------------------
    def counts(self) -> dict[str, int]:
        return {
            "and_gates": self.and_gates,
            "xor_gates": self.xor_gates,
            "not_gates": self.not_gates,
            "and_calls": self.and_calls,
            "and_depth": self.depth,
            "peak_bits": self.meter.peak,
            "widest_call": self.widest_call,
            "garbler_inputs": self.inputs_used[Party.GARBLER],
            "evaluator_inputs": self.inputs_used[Party.EVALUATOR],
            "garbler_outputs": self.outputs_given[Party.GARBLER],
            "evaluator_outputs": self.outputs_given[Party.EVALUATOR],
        }


class CountBackend(Backend):
    """Shapes only: counts gates, inputs and outputs, and digests the program's structure."""

    def _const_data(self, values: np.ndarray) -> None:
        return None

    def _xor_data(self, a: np.ndarray | None, b: np.ndarray | None) -> None:
        return None

    def _not_data(self, a: np.ndarray | None) -> None:
        return None

    def _and_data(self, a: np.ndarray | None, b: np.ndarray | None) -> None:
        return None

    def _input_data(self, party: Party, n: int) -> None:
        return None

    def _output_data(self, party: Party, data: np.ndarray | None) -> None:
        return None


class PlainBackend(Backend):
    """Bits in the clear (0/1 bytes): the reference answer of a program.

    ``inputs`` gives each party's input bits in order; ``outputs(party)`` returns what the program gave a party.
    """

    def __init__(self, inputs: Mapping[Party, object] | None = None) -> None:
        super().__init__()
        given = inputs or {}
        self._inputs = {p: np.asarray(given.get(p, np.zeros(0)), dtype=np.uint8).reshape(-1) for p in Party}
        for p, bits in self._inputs.items():
            if bits.size and int(bits.max()) > 1:
                raise CircuitError(f"{p.name.lower()} inputs: bits must be 0 or 1")
        self._outputs: dict[Party, list[np.ndarray]] = {p: [] for p in Party}

    def _const_data(self, values: np.ndarray) -> np.ndarray:
        return np.asarray(values, dtype=np.uint8)

    def _xor_data(self, a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray:
        assert a is not None and b is not None
        return np.bitwise_xor(a, b)

    def _not_data(self, a: np.ndarray | None) -> np.ndarray:
        assert a is not None
        return np.bitwise_xor(a, np.uint8(1))

    def _and_data(self, a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray:
        assert a is not None and b is not None
        return np.bitwise_and(a, b)

    def _input_data(self, party: Party, n: int) -> np.ndarray:
        used = self.inputs_used[party]
        have = self._inputs[party].size
        if used + n > have:
            raise CircuitError(
                f"{party.name.lower()} inputs: the program reads {used + n} bits but {have} were given"
            )
        return self._inputs[party][used : used + n].copy()

    def _output_data(self, party: Party, data: np.ndarray | None) -> None:
        assert data is not None
        self._outputs[party].append(np.array(data, dtype=np.uint8))

    def outputs(self, party: Party) -> np.ndarray:
        parts = self._outputs[Party(party)]
        return np.concatenate(parts) if parts else np.zeros(0, dtype=np.uint8)

    def check_inputs_used(self) -> None:
        """Raise if some given input bits were never read (a layout mismatch)."""
        for p in Party:
            if self.inputs_used[p] != self._inputs[p].size:
                raise CircuitError(
                    f"{p.name.lower()} inputs: {self._inputs[p].size} bits given, the program read {self.inputs_used[p]}"
                )
