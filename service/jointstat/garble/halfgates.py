"""Garbling and evaluation: free-XOR, point-and-permute and half-gates, layer by layer over numpy arrays.

Theory of operation
-------------------
The garbler draws a global offset Δ with lsb(Δ) = 1 and, for every wire, a zero label W⁰; the one label is
W¹ = W⁰ ⊕ Δ (free-XOR, Kolesnikov–Schneider, ICALP 2008). The label's lowest bit is its signal bit
(point-and-permute, Beaver–Micali–Rogaway, STOC 1990): since lsb(Δ) = 1 the two labels of a wire have opposite
signal bits, so the evaluator knows which row to use without learning the value.

- XOR: C⁰ = A⁰ ⊕ B⁰; the evaluator computes C = A ⊕ B. NOT: C⁰ = A⁰ ⊕ Δ; the evaluator passes the label through.
  Neither costs a ciphertext.
- AND, half-gates (Zahur–Rosulek–Evans, Eurocrypt 2015, figure 2), with p_a = lsb(A⁰), p_b = lsb(B⁰), and the
  gate's global AND index j giving tweaks 2j and 2j + 1:
      T_G = H(A⁰, 2j) ⊕ H(A¹, 2j) ⊕ p_b·Δ        W_G⁰ = H(A⁰, 2j) ⊕ p_a·T_G
      T_E = H(B⁰, 2j+1) ⊕ H(B¹, 2j+1) ⊕ A⁰        W_E⁰ = H(B⁰, 2j+1) ⊕ p_b·(T_E ⊕ A⁰)
      C⁰ = W_G⁰ ⊕ W_E⁰, and the garbled table is (T_G, T_E): exactly two 16-byte ciphertexts.
  The evaluator, holding A and B with signal bits s_a, s_b, makes two hash calls:
      C = H(A, 2j) ⊕ s_a·T_G ⊕ H(B, 2j+1) ⊕ s_b·(T_E ⊕ A).
- H is the tweakable circular correlation-robust hash from fixed-key AES (Guo–Katz–Wang–Yu, S&P 2020), see
  ``jointstat.primitives.aes``.

Both sides walk the layer schedule of ``jointstat.circuit.layers``: a layer's XOR and NOT gates and its AND gates
are each a few array operations, and each layer's outputs are one contiguous slice of the label array. AND gates of
a large layer are processed in steps of at most ``STEP`` gates, so the hash runs on cache-sized batches.

Streaming: ``Garbler.tables()`` is a generator that yields the garbled tables in chunks of a bounded size, in AND
index order, while garbling continues; ``Evaluator.feed()`` accepts any split of that byte stream and evaluates as
far as the bytes reach. Neither side holds all tables.

Output decoding: for each output wire k the garbler publishes its decoding bit d = lsb(W⁰) and, indexed by signal
bit, a 64-bit check tag t_v = H(W^v, (2k + v, OUTPUT_DOMAIN)) for v = 0, 1. The evaluator reads v = lsb(W) ⊕ d and
checks the tag, so a wrong label or a wrong decoding bit is detected rather than decoded into a wrong value. The
tags are hashes of labels the evaluator does not hold for the other value, so they reveal nothing (common practice,
as in the output-authenticity checks of garbling schemes). Decoding is kept per party: the evaluator is given only
the decoding of its own outputs. For the garbler's outputs the evaluator returns the labels and the garbler checks
each is one of its two valid labels.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from jointstat.circuit.layers import LayeredCircuit
from jointstat.circuit.model import Party
from jointstat.primitives.aes import FixedKeyAES
from jointstat.primitives.blocks import BLOCK_DTYPE, as_cells, random_blocks, select_mask, signal_masks

STEP = 1 << 13  # AND gates per hashing step
TABLE_BYTES = 32  # two 16-byte ciphertexts per AND gate
DEFAULT_CHUNK_BYTES = 1 << 20
OUTPUT_DOMAIN = np.uint64(0x6A6F696E74737461)  # tweak high word for output tags; gate tweaks have high word 0


class GarbleError(ValueError):
    """Tables, labels or decoding information of the wrong size or content; the message says which and where."""


def fresh_delta() -> np.ndarray:
    """A fresh global offset Δ from the OS CSPRNG with lsb(Δ) = 1 (point-and-permute needs opposite signal bits)."""
    delta = random_blocks(1)[0].copy()
    delta[0] |= np.uint64(1)
    return delta


def _tweaks(first_and: int, k: int) -> np.ndarray:
    return np.arange(2 * first_and, 2 * (first_and + k), 2, dtype=np.uint64)


def _linear_layer(
    lc: LayeredCircuit,
    k: int,
    first_slot: int,
    labels: np.ndarray,
    cells: np.ndarray,
    delta_tile: np.ndarray | None,
) -> None:
    """Layer k's XOR gates (C = A ⊕ B on both sides) and NOT gates (garbler: C⁰ = A⁰ ⊕ Δ; evaluator: C = A).

    ``delta_tile`` is Δ repeated ``STEP`` times for the garbler and None for the evaluator. Works in steps of
    ``STEP`` gates so temporaries stay in cache; outputs go to consecutive slots from ``first_slot``.
    """
    x0, x1 = int(lc.xor_start[k]), int(lc.xor_start[k + 1])
    for g in range(x0, x1, STEP):
        m = min(STEP, x1 - g)
        dest = first_slot + (g - x0)
        left = np.take(cells, lc.xor_a[g : g + m]).view(BLOCK_DTYPE).reshape(m, 2)
        right = np.take(cells, lc.xor_b[g : g + m]).view(BLOCK_DTYPE).reshape(m, 2)
        np.bitwise_xor(left, right, out=labels[dest : dest + m])
    n0, n1 = int(lc.not_start[k]), int(lc.not_start[k + 1])
    first_not = first_slot + (x1 - x0)
    for g in range(n0, n1, STEP):
        m = min(STEP, n1 - g)
        dest = first_not + (g - n0)
        if delta_tile is None:
            np.take(cells, lc.not_a[g : g + m], out=cells[dest : dest + m])
        else:
            src = np.take(cells, lc.not_a[g : g + m]).view(BLOCK_DTYPE).reshape(m, 2)
            np.bitwise_xor(src, delta_tile[:m], out=labels[dest : dest + m])


@dataclass(frozen=True)
class OutputDecoding:
    """Decoding bits and check tags for one party's output wires."""

    bits: np.ndarray  # (n,) uint8: lsb of the zero label
    tags: np.ndarray  # (n, 2) uint64: tags[k, s] is the check tag of the label of output k with signal bit s

    def to_bytes(self) -> bytes:
        return np.packbits(self.bits, bitorder="little").tobytes() + self.tags.astype("<u8").tobytes()

    @classmethod
    def from_bytes(cls, data: bytes, count: int) -> OutputDecoding:
        packed = (count + 7) // 8
        if len(data) != packed + 16 * count:
            raise GarbleError(
                f"output decoding: expected {packed + 16 * count} bytes for {count} outputs, got {len(data)}"
            )
        bits = np.unpackbits(np.frombuffer(data[:packed], dtype=np.uint8), bitorder="little", count=count)
        tags = np.frombuffer(data[packed:], dtype="<u8").reshape(count, 2).copy()
        return cls(bits=bits.astype(np.uint8), tags=tags)


def _output_tags(perm: FixedKeyAES, labels: np.ndarray, values: np.ndarray) -> np.ndarray:
    """64-bit check tag H(label, (2k + v, OUTPUT_DOMAIN)) of the k-th output label carrying value v."""
    n = labels.shape[0]
    tweak = np.empty((n, 2), dtype=BLOCK_DTYPE)
    tweak[:, 0] = 2 * np.arange(n, dtype=np.uint64) + values.astype(np.uint64)
    tweak[:, 1] = OUTPUT_DOMAIN
    return perm.hash(labels, tweak)[:, 0]


class Garbler:
    """Garbles one layered circuit once, with a fresh Δ and fresh labels (never reuse an instance)."""

    def __init__(
        self,
        layered: LayeredCircuit,
        *,
        delta: np.ndarray | None = None,
        evaluator_zero_labels: np.ndarray | None = None,
    ) -> None:
        self.layered = layered
        self.delta = (
            fresh_delta() if delta is None else np.asarray(delta, dtype=BLOCK_DTYPE).reshape(2).copy()
        )
        if not int(self.delta[0]) & 1:
            raise GarbleError("Δ must have its least significant bit set (point-and-permute)")
        self._perm = FixedKeyAES()
        self._zero = np.empty((layered.n_slots, 2), dtype=BLOCK_DTYPE)
        first = layered.first_gate_slot
        self._zero[:first] = random_blocks(first)
        ev_slots = layered.input_slots[Party.EVALUATOR]
        if evaluator_zero_labels is not None:
            given = np.asarray(evaluator_zero_labels, dtype=BLOCK_DTYPE)
            if given.shape != (ev_slots.size, 2):
                raise GarbleError(
                    f"evaluator zero labels: expected {ev_slots.size} labels, got array of shape {given.shape}"
                )
            self._zero[ev_slots] = given
        self._cells = as_cells(self._zero)
        self._delta_tile = np.tile(self.delta, (STEP, 1))
        self._garbled = False

    # -- inputs -------------------------------------------------------------------------------------------------
    def constant_labels(self) -> np.ndarray:
        """The labels of the public constants: wire 0 carrying 0 and wire 1 carrying 1 (shape (2, 2))."""
        out = self._zero[:2].copy()
        out[1] ^= self.delta
        return out

    def input_labels(self, party: Party, bits: object) -> np.ndarray:
        """The labels encoding ``bits`` on ``party``'s input wires: W⁰ ⊕ bit·Δ.

        The garbler sends these for its own inputs. For the evaluator's inputs the labels come from oblivious
        transfer instead; this method serves tests and the one-process demo, where it stands in for an ideal OT.
        """
        slots = self.layered.input_slots[Party(party)]
        bit_arr = np.asarray(bits, dtype=np.uint8).reshape(-1)
        if bit_arr.shape[0] != slots.size:
            raise GarbleError(
                f"{Party(party).name.lower()} inputs: expected {slots.size} bits, got {bit_arr.size}"
            )
        if bit_arr.size and bit_arr.max() > 1:
            raise GarbleError(f"{Party(party).name.lower()} inputs: bits must be 0 or 1")
        return self._zero[slots] ^ (self.delta & select_mask(bit_arr))

    def evaluator_zero_labels(self) -> np.ndarray:
        """Zero labels of the evaluator's input wires (what the OT sender must transfer as the pairs (K, K ⊕ Δ))."""
        return self._zero[self.layered.input_slots[Party.EVALUATOR]].copy()

    # -- tables -------------------------------------------------------------------------------------------------
    def tables(self, chunk_bytes: int = DEFAULT_CHUNK_BYTES) -> Iterator[bytes]:
        """Garble the whole circuit, yielding the garbled tables in chunks of at most ``chunk_bytes``.

        Chunks hold whole AND gates, in AND index order. The generator may be consumed from another thread.
        """
        if self._garbled:
            raise GarbleError("this garbling has already been produced; garble again with a fresh Garbler")
        self._garbled = True
        lc = self.layered
        gates_per_chunk = max(1, chunk_bytes // TABLE_BYTES)
        out = np.empty((gates_per_chunk, 2, 2), dtype=BLOCK_DTYPE)
        filled = 0
        for k in range(lc.n_layers):
            s = int(lc.layer_start[k])
            a0, a1 = int(lc.and_start[k]), int(lc.and_start[k + 1])
            _linear_layer(lc, k, s + (a1 - a0), self._zero, self._cells, self._delta_tile)
            g = a0
            while g < a1:
                take = min(a1 - g, STEP, gates_per_chunk - filled)
                self._garble_and(g, take, s + (g - a0), out[filled : filled + take])
                filled += take
                g += take
                if filled == gates_per_chunk:
                    yield out.tobytes()
                    filled = 0
        if filled:
            yield out[:filled].tobytes()

    def _garble_and(self, first: int, k: int, dest: int, table: np.ndarray) -> None:
        lc, z, cells = self.layered, self._zero, self._cells
        dt = self._delta_tile[:k]
        x = np.empty((4 * k, 2), dtype=BLOCK_DTYPE)
        x_cells = as_cells(x)
        np.take(cells, lc.and_a[first : first + k], out=x_cells[:k])
        np.take(cells, lc.and_b[first : first + k], out=x_cells[2 * k : 3 * k])
        np.bitwise_xor(x[:k], dt, out=x[k : 2 * k])
        np.bitwise_xor(x[2 * k : 3 * k], dt, out=x[3 * k :])
        j = _tweaks(first, k)
        h = self._perm.hash(x, np.concatenate([j, j, j + 1, j + 1]))
        a0, ha0, ha1 = x[:k], h[:k], h[k : 2 * k]
        hb0, hb1 = h[2 * k : 3 * k], h[3 * k :]
        pa = signal_masks(a0)
        pb = signal_masks(x[2 * k : 3 * k])
        tg = ha0 ^ ha1  # T_G = H(A⁰) ⊕ H(A¹) ⊕ p_b·Δ
        tmp = dt & pb
        tg ^= tmp
        wg = tg & pa  # W_G⁰ = H(A⁰) ⊕ p_a·T_G
        wg ^= ha0
        te = hb0 ^ hb1  # here T_E ⊕ A⁰
        np.bitwise_and(te, pb, out=tmp)  # W_E⁰ = H(B⁰) ⊕ p_b·(T_E ⊕ A⁰)
        tmp ^= hb0
        np.bitwise_xor(wg, tmp, out=z[dest : dest + k])  # C⁰ = W_G⁰ ⊕ W_E⁰
        te ^= a0
        t_cells = as_cells(table.reshape(k, 4))
        t_cells[:, 0] = as_cells(tg)
        t_cells[:, 1] = as_cells(te)

    # -- outputs ------------------------------------------------------------------------------------------------
    def _require_garbled(self) -> None:
        if not self._garbled:
            raise GarbleError("output decoding is known only after the tables have been produced")

    def output_decoding(self, party: Party) -> OutputDecoding:
        """Decoding bits and check tags for ``party``'s outputs (give the evaluator only its own)."""
        self._require_garbled()
        zero = self._zero[self.layered.output_slots[Party(party)]]
        n = zero.shape[0]
        bits = (zero[:, 0] & np.uint64(1)).astype(np.uint8)
        t0 = _output_tags(self._perm, zero, np.zeros(n, dtype=np.uint8))
        t1 = _output_tags(self._perm, zero ^ self.delta, np.ones(n, dtype=np.uint8))
        tags = np.empty((n, 2), dtype=np.uint64)
        # The zero label has signal bit d; the one label has signal bit 1 − d.
        tags[np.arange(n), bits] = t0
        tags[np.arange(n), 1 - bits] = t1
        return OutputDecoding(bits=bits, tags=tags)

    def decode_returned(self, party: Party, labels: object) -> np.ndarray:
        """Decode output labels returned by the evaluator, checking each is one of the two valid labels."""
        self._require_garbled()
        slots = self.layered.output_slots[Party(party)]
        got = np.asarray(labels, dtype=BLOCK_DTYPE)
        if got.shape != (slots.size, 2):
            raise GarbleError(f"returned output labels: expected {slots.size} labels, got shape {got.shape}")
        zero = self._zero[slots]
        is_zero = (got == zero).all(axis=1)
        is_one = (got == (zero ^ self.delta)).all(axis=1)
        bad = ~(is_zero | is_one)
        if bad.any():
            raise GarbleError(
                f"returned output label {int(np.argmax(bad))} is neither valid label of its wire"
                f" ({int(bad.sum())} of {slots.size} invalid)"
            )
        return is_one.astype(np.uint8)


class Evaluator:
    """Evaluates one garbled circuit from the input labels and the table stream."""

    def __init__(
        self,
        layered: LayeredCircuit,
        *,
        constant_labels: np.ndarray,
        garbler_labels: np.ndarray,
        evaluator_labels: np.ndarray,
    ) -> None:
        self.layered = layered
        self._perm = FixedKeyAES()
        self._w = np.empty((layered.n_slots, 2), dtype=BLOCK_DTYPE)
        for what, labels, slots in (
            ("constant labels", constant_labels, np.array([0, 1])),
            ("garbler input labels", garbler_labels, layered.input_slots[Party.GARBLER]),
            ("evaluator input labels", evaluator_labels, layered.input_slots[Party.EVALUATOR]),
        ):
            arr = np.asarray(labels, dtype=BLOCK_DTYPE)
            if arr.shape != (slots.size, 2):
                raise GarbleError(
                    f"{what}: expected {slots.size} labels of 16 bytes, got array of shape {arr.shape}"
                )
            self._w[slots] = arr
        self._cells = as_cells(self._w)
        self._layer = 0
        self._next_and = 0  # global index of the next AND gate to evaluate
        self._pending = b""
        self._layer_linear_done = False
        self._advance(memoryview(b""))

    @property
    def done(self) -> bool:
        return self._layer >= self.layered.n_layers

    @property
    def and_gates_done(self) -> int:
        return self._next_and

    def feed(self, data: bytes | bytearray | memoryview) -> None:
        """Evaluate as far as ``data`` (the next bytes of the table stream, split anywhere) reaches."""
        if self.done:
            if len(data):
                raise GarbleError(f"received {len(data)} table bytes after the last AND gate")
            return
        buf = memoryview(self._pending + bytes(data)) if self._pending else memoryview(data).cast("B")
        self._pending = b""
        rest = self._advance(buf)
        if rest.nbytes:
            if self.done:
                raise GarbleError(
                    f"received {rest.nbytes} table bytes more than the circuit's AND gates need"
                )
            self._pending = bytes(rest)

    def _advance(self, buf: memoryview) -> memoryview:
        lc = self.layered
        while self._layer < lc.n_layers:
            k = self._layer
            s = int(lc.layer_start[k])
            a0, a1 = int(lc.and_start[k]), int(lc.and_start[k + 1])
            if not self._layer_linear_done:
                _linear_layer(lc, k, s + (a1 - a0), self._w, self._cells, None)
                self._layer_linear_done = True
            while self._next_and < a1:
                have = buf.nbytes // TABLE_BYTES
                if have == 0:
                    return buf
                take = min(a1 - self._next_and, STEP, have)
                tables = np.frombuffer(buf[: take * TABLE_BYTES], dtype=BLOCK_DTYPE).reshape(take, 4)
                self._eval_and(self._next_and, take, s + (self._next_and - a0), tables)
                buf = buf[take * TABLE_BYTES :]
                self._next_and += take
            self._layer += 1
            self._layer_linear_done = False
        return buf

    def _eval_and(self, first: int, k: int, dest: int, tables: np.ndarray) -> None:
        lc, cells = self.layered, self._cells
        x = np.empty((2 * k, 2), dtype=BLOCK_DTYPE)
        x_cells = as_cells(x)
        np.take(cells, lc.and_a[first : first + k], out=x_cells[:k])
        np.take(cells, lc.and_b[first : first + k], out=x_cells[k:])
        j = _tweaks(first, k)
        h = self._perm.hash(x, np.concatenate([j, j + 1]))
        wa, wb = x[:k], x[k:]
        t_cells = as_cells(tables)
        tg = t_cells[:, 0].copy().view(BLOCK_DTYPE).reshape(k, 2)
        te = t_cells[:, 1].copy().view(BLOCK_DTYPE).reshape(k, 2)
        tg &= signal_masks(wa)  # s_a·T_G
        te ^= wa
        te &= signal_masks(wb)  # s_b·(T_E ⊕ A)
        res = self._w[dest : dest + k]
        np.bitwise_xor(h[:k], h[k:], out=res)
        res ^= tg
        res ^= te

    def finish(self) -> None:
        """Confirm the whole table stream arrived; raises ``GarbleError`` if gates are still missing tables."""
        if not self.done:
            missing = self.layered.n_and - self._next_and
            raise GarbleError(
                f"table stream ended early: {missing} of {self.layered.n_and} AND gates have no table"
                f" ({missing * TABLE_BYTES} bytes missing)"
            )

    def output_labels(self, party: Party) -> np.ndarray:
        """The labels on ``party``'s output wires (the evaluator returns the garbler's to the garbler)."""
        self.finish()
        return self._w[self.layered.output_slots[Party(party)]].copy()

    def decode(self, decoding: OutputDecoding) -> np.ndarray:
        """Decode the evaluator's own outputs, checking every label against its tag."""
        labels = self.output_labels(Party.EVALUATOR)
        n = labels.shape[0]
        if decoding.bits.shape != (n,) or decoding.tags.shape != (n, 2):
            raise GarbleError(
                f"output decoding: expected {n} bits and {n} tag pairs, got {decoding.bits.shape[0]} bits and"
                f" {decoding.tags.shape[0]} tag pairs"
            )
        signal = (labels[:, 0] & np.uint64(1)).astype(np.uint8)
        values = signal ^ decoding.bits
        expected = decoding.tags[np.arange(n), signal]
        actual = _output_tags(self._perm, labels, values)
        bad = actual != expected
        if bad.any():
            raise GarbleError(
                f"output {int(np.argmax(bad))} failed its check tag: wrong label or wrong decoding bit"
                f" ({int(bad.sum())} of {n} outputs)"
            )
        return values
