"""Half-gates garbling (Zahur–Rosulek–Evans 2015) with free-XOR and point-and-permute: garbled evaluation equals
plain evaluation, tables are exactly two ciphertexts per AND gate, Δ is fresh with lsb 1, and wrong tables, labels
or decoding information are detected or refused, never silently decoded."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.circuit.builder import Builder
from jointstat.circuit.layers import LayeredCircuit, schedule
from jointstat.circuit.model import Circuit, GateKind, Party
from jointstat.garble import Evaluator, GarbleError, Garbler, OutputDecoding
from jointstat.garble.local import run_locally
from jointstat.primitives.blocks import BLOCK_DTYPE

from tests.circuits import random_bits, random_circuits, reference_eval


def garble_and_evaluate(
    lc: LayeredCircuit, g_bits: np.ndarray, e_bits: np.ndarray, chunk_bytes: int = 1 << 20, split: int = 0
) -> tuple[Garbler, Evaluator, int]:
    run = run_locally(lc, g_bits, e_bits, chunk_bytes=chunk_bytes, feed_bytes=split)
    return run.garbler, run.evaluator, run.table_bytes


def sample_circuit(lanes: int = 20, width: int = 12) -> Circuit:
    b = Builder()
    x = b.input(Party.GARBLER, (lanes, width))
    y = b.input(Party.EVALUATOR, (lanes, width))
    b.output(Party.EVALUATOR, b.multiply(x, y))
    b.output(Party.GARBLER, b.less_than(x, y, signed=True))
    b.output(Party.GARBLER, b.not_(b.xor(x, y)))
    return b.build()


@given(random_circuits(), st.sampled_from([32, 96, 1000, 1 << 20]), st.sampled_from([0, 1, 17, 32, 33]))
def test_garbled_evaluation_equals_plain_evaluation(c: Circuit, chunk: int, split: int) -> None:
    rng = np.random.default_rng(c.n_gates + 1)
    g = random_bits(rng, c.n_inputs(Party.GARBLER))
    e = random_bits(rng, c.n_inputs(Party.EVALUATOR))
    lc = schedule(c)
    garbler, evaluator, sent = garble_and_evaluate(lc, g, e, chunk_bytes=chunk, split=split)
    ref = reference_eval(c, g, e)
    assert np.array_equal(evaluator.decode(garbler.output_decoding(Party.EVALUATOR)), ref[Party.EVALUATOR])
    got = garbler.decode_returned(Party.GARBLER, evaluator.output_labels(Party.GARBLER))
    assert np.array_equal(got, ref[Party.GARBLER])
    assert sent == 32 * c.count(GateKind.AND)


def test_tables_are_exactly_two_ciphertexts_per_and_gate_and_none_for_xor_or_not() -> None:
    c = sample_circuit()
    lc = schedule(c)
    rng = np.random.default_rng(3)
    _, _, sent = garble_and_evaluate(lc, random_bits(rng, c.n_inputs(Party.GARBLER)), random_bits(rng, 240))
    assert c.count(GateKind.XOR) > 0 and c.count(GateKind.NOT) > 0
    assert sent == 2 * 16 * c.count(GateKind.AND)


def test_delta_has_lsb_one_and_is_fresh_for_every_garbling() -> None:
    lc = schedule(sample_circuit(lanes=2))
    deltas = {Garbler(lc).delta.tobytes() for _ in range(50)}
    assert len(deltas) == 50
    for d in deltas:
        assert d[0] & 1 == 1
    labels = {Garbler(lc).constant_labels().tobytes() for _ in range(50)}
    assert len(labels) == 50


def test_the_two_labels_of_every_wire_differ_by_delta_and_have_opposite_signal_bits() -> None:
    lc = schedule(sample_circuit(lanes=2))
    g = Garbler(lc)
    zero = g.input_labels(Party.GARBLER, np.zeros(24, dtype=np.uint8))
    one = g.input_labels(Party.GARBLER, np.ones(24, dtype=np.uint8))
    assert ((zero ^ one) == g.delta).all()
    assert ((zero[:, 0] ^ one[:, 0]) & 1 == 1).all()


def fresh_pair(lc: LayeredCircuit, g_bits: np.ndarray, e_bits: np.ndarray) -> tuple[Garbler, Evaluator]:
    """A garbler and an evaluator holding the input labels, before any table has been produced."""
    garbler = Garbler(lc)
    evaluator = Evaluator(
        lc,
        constant_labels=garbler.constant_labels(),
        garbler_labels=garbler.input_labels(Party.GARBLER, g_bits),
        evaluator_labels=garbler.input_labels(Party.EVALUATOR, e_bits),
    )
    return garbler, evaluator


def _setup() -> tuple[Circuit, LayeredCircuit, np.ndarray, np.ndarray]:
    c = sample_circuit(lanes=4)
    rng = np.random.default_rng(5)
    return c, schedule(c), random_bits(rng, 48), random_bits(rng, 48)


def test_wrong_decoding_bits_are_detected() -> None:
    _, lc, g, e = _setup()
    garbler, evaluator, _ = garble_and_evaluate(lc, g, e)
    good = garbler.output_decoding(Party.EVALUATOR)
    flipped = good.bits.copy()
    flipped[7] ^= 1
    with pytest.raises(GarbleError, match="output 7 failed its check tag"):
        evaluator.decode(OutputDecoding(bits=flipped, tags=good.tags))


def test_a_tampered_table_is_detected_at_decoding() -> None:
    _c, lc, g, e = _setup()
    garbler, evaluator = fresh_pair(lc, g, e)
    stream = b"".join(garbler.tables())
    # Flip one bit in every ciphertext: whichever rows the evaluator's signal bits select, its labels go wrong.
    tampered = np.frombuffer(stream, dtype=np.uint8).copy()
    tampered[::16] ^= 0x40
    evaluator.feed(tampered.tobytes())
    evaluator.finish()
    with pytest.raises(GarbleError, match="failed its check tag"):
        evaluator.decode(garbler.output_decoding(Party.EVALUATOR))


def test_a_label_that_is_neither_valid_label_is_refused_by_the_garbler() -> None:
    _, lc, g, e = _setup()
    garbler, evaluator, _ = garble_and_evaluate(lc, g, e)
    labels = evaluator.output_labels(Party.GARBLER)
    labels[3, 1] ^= np.uint64(1 << 40)
    with pytest.raises(GarbleError, match="returned output label 3 is neither valid label"):
        garbler.decode_returned(Party.GARBLER, labels)


def test_table_streams_of_the_wrong_length_are_refused() -> None:
    _c, lc, g, e = _setup()
    garbler, evaluator = fresh_pair(lc, g, e)
    stream = b"".join(garbler.tables())
    evaluator.feed(stream[:-40])
    with pytest.raises(GarbleError, match=r"table stream ended early: 2 of \d+ AND gates have no table"):
        evaluator.finish()
    with pytest.raises(GarbleError, match="more than the circuit's AND gates need"):
        evaluator.feed(stream[-40:] + b"extra")


def test_input_labels_of_the_wrong_count_are_refused() -> None:
    _, lc, g, e = _setup()
    garbler = Garbler(lc)
    with pytest.raises(GarbleError, match=r"garbler input labels: expected 48 labels"):
        Evaluator(
            lc,
            constant_labels=garbler.constant_labels(),
            garbler_labels=garbler.input_labels(Party.GARBLER, g)[:-1],
            evaluator_labels=garbler.input_labels(Party.EVALUATOR, e),
        )
    with pytest.raises(GarbleError, match=r"evaluator inputs: expected 48 bits, got 47"):
        garbler.input_labels(Party.EVALUATOR, e[:-1])
    with pytest.raises(GarbleError, match=r"output decoding: expected"):
        OutputDecoding.from_bytes(b"\x00" * 10, 8)


def test_given_evaluator_zero_labels_are_used_as_the_ot_sender_pairs() -> None:
    _, lc, _g, _e = _setup()
    from jointstat.primitives.blocks import random_blocks

    zero = random_blocks(48)
    garbler = Garbler(lc, evaluator_zero_labels=zero)
    assert np.array_equal(garbler.evaluator_zero_labels(), zero)
    with pytest.raises(GarbleError, match="evaluator zero labels: expected 48 labels"):
        Garbler(lc, evaluator_zero_labels=zero[:3])
    with pytest.raises(GarbleError, match="least significant bit"):
        Garbler(lc, delta=np.zeros(2, dtype=BLOCK_DTYPE))


def test_a_garbler_garbles_only_once() -> None:
    _, lc, _g, _e = _setup()
    garbler = Garbler(lc)
    with pytest.raises(GarbleError, match="only after the tables"):
        garbler.output_decoding(Party.EVALUATOR)
    list(garbler.tables())
    with pytest.raises(GarbleError, match="already been produced"):
        list(garbler.tables())


def test_decoding_is_per_party() -> None:
    c, lc, g, e = _setup()
    garbler, _, _ = garble_and_evaluate(lc, g, e)
    assert garbler.output_decoding(Party.EVALUATOR).bits.shape == (c.n_outputs(Party.EVALUATOR),)
    assert garbler.output_decoding(Party.GARBLER).bits.shape == (c.n_outputs(Party.GARBLER),)
    blob = garbler.output_decoding(Party.EVALUATOR).to_bytes()
    again = OutputDecoding.from_bytes(blob, c.n_outputs(Party.EVALUATOR))
    assert np.array_equal(again.tags, garbler.output_decoding(Party.EVALUATOR).tags)


@pytest.mark.parametrize("chunk_bytes", [32, 100, 4096])
def test_table_chunks_hold_whole_gates_and_never_exceed_the_bound(chunk_bytes: int) -> None:
    c = sample_circuit(lanes=4)
    garbler = Garbler(schedule(c))
    sizes = [len(chunk) for chunk in garbler.tables(chunk_bytes=chunk_bytes)]
    assert sum(sizes) == 32 * c.count(GateKind.AND)
    assert all(size % 32 == 0 and size <= max(chunk_bytes, 32) for size in sizes)
