"""The sans-I/O garbler and evaluator sessions, run against each other through the in-memory pipe.

Specification: both sides run the same program (``circuit.program``) — the garbler against its garbling backend,
the evaluator against its evaluating backend — and each ends with exactly its own outputs, equal to an independent
evaluation of the program (numpy, or the published answer for AES-128 and SHA-256); both keep the same transcript
and sign it; programs that differ are refused at hello before anything secret moves; every mismatch, unexpected
frame, malformed frame, table stream of the wrong length or failed check aborts with a reason that names the state
and the frame, sends an abort to the peer and releases no output anywhere; a program paused mid-way when its
session ends is unwound.
"""

from __future__ import annotations

import hashlib
from collections import defaultdict
from collections.abc import Callable

import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.bench.garble import wide_program
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.circuit.reference import aes128, sha256
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
from jointstat.wire.jointstat.v1 import session_pb2 as pb

from tests.circuits import RandomProgram, random_bits, random_programs, reference_eval

# Invented scenario: two clinics comparing visit counts; the digest stands for their agreed manifest.
MANIFEST = hashlib.sha256(b"invented manifest: two clinics compare weekly visit counts").digest()
OTHER_MANIFEST = hashlib.sha256(b"invented manifest: a different statistic").digest()
SID = b"clinics-2031-week-07"
G_KEY = Ed25519PrivateKey.generate()
E_KEY = Ed25519PrivateKey.generate()

# FIPS 197 Appendix C.1 (AES-128), from memory; also checked against `cryptography` in test_reference_circuits.
FIPS197_C1_KEY = bytes.fromhex("000102030405060708090a0b0c0d0e0f")
FIPS197_C1_PLAINTEXT = bytes.fromhex("00112233445566778899aabbccddeeff")
FIPS197_C1_CIPHERTEXT = bytes.fromhex("69c4e0d86a7b0430d8cdb78070b4c55a")
# FIPS 180-4 example "abc" (one block), SHA-256 digest, from memory; checked against `hashlib` below.
FIPS180_ABC_DIGEST = bytes.fromhex("ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad")


def sha256_pad(message: bytes) -> bytes:
    """FIPS 180-4 §5.1.1 padding: 0x80, zeros to 56 mod 64, then the bit length as a 64-bit big-endian integer."""
    tail = b"\x80" + bytes((55 - len(message)) % 64) + (8 * len(message)).to_bytes(8, "big")
    return message + tail


def make_pair(
    program: Program,
    g_bits: np.ndarray,
    e_bits: np.ndarray,
    *,
    g_manifest: bytes = MANIFEST,
    e_manifest: bytes = MANIFEST,
    e_program: Program | None = None,
    g_sid: bytes = SID,
    e_sid: bytes = SID,
    chunk_bytes: int = 1 << 12,
    garbler_class: type[GarblerSession] = GarblerSession,
) -> tuple[GarblerSession, EvaluatorSession]:
    garbler = garbler_class(
        session_id=g_sid,
        program=program,
        manifest_digest=g_manifest,
        inputs=g_bits,
        sign=signer(G_KEY),
        verify=verifier(E_KEY.public_key()),
        chunk_bytes=chunk_bytes,
    )
    evaluator = EvaluatorSession(
        session_id=e_sid,
        program=e_program or program,
        manifest_digest=e_manifest,
        inputs=e_bits,
        sign=signer(E_KEY),
        verify=verifier(G_KEY.public_key()),
    )
    return garbler, evaluator


def inputs_for(program: Program, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return random_bits(rng, program.n_inputs(Party.GARBLER)), random_bits(
        rng, program.n_inputs(Party.EVALUATOR)
    )


def plain_outputs(program: Program, g_bits: np.ndarray, e_bits: np.ndarray) -> dict[Party, np.ndarray]:
    from jointstat.circuit.backend import PlainBackend

    backend = PlainBackend({Party.GARBLER: g_bits, Party.EVALUATOR: e_bits})
    program.run(Builder(backend))
    return {p: backend.outputs(p) for p in Party}


@pytest.fixture(scope="module")
def wide() -> Program:
    return wide_program(1 << 13, 512)  # 8,192 AND gates in calls of 512; outputs for both parties


@pytest.fixture(scope="module")
def aes() -> Program:
    return Program.of(aes128.aes128_program, name="AES-128")  # outputs for the evaluator only


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


def tamper(
    kind: str, to: Party, change: Callable[[bytes], bytes | None], *, index: int = 0
) -> Callable[[Party, bytes], list[bytes]]:
    """An ``intercept`` applying ``change(payload) -> payload`` to the ``index``-th frame of ``kind`` to ``to``;
    a change returning None drops the frame."""
    seen: dict[str, int] = defaultdict(int)

    def intercept(dest: Party, data: bytes) -> list[bytes]:
        k, frame = fr.decode(data)
        if dest == to and k == kind:
            seen[k] += 1
            if seen[k] == index + 1:
                changed = change(bytes(fr.payload_of(k, frame)))
                return [] if changed is None else [fr.payload_frame(k, changed)]
        return [data]

    return intercept


def flip_first_bit(payload: bytes) -> bytes:
    return bytes([payload[0] ^ 1]) + payload[1:]


def assert_no_output(*sessions: sm.SessionBase) -> None:
    for s in sessions:
        assert s.failed
        with pytest.raises(NoOutputError):
            _ = s.outputs


def table_frames(program: Program, chunk_bytes: int) -> int:
    return -(-TABLE_BYTES * program.size.and_gates // chunk_bytes)


# -- the honest run --------------------------------------------------------------------------------------------------


@settings(max_examples=25)
@given(random_programs(max_gates=150), st.integers(0, 2**32 - 1))
def test_random_programs_give_each_side_exactly_its_own_outputs(random: RandomProgram, seed: int) -> None:
    program = Program.of(random.run)
    g_bits, e_bits = inputs_for(program, seed)
    garbler, evaluator = make_pair(program, g_bits, e_bits, chunk_bytes=TABLE_BYTES * 3)
    seen = Recorder()
    run_in_memory(garbler, evaluator, intercept=seen)
    expected = reference_eval(random, g_bits, e_bits)  # gate by gate on Python integers
    assert garbler.done and evaluator.done
    assert np.array_equal(garbler.outputs, expected[Party.GARBLER])
    assert np.array_equal(evaluator.outputs, expected[Party.EVALUATOR])
    n_g, n_e = program.n_outputs(Party.GARBLER), program.n_outputs(Party.EVALUATOR)
    # The evaluator is sent decoding information for its own outputs only …
    assert seen.payload_bytes[(Party.EVALUATOR, fr.EVALUATOR_OUTPUT_DECODING)] == (n_e + 7) // 8 + 16 * n_e
    # … and the garbler receives the labels of its own outputs only.
    assert seen.payload_bytes[(Party.GARBLER, fr.GARBLER_OUTPUT_LABELS)] == 16 * n_g
    assert fr.EVALUATOR_OUTPUT_DECODING not in seen.kinds[Party.GARBLER]
    # One table of 32 bytes per AND gate the count backend measured; the garbler's own input labels, 16 bytes each.
    assert seen.payload_bytes[(Party.EVALUATOR, fr.GARBLED_TABLES)] == TABLE_BYTES * program.size.and_gates
    assert seen.payload_bytes[(Party.EVALUATOR, fr.GARBLER_INPUT_LABELS)] == 16 * program.n_inputs(
        Party.GARBLER
    )


def test_aes128_through_a_session_gives_the_evaluator_the_fips197_ciphertext(aes: Program) -> None:
    garbler, evaluator = make_pair(
        aes, aes128.key_bits(FIPS197_C1_KEY), aes128.block_bits(FIPS197_C1_PLAINTEXT), chunk_bytes=1 << 12
    )
    run_in_memory(garbler, evaluator)
    assert garbler.done and evaluator.done
    assert aes128.bits_to_block(evaluator.outputs) == FIPS197_C1_CIPHERTEXT  # FIPS 197 Appendix C.1
    assert garbler.outputs.size == 0  # the ciphertext goes to the evaluator only


def test_both_sides_count_every_and_gate_as_done_once_the_session_is_done(aes: Program) -> None:
    garbler, evaluator = make_pair(aes, aes128.key_bits(bytes(16)), aes128.block_bits(bytes(16)))
    assert garbler.and_gates_done == evaluator.and_gates_done == 0
    run_in_memory(garbler, evaluator)
    assert garbler.done and evaluator.done
    assert garbler.and_gates_done == evaluator.and_gates_done == garbler.and_gates_total == 6400


def test_a_garbler_that_fails_mid_stream_still_counts_the_gates_it_garbled(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 31), chunk_bytes=TABLE_BYTES * 64)
    drive_to_streaming(garbler, evaluator)
    stream = garbler.produce()
    for _ in range(4):
        next(stream)
    garbled = garbler.and_gates_done
    assert 0 < garbled < wide.size.and_gates
    garbler.fail(AbortReason.CANCELLED, "the node is stopping")
    assert garbler.and_gates_done == garbled  # the progress of the failed session shows how far it got


def test_sha256_through_a_session_gives_the_fips180_digest_of_abc() -> None:
    assert hashlib.sha256(b"abc").digest() == FIPS180_ABC_DIGEST  # the known answer, against hashlib
    program = Program.of(sha256.sha256_compress_program, name="SHA-256 compression")
    garbler, evaluator = make_pair(
        program,
        sha256.block_bits(sha256_pad(b"abc")),
        sha256.chaining_bits(sha256.INITIAL_HASH),
        chunk_bytes=1 << 16,
    )
    run_in_memory(garbler, evaluator)
    assert garbler.done and evaluator.done
    assert sha256.bits_to_chaining(evaluator.outputs) == FIPS180_ABC_DIGEST  # FIPS 180-4, one block


def test_both_sides_sign_the_same_transcript_digest(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 1))
    run_in_memory(garbler, evaluator)
    assert garbler.transcript_digest == evaluator.transcript_digest
    assert transcript_signature_ok(
        G_KEY.public_key(), SID.hex(), evaluator.transcript_digest, evaluator.peer_signature
    )
    assert transcript_signature_ok(
        E_KEY.public_key(), SID.hex(), garbler.transcript_digest, garbler.peer_signature
    )


def test_the_wide_program_gives_both_sides_the_plain_backends_answer(wide: Program) -> None:
    g_bits, e_bits = inputs_for(wide, 27)
    garbler, evaluator = make_pair(wide, g_bits, e_bits)
    run_in_memory(garbler, evaluator)
    expected = plain_outputs(wide, g_bits, e_bits)
    assert np.array_equal(garbler.outputs, expected[Party.GARBLER])
    assert np.array_equal(evaluator.outputs, expected[Party.EVALUATOR])


def test_two_sessions_of_the_same_program_and_inputs_have_different_transcripts(wide: Program) -> None:
    bits = inputs_for(wide, 2)
    digests = []
    for _ in range(2):
        garbler, evaluator = make_pair(wide, *bits)
        run_in_memory(garbler, evaluator)
        digests.append(garbler.transcript_digest)
    assert digests[0] != digests[1]  # fresh Δ, labels and OT secrets every session


def test_tables_stream_in_bounded_frames_the_evaluator_consumes_as_they_arrive(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 3), chunk_bytes=TABLE_BYTES * 100)
    seen = Recorder()
    stats = run_in_memory(garbler, evaluator, intercept=seen)
    assert evaluator.done
    assert seen.kinds[Party.EVALUATOR].count(fr.GARBLED_TABLES) == -(-wide.size.and_gates // 100)
    assert stats.most_queued <= 8  # never the whole stream at once


def test_a_program_without_and_gates_or_evaluator_inputs_still_completes() -> None:
    def run(bld: Builder) -> None:
        g = bld.input(Party.GARBLER, 3)
        bld.output(Party.EVALUATOR, bld.not_(g))
        bld.output(Party.GARBLER, g[:1])

    program = Program.of(run)
    assert program.size.and_gates == 0 and program.n_inputs(Party.EVALUATOR) == 0
    garbler, evaluator = make_pair(program, np.array([1, 0, 1]), np.zeros(0, dtype=np.uint8))
    seen = Recorder()
    run_in_memory(garbler, evaluator, intercept=seen)
    assert list(evaluator.outputs) == [0, 1, 0]
    assert list(garbler.outputs) == [1]
    assert fr.GARBLED_TABLES not in seen.kinds[Party.EVALUATOR]  # no AND gate, no table
    assert fr.BASE_OT not in seen.kinds[Party.GARBLER]  # no evaluator input, no OT


def test_a_program_with_public_constants_only_completes_with_nothing_streamed() -> None:
    def run(bld: Builder) -> None:
        one = bld.ones(4)
        bld.output(Party.EVALUATOR, bld.and_(one, bld.constant(np.array([1, 0, 1, 1], dtype=np.uint8))))

    program = Program.of(run)
    garbler, evaluator = make_pair(program, np.zeros(0, dtype=np.uint8), np.zeros(0, dtype=np.uint8))
    run_in_memory(garbler, evaluator)
    assert list(evaluator.outputs) == [1, 0, 1, 1]


@pytest.mark.parametrize("evaluator_inputs", [0, 3], ids=["no OT", "after OT"])
def test_with_nothing_to_stream_the_garbler_leaves_streaming_before_the_evaluator_can_answer(
    evaluator_inputs: int,
) -> None:
    # Found by the TLS property test: with no garbler inputs and no AND gates the evaluator needs nothing more after
    # hello (or the OT) and sends its finish at once, which could reach the garbler before its producer ran. The
    # garbler must already be past 'streaming' when the frame that ends the OT (or the hello) has been handled.
    def run(bld: Builder) -> None:
        e = bld.input(Party.EVALUATOR, evaluator_inputs)
        bld.output(Party.EVALUATOR, bld.not_(e))

    program = Program.of(run)
    e_bits = np.array([1, 0, 1][:evaluator_inputs], dtype=np.uint8)
    garbler, evaluator = make_pair(program, np.zeros(0, dtype=np.uint8), e_bits)
    to_garbler, to_evaluator = list(evaluator.start()), list(garbler.start())
    while to_garbler or to_evaluator:  # no produce() is ever called: the garbler must not need it
        if to_evaluator:
            to_garbler += evaluator.receive(to_evaluator.pop(0))
        else:
            to_evaluator += garbler.receive(to_garbler.pop(0))
            assert garbler.state != sm.STREAMING and not garbler.ready_to_stream
    assert garbler.state == evaluator.state == sm.DONE
    assert list(evaluator.outputs) == [0, 1, 0][:evaluator_inputs]
    assert garbler.outputs is not None and garbler.outputs.size == 0


# -- mismatches in the hello -----------------------------------------------------------------------------------------


def test_mismatched_manifest_digests_abort_both_sides_before_anything_secret_moves(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 4), e_manifest=OTHER_MANIFEST)
    seen = Recorder()
    run_in_memory(garbler, evaluator, intercept=seen)
    assert_no_output(garbler, evaluator)
    assert garbler.abort is not None and evaluator.abort is not None
    assert garbler.abort.reason == evaluator.abort.reason == AbortReason.MANIFEST_MISMATCH
    assert not garbler.abort.by_peer and not evaluator.abort.by_peer  # each side found it itself
    assert "manifest digests differ" in garbler.abort.message
    for to in Party:
        assert set(seen.kinds[to]) <= {fr.HELLO, fr.ABORT}


def test_different_programs_for_the_same_manifest_are_refused_at_hello_before_anything_secret_moves(
    wide: Program,
) -> None:
    other = wide_program((1 << 13) + 512, 512)  # the same inputs and outputs, one round more
    assert other.n_inputs(Party.EVALUATOR) == wide.n_inputs(Party.EVALUATOR) and other.digest != wide.digest
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 5), e_program=other)
    seen = Recorder()
    run_in_memory(garbler, evaluator, intercept=seen)
    assert_no_output(garbler, evaluator)
    for side in (garbler, evaluator):
        assert side.abort is not None and side.abort.reason == AbortReason.MANIFEST_MISMATCH
        assert not side.abort.by_peer and "program digests differ" in side.abort.message
    for to in Party:  # no OT, no label, no table: hellos and aborts only
        assert set(seen.kinds[to]) <= {fr.HELLO, fr.ABORT}


def test_different_session_ids_abort(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 6), e_sid=b"another-session")
    run_in_memory(garbler, evaluator)
    assert_no_output(garbler, evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.SESSION_MISMATCH


@pytest.mark.parametrize("version", [1, 2, 3, fr.PROTOCOL_VERSION + 1])
def test_another_protocol_version_aborts(wide: Program, version: int) -> None:
    # Version 1 sent unsigned hellos and gate lists, version 2 signed hellos and gate lists; version 3 runs programs
    # (their digest, no constant labels); version 4 acknowledges frames and resumes after a cut.
    assert fr.PROTOCOL_VERSION == 4

    def other_hello(to: Party, data: bytes) -> list[bytes]:
        kind, frame = fr.decode(data)
        if kind == fr.HELLO and to == Party.EVALUATOR:
            frame.hello.protocol_version = version
            return [fr.encode(frame)]
        return [data]

    garbler, evaluator = make_pair(wide, *inputs_for(wide, 7))
    run_in_memory(garbler, evaluator, intercept=other_hello)
    assert_no_output(garbler, evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.PROTOCOL_VERSION
    assert f"version {version}" in evaluator.abort.message


def test_two_garblers_refuse_each_other(wide: Program) -> None:
    bits = inputs_for(wide, 8)
    first, _ = make_pair(wide, *bits)
    second, _ = make_pair(wide, *bits)
    hello = second.start()[0]
    first.start()
    with pytest.raises(ProtocolError) as err:
        first.receive(hello)
    assert err.value.reason == AbortReason.SESSION_MISMATCH
    assert "ROLE_GARBLER" in str(err.value)


# -- unexpected and malformed frames -----------------------------------------------------------------------------------


def test_an_unexpected_frame_raises_naming_the_state_and_the_frame(wide: Program) -> None:
    garbler, _ = make_pair(wide, *inputs_for(wide, 9))
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


def test_frames_in_the_wrong_order_mid_session_abort(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 10))
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
        (b"\x2a\x05\x0a\x07abc", "is not a jointstat.v1.Frame"),  # garbled_tables whose inner length overruns
    ],
)
def test_undecodable_or_unknown_frames_abort_as_malformed(wide: Program, data: bytes, expected: str) -> None:
    garbler, _ = make_pair(wide, *inputs_for(wide, 11))
    garbler.start()
    with pytest.raises(ProtocolError) as err:
        garbler.receive(data)
    assert err.value.reason == AbortReason.MALFORMED_FRAME
    assert expected in str(err.value) and "'awaiting hello'" in str(err.value)
    assert garbler.failed


def test_a_frame_over_four_mebibytes_is_refused(wide: Program) -> None:
    garbler, _ = make_pair(wide, *inputs_for(wide, 12))
    garbler.start()
    with pytest.raises(ProtocolError) as err:
        garbler.receive(bytes(fr.MAX_FRAME_BYTES + 1))
    assert err.value.reason == AbortReason.MALFORMED_FRAME and "exceeds the limit" in str(err.value)


def test_an_empty_garbled_tables_frame_aborts_the_evaluator(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 13))
    run_in_memory(
        garbler, evaluator, intercept=tamper(fr.GARBLED_TABLES, Party.EVALUATOR, lambda p: b"", index=2)
    )
    assert_no_output(garbler, evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.MALFORMED_FRAME
    assert (
        "empty garbled_tables frame" in evaluator.abort.message and "'evaluating'" in evaluator.abort.message
    )
    assert garbler.abort is not None and garbler.abort.by_peer


@pytest.mark.parametrize("extra", [1, 32, 4000])
def test_more_table_bytes_than_the_program_needs_abort_naming_the_excess(wide: Program, extra: int) -> None:
    # An extra byte mid-stream shifts every later table; the stream is refused once it passes the program's total.
    chunk = TABLE_BYTES * 128
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 14), chunk_bytes=chunk)
    run_in_memory(
        garbler,
        evaluator,
        intercept=tamper(fr.GARBLED_TABLES, Party.EVALUATOR, lambda p: p + bytes(extra), index=3),
    )
    assert_no_output(garbler, evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.MALFORMED_FRAME
    assert f"exceeds the {chunk - extra} bytes of tables the program still needs" in evaluator.abort.message
    assert "'evaluating'" in evaluator.abort.message


def test_a_table_frame_after_the_last_table_aborts_naming_it(aes: Program) -> None:
    # The evaluator of AES has every table; a further frame of tables is refused, saying the tables were all in.
    garbler, evaluator = make_pair(aes, aes128.key_bits(bytes(16)), aes128.block_bits(bytes(16)))
    last = table_frames(aes, 1 << 12) - 1
    duplicate = tamper(fr.GARBLED_TABLES, Party.EVALUATOR, lambda p: p, index=last)

    def twice(to: Party, data: bytes) -> list[bytes]:
        out = duplicate(to, data)
        if out and out[0] is not data:  # the last table frame: deliver it, then the same again
            return [data, data]
        return out

    run_in_memory(garbler, evaluator, intercept=twice)
    assert_no_output(evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.UNEXPECTED_FRAME
    assert "'garbled_tables'" in evaluator.abort.message
    assert f"all {TABLE_BYTES * 6400} bytes of garbled tables" in evaluator.abort.message


@pytest.mark.parametrize(("how", "short"), [("drop the last frame", None), ("cut one byte", 1)])
def test_fewer_table_bytes_than_the_program_needs_abort_when_the_next_frame_type_comes(
    aes: Program, how: str, short: int | None
) -> None:
    # The garbler of AES has no outputs, so its decoding frame follows its last table frame at once.
    chunk = 1 << 12
    garbler, evaluator = make_pair(
        aes, aes128.key_bits(bytes(16)), aes128.block_bits(bytes(16)), chunk_bytes=chunk
    )
    last = table_frames(aes, chunk) - 1
    change = (lambda p: None) if short is None else (lambda p: p[:-short])
    run_in_memory(
        garbler, evaluator, intercept=tamper(fr.GARBLED_TABLES, Party.EVALUATOR, change, index=last)
    )
    assert_no_output(garbler, evaluator)
    missing = chunk if short is None else short
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.UNEXPECTED_FRAME, how
    message = evaluator.abort.message
    assert "'evaluating'" in message and "'evaluator_output_decoding'" in message
    assert f"the garbled tables stopped {missing} bytes short of the {TABLE_BYTES * 6400}" in message
    assert garbler.abort is not None and garbler.abort.by_peer


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
    wide: Program, kind: str, to: Party, change: Callable[[bytes], bytes], reason: AbortReason
) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 15))
    run_in_memory(garbler, evaluator, intercept=tamper(kind, to, change))
    assert_no_output(garbler, evaluator)
    receiver = garbler if to == Party.GARBLER else evaluator
    assert receiver.abort is not None and receiver.abort.reason == reason and not receiver.abort.by_peer
    assert f"'{kind}'" in receiver.abort.message


# -- another valid encoding of the table frames ------------------------------------------------------------------------


class ProtobufTablesGarbler(GarblerSession):
    """A garbler that writes its table frames with the protobuf library, an unknown field first inside the message
    and the length of the tables as a varint one byte longer than it needs (both valid protobuf encodings)."""

    def _emit(self, kind: str, data: bytes) -> bytes:
        if kind == fr.GARBLED_TABLES:
            tables = bytes(fr.payload_of(kind, fr.decode(data)[1]))
            inner = bytes([(9 << 3) | 0, 1])  # field 9, varint 1: unknown to this version, so ignored
            inner += bytes([(1 << 3) | 2]) + fr._varint(len(tables))[:-1]  # the tables' tag and length …
            inner += (
                bytes([fr._varint(len(tables))[-1] | 0x80, 0x00]) + tables
            )  # … with a redundant last byte
            data = bytes([(5 << 3) | 2]) + fr._varint(len(inner)) + inner
            assert pb.Frame.FromString(data).garbled_tables.tables == tables  # the library reads it the same
        return super()._emit(kind, data)


def test_a_garbler_writing_tables_in_another_valid_protobuf_encoding_completes_the_session(
    wide: Program,
) -> None:
    g_bits, e_bits = inputs_for(wide, 28)
    garbler, evaluator = make_pair(wide, g_bits, e_bits, garbler_class=ProtobufTablesGarbler)
    run_in_memory(garbler, evaluator)
    assert garbler.done and evaluator.done  # the same bytes on both sides' transcripts
    expected = plain_outputs(wide, g_bits, e_bits)
    assert np.array_equal(evaluator.outputs, expected[Party.EVALUATOR])
    assert np.array_equal(garbler.outputs, expected[Party.GARBLER])


# -- failed checks -----------------------------------------------------------------------------------------------------


def test_a_wrong_returned_output_label_makes_the_garbler_abort(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 16))
    run_in_memory(
        garbler, evaluator, intercept=tamper(fr.GARBLER_OUTPUT_LABELS, Party.GARBLER, flip_first_bit)
    )
    assert_no_output(garbler, evaluator)
    assert garbler.abort is not None and garbler.abort.reason == AbortReason.INVALID_OUTPUT
    assert "neither valid label" in garbler.abort.message
    assert evaluator.abort is not None and evaluator.abort.by_peer


def test_a_wrong_decoding_makes_the_evaluator_abort(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 17))
    run_in_memory(
        garbler, evaluator, intercept=tamper(fr.EVALUATOR_OUTPUT_DECODING, Party.EVALUATOR, flip_first_bit)
    )
    assert_no_output(evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.INVALID_OUTPUT


def test_corrupted_garbled_tables_release_no_output_anywhere(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 18))
    noise = np.random.default_rng(0)
    # Random tables for the first gates: wrong labels spread through the rounds to the outputs, where the garbler's
    # check of the returned labels catches them.
    run_in_memory(
        garbler,
        evaluator,
        intercept=tamper(fr.GARBLED_TABLES, Party.EVALUATOR, lambda p: noise.bytes(len(p)), index=0),
    )
    assert_no_output(garbler, evaluator)
    assert garbler.abort is not None and garbler.abort.reason == AbortReason.INVALID_OUTPUT


def test_a_transcript_signature_that_does_not_verify_aborts_that_side(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 19))
    honest, other = verifier(G_KEY.public_key()), verifier(Ed25519PrivateKey.generate().public_key())
    # The garbler's hello verifies; its transcript signature is checked against another key.
    evaluator._verify = lambda sig, st: (honest if st.kind == "hello" else other)(sig, st)
    run_in_memory(garbler, evaluator)
    assert_no_output(evaluator)
    assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.BAD_SIGNATURE
    assert "signature over the transcript" in evaluator.abort.message


@pytest.mark.parametrize("impostor", [Party.GARBLER, Party.EVALUATOR])
def test_a_peer_without_the_configured_signing_key_is_refused_at_its_hello_before_any_ot(
    wide: Program, impostor: Party
) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 23))
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
    wide: Program,
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
        garbler, evaluator = make_pair(wide, *inputs_for(wide, 29))
        run_in_memory(garbler, evaluator, intercept=intercept)
        assert_no_output(garbler, evaluator)
        assert evaluator.abort is not None and evaluator.abort.reason == AbortReason.BAD_SIGNATURE
        assert words in evaluator.abort.message


def test_a_frame_altered_in_transit_shows_as_a_transcript_mismatch(wide: Program) -> None:
    def add_unknown_field(to: Party, data: bytes) -> list[bytes]:
        kind, _ = fr.decode(data)
        if kind == fr.HELLO and to == Party.EVALUATOR:
            return [data + bytes([0xA0, 0x06, 0x01])]  # field 100, varint 1: parses, but the bytes differ
        return [data]

    garbler, evaluator = make_pair(wide, *inputs_for(wide, 20))
    run_in_memory(garbler, evaluator, intercept=add_unknown_field)
    assert_no_output(garbler, evaluator)
    reasons = {garbler.abort.reason, evaluator.abort.reason} if garbler.abort and evaluator.abort else set()
    assert AbortReason.TRANSCRIPT_MISMATCH in reasons


def test_the_peers_abort_ends_the_session_with_its_reason_and_no_output(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 21))
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


def test_fail_gives_one_abort_frame_and_then_nothing(wide: Program) -> None:
    garbler, _ = make_pair(wide, *inputs_for(wide, 22))
    garbler.start()
    frame = garbler.fail(AbortReason.CONNECTION_LOST, "stream reset")
    assert frame is not None
    kind, decoded = fr.decode(frame)
    assert kind == fr.ABORT and "stream reset" in decoded.abort.message
    assert "'awaiting hello'" in decoded.abort.message
    assert garbler.fail(AbortReason.DEADLINE, "again") is None
    assert garbler.abort is not None and garbler.abort.reason == AbortReason.CONNECTION_LOST


def test_no_output_before_done(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 23))
    with pytest.raises(NoOutputError):
        _ = garbler.outputs
    with pytest.raises(NoOutputError):
        _ = evaluator.transcript_digest


def drive_to_streaming(garbler: GarblerSession, evaluator: EvaluatorSession) -> list[tuple[Party, bytes]]:
    """Run both sessions by hand until the garbler is ready to stream; returns the frames still undelivered."""
    pending = [(Party.EVALUATOR, f) for f in garbler.start()] + [
        (Party.GARBLER, f) for f in evaluator.start()
    ]
    while pending and not garbler.ready_to_stream:
        to, data = pending.pop(0)
        side = garbler if to == Party.GARBLER else evaluator
        back = Party.EVALUATOR if to == Party.GARBLER else Party.GARBLER
        pending += [(back, f) for f in side.receive(data)]
    return pending


def test_produce_runs_once_and_only_while_streaming(wide: Program) -> None:
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 24))
    with pytest.raises(ProtocolError):
        next(garbler.produce())
    garbler, evaluator = make_pair(wide, *inputs_for(wide, 24))
    drive_to_streaming(garbler, evaluator)
    assert garbler.state == sm.STREAMING and garbler.ready_to_stream
    stream = garbler.produce()
    first = next(stream)
    assert fr.decode(first)[0] == fr.GARBLER_INPUT_LABELS
    assert not garbler.ready_to_stream
    with pytest.raises(ProtocolError):
        next(garbler.produce())


def test_session_inputs_are_checked_and_named(wide: Program) -> None:
    g_bits, e_bits = inputs_for(wide, 25)
    with pytest.raises(ValueError, match="garbler inputs: expected"):
        make_pair(wide, g_bits[:-1], e_bits)
    with pytest.raises(ValueError, match="evaluator inputs: bits must be 0 or 1"):
        make_pair(wide, g_bits, e_bits * 2 + 1)
    with pytest.raises(ValueError, match="manifest digest must be 32 bytes"):
        make_pair(wide, g_bits, e_bits, g_manifest=b"short")
    with pytest.raises(ValueError, match="session id must be 1 to 64 bytes"):
        make_pair(wide, g_bits, e_bits, g_sid=b"")
    with pytest.raises(ValueError, match="program must be a Program"):
        make_pair(wide.run, g_bits, e_bits)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="chunk_bytes must be an integer from 32"):
        make_pair(wide, g_bits, e_bits, chunk_bytes=16)


# -- a program paused mid-way when its session ends -------------------------------------------------------------------


def paused_program(and_gates: int, width: int, unwound: list[str]) -> Program:
    """The wide program, noting in ``unwound`` when a run of it stops on the garbling or evaluating backend."""
    inner = wide_program(and_gates, width)

    def run(bld: Builder) -> None:
        try:
            inner.run(bld)
        finally:
            unwound.append(type(bld.backend).__name__)

    return Program(run, inner.size, inner.name)


def test_a_garbler_that_fails_while_its_program_is_paused_unwinds_the_program() -> None:
    unwound: list[str] = []
    program = paused_program(1 << 12, 256, unwound)
    garbler, evaluator = make_pair(program, *inputs_for(program, 29), chunk_bytes=TABLE_BYTES * 64)
    drive_to_streaming(garbler, evaluator)
    stream = garbler.produce()
    for _ in range(4):  # the input labels and three of the 64 table frames
        next(stream)
    assert 0 < garbler.and_gates_done < program.size.and_gates
    unwound.clear()  # the count backend's run, when the program was measured
    assert garbler.fail(AbortReason.CANCELLED, "the node is stopping") is not None
    assert unwound == ["GarblerBackend"]  # the paused program's stack unwound, its labels let go
    assert next(stream, None) is None
    assert_no_output(garbler)


def test_an_evaluator_aborted_while_its_program_waits_for_tables_unwinds_the_program() -> None:
    unwound: list[str] = []
    program = paused_program(1 << 12, 256, unwound)
    garbler, evaluator = make_pair(program, *inputs_for(program, 30), chunk_bytes=TABLE_BYTES * 64)
    pending = drive_to_streaming(garbler, evaluator)
    for _, data in pending:
        evaluator.receive(data)
    stream = garbler.produce()
    for _ in range(
        7
    ):  # the input labels and six table frames: one AND call of 256 gates and part of the next
        evaluator.receive(next(stream))
    assert evaluator.state == sm.EVALUATING and 0 < evaluator.and_gates_done < program.size.and_gates
    unwound.clear()
    assert evaluator.receive(fr.abort_frame(AbortReason.CANCELLED, "the garbler is stopping")) == []
    assert unwound == ["EvaluatorBackend"]
    assert_no_output(evaluator)


# -- the tables themselves ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("name", "table"), [("garbler", GARBLER_TABLE), ("evaluator", EVALUATOR_TABLE)])
def test_every_state_is_reachable_and_done_or_failed_is_reachable_from_every_state(
    name: str, table: dict
) -> None:
    cls = GarblerSession if name == "garbler" else EvaluatorSession
    for handler, nexts in table.values():
        assert callable(getattr(cls, handler))
        assert nexts

    def reachable_from(start: str) -> set[str]:
        seen, frontier = {start}, [start]
        while frontier:
            state = frontier.pop()
            for (st_, _), (_, nexts) in table.items():
                if st_ == state:
                    for n in nexts:
                        if n not in seen:
                            seen.add(n)
                            frontier.append(n)
        return seen

    states = {st_ for st_, _ in table}
    assert states <= reachable_from(sm.NEW)
    for state in states:
        assert sm.DONE in reachable_from(state) and sm.FAILED in reachable_from(state), state
    # Every live state accepts the peer's abort.
    assert all((state, fr.ABORT) in table for state in states)


def test_the_docstring_table_lists_exactly_the_transitions_of_the_dictionaries() -> None:
    doc = sm.__doc__ or ""
    rows = {
        tuple(cell.strip() for cell in line.strip().strip("|").split("|")[:3])
        for line in doc.splitlines()
        if line.startswith("| garbler") or line.startswith("| evaluator")
    }
    names = {fr.HELLO, fr.BASE_OT, fr.OT_EXTENSION, fr.GARBLER_INPUT_LABELS, fr.GARBLED_TABLES}
    names |= {fr.GARBLER_OUTPUT_LABELS, fr.EVALUATOR_OUTPUT_DECODING, fr.FINISH}
    for who, table in (("garbler", GARBLER_TABLE), ("evaluator", EVALUATOR_TABLE)):
        listed = {(state, event.split(" ")[0]) for w, state, event in rows if w == who}
        actual = {(state, event) for state, event in table if event != fr.ABORT}
        assert {(s, e if e in names else e.split(" ")[0]) for s, e in actual} == listed, who


def test_new_session_builds_the_session_of_the_given_role(wide: Program) -> None:
    from jointstat.protocol import new_session

    g_bits, e_bits = inputs_for(wide, 26)
    common = {"session_id": SID, "program": wide, "manifest_digest": MANIFEST}
    garbler = new_session(
        Party.GARBLER, inputs=g_bits, sign=signer(G_KEY), verify=verifier(E_KEY.public_key()), **common
    )
    evaluator = new_session(
        Party.EVALUATOR, inputs=e_bits, sign=signer(E_KEY), verify=verifier(G_KEY.public_key()), **common
    )
    assert isinstance(garbler, GarblerSession) and isinstance(evaluator, EvaluatorSession)
    run_in_memory(garbler, evaluator)
    expected = plain_outputs(wide, g_bits, e_bits)
    assert np.array_equal(evaluator.outputs, expected[Party.EVALUATOR])
