"""Two nodes on loopback over gRPC with mutual TLS (certificates made in the test): the whole session, end to end.

Specification: AES-128 with the garbler's key and the evaluator's plaintext gives the FIPS 197 C.1 ciphertext to
the evaluator only, and the SHA-256 compression of the padded "abc" block the FIPS 180-4 digest; random programs
give each side exactly its own outputs, whichever side serves; a program digest mismatch aborts both at hello; a manifest
mismatch aborts both with no output; a peer that vanishes, goes silent or is cancelled makes the other side abort
within its limits and release nothing; malformed or replayed streams are refused with a clear reason; a slow
evaluator holds the garbler back instead of making it buffer.
"""

from __future__ import annotations

import asyncio
import hashlib

import grpc
import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from hypothesis import given, settings
from hypothesis import strategies as st
from jointstat.bench.garble import wide_program
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.circuit.reference import aes128, sha256
from jointstat.protocol import AbortReason, EvaluatorSession, GarblerSession, signer, verifier
from jointstat.protocol import frames as fr
from jointstat.protocol.sides import Session
from jointstat.statements import transcript_signature_ok
from jointstat.transport import Limits, SessionIds, SessionRefused, SessionServer, run_client
from jointstat.transport.channel import MESSAGE_OPTIONS, METHOD_PATH, ClientStream
from jointstat.transport.driver import SessionResult, drive
from jointstat.transport.pki import issue, new_ca, node_tls
from jointstat.transport.tls import NodeTLS

from tests.circuits import RandomProgram, random_bits, random_programs, reference_eval

# Invented scenario: a regional bakery co-operative (garbler) and a flour mill (evaluator) compare figures.
MANIFEST = hashlib.sha256(b"invented manifest: bakery co-operative and flour mill, weekly tonnage").digest()
LIMITS = Limits(deadline_s=30, idle_timeout_s=10, abort_grace_s=1)
FIPS197_C1_KEY = bytes.fromhex("000102030405060708090a0b0c0d0e0f")  # FIPS 197 Appendix C.1
FIPS197_C1_PLAINTEXT = bytes.fromhex("00112233445566778899aabbccddeeff")  # FIPS 197 Appendix C.1
FIPS197_C1_CIPHERTEXT = bytes.fromhex("69c4e0d86a7b0430d8cdb78070b4c55a")  # FIPS 197 Appendix C.1
# FIPS 180-4 example "abc" (one block), SHA-256 digest, from memory; checked against `hashlib` in the test.
FIPS180_ABC_DIGEST = bytes.fromhex("ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad")


class Nodes:
    def __init__(self) -> None:
        ca = new_ca("co-operative test CA")
        bakery, mill = issue(ca, "bakery.coop.test"), issue(ca, "mill.coop.test")
        self.bakery_tls = node_tls(bakery, mill)
        self.mill_tls = node_tls(mill, bakery)
        self.bakery_key = Ed25519PrivateKey.generate()
        self.mill_key = Ed25519PrivateKey.generate()

    def garbler(self, program: Program, sid: bytes, bits: np.ndarray, **kw: object) -> GarblerSession:
        return GarblerSession(
            session_id=sid,
            program=program,
            manifest_digest=kw.pop("manifest", MANIFEST),  # type: ignore[arg-type]
            inputs=bits,
            sign=signer(self.bakery_key),
            verify=verifier(self.mill_key.public_key()),
            **kw,  # type: ignore[arg-type]
        )

    def evaluator(self, program: Program, sid: bytes, bits: np.ndarray, **kw: object) -> EvaluatorSession:
        return EvaluatorSession(
            session_id=sid,
            program=kw.pop("other_program", program),  # type: ignore[arg-type]
            manifest_digest=kw.pop("manifest", MANIFEST),  # type: ignore[arg-type]
            inputs=bits,
            sign=signer(self.mill_key),
            verify=verifier(self.bakery_key.public_key()),
        )


@pytest.fixture(scope="module")
def nodes() -> Nodes:
    return Nodes()


@pytest.fixture(scope="module")
def wide() -> Program:
    return wide_program(1 << 15, 1024)


def inputs_for(program: Program, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return random_bits(rng, program.n_inputs(Party.GARBLER)), random_bits(
        rng, program.n_inputs(Party.EVALUATOR)
    )


def plain_outputs(program: Program, g_bits: np.ndarray, e_bits: np.ndarray) -> dict[Party, np.ndarray]:
    backend = PlainBackend({Party.GARBLER: g_bits, Party.EVALUATOR: e_bits})
    program.run(Builder(backend))
    return {p: backend.outputs(p) for p in Party}


def sha256_pad(message: bytes) -> bytes:
    """FIPS 180-4 §5.1.1 padding: 0x80, zeros to 56 mod 64, then the bit length as a 64-bit big-endian integer."""
    return message + b"\x80" + bytes((55 - len(message)) % 64) + (8 * len(message)).to_bytes(8, "big")


async def serve_and_connect(
    server_tls: NodeTLS,
    client_tls: NodeTLS,
    served: Session,
    client: Session,
    *,
    limits: Limits = LIMITS,
) -> tuple[SessionResult, SessionResult]:
    """Serve ``served``, connect ``client`` to it; returns (server result, client result)."""
    async with SessionServer(server_tls, limits=limits) as server:
        expected = server.expect(served)
        client_result = await run_client(client, f"127.0.0.1:{server.port}", client_tls, limits=limits)
        server_result = await asyncio.wait_for(expected, timeout=limits.deadline_s)
    return server_result, client_result


async def frames_sent(session: Session, count: int, within_s: float = 20.0) -> None:
    """Wait until ``session`` has sent ``count`` frames; fail at once if it ends first, or after ``within_s``."""
    loop = asyncio.get_running_loop()
    deadline = loop.time() + within_s
    while session.frames_sent < count:
        if session.ended:
            raise AssertionError(f"the session ended ({session.state}) after {session.frames_sent} frames")
        if loop.time() > deadline:
            raise AssertionError(
                f"the session sent {session.frames_sent} frames in {within_s:g} s, not {count}"
            )
        await asyncio.sleep(0.001)


def assert_nothing_released(*results: SessionResult) -> None:
    for r in results:
        assert not r.completed and r.outputs is None and r.transcript_digest is None
        assert r.abort is not None


# -- complete sessions ---------------------------------------------------------------------------------------------


async def test_aes128_gives_the_evaluator_the_fips197_ciphertext_and_the_garbler_nothing(
    nodes: Nodes,
) -> None:
    program = Program.of(aes128.aes128_program)
    garbler = nodes.garbler(program, b"aes-fips197-c1", aes128.key_bits(FIPS197_C1_KEY))
    evaluator = nodes.evaluator(program, b"aes-fips197-c1", aes128.block_bits(FIPS197_C1_PLAINTEXT))
    g, e = await serve_and_connect(nodes.bakery_tls, nodes.mill_tls, garbler, evaluator)
    assert e.completed and g.completed
    assert aes128.bits_to_block(e.outputs) == FIPS197_C1_CIPHERTEXT
    assert g.outputs is not None and g.outputs.size == 0  # the ciphertext goes to the evaluator only
    assert g.transcript_digest == e.transcript_digest
    assert transcript_signature_ok(
        nodes.bakery_key.public_key(), b"aes-fips197-c1".hex(), e.transcript_digest, e.peer_signature
    )
    # Table bytes dominate what crossed the wire: 32 bytes for each of the 6,400 AND gates, both directions counted.
    assert g.bytes_on_wire == e.bytes_on_wire >= 32 * program.size.and_gates
    assert g.counters.bytes_sent == e.counters.bytes_received


async def test_sha256_over_tls_gives_the_evaluator_the_fips180_digest_of_abc(nodes: Nodes) -> None:
    assert hashlib.sha256(b"abc").digest() == FIPS180_ABC_DIGEST  # the known answer, against hashlib
    program = Program.of(sha256.sha256_compress_program)
    garbler = nodes.garbler(
        program, b"sha256-abc", sha256.block_bits(sha256_pad(b"abc")), chunk_bytes=1 << 16
    )
    evaluator = nodes.evaluator(program, b"sha256-abc", sha256.chaining_bits(sha256.INITIAL_HASH))
    # The evaluator serves this time: the garbler connects and streams its tables up the client stream.
    e, g = await serve_and_connect(nodes.mill_tls, nodes.bakery_tls, evaluator, garbler)
    assert e.completed and g.completed
    assert sha256.bits_to_chaining(e.outputs) == FIPS180_ABC_DIGEST  # FIPS 180-4, one block
    assert g.transcript_digest == e.transcript_digest
    assert g.counters.bytes_sent >= 32 * program.size.and_gates


@settings(max_examples=6)
@given(random_programs(max_gates=200), st.integers(0, 2**32 - 1), st.booleans())
def test_random_programs_over_tls_give_each_side_only_its_own_outputs(
    nodes: Nodes, random: RandomProgram, seed: int, garbler_serves: bool
) -> None:
    program = Program.of(random.run)
    g_bits, e_bits = inputs_for(program, seed)
    sid = hashlib.sha256(seed.to_bytes(4, "big") + program.digest).digest()[:16]
    garbler, evaluator = nodes.garbler(program, sid, g_bits), nodes.evaluator(program, sid, e_bits)
    if garbler_serves:
        g, e = asyncio.run(serve_and_connect(nodes.bakery_tls, nodes.mill_tls, garbler, evaluator))
    else:
        e, g = asyncio.run(serve_and_connect(nodes.mill_tls, nodes.bakery_tls, evaluator, garbler))
    expected = reference_eval(random, g_bits, e_bits)  # gate by gate on Python integers
    assert g.party == Party.GARBLER and e.party == Party.EVALUATOR
    assert np.array_equal(g.outputs, expected[Party.GARBLER])
    assert np.array_equal(e.outputs, expected[Party.EVALUATOR])


async def test_a_wide_program_streams_many_frames_and_completes(nodes: Nodes, wide: Program) -> None:
    g_bits, e_bits = inputs_for(wide, 1)
    garbler = nodes.garbler(wide, b"wide-1", g_bits, chunk_bytes=1 << 14)
    evaluator = nodes.evaluator(wide, b"wide-1", e_bits)
    g, e = await serve_and_connect(nodes.bakery_tls, nodes.mill_tls, garbler, evaluator)
    expected = plain_outputs(wide, g_bits, e_bits)
    assert np.array_equal(g.outputs, expected[Party.GARBLER]) and np.array_equal(
        e.outputs, expected[Party.EVALUATOR]
    )
    assert g.counters.frames_sent > 64  # 1 MiB of tables in 16 KiB frames


# -- mismatch --------------------------------------------------------------------------------------------------------


async def test_mismatched_manifest_digests_abort_both_nodes_with_no_output(
    nodes: Nodes, wide: Program
) -> None:
    g_bits, e_bits = inputs_for(wide, 2)
    other = hashlib.sha256(b"invented manifest: another week").digest()
    garbler = nodes.garbler(wide, b"mismatch", g_bits)
    evaluator = nodes.evaluator(wide, b"mismatch", e_bits, manifest=other)
    g, e = await serve_and_connect(nodes.bakery_tls, nodes.mill_tls, garbler, evaluator)
    assert_nothing_released(g, e)
    assert g.abort.reason == e.abort.reason == AbortReason.MANIFEST_MISMATCH
    assert g.counters.bytes_sent < 1000 and e.counters.bytes_sent < 1000  # hellos and aborts only


async def test_different_programs_abort_both_nodes_at_hello_with_no_output(
    nodes: Nodes, wide: Program
) -> None:
    g_bits, e_bits = inputs_for(wide, 15)
    other = wide_program((1 << 15) + 1024, 1024)  # same inputs, one round more: another program digest
    garbler = nodes.garbler(wide, b"other-program", g_bits)
    evaluator = nodes.evaluator(wide, b"other-program", e_bits, other_program=other)
    g, e = await serve_and_connect(nodes.bakery_tls, nodes.mill_tls, garbler, evaluator)
    assert_nothing_released(g, e)
    assert g.abort.reason == e.abort.reason == AbortReason.MANIFEST_MISMATCH
    assert "program digests differ" in g.abort.message and "program digests differ" in e.abort.message
    # Each sent its hello and, unless the peer's own abort ended the stream first, its abort: nothing secret moved.
    assert 1 <= g.counters.frames_sent <= 2 and 1 <= e.counters.frames_sent <= 2


# -- vanishing, silent and cancelled peers -----------------------------------------------------------------------------


async def open_raw(tls: NodeTLS, port: int) -> tuple[grpc.aio.Channel, grpc.aio.StreamStreamCall]:
    options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", tls.server_name())]
    channel = grpc.aio.secure_channel(f"127.0.0.1:{port}", tls.channel_credentials(), options=options)
    return channel, channel.stream_stream(METHOD_PATH)(timeout=30)


async def test_an_evaluator_that_vanishes_mid_stream_makes_the_garbler_abort(
    nodes: Nodes, wide: Program
) -> None:
    g_bits, e_bits = inputs_for(wide, 3)
    garbler = nodes.garbler(wide, b"vanish-e", g_bits, chunk_bytes=1 << 12)
    evaluator = nodes.evaluator(wide, b"vanish-e", e_bits)
    async with SessionServer(nodes.bakery_tls, limits=LIMITS) as server:
        expected = server.expect(garbler)
        channel, call = await open_raw(nodes.mill_tls, server.port)
        for frame in evaluator.start():
            await call.write(frame)
        # Play the evaluator honestly until the tables flow, then drop the connection without a word.
        while True:
            data = await call.read()
            for reply in evaluator.receive(data):
                await call.write(reply)
            if fr.decode(data)[0] == fr.GARBLED_TABLES:
                break
        await channel.close(grace=None)
        g = await asyncio.wait_for(expected, timeout=LIMITS.idle_timeout_s + 5)
    assert_nothing_released(g)
    assert g.abort.reason == AbortReason.CONNECTION_LOST
    assert g.counters.bytes_sent < 32 * wide.size.and_gates  # it stopped before sending the whole circuit


async def test_a_garbler_that_vanishes_mid_stream_makes_the_evaluator_abort(
    nodes: Nodes, wide: Program
) -> None:
    g_bits, e_bits = inputs_for(wide, 4)
    garbler = nodes.garbler(wide, b"vanish-g", g_bits, chunk_bytes=1 << 12)
    evaluator = nodes.evaluator(wide, b"vanish-g", e_bits)
    server = SessionServer(nodes.mill_tls, limits=LIMITS)
    await server.start()
    expected = server.expect(evaluator)
    channel, call = await open_raw(nodes.bakery_tls, server.port)
    try:
        for frame in garbler.start():
            await call.write(frame)
        streamed = None
        while streamed is None:
            data = await call.read()
            for reply in garbler.receive(data):
                await call.write(reply)
            if garbler.ready_to_stream:
                streamed = garbler.produce()
        for _ in range(10):  # a few table frames, then the garbler disappears
            await call.write(next(streamed))
        await channel.close(grace=None)
        e = await asyncio.wait_for(expected, timeout=LIMITS.idle_timeout_s + 5)
    finally:
        await server.stop(None)
    assert_nothing_released(e)
    assert e.abort.reason == AbortReason.CONNECTION_LOST


async def test_a_peer_that_goes_silent_is_aborted_after_the_idle_timeout(nodes: Nodes, wide: Program) -> None:
    g_bits, _ = inputs_for(wide, 5)
    garbler = nodes.garbler(wide, b"silent", g_bits)
    quick = Limits(deadline_s=30, idle_timeout_s=0.5, abort_grace_s=0.5)
    async with SessionServer(nodes.bakery_tls, limits=quick) as server:
        expected = server.expect(garbler)
        channel, call = await open_raw(nodes.mill_tls, server.port)
        evaluator = nodes.evaluator(wide, b"silent", inputs_for(wide, 5)[1])
        await call.write(evaluator.start()[0])  # hello, then nothing more
        g = await asyncio.wait_for(expected, timeout=10)
        # The garbler told the silent peer why it gave up.
        frames = []
        while (data := await call.read()) is not grpc.aio.EOF:
            frames.append(fr.decode(data))
        await channel.close()
    assert_nothing_released(g)
    assert g.abort.reason == AbortReason.DEADLINE and "nothing was sent or received" in g.abort.message
    assert frames[-1][0] == fr.ABORT and frames[-1][1].abort.reason == int(AbortReason.DEADLINE)


async def test_a_session_that_overruns_its_deadline_is_aborted(nodes: Nodes, wide: Program) -> None:
    garbler = nodes.garbler(wide, b"deadline", inputs_for(wide, 14)[0])
    short = Limits(deadline_s=0.3, idle_timeout_s=30, abort_grace_s=0.5)
    async with SessionServer(nodes.bakery_tls, limits=short) as server:
        expected = server.expect(garbler)
        channel, call = await open_raw(nodes.mill_tls, server.port)
        await call.write(nodes.evaluator(wide, b"deadline", inputs_for(wide, 14)[1]).start()[0])
        g = await asyncio.wait_for(expected, timeout=10)
        await channel.close()
    assert_nothing_released(g)
    assert g.abort.reason == AbortReason.DEADLINE and "session deadline of 0.3 s passed" in g.abort.message


async def test_cancelling_the_client_aborts_the_server_side_too(nodes: Nodes, wide: Program) -> None:
    g_bits, e_bits = inputs_for(wide, 6)
    garbler = nodes.garbler(wide, b"cancel", g_bits, chunk_bytes=1 << 12)
    evaluator = nodes.evaluator(wide, b"cancel", e_bits)
    async with SessionServer(nodes.bakery_tls, limits=LIMITS) as server:
        expected = server.expect(garbler)
        client = asyncio.create_task(
            run_client(evaluator, f"127.0.0.1:{server.port}", nodes.mill_tls, limits=LIMITS)
        )
        await frames_sent(garbler, 20)  # wait until tables flow
        client.cancel()
        with pytest.raises(asyncio.CancelledError):
            await client
        g = await asyncio.wait_for(expected, timeout=LIMITS.idle_timeout_s + 5)
    assert (
        evaluator.failed and evaluator.abort is not None and evaluator.abort.reason == AbortReason.CANCELLED
    )
    assert_nothing_released(g)
    # Either the client's abort frame arrived (cancelled, by the peer) or the stream was cut under the server.
    assert (g.abort.reason, g.abort.by_peer) in {
        (AbortReason.CANCELLED, True),
        (AbortReason.CONNECTION_LOST, False),
    }


async def test_stopping_the_server_mid_session_aborts_the_client(nodes: Nodes, wide: Program) -> None:
    g_bits, e_bits = inputs_for(wide, 7)
    garbler = nodes.garbler(wide, b"server-stop", g_bits, chunk_bytes=1 << 12)
    evaluator = nodes.evaluator(wide, b"server-stop", e_bits)
    server = SessionServer(nodes.bakery_tls, limits=LIMITS)
    await server.start()
    expected = server.expect(garbler)
    client = asyncio.create_task(
        run_client(evaluator, f"127.0.0.1:{server.port}", nodes.mill_tls, limits=LIMITS)
    )
    await frames_sent(garbler, 20)
    await server.stop(0)
    e = await asyncio.wait_for(client, timeout=LIMITS.idle_timeout_s + 5)
    g = await asyncio.wait_for(expected, timeout=5)
    assert_nothing_released(e, g)


# -- refused streams ---------------------------------------------------------------------------------------------------


async def test_a_session_id_seen_before_is_refused(nodes: Nodes, wide: Program) -> None:
    g_bits, e_bits = inputs_for(wide, 8)
    ids = SessionIds()
    async with SessionServer(nodes.bakery_tls, limits=LIMITS) as server:
        expected = server.expect(nodes.garbler(wide, b"once", g_bits))
        e = await run_client(
            nodes.evaluator(wide, b"once", e_bits),
            f"127.0.0.1:{server.port}",
            nodes.mill_tls,
            session_ids=ids,
        )
        assert e.completed and (await expected).completed
        # The server will not expect it again …
        with pytest.raises(SessionRefused):
            server.expect(nodes.garbler(wide, b"once", g_bits))
        # … a client of the same node will not run it again …
        with pytest.raises(SessionRefused):
            await run_client(
                nodes.evaluator(wide, b"once", e_bits),
                f"127.0.0.1:{server.port}",
                nodes.mill_tls,
                session_ids=ids,
            )
        # … and a peer replaying its hello gets an abort naming the reason.
        channel, call = await open_raw(nodes.mill_tls, server.port)
        await call.write(nodes.evaluator(wide, b"once", e_bits).start()[0])
        kind, frame = fr.decode(await call.read())
        await channel.close()
    assert kind == fr.ABORT and frame.abort.reason == int(AbortReason.SESSION_REFUSED)
    assert "used before" in frame.abort.message


async def test_a_session_nobody_expects_is_refused(nodes: Nodes, wide: Program) -> None:
    async with SessionServer(nodes.bakery_tls, limits=LIMITS) as server:
        e = await run_client(
            nodes.evaluator(wide, b"unknown", inputs_for(wide, 9)[1]),
            f"127.0.0.1:{server.port}",
            nodes.mill_tls,
            limits=LIMITS,
        )
    assert_nothing_released(e)
    assert e.abort.by_peer and e.abort.reason == AbortReason.SESSION_REFUSED


@pytest.mark.parametrize(
    ("frames", "reason", "text"),
    [
        ([b"\xff\xfe\xfd"], AbortReason.MALFORMED_FRAME, "not a jointstat.v1.Frame"),
        ([bytes([0x78, 0x01])], AbortReason.MALFORMED_FRAME, "unknown frame type"),
        ([fr.payload_frame(fr.GARBLED_TABLES, bytes(32))], AbortReason.UNEXPECTED_FRAME, "must be hello"),
    ],
)
async def test_a_malformed_first_frame_is_refused_with_a_reason(
    nodes: Nodes, wide: Program, frames: list[bytes], reason: AbortReason, text: str
) -> None:
    async with SessionServer(nodes.bakery_tls, limits=LIMITS) as server:
        garbler = nodes.garbler(wide, b"malformed-first", inputs_for(wide, 10)[0])
        server.expect(garbler)
        channel, call = await open_raw(nodes.mill_tls, server.port)
        for data in frames:
            await call.write(data)
        kind, frame = fr.decode(await call.read())
        await channel.close()
    assert kind == fr.ABORT and frame.abort.reason == int(reason) and text in frame.abort.message
    assert garbler.state == "new"  # the expected session was not touched


@pytest.mark.parametrize(
    ("bad", "reason", "text"),
    [
        (b"\x0a\x05abc", AbortReason.MALFORMED_FRAME, "not a jointstat.v1.Frame"),
        (bytes([0x78, 0x01]), AbortReason.MALFORMED_FRAME, "unknown frame type"),
        (fr.payload_frame(fr.GARBLER_OUTPUT_LABELS, bytes(16)), AbortReason.UNEXPECTED_FRAME, "'base OT'"),
        (fr.payload_frame(fr.BASE_OT, bytes(31)), AbortReason.OT_FAILURE, "31 bytes"),
    ],
)
async def test_a_malformed_frame_mid_session_aborts_the_session_with_a_reason(
    nodes: Nodes, wide: Program, bad: bytes, reason: AbortReason, text: str
) -> None:
    g_bits, e_bits = inputs_for(wide, 11)
    garbler = nodes.garbler(wide, b"malformed-mid", g_bits)
    async with SessionServer(nodes.bakery_tls, limits=LIMITS) as server:
        expected = server.expect(garbler)
        channel, call = await open_raw(nodes.mill_tls, server.port)
        await call.write(nodes.evaluator(wide, b"malformed-mid", e_bits).start()[0])  # a proper hello …
        await call.write(bad)  # … then a bad frame where the garbler waits for base OT
        frames = []
        while (data := await call.read()) is not grpc.aio.EOF:
            frames.append(fr.decode(data))
        await channel.close()
        g = await expected
    assert_nothing_released(g)
    assert g.abort.reason == reason and text in g.abort.message
    assert [k for k, _ in frames] == [fr.HELLO, fr.ABORT]
    assert frames[-1][1].abort.reason == int(reason)


async def test_a_frame_over_four_mebibytes_never_reaches_the_session(nodes: Nodes, wide: Program) -> None:
    g_bits, e_bits = inputs_for(wide, 12)
    garbler = nodes.garbler(wide, b"oversize", g_bits)
    async with SessionServer(nodes.bakery_tls, limits=LIMITS) as server:
        expected = server.expect(garbler)
        options = [
            ("grpc.ssl_target_name_override", "bakery.coop.test"),
            ("grpc.max_send_message_length", -1),
        ]
        async with grpc.aio.secure_channel(
            f"127.0.0.1:{server.port}", nodes.mill_tls.channel_credentials(), options=options
        ) as channel:
            call = channel.stream_stream(METHOD_PATH)(timeout=30)
            await call.write(nodes.evaluator(wide, b"oversize", e_bits).start()[0])
            with pytest.raises(grpc.aio.AioRpcError):
                await call.write(bytes(fr.MAX_FRAME_BYTES + 1))
                while await call.read() is not grpc.aio.EOF:
                    pass
                await call
        g = await asyncio.wait_for(expected, timeout=10)
    assert_nothing_released(g)
    assert g.abort.reason == AbortReason.CONNECTION_LOST


# -- flow control ------------------------------------------------------------------------------------------------------


class PausedReads(ClientStream):
    """A client stream that stops reading after ``after`` frames until ``resume`` is set."""

    def __init__(self, call: grpc.aio.StreamStreamCall, after: int) -> None:
        super().__init__(call, grace_s=5)
        self.after = after
        self.read_count = 0
        self.paused = asyncio.Event()
        self.resume = asyncio.Event()

    async def read(self) -> bytes | None:
        if self.read_count == self.after:
            self.paused.set()
            await self.resume.wait()
        self.read_count += 1
        return await super().read()


async def test_a_slow_evaluator_holds_the_garbler_back_instead_of_making_it_buffer(nodes: Nodes) -> None:
    program = wide_program(1 << 20, 8192)  # 32 MiB of tables
    g_bits, e_bits = inputs_for(program, 13)
    chunk = 1 << 14
    garbler = nodes.garbler(program, b"slow-evaluator", g_bits, chunk_bytes=chunk)
    evaluator = nodes.evaluator(program, b"slow-evaluator", e_bits)
    async with SessionServer(nodes.bakery_tls, limits=LIMITS) as server:
        expected = server.expect(garbler)
        channel, call = await open_raw(nodes.mill_tls, server.port)
        stream = PausedReads(call, after=12)  # hello, OT, input labels and a few table frames
        client = asyncio.create_task(drive(evaluator, stream, LIMITS))
        await stream.paused.wait()
        # Wait until the garbler stops making progress, then look at how far ahead it got.
        last = -1
        while garbler.frames_sent != last:
            last = garbler.frames_sent
            await asyncio.sleep(0.3)
        ahead_bytes = (garbler.frames_sent - stream.read_count) * chunk
        stream.resume.set()
        e = await client
        g = await expected
        await channel.close()
    assert e.completed and g.completed
    expected_out = plain_outputs(program, g_bits, e_bits)
    assert np.array_equal(e.outputs, expected_out[Party.EVALUATOR])
    # It stalled well short of the 32 MiB of tables: a send window of frames plus gRPC's bounded buffers.
    assert ahead_bytes < 16 * 1024 * 1024
