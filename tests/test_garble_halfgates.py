"""Half-gates garbling (Zahur–Rosulek–Evans, Eurocrypt 2015) with free-XOR and point-and-permute, and the table
stream between the garbler's and the evaluator's backends.

The vectorised ``HalfGates`` is checked gate by gate against an independent reference written plainly from
figure 2 of the paper, on scalar Python integers, with the tweakable circular correlation-robust hash of
Guo–Katz–Wang–Yu (IEEE S&P 2020, §7.3), H(x, i) = π(π(x) ⊕ i) ⊕ π(x), built here directly on AES-128 from the
``cryptography`` package (FIPS 197) under the project's fixed public key. Vectors made by one implementation are
verified by the other, in both directions, byte for byte. Garbled programs are checked against a naive evaluator
of the same random gate list (``tests.circuits``).
"""

from __future__ import annotations

import gc
import hashlib
import itertools
import os
import weakref
from collections.abc import Callable

import numpy as np
import pytest
from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.circuit.backend import CountBackend, PlainBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.garble.backends import EvaluatorBackend, GarblerBackend
from jointstat.garble.halfgates import STEP, GarbleError, HalfGates, fresh_delta
from jointstat.garble.local import run_locally
from jointstat.garble.outputs import OutputDecoding, decode, decode_returned, make_decoding
from jointstat.garble.streams import Sink, Source, TableConsumer, TableProducer
from jointstat.primitives.aes import FIXED_KEY, FixedKeyAES
from jointstat.primitives.blocks import BLOCK_DTYPE, random_blocks

from tests.circuits import (
    RandomProgram,
    expected_and_gates,
    garble_and_evaluate,
    random_bits,
    random_inputs,
    random_programs,
    reference_eval,
)

G, E = Party.GARBLER, Party.EVALUATOR


# -- the independent reference: ZRE15 figure 2 on Python integers -------------------------------------------------
# The fixed key, from its definition in jointstat.primitives.aes: the first 16 bytes of SHA-256 of a label.
REFERENCE_KEY = hashlib.sha256(b"jointstat fixed-key AES permutation v1").digest()[:16]


class Reference:
    """Half-gates garbling and evaluation of one gate at a time; a label is a 128-bit integer whose bit 0 (of its
    first little-endian byte) is the signal bit."""

    def __init__(self) -> None:
        self._aes = Cipher(algorithms.AES(REFERENCE_KEY), modes.ECB()).encryptor()

    def pi(self, x: int) -> int:
        """The fixed-key permutation: AES-128 (FIPS 197) of the block's 16 little-endian bytes."""
        return int.from_bytes(self._aes.update(x.to_bytes(16, "little")), "little")

    def hash(self, x: int, tweak: int) -> int:
        """H(x, i) = π(π(x) ⊕ i) ⊕ π(x) (Guo–Katz–Wang–Yu 2020, §7.3)."""
        px = self.pi(x)
        return self.pi(px ^ tweak) ^ px

    def garble(self, a0: int, b0: int, delta: int, j: int) -> tuple[int, int, int]:
        """(C⁰, T_G, T_E) of AND gate j (ZRE15 figure 2, tweaks 2j and 2j + 1)."""
        pa, pb = a0 & 1, b0 & 1
        a1, b1 = a0 ^ delta, b0 ^ delta
        tg = self.hash(a0, 2 * j) ^ self.hash(a1, 2 * j) ^ (delta if pb else 0)
        wg0 = self.hash(a0, 2 * j) ^ (tg if pa else 0)
        te = self.hash(b0, 2 * j + 1) ^ self.hash(b1, 2 * j + 1) ^ a0
        we0 = self.hash(b0, 2 * j + 1) ^ ((te ^ a0) if pb else 0)
        return wg0 ^ we0, tg, te

    def evaluate(self, a: int, b: int, tg: int, te: int, j: int) -> int:
        """The evaluator's output label of AND gate j from active labels A, B (ZRE15 figure 2)."""
        sa, sb = a & 1, b & 1
        wg = self.hash(a, 2 * j) ^ (tg if sa else 0)
        we = self.hash(b, 2 * j + 1) ^ ((te ^ a) if sb else 0)
        return wg ^ we


def to_int(block: np.ndarray) -> int:
    return int.from_bytes(np.ascontiguousarray(block, dtype=BLOCK_DTYPE).tobytes(), "little")


def to_blocks(values: list[int]) -> np.ndarray:
    raw = b"".join(v.to_bytes(16, "little") for v in values)
    return np.frombuffer(raw, dtype=BLOCK_DTYPE).reshape(-1, 2).copy()


def table_of(tgs: list[int], tes: list[int]) -> bytes:
    """A batch's garbled material as the engine lays it out: its k T_G, then its k T_E, 16 bytes each."""
    return b"".join(v.to_bytes(16, "little") for v in [*tgs, *tes])


def engine_garble(a0: np.ndarray, b0: np.ndarray, delta: np.ndarray, first: int) -> tuple[np.ndarray, bytes]:
    k = a0.shape[0]
    scheme = HalfGates()
    c0 = np.empty((k, 2), dtype=BLOCK_DTYPE)
    table = np.empty(scheme.table_bytes(k), dtype=np.uint8)
    scheme.garble(a0, b0, delta, first, c0, table)
    return c0, table.tobytes()


def engine_evaluate(a: np.ndarray, b: np.ndarray, table: bytes, first: int) -> np.ndarray:
    c = np.empty((a.shape[0], 2), dtype=BLOCK_DTYPE)
    HalfGates().evaluate(a, b, np.frombuffer(table, dtype=np.uint8), first, c)
    return c


vectors = st.tuples(
    st.integers(1, 40),  # gates in the batch
    st.integers(0, 2**40),  # index of its first gate in the session
    st.integers(0, 2**32 - 1),  # seed of labels and Δ
)


def make_vector(k: int, seed: int) -> tuple[list[int], list[int], int]:
    rng = np.random.default_rng(seed)
    a0 = [int.from_bytes(rng.bytes(16), "little") for _ in range(k)]
    b0 = [int.from_bytes(rng.bytes(16), "little") for _ in range(k)]
    delta = int.from_bytes(rng.bytes(16), "little") | 1
    return a0, b0, delta


def test_the_reference_uses_the_projects_fixed_key_and_hash() -> None:
    assert REFERENCE_KEY == FIXED_KEY
    ref, engine = Reference(), FixedKeyAES()
    rng = np.random.default_rng(7)
    xs = random_blocks(5)
    tweaks = rng.integers(0, 2**62, 5, dtype=np.uint64)
    got = engine.hash(xs, tweaks)
    assert [to_int(b) for b in got] == [ref.hash(to_int(x), int(t)) for x, t in zip(xs, tweaks, strict=True)]


@settings(max_examples=25)
@given(vectors)
def test_vectors_garbled_by_the_reference_are_what_the_engine_garbles(vector: tuple[int, int, int]) -> None:
    k, first, seed = vector
    a0, b0, delta = make_vector(k, seed)
    ref = Reference()
    gates = [ref.garble(a, b, delta, first + i) for i, (a, b) in enumerate(zip(a0, b0, strict=True))]
    c0, table = engine_garble(to_blocks(a0), to_blocks(b0), to_blocks([delta])[0], first)
    assert [to_int(c) for c in c0] == [g[0] for g in gates]
    assert table == table_of([g[1] for g in gates], [g[2] for g in gates])
    assert len(table) == HalfGates.table_bytes(k) == 32 * k


@settings(max_examples=25)
@given(vectors)
def test_the_engine_evaluates_reference_tables_to_c0_xor_a_and_b_delta(vector: tuple[int, int, int]) -> None:
    k, first, seed = vector
    a0, b0, delta = make_vector(k, seed)
    ref = Reference()
    gates = [ref.garble(a, b, delta, first + i) for i, (a, b) in enumerate(zip(a0, b0, strict=True))]
    table = table_of([g[1] for g in gates], [g[2] for g in gates])
    for a in (0, 1):
        for b in (0, 1):
            active_a = [x ^ (delta if a else 0) for x in a0]
            active_b = [x ^ (delta if b else 0) for x in b0]
            c = engine_evaluate(to_blocks(active_a), to_blocks(active_b), table, first)
            assert [to_int(v) for v in c] == [g[0] ^ (delta if a & b else 0) for g in gates], (a, b)


@settings(max_examples=25)
@given(vectors)
def test_the_reference_evaluates_engine_tables_to_c0_xor_a_and_b_delta(vector: tuple[int, int, int]) -> None:
    k, first, seed = vector
    a0, b0, delta = make_vector(k, seed)
    c0, table = engine_garble(to_blocks(a0), to_blocks(b0), to_blocks([delta])[0], first)
    rows = [int.from_bytes(table[16 * i : 16 * i + 16], "little") for i in range(2 * k)]
    ref = Reference()
    for a in (0, 1):
        for b in (0, 1):
            for i in range(k):
                got = ref.evaluate(
                    a0[i] ^ (delta if a else 0), b0[i] ^ (delta if b else 0), rows[i], rows[k + i], first + i
                )
                assert got == to_int(c0[i]) ^ (delta if a & b else 0), (a, b, i)


def test_a_full_step_of_strided_operands_garbles_and_evaluates() -> None:
    k = STEP
    a0, b0 = random_blocks(2 * k)[::2], random_blocks(2 * k)[1::2]  # views with a stride of two blocks
    delta = fresh_delta()
    c0, table = engine_garble(a0, b0, delta, 12345)
    bits_a, bits_b = random_bits(np.random.default_rng(1), k), random_bits(np.random.default_rng(2), k)
    mask_a = (bits_a.astype(np.uint64) * np.uint64(2**64 - 1))[:, None]
    mask_b = (bits_b.astype(np.uint64) * np.uint64(2**64 - 1))[:, None]
    c = engine_evaluate(a0 ^ (delta & mask_a), b0 ^ (delta & mask_b), table, 12345)
    mask_c = ((bits_a & bits_b).astype(np.uint64) * np.uint64(2**64 - 1))[:, None]
    assert np.array_equal(c, c0 ^ (delta & mask_c))
    ref = Reference()
    for i in (0, k // 2, k - 1):  # spot checks against figure 2
        assert to_int(c0[i]) == ref.garble(to_int(a0[i]), to_int(b0[i]), to_int(delta), 12345 + i)[0]


def test_a_batch_holds_at_most_one_step() -> None:
    scheme = HalfGates()
    a = random_blocks(STEP + 1)
    with pytest.raises(GarbleError, match=f"a batch holds at most {STEP} gates, got {STEP + 1}"):
        scheme.garble(a, a, fresh_delta(), 0, np.empty_like(a), np.empty(32 * (STEP + 1), dtype=np.uint8))
    with pytest.raises(GarbleError, match=f"a batch holds at most {STEP} gates, got {STEP + 1}"):
        scheme.evaluate(a, a, np.empty(32 * (STEP + 1), dtype=np.uint8), 0, np.empty_like(a))


def test_delta_has_lsb_one_and_is_fresh_for_every_garbling() -> None:
    deltas = {fresh_delta().tobytes() for _ in range(50)}
    assert len(deltas) == 50 and all(d[0] & 1 for d in deltas)
    assert fresh_delta(lambda n: bytes(n)).tolist() == [1, 0]  # lsb forced to 1 (point-and-permute)
    assert fresh_delta(os.urandom).dtype == BLOCK_DTYPE


def test_the_two_labels_of_every_input_differ_by_delta_and_have_opposite_signal_bits() -> None:
    delta = fresh_delta()
    garbler = GarblerBackend(delta=delta, input_labels={G: random_blocks(24)}, sink=lambda c: None)
    zero = garbler.input_labels(G, np.zeros(24, dtype=np.uint8))
    one = garbler.input_labels(G, np.ones(24, dtype=np.uint8))
    assert ((zero ^ one) == delta).all()
    assert ((zero[:, 0] ^ one[:, 0]) & 1 == 1).all()


# -- garbled programs ---------------------------------------------------------------------------------------------
@given(random_programs(), st.sampled_from([32, 96, 1000, 1 << 20]), st.sampled_from([0, 1, 17, 32, 33]))
def test_garbled_programs_compute_what_the_plain_backend_computes(
    program: RandomProgram, chunk: int, feed: int
) -> None:
    bits = random_inputs(program, 11)
    run = run_locally(program.run, bits, chunk_bytes=chunk, feed_bytes=feed)
    plain = PlainBackend(bits)
    program.run(Builder(plain))
    ref = reference_eval(program, bits[G], bits[E])
    for p in Party:
        assert np.array_equal(run.outputs[p], plain.outputs(p))
        assert np.array_equal(run.outputs[p], ref[p])
    assert run.and_gates == expected_and_gates(program)
    assert run.table_bytes == 32 * run.and_gates
    assert run.chunks == -(-run.table_bytes // chunk)


def sample_program(lanes: int = 20, width: int = 12) -> Program:
    def run(bld: Builder) -> None:
        x, y = bld.input(G, (lanes, width)), bld.input(E, (lanes, width))
        bld.output(E, bld.multiply(x, y))
        bld.output(G, bld.less_than(x, y, signed=True))
        bld.output(G, bld.not_(bld.xor(x, y)))

    return Program.of(run, name="sample")


def sample_inputs(program: Program, seed: int = 5) -> dict[Party, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {p: random_bits(rng, program.n_inputs(p)) for p in Party}


def plain_outputs(program: Program, bits: dict[Party, np.ndarray]) -> dict[Party, np.ndarray]:
    plain = PlainBackend(bits)
    program.run(Builder(plain))
    return {p: plain.outputs(p) for p in Party}


def test_tables_are_exactly_two_ciphertexts_per_and_gate_and_none_for_xor_or_not() -> None:
    program = sample_program()
    run = run_locally(program.run, sample_inputs(program))
    assert program.size.xor_gates > 0 and program.size.not_gates > 0
    assert run.and_gates == program.size.and_gates > 0
    assert run.table_bytes == 2 * 16 * program.size.and_gates


@pytest.mark.parametrize("chunk_bytes", [1, 32, 100, 4096, 1 << 20])
def test_table_chunks_are_full_but_the_last_and_hold_every_table_once(chunk_bytes: int) -> None:
    program = sample_program(lanes=4)
    bits = sample_inputs(program)
    run = garble_and_evaluate(program.run, bits, chunk_bytes=chunk_bytes)
    sizes = run.chunk_sizes
    assert sum(sizes) == len(run.stream) == 32 * program.size.and_gates
    assert all(size == chunk_bytes for size in sizes[:-1]) and 0 < sizes[-1] <= chunk_bytes
    outputs, want = run.outputs(), plain_outputs(program, bits)
    assert all(np.array_equal(outputs[p], want[p]) for p in Party)


def test_public_bits_carry_the_labels_both_sides_know() -> None:
    # Backends docstring: a public bit is label 0 on the evaluator's side and 0 (public 0) or Δ (public 1) on the
    # garbler's, so the pair (W⁰, W⁰ ⊕ v·Δ) decodes to its value v with nothing sent.
    delta = fresh_delta()
    garbler = GarblerBackend(delta=delta, input_labels={}, sink=lambda c: None)
    evaluator = EvaluatorBackend(input_labels={}, source=lambda n: memoryview(bytes(n)))
    for backend in (garbler, evaluator):
        bld = Builder(backend)
        bld.output(E, bld.constant([0, 1, 1, 0]))
        bld.output(E, bld.not_(bld.ones(2)))
    zero = garbler.output_labels(E)
    assert [to_int(z) for z in zero] == [0, to_int(delta), to_int(delta), 0, 0, 0]
    assert not evaluator.output_labels(E).any()
    assert decode(evaluator.output_labels(E), make_decoding(zero, delta)).tolist() == [0, 1, 1, 0, 0, 0]


# -- output decoding ---------------------------------------------------------------------------------------------
def test_a_wrong_decoding_bit_is_detected() -> None:
    program = sample_program(lanes=4)
    run = garble_and_evaluate(program.run, sample_inputs(program))
    good = make_decoding(run.garbler.output_labels(E), run.delta)
    flipped = good.bits.copy()
    flipped[7] ^= 1
    with pytest.raises(GarbleError, match="output 7 failed its check tag: wrong label or wrong decoding bit"):
        decode(run.evaluator.output_labels(E), OutputDecoding(bits=flipped, tags=good.tags))


def test_a_wrong_label_is_detected_by_its_check_tag() -> None:
    program = sample_program(lanes=4)
    run = garble_and_evaluate(program.run, sample_inputs(program))
    labels = run.evaluator.output_labels(E).copy()
    labels[5, 1] ^= np.uint64(1 << 20)  # signal bit unchanged, label wrong
    with pytest.raises(GarbleError, match=r"output 5 failed its check tag: .*\(1 of 48 outputs\)"):
        decode(labels, make_decoding(run.garbler.output_labels(E), run.delta))


def test_a_tampered_table_stream_is_detected_at_decoding() -> None:
    program = sample_program(lanes=4)

    def flip_every_ciphertext(stream: bytes) -> bytes:
        # one bit in every ciphertext: whichever rows the signal bits select, the labels go wrong
        tampered = np.frombuffer(stream, dtype=np.uint8).copy()
        tampered[::16] ^= 0x40
        return tampered.tobytes()

    run = garble_and_evaluate(program.run, sample_inputs(program), tamper=flip_every_ciphertext)
    with pytest.raises(GarbleError, match="failed its check tag"):
        decode(run.evaluator.output_labels(E), make_decoding(run.garbler.output_labels(E), run.delta))
    with pytest.raises(GarbleError, match="is neither valid label of its wire"):
        decode_returned(run.garbler.output_labels(G), run.delta, run.evaluator.output_labels(G))


def test_a_returned_label_that_is_neither_valid_label_is_refused_by_the_garbler() -> None:
    program = sample_program(lanes=4)
    run = garble_and_evaluate(program.run, sample_inputs(program))
    labels = run.evaluator.output_labels(G).copy()
    labels[3, 1] ^= np.uint64(1 << 40)
    with pytest.raises(
        GarbleError, match=r"returned output label 3 is neither valid label of its wire \(1 of 52"
    ):
        decode_returned(run.garbler.output_labels(G), run.delta, labels)
    with pytest.raises(GarbleError, match=r"returned output labels: expected 52 labels, got shape \(51, 2\)"):
        decode_returned(run.garbler.output_labels(G), run.delta, labels[:-1])


def test_decoding_information_is_per_party_and_travels_as_bytes() -> None:
    program = sample_program(lanes=4)
    run = garble_and_evaluate(program.run, sample_inputs(program))
    decoding = make_decoding(run.garbler.output_labels(E), run.delta)
    assert decoding.bits.shape == (program.n_outputs(E),) and decoding.tags.shape == (program.n_outputs(E), 2)
    blob = decoding.to_bytes()
    assert len(blob) == OutputDecoding.size(program.n_outputs(E)) == 48 // 8 + 16 * 48
    again = OutputDecoding.from_bytes(blob, program.n_outputs(E))
    assert np.array_equal(again.bits, decoding.bits) and np.array_equal(again.tags, decoding.tags)
    with pytest.raises(GarbleError, match="output decoding: expected 129 bytes for 8 outputs, got 10"):
        OutputDecoding.from_bytes(b"\x00" * 10, 8)
    with pytest.raises(GarbleError, match="output decoding: expected 47 bits and 47 tag pairs, got 48 bits"):
        decode(run.evaluator.output_labels(E)[:-1], decoding)


# -- the table stream between greenlets --------------------------------------------------------------------------
def and_program(gates: int) -> Callable[[Builder], int]:
    """A program of ``gates`` AND gates over evaluator inputs; returns the AND count."""

    def run(bld: Builder) -> int:
        x = bld.input(E, gates)
        bld.output(E, bld.and_(x, x.roll(1)))
        return bld.and_gates

    return run


def consumer_for(gates: int, total: int | None = None) -> TableConsumer:
    labels = random_blocks(gates)

    def evaluate(source: Source) -> int:
        return and_program(gates)(Builder(EvaluatorBackend(input_labels={E: labels}, source=source)))

    return TableConsumer(evaluate, total)


def test_the_consumer_refuses_bytes_beyond_what_the_program_declares() -> None:
    consumer = consumer_for(3, total=96)
    consumer.start()
    consumer.feed(bytes(90))
    with pytest.raises(
        GarbleError, match="table bytes exceed the 96 the program declares: 90 received before 7 more"
    ):
        consumer.feed(bytes(7))


def test_the_consumer_refuses_bytes_the_program_does_not_take() -> None:
    consumer = consumer_for(3)
    consumer.start()
    with pytest.raises(GarbleError, match="received 4 table bytes more than the program's AND gates need"):
        consumer.feed(bytes(100))
    assert consumer.finished
    with pytest.raises(GarbleError, match="received 1 table bytes after the program's last AND gate"):
        consumer.feed(b"\x00")


def test_a_program_asking_for_more_tables_than_exist_fails_at_close_not_hangs() -> None:
    consumer = consumer_for(3)
    consumer.start()
    consumer.feed(bytes(40))
    assert not consumer.finished  # paused, waiting for the rest of its 96 bytes
    with pytest.raises(
        GarbleError, match="table stream ended early: the program needs 56 more bytes of tables after 0"
    ):
        consumer.close()
    assert consumer.finished


def test_the_consumer_takes_the_stream_split_anywhere() -> None:
    bits = {E: random_bits(np.random.default_rng(3), 50)}
    zero = random_blocks(50)
    delta = fresh_delta()
    chunks: list[bytes] = []
    garbler = GarblerBackend(delta=delta, input_labels={E: zero}, sink=lambda c: chunks.append(bytes(c)))
    and_program(50)(Builder(garbler))
    garbler.flush()
    stream = b"".join(chunks)
    active = garbler.input_labels(E, bits[E])

    def evaluate(source: Source) -> EvaluatorBackend:
        backend = EvaluatorBackend(input_labels={E: active}, source=source)
        and_program(50)(Builder(backend))
        return backend

    consumer = TableConsumer(evaluate, total=len(stream))
    consumer.start()
    cuts = [0, 1, 2, 33, 34, 1000, 1599, len(stream)]
    for lo, hi in itertools.pairwise(cuts):
        consumer.feed(memoryview(stream)[lo:hi])
    consumer.close()
    assert consumer.finished and consumer.bytes_in == consumer.bytes_taken == len(stream) == 1600
    got = decode(consumer.result.output_labels(E), make_decoding(garbler.output_labels(E), delta))
    assert got.tolist() == (bits[E] & np.roll(bits[E], 1)).tolist()


class Marker:
    """An object a paused program holds, to see when its stack is unwound."""


def test_the_producer_frees_a_paused_program_on_close() -> None:
    unwound: list[bool] = []
    held: list[weakref.ref[Marker]] = []

    def garble(sink: Sink) -> None:
        marker = Marker()
        held.append(weakref.ref(marker))
        try:
            backend = GarblerBackend(
                delta=fresh_delta(), input_labels={E: random_blocks(64)}, sink=sink, chunk_bytes=32
            )
            and_program(64)(Builder(backend))
        finally:
            unwound.append(True)

    producer = TableProducer(garble)
    assert len(producer.next_chunk() or b"") == 32
    assert not unwound and held[0]() is not None  # paused mid-program, holding its values
    producer.close()
    gc.collect()
    assert unwound == [True] and held[0]() is None
    assert producer.finished and producer.next_chunk() is None


@pytest.mark.parametrize("quietly", [True, False])
def test_the_consumer_frees_a_paused_program_on_close(quietly: bool) -> None:
    unwound: list[bool] = []
    held: list[weakref.ref[Marker]] = []
    labels = random_blocks(8)

    def evaluate(source: Source) -> None:
        marker = Marker()
        held.append(weakref.ref(marker))
        try:
            and_program(8)(Builder(EvaluatorBackend(input_labels={E: labels}, source=source)))
        finally:
            unwound.append(True)

    consumer = TableConsumer(evaluate)
    consumer.start()
    assert not unwound and held[0]() is not None
    if quietly:
        consumer.close_quietly()
    else:
        with pytest.raises(GarbleError, match="table stream ended early"):
            consumer.close()
    gc.collect()
    assert unwound == [True] and held[0]() is None and consumer.finished


def test_an_error_in_the_program_surfaces_to_the_caller_and_ends_it() -> None:
    def garble(sink: Sink) -> None:
        raise RuntimeError("program failed")

    producer = TableProducer(garble)
    with pytest.raises(RuntimeError, match="program failed"):
        producer.next_chunk()
    assert producer.finished and producer.next_chunk() is None


def test_run_locally_returns_the_program_outputs_and_the_tables_it_moved() -> None:
    program = sample_program()
    bits = sample_inputs(program)
    run = run_locally(program.run, bits, chunk_bytes=4096, feed_bytes=1000)
    want = plain_outputs(program, bits)
    for p in Party:
        assert np.array_equal(run.outputs[p], want[p])
    count = CountBackend()
    program.run(Builder(count))
    assert run.and_gates == count.and_gates == program.size.and_gates
    assert run.table_bytes == 32 * count.and_gates and run.chunks == -(-run.table_bytes // 4096)
