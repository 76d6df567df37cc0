"""The driver that runs a session over a frame stream: its worker thread, its producer, its background transcript hash.

Specification: the transcript hashed on the driver's background thread (``BackgroundHasher``) is the plain
``hashlib`` SHA-256 transcript; every call into a session — and so the greenlet its program runs in — happens on one
worker thread, the same for the session's whole life and never the event loop's, even when the program pauses
across many frames; every frame ``produce()`` made is sent, even when the peer's finish ended the session first; a
peer's abort in the middle of the table stream ends the garbler with the peer's reason; a garbler that stops its
table stream short while both sides wait leaves both ended by the idle limit, without output; a node that shuts
down mid-session sends its peer an abort whose reason says so (``peer_shutdown``) before it closes the stream.

The two sides talk through an in-memory frame stream (``MemoryStream``), so these tests need no network.
"""

from __future__ import annotations

import asyncio
import hashlib
import threading
from collections.abc import Callable

import numpy as np
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from hypothesis import given
from hypothesis import strategies as st
from jointstat.bench.garble import wide_program
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.circuit.reference import aes128
from jointstat.garble.halfgates import TABLE_BYTES
from jointstat.protocol import AbortReason, EvaluatorSession, GarblerSession, signer, verifier
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import Transcript
from jointstat.protocol.sides import Session
from jointstat.transport.driver import BackgroundHasher, Limits, SessionResult, Shutdown, StreamLost, drive

from tests.circuits import random_bits

# Invented scenario: two ferry operators compare passenger counts; the digest stands for their agreed manifest.
MANIFEST = hashlib.sha256(b"invented manifest: two ferry operators compare passenger counts").digest()
G_KEY, E_KEY = Ed25519PrivateKey.generate(), Ed25519PrivateKey.generate()
LIMITS = Limits(deadline_s=60, idle_timeout_s=30, abort_grace_s=2)
# FIPS 197 Appendix C.1 (AES-128), from memory; also checked against `cryptography` in test_reference_circuits.
FIPS197_C1_KEY = bytes.fromhex("000102030405060708090a0b0c0d0e0f")
FIPS197_C1_PLAINTEXT = bytes.fromhex("00112233445566778899aabbccddeeff")
FIPS197_C1_CIPHERTEXT = bytes.fromhex("69c4e0d86a7b0430d8cdb78070b4c55a")


class MemoryStream:
    """One end of an in-memory frame stream (``driver.FrameStream``); ``pair()`` makes both ends.

    ``drop`` may name frames this end writes that never arrive (a garbler that stops short)."""

    def __init__(self, drop: Callable[[bytes], bool] | None = None) -> None:
        self.inbox: asyncio.Queue[bytes | None] = asyncio.Queue()
        self.peer: MemoryStream | None = None
        self.written: list[bytes] = []
        self.drop = drop
        self.closed = False

    @classmethod
    def pair(cls, drop: Callable[[bytes], bool] | None = None) -> tuple[MemoryStream, MemoryStream]:
        a, b = cls(drop), cls()
        a.peer, b.peer = b, a
        return a, b

    async def read(self) -> bytes | None:
        return await self.inbox.get()

    async def write(self, data: bytes) -> None:
        if self.closed:
            raise StreamLost("the stream is closed")
        assert self.peer is not None
        self.written.append(data)
        if self.drop is None or not self.drop(data):
            self.peer.inbox.put_nowait(data)

    async def close(self, completed: bool) -> None:
        if not self.closed:
            self.closed = True
            assert self.peer is not None
            self.peer.inbox.put_nowait(None)

    def cancel(self) -> None:
        self.closed = True

    def peer_gone(self) -> bool:
        return False


def inputs_of(program: Program, seed: int) -> dict[Party, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {p: random_bits(rng, program.n_inputs(p)) for p in Party}


def kinds(frames: list[bytes]) -> list[str]:
    return [fr.decode(f)[0] for f in frames]


def pair_of(
    program: Program,
    bits: dict[Party, np.ndarray],
    *,
    chunk_bytes: int = 1 << 12,
    garbler_class: type[GarblerSession] = GarblerSession,
    evaluator_class: type[EvaluatorSession] = EvaluatorSession,
) -> tuple[GarblerSession, EvaluatorSession]:
    common = {"session_id": b"ferries-2032-07", "program": program, "manifest_digest": MANIFEST}
    garbler = garbler_class(
        inputs=bits[Party.GARBLER],
        sign=signer(G_KEY),
        verify=verifier(E_KEY.public_key()),
        chunk_bytes=chunk_bytes,
        **common,  # type: ignore[arg-type]
    )
    evaluator = evaluator_class(
        inputs=bits[Party.EVALUATOR],
        sign=signer(E_KEY),
        verify=verifier(G_KEY.public_key()),
        **common,  # type: ignore[arg-type]
    )
    return garbler, evaluator


async def drive_both(
    garbler: Session, evaluator: Session, limits: Limits = LIMITS, drop: Callable[[bytes], bool] | None = None
) -> tuple[SessionResult, SessionResult]:
    g_stream, e_stream = MemoryStream.pair(drop)
    g, e = await asyncio.wait_for(
        asyncio.gather(drive(garbler, g_stream, limits), drive(evaluator, e_stream, limits)), timeout=60
    )
    return g, e


def plain(program: Program, bits: dict[Party, np.ndarray]) -> dict[Party, np.ndarray]:
    backend = PlainBackend(bits)
    program.run(Builder(backend))
    return {p: backend.outputs(p) for p in Party}


# -- the background transcript hash ------------------------------------------------------------------------------------

frames_strategy = st.lists(
    st.tuples(
        st.sampled_from([Party.GARBLER, Party.EVALUATOR]),
        st.sampled_from([fr.HELLO, fr.BASE_OT, fr.GARBLED_TABLES, fr.FINISH, fr.ABORT]),
        st.binary(min_size=1, max_size=3000),
    ),
    max_size=20,
)


@given(frames_strategy, st.integers(0, 3))
def test_the_transcript_hashed_on_the_background_thread_equals_the_plain_hashlib_transcript(
    frames: list[tuple[Party, str, bytes]], digest_after: int
) -> None:
    hasher = BackgroundHasher()
    try:
        background = Transcript(Party.GARBLER, b"sid", hasher.new)
        plain_t = Transcript(Party.GARBLER, b"sid")  # hashlib.sha256 (FIPS 180-4), on this thread
        for i, (sender, kind, data) in enumerate(frames):
            view = memoryview(data)  # as the session hands received tables over: a view, not a copy
            for t in (background, plain_t):
                (t.sent if sender == Party.GARBLER else t.received)(kind, view)
            if i == digest_after:  # a digest mid-way waits for what was queued before it, and hashing goes on
                assert background.digest() == plain_t.digest()
        assert background.digest() == plain_t.digest()
    finally:
        hasher.close()


async def test_a_garbler_hashing_on_the_background_thread_agrees_with_an_evaluator_hashing_in_line() -> None:
    program = wide_program(1 << 12, 256)
    bits = inputs_of(program, 1)
    garbler, evaluator = pair_of(program, bits)
    g_stream, e_stream = MemoryStream.pair()
    # The driver hashes the garbler's transcript in the background; the evaluator is played in line, hashing with
    # hashlib as it goes, and answered through the stream.
    evaluator_done = asyncio.Event()

    async def play_evaluator() -> None:
        for data in evaluator.start():
            await e_stream.write(data)
        while not evaluator.ended:
            data = await e_stream.read()
            if data is None:
                break
            for reply in evaluator.receive(data):
                await e_stream.write(reply)
        evaluator_done.set()

    player = asyncio.create_task(play_evaluator())
    g = await asyncio.wait_for(drive(garbler, g_stream, LIMITS), timeout=60)
    await asyncio.wait_for(player, timeout=10)
    assert g.completed and evaluator.done
    assert g.transcript_digest == evaluator.transcript_digest
    assert np.array_equal(evaluator.outputs, plain(program, bits)[Party.EVALUATOR])


# -- one thread per session ----------------------------------------------------------------------------------------


class ThreadNotes:
    """The threads each party's session code ran on: its methods, and its program between AND calls."""

    def __init__(self) -> None:
        self.threads: dict[str, set[int]] = {"garbler": set(), "evaluator": set()}
        self.program_steps: dict[str, int] = {"GarblerBackend": 0, "EvaluatorBackend": 0}

    def note(self, who: str) -> None:
        self.threads[who].add(threading.get_ident())


def noting_program(notes: ThreadNotes, calls: int, width: int) -> Program:
    """``calls`` AND calls of ``width`` gates, noting the thread after each (a program that pauses across frames)."""

    def run(bld: Builder) -> None:
        state = bld.input(Party.GARBLER, width)
        key = bld.input(Party.EVALUATOR, width)
        backend = type(bld.backend).__name__
        who = {"GarblerBackend": "garbler", "EvaluatorBackend": "evaluator"}.get(backend)
        for _ in range(calls):
            state = bld.xor(bld.and_(state, key.roll(1, axis=0)), key)
            if who is not None:
                notes.note(who)
                notes.program_steps[backend] += 1
        bld.output(Party.EVALUATOR, state[: width // 2])
        bld.output(Party.GARBLER, state[width // 2 :])

    return Program.of(run, name="a program noting its threads")


def noting_sessions(notes: ThreadNotes) -> tuple[type[GarblerSession], type[EvaluatorSession]]:
    class NotingGarbler(GarblerSession):
        def start(self) -> list[bytes]:
            notes.note("garbler")
            return super().start()

        def receive(self, data: bytes) -> list[bytes]:
            notes.note("garbler")
            return super().receive(data)

        def release(self) -> None:
            notes.note("garbler")
            super().release()

    class NotingEvaluator(EvaluatorSession):
        def start(self) -> list[bytes]:
            notes.note("evaluator")
            return super().start()

        def receive(self, data: bytes) -> list[bytes]:
            notes.note("evaluator")
            return super().receive(data)

        def release(self) -> None:
            notes.note("evaluator")
            super().release()

    return NotingGarbler, NotingEvaluator


async def test_every_call_of_a_session_and_its_paused_program_runs_on_one_worker_thread() -> None:
    notes = ThreadNotes()
    calls, width = 64, 256
    program = noting_program(notes, calls, width)
    bits = inputs_of(program, 2)
    g_class, e_class = noting_sessions(notes)
    # 32 tables per frame: each AND call of 256 gates spans 8 frames, so both programs pause mid-call again and
    # again, resumed each time by a later call from the driver.
    garbler, evaluator = pair_of(
        program, bits, chunk_bytes=TABLE_BYTES * 32, garbler_class=g_class, evaluator_class=e_class
    )
    g, e = await drive_both(garbler, evaluator)
    assert g.completed and e.completed
    expected = plain(program, bits)
    assert np.array_equal(g.outputs, expected[Party.GARBLER])
    assert np.array_equal(e.outputs, expected[Party.EVALUATOR])
    assert notes.program_steps == {"GarblerBackend": calls, "EvaluatorBackend": calls}
    assert g.counters.frames_sent > calls * 8
    loop_thread = threading.get_ident()
    garbler_threads, evaluator_threads = notes.threads["garbler"], notes.threads["evaluator"]
    assert len(garbler_threads) == 1 and len(evaluator_threads) == 1
    assert loop_thread not in garbler_threads | evaluator_threads  # never on the event loop
    assert garbler_threads != evaluator_threads  # each session its own worker


# -- every frame produce() made is sent ----------------------------------------------------------------------------


class FinishFirst(MemoryStream):
    """The garbler's stream, with the evaluator played in line: when the garbler's decoding frame is written, the
    evaluator's finish is delivered back, and the write returns only once that finish has ended the garbler's
    session — before the garbler's own finish, already made, has been pulled from ``produce()``."""

    def __init__(self, garbler: GarblerSession, evaluator: EvaluatorSession) -> None:
        super().__init__()
        self.garbler, self.evaluator = garbler, evaluator
        self.done_before_own_finish: bool | None = None

    async def start_evaluator(self) -> None:
        for data in self.evaluator.start():
            self.inbox.put_nowait(data)

    async def write(self, data: bytes) -> None:
        self.written.append(data)
        if self.evaluator.ended:
            return
        kind = fr.decode(data)[0]
        for reply in self.evaluator.receive(data):
            self.inbox.put_nowait(reply)
        if kind == fr.EVALUATOR_OUTPUT_DECODING:
            for _ in range(2000):  # the garbler's reader takes the evaluator's finish on its worker
                if self.garbler.done:
                    break
                await asyncio.sleep(0.005)
            self.done_before_own_finish = self.garbler.done and fr.FINISH not in kinds(self.written)

    async def close(self, completed: bool) -> None:
        self.closed = True


async def test_every_frame_produce_made_is_sent_even_after_the_peers_finish_ended_the_session() -> None:
    program = Program.of(
        aes128.aes128_program
    )  # the garbler has no outputs: decoding and finish end its stream
    bits = {
        Party.GARBLER: aes128.key_bits(FIPS197_C1_KEY),
        Party.EVALUATOR: aes128.block_bits(FIPS197_C1_PLAINTEXT),
    }
    garbler, evaluator = pair_of(program, bits)
    stream = FinishFirst(garbler, evaluator)
    await stream.start_evaluator()
    # One send slot: the producer pulls its next frame only after the previous one is written.
    limits = Limits(deadline_s=60, idle_timeout_s=30, abort_grace_s=5, send_window=1)
    g = await asyncio.wait_for(drive(garbler, stream, limits), timeout=60)
    assert stream.done_before_own_finish is True  # the peer's finish came first
    assert g.completed
    assert kinds(stream.written)[-2:] == [
        fr.EVALUATOR_OUTPUT_DECODING,
        fr.FINISH,
    ]  # … and the own finish still left
    assert evaluator.done  # so the evaluator completes too
    assert aes128.bits_to_block(evaluator.outputs) == FIPS197_C1_CIPHERTEXT


# -- endings in the middle of the table stream ---------------------------------------------------------------------


class AbortAfterTables(MemoryStream):
    """The garbler's stream with the evaluator played in line; after ``tables`` table frames the evaluator aborts."""

    def __init__(self, evaluator: EvaluatorSession, tables: int) -> None:
        super().__init__()
        self.evaluator, self.tables = evaluator, tables
        self.seen = 0

    async def write(self, data: bytes) -> None:
        self.written.append(data)
        if self.evaluator.ended:
            return
        if fr.decode(data)[0] == fr.GARBLED_TABLES:
            self.seen += 1
            if self.seen == self.tables:
                frame = self.evaluator.fail(AbortReason.CANCELLED, "the mill's node is stopping")
                assert frame is not None
                self.inbox.put_nowait(frame)
                return
        for reply in self.evaluator.receive(data):
            self.inbox.put_nowait(reply)

    async def close(self, completed: bool) -> None:
        self.closed = True


async def test_a_peers_abort_mid_stream_ends_the_garbler_with_the_peers_reason() -> None:
    program = wide_program(1 << 14, 512)
    garbler, evaluator = pair_of(program, inputs_of(program, 3), chunk_bytes=TABLE_BYTES * 16)
    stream = AbortAfterTables(evaluator, tables=20)
    for data in evaluator.start():
        stream.inbox.put_nowait(data)
    g = await asyncio.wait_for(drive(garbler, stream, LIMITS), timeout=60)
    assert not g.completed and g.abort is not None
    assert (g.abort.reason, g.abort.by_peer) == (AbortReason.CANCELLED, True), g.abort
    assert "the mill's node is stopping" in g.abort.message
    assert fr.ABORT not in kinds(stream.written)  # no abort of its own sent back


async def test_a_garbler_that_stops_its_table_stream_short_leaves_both_sides_ended_by_the_idle_limit() -> (
    None
):
    # The garbler of the wide program has outputs, so after its last table frame it waits for its output labels,
    # while the evaluator waits for the rest of the tables: nothing tells either side, until the idle limit.
    program = wide_program(1 << 12, 256)
    garbler, evaluator = pair_of(program, inputs_of(program, 4), chunk_bytes=1 << 12)
    table_frames = TABLE_BYTES * program.size.and_gates // (1 << 12)
    written: list[str] = []

    def last_tables(data: bytes) -> bool:
        written.append(fr.decode(data)[0])
        return written.count(fr.GARBLED_TABLES) == table_frames and written[-1] == fr.GARBLED_TABLES

    quick = Limits(deadline_s=30, idle_timeout_s=0.5, abort_grace_s=0.2)
    g, e = await drive_both(garbler, evaluator, quick, drop=last_tables)
    for result in (g, e):
        assert not result.completed and result.outputs is None and result.abort is not None
        assert result.abort.reason == AbortReason.DEADLINE, result.abort
    assert evaluator.and_gates_done < program.size.and_gates


async def test_a_node_shutting_down_tells_its_peer_so_with_an_abort_before_it_closes() -> None:
    program = wide_program(1 << 14, 512)
    garbler, evaluator = pair_of(program, inputs_of(program, 5))
    g_stream, e_stream = MemoryStream.pair()
    shutdown = Shutdown()

    def evaluator_progress() -> None:
        if evaluator.and_gates_done > 0:  # tables flow: the garbler's node is asked to stop now
            shutdown.request()

    g, e = await asyncio.wait_for(
        asyncio.gather(
            drive(garbler, g_stream, LIMITS, shutdown=shutdown),
            drive(evaluator, e_stream, LIMITS, on_progress=evaluator_progress),
        ),
        timeout=60,
    )
    assert not g.completed and not e.completed
    assert g.abort is not None and not g.abort.by_peer and g.abort.reason == AbortReason.PEER_SHUTDOWN
    assert e.abort is not None and e.abort.by_peer and e.abort.reason == AbortReason.PEER_SHUTDOWN
    assert "this node is shutting down" in e.abort.message
    assert kinds(g_stream.written)[-1] == fr.ABORT and g_stream.closed
    assert await asyncio.wait_for(shutdown.drained(), timeout=5)
