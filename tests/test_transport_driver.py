"""The transport driver on in-memory streams: which frames leave, in which order, before the stream closes.

Specification: every frame a session produced is written before the driver closes its stream — in particular the
garbler's decoding and finish frames, which come out of its producer thread after the last table, still leave
when the evaluator's finish has already completed the garbler's session (the interleaving is forced, with no
timing involved). A node that shuts down mid-session sends its peer an abort whose reason says so
(``peer_shutdown``) before it closes the stream.
"""

from __future__ import annotations

import asyncio
import hashlib
import threading
from collections.abc import Callable, Iterator

import numpy as np
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.bench.garble import wide_circuit
from jointstat.circuit.builder import Builder
from jointstat.circuit.layers import LayeredCircuit, schedule
from jointstat.circuit.model import Party
from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason
from jointstat.transport.driver import Limits, Shutdown, StreamLost, drive

# Invented scenario: a ferry operator (garbler) and a harbour office (evaluator) count shared sailings.
MANIFEST = hashlib.sha256(b"invented manifest: ferry operator and harbour office, shared sailings").digest()
LIMITS = Limits(deadline_s=60, idle_timeout_s=30, abort_grace_s=5)
FERRY_KEY, HARBOUR_KEY = Ed25519PrivateKey.generate(), Ed25519PrivateKey.generate()


class MemoryStream:
    """One end of an in-memory frame stream: what it writes, the other end reads; closing ends the other's reads."""

    def __init__(self) -> None:
        self.inbox: asyncio.Queue[bytes | None] = asyncio.Queue()
        self.other: MemoryStream | None = None
        self.written: list[str] = []
        self.closed = False

    async def read(self) -> bytes | None:
        return await self.inbox.get()

    async def write(self, data: bytes) -> None:
        if self.closed:
            raise StreamLost("the stream has been closed")
        assert self.other is not None
        self.written.append(fr.decode(data)[0])
        self.other.inbox.put_nowait(data)

    async def close(self, completed: bool) -> None:
        self.cancel()

    def cancel(self) -> None:
        if not self.closed:
            self.closed = True
            assert self.other is not None
            self.other.inbox.put_nowait(None)

    def peer_gone(self) -> bool:
        return False


def stream_pair() -> tuple[MemoryStream, MemoryStream]:
    a, b = MemoryStream(), MemoryStream()
    a.other, b.other = b, a
    return a, b


def only_the_evaluator_has_outputs() -> LayeredCircuit:
    bld = Builder()
    g = bld.input(Party.GARBLER, 8)
    e = bld.input(Party.EVALUATOR, 8)
    bld.output(Party.EVALUATOR, bld.xor(bld.and_(g, e), g))
    return schedule(bld.build())


class FinishHeldBack(GarblerSession):
    """A garbler whose producer hands out its finish frame only once ``release`` is set."""

    def __init__(self, **kwargs: object) -> None:
        super().__init__(**kwargs)  # type: ignore[arg-type]
        self.release = threading.Event()

    def produce(self) -> Iterator[bytes]:
        for data in super().produce():
            if fr.decode(data)[0] == fr.FINISH and not self.release.wait(timeout=60):
                raise AssertionError("the test never released the garbler's finish frame")
            yield data


def after_loop_passes(passes: int, action: Callable[[], None]) -> None:
    """Run ``action`` after the event loop has gone through its ready callbacks ``passes`` more times."""
    loop = asyncio.get_running_loop()

    def step(left: int) -> None:
        if left == 0:
            action()
        else:
            loop.call_soon(step, left - 1)

    loop.call_soon(step, passes)


async def test_the_garblers_finish_leaves_even_when_the_evaluators_finish_completed_its_session_first() -> (
    None
):
    layered = only_the_evaluator_has_outputs()
    sid = b"ferry-harbour-0001"
    g_bits = np.array([1, 0, 1, 1, 0, 0, 1, 0], dtype=np.uint8)
    e_bits = np.array([1, 1, 0, 1, 0, 1, 1, 0], dtype=np.uint8)
    garbler = FinishHeldBack(
        session_id=sid,
        layered=layered,
        manifest_digest=MANIFEST,
        inputs=g_bits,
        sign=signer(FERRY_KEY),
        verify=verifier(HARBOUR_KEY.public_key()),
    )
    evaluator = EvaluatorSession(
        session_id=sid,
        layered=layered,
        manifest_digest=MANIFEST,
        inputs=e_bits,
        sign=signer(HARBOUR_KEY),
        verify=verifier(FERRY_KEY.public_key()),
    )
    g_stream, e_stream = stream_pair()

    def garbler_progress() -> None:
        # The evaluator's finish has completed the garbler's session while its own finish is still held in the
        # producer. Let the driver act on that for 50 passes of the event loop (it needs a handful), then let go.
        if garbler.done and not garbler.release.is_set():
            after_loop_passes(50, garbler.release.set)

    g, e = await asyncio.wait_for(
        asyncio.gather(
            drive(garbler, g_stream, LIMITS, on_progress=garbler_progress),
            drive(evaluator, e_stream, LIMITS),
        ),
        timeout=60,
    )
    assert g.completed and g.outputs is not None and g.outputs.size == 0
    assert e.completed, e.abort
    assert np.array_equal(e.outputs, (g_bits & e_bits) ^ g_bits)
    assert g_stream.written[-2:] == [fr.EVALUATOR_OUTPUT_DECODING, fr.FINISH]
    assert e.transcript_digest == g.transcript_digest


async def test_a_node_shutting_down_tells_its_peer_so_with_an_abort_before_it_closes() -> None:
    layered = schedule(wide_circuit(1 << 14, 512))
    sid = b"ferry-harbour-0002"
    rng = np.random.default_rng(5)
    garbler = GarblerSession(
        session_id=sid,
        layered=layered,
        manifest_digest=MANIFEST,
        inputs=rng.integers(0, 2, layered.circuit.n_inputs(Party.GARBLER), dtype=np.uint8),
        sign=signer(FERRY_KEY),
        verify=verifier(HARBOUR_KEY.public_key()),
        chunk_bytes=1 << 12,
    )
    evaluator = EvaluatorSession(
        session_id=sid,
        layered=layered,
        manifest_digest=MANIFEST,
        inputs=rng.integers(0, 2, layered.circuit.n_inputs(Party.EVALUATOR), dtype=np.uint8),
        sign=signer(HARBOUR_KEY),
        verify=verifier(FERRY_KEY.public_key()),
    )
    g_stream, e_stream = stream_pair()
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
    assert g_stream.written[-1] == fr.ABORT and g_stream.closed
    assert await asyncio.wait_for(shutdown.drained(), timeout=5)
