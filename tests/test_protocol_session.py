"""The sans-I/O garbler and evaluator sessions, run against each other through the in-memory pipe.

Specification: each side ends with exactly its own outputs, equal to plain evaluation; both keep the same
transcript and sign it; every mismatch, unexpected frame, malformed frame or failed check aborts with a reason
that names the state and the frame, sends an abort to the peer and releases no output anywhere.
"""

from __future__ import annotations

import hashlib
from collections import defaultdict

import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.bench.garble import wide_circuit
from jointstat.circuit.layers import LayeredCircuit, schedule
from jointstat.circuit.model import Circuit, Party
from jointstat.garble.halfgates import TABLE_BYTES
from jointstat.protocol import (
    EVALUATOR_TABLE,
    GARBLER_TABLE,
    AbortReason,
    EvaluatorSession,
    GarblerSession,
    NoOutputError,
    ProtocolError,
    signer,
    verifier,
)
from jointstat.protocol import frames as fr
from jointstat.protocol import session as sm
from jointstat.protocol.pipe import run_in_memory
from jointstat.statements import transcript_signature_ok
from jointstat.transport.wire.jointstat.v1 import session_pb2 as pb

from tests.circuits import random_bits, random_circuits, reference_eval

# Invented scenario: two clinics comparing visit counts; the digest stands for their agreed manifest.
MANIFEST = hashlib.sha256(b"invented manifest: two clinics compare weekly visit counts").digest()
OTHER_MANIFEST = hashlib.sha256(b"invented manifest: a different statistic").digest()
SID = b"clinics-2031-week-07"
G_KEY = Ed25519PrivateKey.generate()
E_KEY = Ed25519PrivateKey.generate()


def make_pair(
    layered: LayeredCircuit,
    g_bits: np.ndarray,
    e_bits: np.ndarray,
    *,
    g_manifest: bytes = MANIFEST,
    e_manifest: bytes = MANIFEST,
    e_layered: LayeredCircuit | None = None,
    g_sid: bytes = SID,
    e_sid: bytes = SID,
    chunk_bytes: int = 1 << 12,
) -> tuple[GarblerSession, EvaluatorSession]:
    garbler = GarblerSession(
        session_id=g_sid,
        layered=layered,
        manifest_digest=g_manifest,
        inputs=g_bits,
        sign=signer(G_KEY),
        verify=verifier(E_KEY.public_key()),
        chunk_bytes=chunk_bytes,
    )
    evaluator = EvaluatorSession(
        session_id=e_sid,
        layered=e_layered or layered,
        manifest_digest=e_manifest,
        inputs=e_bits,
        sign=signer(E_KEY),
        verify=verifier(G_KEY.public_key()),
    )
    return garbler, evaluator


def random_inputs(circuit: Circuit, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return random_bits(rng, circuit.n_inputs(Party.GARBLER)), random_bits(
        rng, circuit.n_inputs(Party.EVALUATOR)
    )


@pytest.fixture(scope="module")
def wide() -> LayeredCircuit:
    return schedule(wide_circuit(1 << 13, 512))


class Recorder:
    """An ``intercept`` that records every frame by destination and type and delivers it unchanged."""

    def __init__(self) -> None:
        self.kinds: dict[Party, list[str]] = defaultdict(list)
        self.payload_bytes: dict[tuple[Party, str], int] = defaultdict(int)

    def __call__(self, to: Party, data: bytes) -> list[bytes]:
        kind, frame = fr.decode(data)
        self.kinds[to].append(kind)
        if kind in fr.PAYLOAD_FIELD:
            self.payload_bytes[(to, kind)] += len(fr.payload_of(kind, frame))
        return [data]


def tamper(kind: str, to: Party, change: object, *, index: int = 0) -> object:
    """An ``intercept`` that applies ``change(payload) -> payload`` to the ``index``-th frame of ``kind`` to ``to``."""
    seen = defaultdict(int)

    def intercept(dest: Party, data: bytes) -> list[bytes]:
        k, frame = fr.decode(data)
        if dest == to and k == kind:
            seen[k] += 1
            if seen[k] == index + 1:
                return [fr.payload_frame(k, change(fr.payload_of(k, frame)))]  # type: ignore[operator]
        return [data]

    return intercept


def flip_first_bit(payload: bytes) -> bytes:
    return bytes([payload[0] ^ 1]) + payload[1:]


def assert_no_output(*sessions: sm._Session) -> None:
    for s in sessions:
        assert s.failed
        with pytest.raises(NoOutputError):
            _ = s.outputs


# -- the honest run --------------------------------------------------------------------------------------------------


@settings(max_examples=25)
@given(random_circuits(max_gates=150), st.integers(0, 2**32 - 1))
def test_random_circuits_give_each_side_exactly_its_own_outputs(circuit: Circuit, seed: int) -> None:
    layered = schedule(circuit)
    g_bits, e_bits = random_inputs(circuit, seed)
    garbler, evaluator = make_pair(layered, g_bits, e_bits, chunk_bytes=TABLE_BYTES * 3)
    seen = Recorder()
    run_in_memory(garbler, evaluator, intercept=seen)
    expected = reference_eval(circuit, g_bits, e_bits)
    assert garbler.done and evaluator.done
    assert np.array_equal(garbler.outputs, expected[Party.GARBLER])
    assert np.array_equal(evaluator.outputs, expected[Party.EVALUATOR])
    n_g, n_e = circuit.n_outputs(Party.GARBLER), circuit.n_outputs(Party.EVALUATOR)
    # The evaluator is sent decoding information for its own outputs only …
    assert seen.payload_bytes[(Party.EVALUATOR, fr.EVALUATOR_OUTPUT_DECODING)] == (n_e + 7) // 8 + 16 * n_e
    # … and the garbler receives the labels of its own outputs only.
    assert seen.payload_bytes[(Party.GARBLER, fr.GARBLER_OUTPUT_LABELS)] == 16 * n_g
    assert fr.EVALUATOR_OUTPUT_DECODING not in seen.kinds[Party.GARBLER]
    assert seen.payload_bytes[(Party.EVALUATOR, fr.GARBLED_TABLES)] == TABLE_BYTES * layered.n_and


def test_both_sides_sign_the_same_transcript_digest(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 1))
    run_in_memory(garbler, evaluator)
    assert garbler.transcript_digest == evaluator.transcript_digest
    assert transcript_signature_ok(
        G_KEY.public_key(), SID.hex(), evaluator.transcript_digest, evaluator.peer_signature
    )
    assert transcript_signature_ok(
        E_KEY.public_key(), SID.hex(), garbler.transcript_digest, garbler.peer_signature
    )


def test_two_sessions_of_the_same_circuit_and_inputs_have_different_transcripts(wide: LayeredCircuit) -> None:
    bits = random_inputs(wide.circuit, 2)
    digests = []
    for _ in range(2):
        garbler, evaluator = make_pair(wide, *bits)
        run_in_memory(garbler, evaluator)
        digests.append(garbler.transcript_digest)
    assert digests[0] != digests[1]  # fresh Δ, labels and OT secrets every session


def test_tables_stream_in_bounded_frames_the_evaluator_consumes_as_they_arrive(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 3), chunk_bytes=TABLE_BYTES * 100)
    stats = run_in_memory(garbler, evaluator)
    assert evaluator.done
    table_frames = -(-wide.n_and // 100)
    assert stats.frames > table_frames
    assert stats.most_queued <= 8  # never the whole stream at once


def test_a_circuit_without_and_gates_or_inputs_still_completes() -> None:
    from jointstat.circuit.builder import Builder

    bld = Builder()
    g = bld.input(Party.GARBLER, 3)
    bld.output(Party.EVALUATOR, bld.not_(g))
    bld.output(Party.GARBLER, g[:1])
    circuit = bld.build()
    layered = schedule(circuit)
    garbler, evaluator = make_pair(layered, np.array([1, 0, 1]), np.zeros(0, dtype=np.uint8))
    run_in_memory(garbler, evaluator)
    assert list(evaluator.outputs) == [0, 1, 0]
    assert list(garbler.outputs) == [1]


# -- mismatches in the hello -----------------------------------------------------------------------------------------


def test_mismatched_manifest_digests_abort_both_sides_before_anything_secret_moves(
    wide: LayeredCircuit,
) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 4), e_manifest=OTHER_MANIFEST)
    seen = Recorder()
    run_in_memory(garbler, evaluator, intercept=seen)
    assert_no_output(garbler, evaluator)
    assert garbler.abort is not None and evaluator.abort is not None
    assert garbler.abort.reason == evaluator.abort.reason == AbortReason.MANIFEST_MISMATCH
    assert not garbler.abort.by_peer and not evaluator.abort.by_peer  # each side found it itself
    assert "manifest digests differ" in garbler.abort.message
    for to in Party:
        assert set(seen.kinds[to]) <= {fr.HELLO, fr.ABORT}


def test_same_manifest_compiled_to_different_circuits_aborts(wide: LayeredCircuit) -> None:
    other = schedule(wide_circuit(1 << 13, 512, seed=8))
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 5), e_layered=other)
    run_in_memory(garbler, evaluator)
    assert_no_output(garbler, evaluator)
    assert garbler.abort is not None and garbler.abort.reason == AbortReason.MANIFEST_MISMATCH
    assert "circuit digests differ" in garbler.abort.message


def test_different_session_ids_abort(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 6), e_sid=b"another-session")
    run_in_memory(garbler, evaluator)
    assert_no_output(garbler, evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.SESSION_MISMATCH


@pytest.mark.parametrize("version", [1, fr.PROTOCOL_VERSION + 1])
def test_another_protocol_version_aborts(wide: LayeredCircuit, version: int) -> None:
    def other_hello(to: Party, data: bytes) -> list[bytes]:
        kind, frame = fr.decode(data)
        if kind == fr.HELLO and to == Party.EVALUATOR:
            frame.hello.protocol_version = version
            return [fr.encode(frame)]
        return [data]

    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 7))
    run_in_memory(garbler, evaluator, intercept=other_hello)
    assert_no_output(garbler, evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.PROTOCOL_VERSION
    assert f"peer speaks protocol version {version}, this node speaks 2" in evaluator.abort.message


def test_two_garblers_refuse_each_other(wide: LayeredCircuit) -> None:
    bits = random_inputs(wide.circuit, 8)
    first, _ = make_pair(wide, *bits)
    second, _ = make_pair(wide, *bits)
    hello = second.start()[0]
    first.start()
    with pytest.raises(ProtocolError) as err:
        first.receive(hello)
    assert err.value.reason == AbortReason.SESSION_MISMATCH
    assert "ROLE_GARBLER" in str(err.value)


# -- unexpected and malformed frames -----------------------------------------------------------------------------------


def test_an_unexpected_frame_raises_naming_the_state_and_the_frame(wide: LayeredCircuit) -> None:
    garbler, _ = make_pair(wide, *random_inputs(wide.circuit, 9))
    garbler.start()
    with pytest.raises(ProtocolError) as err:
        garbler.receive(fr.payload_frame(fr.GARBLED_TABLES, bytes(32)))
    exc = err.value
    assert exc.reason == AbortReason.UNEXPECTED_FRAME
    assert "'awaiting hello'" in str(exc) and "'garbled_tables'" in str(exc)
    assert exc.frame is not None
    kind, frame = fr.decode(exc.frame)
    assert kind == fr.ABORT and frame.abort.reason == pb.ABORT_REASON_UNEXPECTED_FRAME
    assert_no_output(garbler)


def test_frames_in_the_wrong_order_mid_session_abort(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 10))
    evaluator.start()
    evaluator.receive(garbler.start()[0])  # hello accepted; the evaluator now waits for base OT
    assert evaluator.state == sm.BASE_OT
    with pytest.raises(ProtocolError) as err:
        evaluator.receive(fr.payload_frame(fr.EVALUATOR_OUTPUT_DECODING, b"\x00"))
    assert "'base OT'" in str(err.value) and "'evaluator_output_decoding'" in str(err.value)
    assert "accepts base_ot" in str(err.value)


@pytest.mark.parametrize(
    ("data", "expected"),
    [
        (b"\xff\xff\xff", "is not a jointstat.v1.Frame"),
        (b"", "unknown frame type"),
        (bytes([0x78, 0x01]), "unknown frame type"),  # field 15, varint 1: a type this version does not know
        (b"\x0a" + b"\xff\xff\xff\xff\x0f" + b"x", "is not a jointstat.v1.Frame"),  # length beyond the data
    ],
)
def test_undecodable_or_unknown_frames_abort_as_malformed(
    wide: LayeredCircuit, data: bytes, expected: str
) -> None:
    garbler, _ = make_pair(wide, *random_inputs(wide.circuit, 11))
    garbler.start()
    with pytest.raises(ProtocolError) as err:
        garbler.receive(data)
    assert err.value.reason == AbortReason.MALFORMED_FRAME
    assert expected in str(err.value) and "'awaiting hello'" in str(err.value)
    assert garbler.failed


def test_a_frame_over_four_mebibytes_is_refused(wide: LayeredCircuit) -> None:
    garbler, _ = make_pair(wide, *random_inputs(wide.circuit, 12))
    garbler.start()
    with pytest.raises(ProtocolError) as err:
        garbler.receive(bytes(fr.MAX_FRAME_BYTES + 1))
    assert err.value.reason == AbortReason.MALFORMED_FRAME and "exceeds the limit" in str(err.value)


@pytest.mark.parametrize(
    ("change", "expected"),
    [
        (lambda p: p + b"\x00", "not a positive whole number of 32-byte tables"),
        (lambda p: p[:-1], "not a positive whole number of 32-byte tables"),
        (lambda p: b"", "not a positive whole number of 32-byte tables"),
    ],
)
def test_garbled_tables_of_the_wrong_size_abort_the_evaluator(
    wide: LayeredCircuit, change, expected: str
) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 13))
    run_in_memory(garbler, evaluator, intercept=tamper(fr.GARBLED_TABLES, Party.EVALUATOR, change, index=2))
    assert_no_output(garbler, evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.MALFORMED_FRAME
    assert expected in evaluator.abort.message and "'evaluating'" in evaluator.abort.message
    assert garbler.abort is not None and garbler.abort.by_peer


def test_more_table_bytes_than_the_circuit_needs_abort(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 14), chunk_bytes=TABLE_BYTES * 128)
    last = wide.n_and // 128 - 1
    run_in_memory(
        garbler,
        evaluator,
        intercept=tamper(fr.GARBLED_TABLES, Party.EVALUATOR, lambda p: p + bytes(32), index=last),
    )
    assert_no_output(garbler, evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.MALFORMED_FRAME
    assert "exceeds the 4096 bytes of tables the circuit still needs" in evaluator.abort.message


@pytest.mark.parametrize(
    ("kind", "to", "change", "reason"),
    [
        (fr.GARBLER_INPUT_LABELS, Party.EVALUATOR, lambda p: p + bytes(16), AbortReason.MALFORMED_FRAME),
        (fr.GARBLER_OUTPUT_LABELS, Party.GARBLER, lambda p: p + bytes(16), AbortReason.MALFORMED_FRAME),
        (fr.EVALUATOR_OUTPUT_DECODING, Party.EVALUATOR, lambda p: p + b"\x00", AbortReason.MALFORMED_FRAME),
        (fr.BASE_OT, Party.GARBLER, lambda p: p[:-1], AbortReason.OT_FAILURE),
        (fr.OT_EXTENSION, Party.EVALUATOR, lambda p: p[:-16], AbortReason.OT_FAILURE),
    ],
)
def test_payloads_of_the_wrong_size_abort_with_a_clear_reason(
    wide: LayeredCircuit, kind: str, to: Party, change, reason: AbortReason
) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 15))
    run_in_memory(garbler, evaluator, intercept=tamper(kind, to, change))
    assert_no_output(garbler, evaluator)
    receiver = garbler if to == Party.GARBLER else evaluator
    assert receiver.abort is not None and receiver.abort.reason == reason and not receiver.abort.by_peer
    assert f"'{kind}'" in receiver.abort.message


# -- failed checks -----------------------------------------------------------------------------------------------------


def test_a_wrong_returned_output_label_makes_the_garbler_abort(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 16))
    run_in_memory(
        garbler, evaluator, intercept=tamper(fr.GARBLER_OUTPUT_LABELS, Party.GARBLER, flip_first_bit)
    )
    assert_no_output(garbler, evaluator)
    assert garbler.abort is not None and garbler.abort.reason == AbortReason.INVALID_OUTPUT
    assert "neither valid label" in garbler.abort.message
    assert evaluator.abort is not None and evaluator.abort.by_peer


def test_a_wrong_decoding_makes_the_evaluator_abort(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 17))
    run_in_memory(
        garbler, evaluator, intercept=tamper(fr.EVALUATOR_OUTPUT_DECODING, Party.EVALUATOR, flip_first_bit)
    )
    assert_no_output(evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.INVALID_OUTPUT


def test_corrupted_garbled_tables_release_no_output_anywhere(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 18))
    noise = np.random.default_rng(0)
    # Random tables for the first 128 gates: wrong labels spread through the next layers to the outputs, where the
    # garbler's check of the returned labels catches them.
    run_in_memory(
        garbler,
        evaluator,
        intercept=tamper(fr.GARBLED_TABLES, Party.EVALUATOR, lambda p: noise.bytes(len(p)), index=0),
    )
    assert_no_output(garbler, evaluator)
    assert garbler.abort is not None and garbler.abort.reason == AbortReason.INVALID_OUTPUT


def test_a_transcript_signature_that_does_not_verify_aborts_that_side(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 19))
    honest, other = verifier(G_KEY.public_key()), verifier(Ed25519PrivateKey.generate().public_key())
    # The garbler's hello verifies; its transcript signature is checked against another key.
    evaluator._verify = lambda sig, st: (honest if st.kind == "hello" else other)(sig, st)
    run_in_memory(garbler, evaluator)
    assert_no_output(evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.BAD_SIGNATURE
    assert "signature over the transcript" in evaluator.abort.message


@pytest.mark.parametrize("impostor", [Party.GARBLER, Party.EVALUATOR])
def test_a_peer_without_the_configured_signing_key_is_refused_at_its_hello_before_any_ot(
    wide: LayeredCircuit, impostor: Party
) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 23))
    # The impostor signs with a key of its own; the honest side has the real peer's key configured.
    (garbler if impostor == Party.GARBLER else evaluator)._sign = signer(Ed25519PrivateKey.generate())
    seen = Recorder()
    run_in_memory(garbler, evaluator, intercept=seen)
    honest = evaluator if impostor == Party.GARBLER else garbler
    assert_no_output(garbler, evaluator)
    assert honest.abort is not None and not honest.abort.by_peer
    assert honest.abort.reason == AbortReason.BAD_SIGNATURE
    assert (
        "in state 'awaiting hello'" in honest.abort.message and "hello is not signed" in honest.abort.message
    )
    # The honest side sent its hello and its abort, nothing else: no OT, no labels, no tables, no decoding.
    assert seen.kinds[impostor] == [fr.HELLO, fr.ABORT]


def test_an_unsigned_hello_or_one_whose_fields_were_changed_after_signing_is_refused(
    wide: LayeredCircuit,
) -> None:
    def strip_signature(to: Party, data: bytes) -> list[bytes]:
        kind, frame = fr.decode(data)
        if kind == fr.HELLO and to == Party.EVALUATOR:
            frame.hello.ClearField("signature")
            return [frame.SerializeToString()]
        return [data]

    def change_manifest(to: Party, data: bytes) -> list[bytes]:
        kind, frame = fr.decode(data)
        if kind == fr.HELLO and to == Party.EVALUATOR:
            frame.hello.manifest_digest = OTHER_MANIFEST
            return [frame.SerializeToString()]
        return [data]

    for intercept, words in ((strip_signature, "no signature"), (change_manifest, "does not verify")):
        garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 29))
        run_in_memory(garbler, evaluator, intercept=intercept)
        assert_no_output(garbler, evaluator)
        assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.BAD_SIGNATURE
        assert words in evaluator.abort.message


def test_a_frame_altered_in_transit_shows_as_a_transcript_mismatch(wide: LayeredCircuit) -> None:
    def add_unknown_field(to: Party, data: bytes) -> list[bytes]:
        kind, _ = fr.decode(data)
        if kind == fr.HELLO and to == Party.EVALUATOR:
            return [data + bytes([0xA0, 0x06, 0x01])]  # field 100, varint 1: parses, but the bytes differ
        return [data]

    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 20))
    run_in_memory(garbler, evaluator, intercept=add_unknown_field)
    assert_no_output(garbler, evaluator)
    reasons = {garbler.abort.reason, evaluator.abort.reason} if garbler.abort and evaluator.abort else set()
    assert AbortReason.TRANSCRIPT_MISMATCH in reasons


def test_the_peers_abort_ends_the_session_with_its_reason_and_no_output(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 21))
    evaluator.start()
    evaluator.receive(garbler.start()[0])
    assert evaluator.receive(fr.abort_frame(AbortReason.DEADLINE, "the garbler gave up")) == []
    assert_no_output(evaluator)
    assert evaluator.abort is not None
    assert (evaluator.abort.reason, evaluator.abort.message, evaluator.abort.by_peer) == (
        AbortReason.DEADLINE,
        "the garbler gave up",
        True,
    )
    with pytest.raises(ProtocolError, match="has ended"):
        evaluator.receive(fr.payload_frame(fr.BASE_OT, bytes(32)))


def test_fail_gives_one_abort_frame_and_then_nothing(wide: LayeredCircuit) -> None:
    garbler, _ = make_pair(wide, *random_inputs(wide.circuit, 22))
    garbler.start()
    frame = garbler.fail(AbortReason.CONNECTION_LOST, "stream reset")
    assert frame is not None
    kind, decoded = fr.decode(frame)
    assert (
        kind == fr.ABORT
        and "stream reset" in decoded.abort.message
        and "'awaiting hello'" in decoded.abort.message
    )
    assert garbler.fail(AbortReason.DEADLINE, "again") is None
    assert garbler.abort is not None and garbler.abort.reason == AbortReason.CONNECTION_LOST


def test_no_output_before_done(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 23))
    with pytest.raises(NoOutputError):
        _ = garbler.outputs
    with pytest.raises(NoOutputError):
        _ = evaluator.transcript_digest


def test_produce_runs_once_and_only_while_streaming(wide: LayeredCircuit) -> None:
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 24))
    with pytest.raises(ProtocolError):
        next(garbler.produce())
    garbler, evaluator = make_pair(wide, *random_inputs(wide.circuit, 24))

    # Drive by hand up to the streaming state.
    pending = [(Party.EVALUATOR, f) for f in garbler.start()] + [
        (Party.GARBLER, f) for f in evaluator.start()
    ]
    while pending and not garbler.ready_to_stream:
        to, data = pending.pop(0)
        side = garbler if to == Party.GARBLER else evaluator
        back = Party.EVALUATOR if to == Party.GARBLER else Party.GARBLER
        pending += [(back, f) for f in side.receive(data)]
    assert garbler.state == sm.STREAMING and garbler.ready_to_stream
    stream = garbler.produce()
    first = next(stream)
    assert fr.decode(first)[0] == fr.GARBLER_INPUT_LABELS
    assert not garbler.ready_to_stream
    with pytest.raises(ProtocolError):
        next(garbler.produce())


def test_session_inputs_are_checked_and_named(wide: LayeredCircuit) -> None:
    g_bits, e_bits = random_inputs(wide.circuit, 25)
    with pytest.raises(ValueError, match="garbler inputs: expected"):
        make_pair(wide, g_bits[:-1], e_bits)
    with pytest.raises(ValueError, match="evaluator inputs: bits must be 0 or 1"):
        make_pair(wide, g_bits, e_bits * 2 + 1)
    with pytest.raises(ValueError, match="manifest digest must be 32 bytes"):
        make_pair(wide, g_bits, e_bits, g_manifest=b"short")
    with pytest.raises(ValueError, match="session id must be 1 to 64 bytes"):
        make_pair(wide, g_bits, e_bits, g_sid=b"")


# -- the tables themselves ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("name", "table"), [("garbler", GARBLER_TABLE), ("evaluator", EVALUATOR_TABLE)])
def test_every_state_is_reachable_and_every_path_ends_done_or_failed(name: str, table: dict) -> None:
    cls = GarblerSession if name == "garbler" else EvaluatorSession
    for handler, nexts in table.values():
        assert callable(getattr(cls, handler))
        assert nexts
    reachable, frontier = {sm.NEW}, [sm.NEW]
    while frontier:
        state = frontier.pop()
        for (st_, _), (_, nexts) in table.items():
            if st_ == state:
                for n in nexts:
                    if n not in reachable:
                        reachable.add(n)
                        frontier.append(n)
    states = {st_ for st_, _ in table}
    assert states <= reachable
    assert {sm.DONE, sm.FAILED} <= reachable
    # Every live state accepts the peer's abort.
    assert all((state, fr.ABORT) in table for state in states)


def test_new_session_builds_the_session_of_the_given_role(wide: LayeredCircuit) -> None:
    from jointstat.protocol import new_session

    g_bits, e_bits = random_inputs(wide.circuit, 26)
    common = {"session_id": SID, "layered": wide, "manifest_digest": MANIFEST}
    garbler = new_session(
        Party.GARBLER, inputs=g_bits, sign=signer(G_KEY), verify=verifier(E_KEY.public_key()), **common
    )
    evaluator = new_session(
        Party.EVALUATOR, inputs=e_bits, sign=signer(E_KEY), verify=verifier(G_KEY.public_key()), **common
    )
    assert isinstance(garbler, GarblerSession) and isinstance(evaluator, EvaluatorSession)
    run_in_memory(garbler, evaluator)
    expected = reference_eval(wide.circuit, g_bits, e_bits)
    assert np.array_equal(evaluator.outputs, expected[Party.EVALUATOR])
