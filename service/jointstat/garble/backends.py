"""The garbler's and the evaluator's backends: a program garbled or evaluated as it runs.

Theory of operation
-------------------
Both parties run the same program (a statistic, a reference circuit) against a backend of this module (see
``jointstat.circuit.backend`` for the backend model). A bit's payload is a 16-byte wire label held as one ``V16``
cell; the garbler holds zero labels W⁰, the evaluator the active labels W⁰ ⊕ v·Δ.

- XOR is free on both sides (free-XOR): C = A ⊕ B. NOT: the garbler's C⁰ = A⁰ ⊕ Δ, the evaluator keeps A.
- AND of secret bits goes to the AND scheme (``HalfGates``) in steps of at most ``STEP`` gates, each step's gates
  numbered consecutively from the session's running AND index. The garbler writes each step's garbled material
  into the current chunk of the table stream and hands a full chunk to ``sink``; the evaluator takes exactly that
  many bytes from ``source`` in the same order. The step boundaries are the same on both sides (cut from the start
  of each AND call), so even a scheme whose material per step is not a multiple of a gate's stays in step.
- Public bits carry the all-zero label on the evaluator's side and, on the garbler's, 0 for a public 0 and Δ for
  a public 1: a valid free-XOR label pair (W⁰, W⁰ ⊕ v·Δ) for the public value v, known to both. XOR with a public
  0 therefore passes the other operand through unchanged, and XOR with a public 1 is its NOT, exactly as the
  folding rules say; nothing has to be sent for constants. Public bits never reach the garbling hash (an AND with a
  public operand folds), and where one is an output its check tags are H(0 ⊕ v·Δ, t) for a fresh tweak t, which the
  tweakable circular correlation-robust hash keeps pseudorandom (Guo–Katz–Wang–Yu, S&P 2020, §7.3).
- Inputs: the next bits of a party's input vector take the next labels of that party's label array (the garbler's
  own random zero labels, the evaluator's zero labels from OT; on the evaluator's side the labels received and the
  labels from OT). Outputs: the labels given to each party are kept, for decoding (``jointstat.garble.outputs``).

Memory: a label lives as long as the program holds a value that refers to it; the backends keep only the input
label arrays, one chunk of tables and fixed-size scratch space.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

import numpy as np

from jointstat.circuit.backend import Backend
from jointstat.circuit.model import Party
from jointstat.garble.halfgates import STEP, GarbleError, HalfGates
from jointstat.primitives.blocks import BLOCK_DTYPE, CELL_DTYPE

PAIRS = np.dtype((np.uint64, (2,)))  # a V16 cell seen as two words, whatever the array's strides
DEFAULT_CHUNK_BYTES = 1 << 20

Sink = Callable[[memoryview], None]
Source = Callable[[int], memoryview]


def _contiguous(a: np.ndarray) -> np.ndarray:
    """``a`` itself when C-contiguous, else a C-contiguous copy (0-d arrays stay 0-d)."""
    return a if a.flags.c_contiguous else np.array(a, order="C")


def _cells(blocks: np.ndarray) -> np.ndarray:
    """(n, 2) blocks → (n,) cells (a view)."""
    return np.ascontiguousarray(blocks, dtype=BLOCK_DTYPE).view(CELL_DTYPE).reshape(blocks.shape[0])


def _blocks(cells: np.ndarray) -> np.ndarray:
    """Cells of any shape and strides → contiguous (n, 2) blocks (a copy only when needed)."""
    flat = _contiguous(cells).reshape(-1)
    return flat.view(BLOCK_DTYPE).reshape(flat.shape[0], 2)


def _pairs(cells: np.ndarray) -> np.ndarray:
    """Cells of any shape → (n, 2) words, a view when the cells can be flattened without a copy."""
    flat = cells.reshape(-1)
    return flat.view(PAIRS) if flat.ndim == 1 else flat


def _xor_cells(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    ca, cb = _contiguous(a), _contiguous(b)
    out = np.empty(ca.shape, dtype=CELL_DTYPE)
    np.bitwise_xor(ca.view(PAIRS), cb.view(PAIRS), out=out.view(PAIRS))
    return out


class _LabelBackend(Backend):
    """What both sides share: labels as cells, inputs taken in order, AND calls cut into steps."""

    def __init__(self, scheme: HalfGates | None, input_labels: Mapping[Party, np.ndarray]) -> None:
        super().__init__()
        self.scheme = scheme or HalfGates()
        self._input_cells = {}
        for p in Party:
            labels = np.asarray(input_labels.get(p, np.zeros((0, 2), dtype=BLOCK_DTYPE)), dtype=BLOCK_DTYPE)
            if labels.ndim != 2 or labels.shape[1] != 2:
                raise GarbleError(
                    f"{p.name.lower()} input labels: expected (n, 2) blocks, got {labels.shape}"
                )
            self._input_cells[p] = _cells(labels)
        self._outputs: dict[Party, list[np.ndarray]] = {p: [] for p in Party}
        self.next_gate = 0  # the running AND index: gate j gets tweaks from j

    def _xor_data(self, a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray:
        assert a is not None and b is not None
        return _xor_cells(a, b)

    def _input_data(self, party: Party, n: int) -> np.ndarray:
        used = self.inputs_used[party]
        have = self._input_cells[party].shape[0]
        if used + n > have:
            raise GarbleError(
                f"{party.name.lower()} inputs: the program reads {used + n} bits but {have} labels were given"
            )
        return self._input_cells[party][used : used + n]

    def _output_data(self, party: Party, data: np.ndarray | None) -> None:
        assert data is not None
        self._outputs[party].append(_contiguous(data))

    def output_labels(self, party: Party) -> np.ndarray:
        """The labels of ``party``'s output bits so far, as (n, 2) blocks."""
        parts = self._outputs[Party(party)]
        if not parts:
            return np.zeros((0, 2), dtype=BLOCK_DTYPE)
        return _blocks(np.concatenate(parts))

    def check_inputs_used(self) -> None:
        for p in Party:
            if self.inputs_used[p] != self._input_cells[p].shape[0]:
                raise GarbleError(
                    f"{p.name.lower()} inputs: {self._input_cells[p].shape[0]} labels given, the program read"
                    f" {self.inputs_used[p]}"
                )


class GarblerBackend(_LabelBackend):
    """Zero labels in; garbled tables out, in AND order, through ``sink`` in chunks of ``chunk_bytes``."""

    def __init__(
        self,
        *,
        delta: np.ndarray,
        input_labels: Mapping[Party, np.ndarray],
        sink: Sink,
        chunk_bytes: int = DEFAULT_CHUNK_BYTES,
        scheme: HalfGates | None = None,
    ) -> None:
        super().__init__(scheme, input_labels)
        self.delta = np.asarray(delta, dtype=BLOCK_DTYPE).reshape(2).copy()
        if not int(self.delta[0]) & 1:
            raise GarbleError("Δ must have its least significant bit set (point-and-permute)")
        if chunk_bytes < 1:
            raise GarbleError(f"chunk_bytes must be positive, got {chunk_bytes}")
        self._const = _cells(np.stack([np.zeros(2, dtype=BLOCK_DTYPE), self.delta]))  # public 0 and public 1
        self._delta_cell = _cells(self.delta.reshape(1, 2))[0]
        self._sink = sink
        self._chunk = np.empty(chunk_bytes, dtype=np.uint8)
        self._fill = 0
        self._scratch = np.empty(self.scheme.table_bytes(STEP), dtype=np.uint8)
        self.table_bytes_out = 0

    def _const_data(self, values: np.ndarray) -> np.ndarray:
        return self._const[np.asarray(values, dtype=np.intp)]

    def _not_data(self, a: np.ndarray | None) -> np.ndarray:
        assert a is not None
        return _xor_cells(a, np.broadcast_to(self._delta_cell, a.shape))

    def _and_data(self, a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray:
        assert a is not None and b is not None
        shape = a.shape
        a0, b0 = _pairs(a), _pairs(b)
        n = a0.shape[0]
        c0 = np.empty((n, 2), dtype=BLOCK_DTYPE)
        for s in range(0, n, STEP):
            k = min(STEP, n - s)
            size = self.scheme.table_bytes(k)
            direct = self._fill + size <= self._chunk.shape[0]
            table = self._chunk[self._fill : self._fill + size] if direct else self._scratch[:size]
            self.scheme.garble(a0[s : s + k], b0[s : s + k], self.delta, self.next_gate, c0[s : s + k], table)
            self.next_gate += k
            if direct:
                self._fill += size
                if self._fill == self._chunk.shape[0]:
                    self.flush()
            else:
                self._write(table)
            self.table_bytes_out += size
        return c0.view(CELL_DTYPE).reshape(shape)

    def _write(self, data: np.ndarray) -> None:
        at = 0
        while at < data.shape[0]:
            take = min(data.shape[0] - at, self._chunk.shape[0] - self._fill)
            self._chunk[self._fill : self._fill + take] = data[at : at + take]
            self._fill += take
            at += take
            if self._fill == self._chunk.shape[0]:
                self.flush()

    def flush(self) -> None:
        """Hand the tables written so far to the sink (call once more after the program ends)."""
        if self._fill:
            fill, self._fill = self._fill, 0
            self._sink(self._chunk.data[:fill])

    def input_labels(self, party: Party, bits: object) -> np.ndarray:
        """The labels encoding ``bits`` on ``party``'s input wires: W⁰ ⊕ bit·Δ, as (n, 2) blocks.

        The garbler sends these for its own inputs. For the evaluator's inputs the labels come from oblivious
        transfer instead; this method serves tests and one-process runs, where it stands in for an ideal OT.
        """
        zero = _blocks(self._input_cells[Party(party)])
        bit_arr = np.asarray(bits, dtype=np.uint8).reshape(-1)
        if bit_arr.shape[0] != zero.shape[0]:
            raise GarbleError(
                f"{Party(party).name.lower()} inputs: expected {zero.shape[0]} bits, got {bit_arr.size}"
            )
        if bit_arr.size and int(bit_arr.max()) > 1:
            raise GarbleError(f"{Party(party).name.lower()} inputs: bits must be 0 or 1")
        mask = (bit_arr.astype(np.uint64) * np.uint64(0xFFFFFFFFFFFFFFFF)).reshape(-1, 1)
        return zero ^ (np.broadcast_to(self.delta, zero.shape) & mask)


class EvaluatorBackend(_LabelBackend):
    """Active labels in; garbled tables taken from ``source`` in AND order."""

    def __init__(
        self,
        *,
        input_labels: Mapping[Party, np.ndarray],
        source: Source,
        scheme: HalfGates | None = None,
    ) -> None:
        super().__init__(scheme, input_labels)
        self._zero_cell = _cells(np.zeros((1, 2), dtype=BLOCK_DTYPE))[0]
        self._source = source
        self.table_bytes_in = 0

    def _const_data(self, values: np.ndarray) -> np.ndarray:
        return np.broadcast_to(self._zero_cell, np.shape(values)).copy()

    def _not_data(self, a: np.ndarray | None) -> np.ndarray:
        assert a is not None
        return a

    def _and_data(self, a: np.ndarray | None, b: np.ndarray | None) -> np.ndarray:
        assert a is not None and b is not None
        shape = a.shape
        wa, wb = _pairs(a), _pairs(b)
        n = wa.shape[0]
        c = np.empty((n, 2), dtype=BLOCK_DTYPE)
        for s in range(0, n, STEP):
            k = min(STEP, n - s)
            size = self.scheme.table_bytes(k)
            table = np.frombuffer(self._source(size), dtype=np.uint8)
            if table.shape[0] != size:
                raise GarbleError(f"table stream: asked for {size} bytes, the source gave {table.shape[0]}")
            self.scheme.evaluate(wa[s : s + k], wb[s : s + k], table, self.next_gate, c[s : s + k])
            self.next_gate += k
            self.table_bytes_in += size
        return c.view(CELL_DTYPE).reshape(shape)
