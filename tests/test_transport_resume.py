"""Resume through the real transport: gRPC with mutual TLS through the link emulator, cut mid-stream.

Specification: a session cut in the middle of its table stream is resumed by the initiator on a new connection
(the same pinned mutual TLS, the same session id, a signed resume) and completes on both sides with the correct
outputs and one transcript both sides signed; the cuts and resumes are recorded in both results. A resume with a
wrong proof, or from a client certificate other than the one the session started with (even one the server pins),
is refused on its own stream and logged, and the session goes on; once the grace period has passed both sides fail
with ``connection lost`` (no output anywhere) and a late resume is refused and logged. A garbler whose evaluator
stops acknowledging holds at most its replay limit. A session cut before its OT has ended cannot be resumed and
fails at once as restartable (the initiator starts a fresh one); one cut after its OT that is not resumed in time is
not restartable.
"""

from __future__ import annotations

import asyncio
import hashlib
from collections.abc import Awaitable, Callable

import grpc
import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.bench.garble import wide_program
from jointstat.circuit.backend import PlainBackend
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.harness.link import Link, LinkConfig
from jointstat.protocol import AbortReason, EvaluatorSession, GarblerSession, signer, verifier
from jointstat.protocol import frames as fr
from jointstat.statements import RESUME, Statement, session_text
from jointstat.transport import Limits, SessionServer, run_client
from jointstat.transport.channel import MESSAGE_OPTIONS, METHOD_PATH, ClientStream
from jointstat.transport.driver import CUT, REFUSED, RESUMED, StreamLost, drive
from jointstat.transport.pki import issue, new_ca
from jointstat.transport.tls import NodeTLS

from tests.circuits import random_bits

# Invented scenario: two orchards compare harvest weights; the digest stands for their agreed manifest.
MANIFEST = hashlib.sha256(b"invented manifest: two orchards compare harvest weights").digest()
G_KEY, E_KEY = Ed25519PrivateKey.generate(), Ed25519PrivateKey.generate()
CHUNK = 1 << 14


class Orchards:
    def __init__(self) -> None:
        ca = new_ca("orchards test CA")
        north, south, other = (
            issue(ca, "north.orchard.test"),
            issue(ca, "south.orchard.test"),
            issue(ca, "x.test"),
        )
        # The garbler's node pins both the evaluator's certificate and a third node's.
        self.server_tls = NodeTLS(
            north.certificate, north.private_key, (south.certificate, other.certificate)
        )
        self.client_tls = NodeTLS(south.certificate, south.private_key, (north.certificate,))
        self.other_tls = NodeTLS(other.certificate, other.private_key, (north.certificate,))


@pytest.fixture(scope="module")
def orchards() -> Orchards:
    return Orchards()


@pytest.fixture(scope="module")
def program() -> Program:
    return wide_program(1 << 16, 2048)  # 65,536 AND gates: 2 MiB of tables in 128 frames


def sessions(
    program: Program, sid: bytes, replay_limit: int = 1 << 20
) -> tuple[GarblerSession, EvaluatorSession, dict[Party, np.ndarray]]:
    rng = np.random.default_rng(int.from_bytes(sid[:4], "big"))
    bits = {p: random_bits(rng, program.n_inputs(p)) for p in Party}
    common = {"session_id": sid, "program": program, "manifest_digest": MANIFEST}
    garbler = GarblerSession(
        inputs=bits[Party.GARBLER],
        sign=signer(G_KEY),
        verify=verifier(E_KEY.public_key()),
        chunk_bytes=CHUNK,
        replay_limit_bytes=replay_limit,
        **common,  # type: ignore[arg-type]
    )
    evaluator = EvaluatorSession(
        inputs=bits[Party.EVALUATOR],
        sign=signer(E_KEY),
        verify=verifier(G_KEY.public_key()),
        **common,  # type: ignore[arg-type]
    )
    return garbler, evaluator, bits


def plain(program: Program, bits: dict[Party, np.ndarray]) -> dict[Party, np.ndarray]:
    backend = PlainBackend(bits)
    program.run(Builder(backend))
    return {p: backend.outputs(p) for p in Party}


def limits(grace: float, reconnect: float = 0.02) -> Limits:
    return Limits(
        deadline_s=60, idle_timeout_s=10, abort_grace_s=1, resume_grace_s=grace, reconnect_initial_s=reconnect
    )


async def until(condition: Callable[[], bool], timeout: float = 30) -> None:
    async with asyncio.timeout(timeout):
        while not condition():
            await asyncio.sleep(0.002)


async def raw_resume(tls: NodeTLS, port: int, frame: bytes) -> bytes | None:
    """Open a stream to the server with ``tls`` and send ``frame`` first; the server's first answer."""
    options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", tls.server_name())]
    async with grpc.aio.secure_channel(
        f"127.0.0.1:{port}", tls.channel_credentials(), options=options
    ) as channel:
        call = channel.stream_stream(METHOD_PATH, request_serializer=None, response_deserializer=None)(
            timeout=10
        )
        stream = ClientStream(call, grace_s=1)
        await stream.write(frame)
        answer = await stream.read()
        stream.cancel()
        return answer


def forged_resume(sid: bytes, key: Ed25519PrivateKey) -> bytes:
    """A resume frame for ``sid`` signed with ``key`` over an anchor the forger cannot know (it guesses zeros)."""
    return fr.resume_frame(
        party=Party.EVALUATOR,
        session_id=sid,
        attempt=7,
        frames_received=3,
        anchor=bytes(32),
        sign=lambda digest: key.sign(Statement(RESUME, session_text(sid), digest).message()),
    )


async def run_through_link(
    orchards: Orchards,
    garbler: GarblerSession,
    evaluator: EvaluatorSession,
    during: Callable[[Link, SessionServer], Awaitable[None]],
    *,
    lim: Limits,
) -> tuple[object, object, SessionServer]:
    config = LinkConfig.from_words("400Mbit/s", "4ms")
    async with SessionServer(orchards.server_tls, limits=lim) as server:
        expected = server.expect(garbler, limits=lim)
        async with Link(config, ("127.0.0.1", server.port)) as link:
            client = asyncio.create_task(
                run_client(evaluator, f"127.0.0.1:{link.address[1]}", orchards.client_tls, limits=lim)
            )
            await during(link, server)
            e = await asyncio.wait_for(client, 60)
            g = await asyncio.wait_for(expected, 60)
    return g, e, server


async def test_a_session_cut_twice_mid_stream_resumes_and_completes_with_one_transcript(
    orchards: Orchards, program: Program
) -> None:
    garbler, evaluator, bits = sessions(program, b"orchards-resume-1")

    async def cut_twice(link: Link, _server: SessionServer) -> None:
        for share in (3, 6):
            await until(lambda s=share: evaluator.and_gates_done > s * program.size.and_gates // 10)
            await link.cut()

    g, e, server = await run_through_link(orchards, garbler, evaluator, cut_twice, lim=limits(20))
    expected = plain(program, bits)
    assert g.completed and e.completed, (g.abort, e.abort)  # type: ignore[attr-defined]
    assert np.array_equal(g.outputs, expected[Party.GARBLER])  # type: ignore[attr-defined]
    assert np.array_equal(e.outputs, expected[Party.EVALUATOR])  # type: ignore[attr-defined]
    assert g.transcript_digest == e.transcript_digest  # type: ignore[attr-defined]
    for result in (g, e):
        kinds = [event.kind for event in result.events]  # type: ignore[attr-defined]
        assert kinds.count(CUT) == 2 and kinds.count(RESUMED) == 2, kinds
    assert not server.refused


async def test_a_resume_with_a_wrong_proof_or_another_certificate_is_refused_and_logged_and_the_session_goes_on(
    orchards: Orchards, program: Program
) -> None:
    sid = b"orchards-resume-2"
    garbler, evaluator, _ = sessions(program, sid)
    answers: dict[str, bytes | None] = {}

    async def cut_then_intrude(link: Link, server: SessionServer) -> None:
        await until(lambda: evaluator.and_gates_done > program.size.and_gates // 3)
        await link.cut()
        await until(lambda: not garbler.ended and garbler.resumes == 0 and len(server._running) == 1)
        impostor = Ed25519PrivateKey.generate()
        answers["proof"] = await raw_resume(orchards.client_tls, server.port, forged_resume(sid, impostor))
        answers["certificate"] = await raw_resume(orchards.other_tls, server.port, forged_resume(sid, E_KEY))

    # The evaluator waits a second before its first reconnection: the intruders come first.
    lim = limits(20, reconnect=1.0)
    lim_client = Limits(**{**lim.__dict__, "reconnect_initial_s": 1.0})
    g, e, server = await run_through_link(orchards, garbler, evaluator, cut_then_intrude, lim=lim_client)
    for why, answer in answers.items():
        assert answer is not None, why
        kind, frame = fr.decode(answer)
        assert kind == fr.ABORT and frame.abort.reason == AbortReason.RESUME_REFUSED, why  # type: ignore[union-attr]
    assert any("proof does not verify" in line for line in server.refused)
    assert any("not the one the session started with" in line for line in server.refused)
    assert g.completed and e.completed  # type: ignore[attr-defined]
    assert any(event.kind == REFUSED for event in g.events)  # type: ignore[attr-defined]


async def test_after_the_grace_period_both_sides_fail_without_output_and_a_late_resume_is_refused_and_logged(
    orchards: Orchards, program: Program
) -> None:
    sid = b"orchards-resume-3"
    garbler, evaluator, _ = sessions(program, sid)
    lim = limits(0.6, reconnect=0.1)
    config = LinkConfig.from_words("400Mbit/s", "4ms")
    async with SessionServer(orchards.server_tls, limits=lim) as server:
        expected = server.expect(garbler, limits=lim)
        link = Link(config, ("127.0.0.1", server.port))
        await link.start()
        client = asyncio.create_task(
            run_client(evaluator, f"127.0.0.1:{link.address[1]}", orchards.client_tls, limits=lim)
        )
        await until(lambda: evaluator.and_gates_done > program.size.and_gates // 3)
        await link.close()  # the link goes away: every reconnection attempt fails
        e = await asyncio.wait_for(client, 30)
        g = await asyncio.wait_for(expected, 30)
        late = await raw_resume(orchards.client_tls, server.port, forged_resume(sid, E_KEY))
    for result in (g, e):
        assert not result.completed and result.outputs is None
        assert result.abort is not None and result.abort.reason == AbortReason.CONNECTION_LOST
        assert "grace period" in result.abort.message
        assert CUT in [event.kind for event in result.events]
    assert late is not None and fr.decode(late)[0] == fr.ABORT
    assert any("no such session is running here" in line for line in server.refused)


class InlinePeer:
    """A stream whose peer is played in line by the test: nothing to close or cancel, and the peer never goes."""

    async def close(self, completed: bool) -> None:
        pass

    def cancel(self) -> None:
        pass

    def peer_gone(self) -> bool:
        return False


class NoAcks(InlinePeer):
    """The garbler's stream with the evaluator played in line, whose acknowledgements never arrive."""

    def __init__(self, evaluator: EvaluatorSession) -> None:
        self.evaluator = evaluator
        self.inbox: asyncio.Queue[bytes | None] = asyncio.Queue()
        for data in evaluator.start():
            self.inbox.put_nowait(data)

    async def read(self) -> bytes | None:
        return await self.inbox.get()

    async def write(self, data: bytes) -> None:
        if self.evaluator.ended:
            return
        for reply in self.evaluator.receive(data):
            if fr.decode(reply)[0] != fr.TABLES_ACK:
                self.inbox.put_nowait(reply)


async def test_a_garbler_whose_evaluator_stops_acknowledging_holds_at_most_its_replay_limit(
    program: Program,
) -> None:
    limit = 6 * (CHUNK + 16)
    garbler, evaluator, _ = sessions(program, b"orchards-stall", replay_limit=limit)
    stream = NoAcks(evaluator)
    task = asyncio.create_task(drive(garbler, stream, Limits(deadline_s=30, idle_timeout_s=30)))
    await until(lambda: garbler.replay_bytes > 0 and not garbler.can_stream)
    await asyncio.sleep(0.3)  # the producer waits: nothing more is garbled
    held, done = garbler.replay_bytes, garbler.and_gates_done
    await asyncio.sleep(0.3)
    assert garbler.replay_bytes == held <= limit and garbler.and_gates_done == done < program.size.and_gates
    task.cancel()
    with pytest.raises(asyncio.CancelledError):
        await task


class Severed(InlinePeer):
    """The evaluator's stream with the garbler played in line; reading fails the first time a frame of kind
    ``cut_before`` comes from the garbler (so that frame never arrives)."""

    def __init__(self, garbler: GarblerSession, cut_before: str) -> None:
        self.garbler = garbler
        self.cut_before = cut_before
        self.inbox: asyncio.Queue[bytes | None] = asyncio.Queue()
        for data in garbler.start():
            self.inbox.put_nowait(data)

    async def read(self) -> bytes | None:
        data = await self.inbox.get()
        if data is not None and fr.decode(data)[0] == self.cut_before:
            raise StreamLost("the test cut the stream")
        return data

    async def write(self, data: bytes) -> None:
        if self.garbler.ended:
            return
        for reply in self.garbler.receive(data):
            self.inbox.put_nowait(reply)
        if self.garbler.ready_to_stream:
            for frame in self.garbler.produce():
                self.inbox.put_nowait(frame)


@pytest.mark.parametrize(
    ("cut_before", "restartable"),
    [(fr.OT_EXTENSION, True), (fr.GARBLED_TABLES, False)],
    ids=["during OT", "after OT"],
)
async def test_only_a_session_cut_before_its_ot_ended_is_restartable(
    cut_before: str, restartable: bool
) -> None:
    small = wide_program(1 << 12, 256)
    garbler, evaluator, _ = sessions(small, b"orchards-restart", replay_limit=1 << 22)
    lim = Limits(deadline_s=30, idle_timeout_s=10, abort_grace_s=1, resume_grace_s=0.3)
    result = await asyncio.wait_for(drive(evaluator, Severed(garbler, cut_before), lim), 30)
    assert not result.completed and result.outputs is None
    assert result.abort is not None and result.abort.reason == AbortReason.CONNECTION_LOST
    assert result.events and result.events[0].kind == CUT
    assert result.restartable is restartable and result.cut_before_ot is restartable
    # Not resumable before OT: it fails at once; after OT it waited the grace period for a resume.
    assert ("grace period" in result.abort.message) is not restartable
