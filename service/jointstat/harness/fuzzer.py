"""Frame fuzzing: an honest peer plays sessions with a node's session server, one of its frames mutated each time.

Theory of operation
-------------------
The node side is a ``transport.server.SessionServer`` — what a node serves on — with sessions made as a node makes
them (``protocol.session``; without the daemon's proposals). For each case an honest peer session plays the other
role and one of its frames (the case's ``target``-th) is replaced by the frames ``harness.mutations`` makes of it;
the peer then plays on. Two small programs are fuzzed: ``plain`` (no oblivious transfer: the evaluator has no
input; 16 AND gates in 4 table frames) and ``ot`` (8 evaluator inputs by oblivious transfer; 16 AND gates in 4
table frames). Most cases go through the server's own stream handler on an in-process stream (``MemoryContext``,
what the handler uses of a gRPC servicer context); a sample goes over the real wire (mutual TLS on loopback).

Each case must end with the node's session aborted for a clear reason (or the stream refused with an abort frame,
or — for a frame over 4 MiB on the wire — refused by gRPC below the session), without output, within the bound.
``rejected``: so; ``accepted``: the node's session completed (an output released from a mutated session);
``hung``: not ended by the bound; ``crash``: ended without a clear reason, or an exception escaped. Memory: the
resident set size after a warm-up tenth and at the end, and, for a last slice under ``tracemalloc``, what the node's
code still holds per case. One case in ``SECRET_SAMPLE`` records its Δ and labels; every abort message and log
line is scanned for them.
"""

from __future__ import annotations

import asyncio
import contextlib
import hashlib
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import grpc
import numpy as np

from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.harness.identities import Pair
from jointstat.harness.mutations import MUTATIONS, mutate
from jointstat.harness.outcome import SCHEDULING_ALLOWANCE_S
from jointstat.harness.recording import RecordingEvaluator, RecordingGarbler
from jointstat.harness.scanner import Finding, Secrets, scan_for_secrets
from jointstat.harness.watch import CrashWatch
from jointstat.protocol import frames as fr
from jointstat.protocol.evaluator import EvaluatorSession
from jointstat.protocol.frames import AbortReason
from jointstat.protocol.garbler import GarblerSession
from jointstat.protocol.sides import Session
from jointstat.transport.channel import METHOD_PATH
from jointstat.transport.driver import Limits, SessionResult
from jointstat.transport.server import SessionServer

FUZZ_LIMITS = Limits(deadline_s=5.0, idle_timeout_s=0.5, abort_grace_s=0.1)
FUZZ_CHUNK_BYTES = 128  # 4 garbled AND gates per frame: several table frames even for tiny programs
FUZZ_CONCURRENCY = 4
DEFAULT_FUZZ_FRAMES = 10_000
WIRE_SAMPLE = 200  # fuzz cases sent over real TLS
SECRET_SAMPLE = 25  # one case in this many records its Δ and labels, to scan the abort messages for
TRACED_CASES = 500  # the last in-process cases, run under tracemalloc
FUZZ_MANIFEST_DIGEST = hashlib.sha256(b"invented manifest: fuzzing a bicycle-share node").digest()


def plain_program(bld: Builder) -> None:
    """A fuzzing job without oblivious transfer: the evaluator has no input; 16 AND gates."""
    a = bld.input(Party.GARBLER, 16)
    bld.output(Party.EVALUATOR, bld.and_(a[:8], a[8:]))
    bld.output(Party.GARBLER, bld.or_(a[:8], a[8:]))


def small_ot_program(bld: Builder) -> None:
    """A fuzzing job with oblivious transfer for 8 evaluator inputs; 16 AND gates."""
    a = bld.input(Party.GARBLER, 8)
    b = bld.input(Party.EVALUATOR, 8)
    bld.output(Party.EVALUATOR, bld.and_(a, b))
    bld.output(Party.GARBLER, bld.or_(a, b))


@dataclass(frozen=True)
class FuzzCase:
    """One mutated frame: in a session of ``program`` with the node as ``node_role``, the peer's ``target``-th frame."""

    index: int
    program: Literal["plain", "ot"]
    node_role: Party
    target: int
    mutation: str
    seed: int
    wire: bool = False


@dataclass
class FuzzOutcome:
    case: FuzzCase
    verdict: Literal["rejected", "accepted", "hung", "crash"] = "hung"
    reason: str | None = None
    message: str = ""
    by_peer: bool = False
    refused_first_frame: bool = False
    frames_sent: int = 0


class MemoryContext:
    """What ``SessionServer``'s stream handler uses of a gRPC servicer context, over two in-process queues."""

    def __init__(self, peer_certificate: bytes) -> None:
        self.to_node: asyncio.Queue[bytes | None] = asyncio.Queue()
        self.to_peer: asyncio.Queue[bytes | None] = asyncio.Queue()
        self._auth = {
            "transport_security_type": [b"ssl"],
            "ssl_tls_version": [b"TLSv1.3"],
            "x509_pem_cert": [peer_certificate],
        }
        self.ended = False
        self.written: list[bytes] = []

    def auth_context(self) -> dict[str, list[bytes]]:
        return self._auth

    async def read(self) -> Any:
        data = await self.to_node.get()
        return grpc.aio.EOF if data is None else data

    async def write(self, data: bytes) -> None:
        self.written.append(data)
        self.to_peer.put_nowait(data)

    def done(self) -> bool:
        return self.ended

    def cancelled(self) -> bool:
        return False

    async def abort(self, code: grpc.StatusCode, details: str) -> None:
        raise RuntimeError(f"the stream was refused: {code.name}: {details}")


class Fuzzer:
    """Sends mutated frames to a node (a ``SessionServer``) from an honest peer session that plays on."""

    def __init__(self, seed: int = 4099, limits: Limits = FUZZ_LIMITS) -> None:
        self.seed = seed
        self.limits = limits
        self.pair = Pair.fresh()
        self.gk, self.ek = self.pair.node.signing_key, self.pair.peer.signing_key
        self.secrets = Secrets()
        self.programs = {"plain": Program.of(plain_program), "ot": Program.of(small_ot_program)}
        self.references: dict[tuple[str, Party], list[bytes]] = {}
        self.peer_frames: dict[tuple[str, Party], int] = {}
        self.outcomes: list[FuzzOutcome] = []
        self.crashes: list[str] = []
        self.log_lines: list[str] = []
        self.refusals_kept = 0
        self._record_references()

    # -- sessions ------------------------------------------------------------------------------------------------------

    def sessions(
        self, program: str, node_role: Party, sid: bytes, seed: int, record: bool = True
    ) -> tuple[Session, Session]:
        """(the node's session, the peer's session) with invented inputs; with ``record``, they record secrets."""
        from jointstat.protocol.signing import signer, verifier

        prog = self.programs[program]
        rng = np.random.default_rng(seed)
        keys = {node_role: self.gk, Party(node_role).other: self.ek}
        out: dict[Party, Session] = {}
        for party in Party:
            other = party.other
            common: dict[str, Any] = {
                "session_id": sid,
                "program": prog,
                "manifest_digest": FUZZ_MANIFEST_DIGEST,
                "inputs": rng.integers(0, 2, prog.n_inputs(party), dtype=np.uint8),
                "sign": signer(keys[party]),
                "verify": verifier(keys[other].public_key()),
            }
            session: RecordingGarbler | RecordingEvaluator
            if party == Party.GARBLER:
                session = RecordingGarbler(chunk_bytes=FUZZ_CHUNK_BYTES, **common)
            else:
                session = RecordingEvaluator(**common)
            session.secrets = self.secrets if record else None
            out[party] = session
        return out[node_role], out[Party(node_role).other]

    def _record_references(self) -> None:
        """One honest in-memory session per program: its frames are the valid frames sent out of order."""
        from jointstat.protocol.pipe import run_in_memory

        for program in self.programs:
            seen: list[tuple[Party, bytes]] = []
            node, peer = self.sessions(program, Party.GARBLER, b"reference-" + program.encode(), 1)
            assert isinstance(node, GarblerSession) and isinstance(peer, EvaluatorSession)

            def keep(to: Party, data: bytes, seen: list[tuple[Party, bytes]] = seen) -> list[bytes]:
                seen.append((to, data))
                return [data]

            run_in_memory(node, peer, intercept=keep)
            if not (node.done and peer.done):
                raise RuntimeError(f"the reference session of the {program} program did not complete")
            frames = [data for _, data in seen]
            for node_role in Party:
                self.references[(program, node_role)] = frames
                # Frames the peer sends: those delivered to the node's role.
                self.peer_frames[(program, node_role)] = sum(1 for to, _ in seen if to == node_role)

    def plan(self, count: int, *, ot_share: float = 0.05, wire: int = 0) -> list[FuzzCase]:
        """``count`` cases, mutations in turn, ``ot_share`` of them on the program with oblivious transfer."""
        rng = np.random.default_rng(self.seed)
        cases = []
        for i in range(count):
            program: Literal["plain", "ot"] = "ot" if rng.random() < ot_share else "plain"
            role = Party.GARBLER if rng.integers(2) else Party.EVALUATOR
            target = int(rng.integers(self.peer_frames[(program, role)]))
            mutation = MUTATIONS[i % len(MUTATIONS)]
            cases.append(FuzzCase(i, program, role, target, mutation, int(rng.integers(2**62)), i < wire))
        return cases

    # -- one case --------------------------------------------------------------------------------------------------------

    async def _play_peer(
        self,
        case: FuzzCase,
        peer: Session,
        send_frame: Callable[[bytes], Any],
        next_frame: Callable[[], Any],
        outcome: FuzzOutcome,
    ) -> None:
        rng = np.random.default_rng(case.seed)
        references = self.references[(case.program, case.node_role)]
        sent = 0
        previous: bytes | None = None

        async def send(frames: list[bytes]) -> None:
            nonlocal sent, previous
            for data in frames:
                chosen = (
                    mutate(data, case.mutation, rng, references, previous) if sent == case.target else [data]
                )
                for f in chosen:
                    await send_frame(f)
                    outcome.frames_sent += 1
                sent += 1
                previous = data

        await send(peer.start())
        while True:
            data = await next_frame()
            if data is None:
                return
            try:
                replies = peer.receive(data)  # in line: a tiny program, and thread hops would dominate
            except fr.ProtocolError as exc:
                if exc.frame is not None:
                    await send_frame(exc.frame)
                continue  # read on until the node closes the stream
            await send(replies)
            if isinstance(peer, GarblerSession) and peer.ready_to_stream:
                try:
                    streamed = list(peer.produce())
                except fr.ProtocolError as exc:
                    streamed = [exc.frame] if exc.frame is not None else []
                await send(streamed)

    def _judge(
        self,
        outcome: FuzzOutcome,
        future: asyncio.Future[SessionResult],
        written: list[bytes],
        transport_error: str | None = None,
    ) -> None:
        """The verdict: the node's session result if it started, else the refusal it wrote (or gRPC's status)."""
        if future.done() and not future.cancelled():
            result = future.result()
            if result.completed:
                outcome.verdict = "accepted"
                return
            assert result.abort is not None
            outcome.reason = result.abort.reason.name.lower()
            outcome.message = result.abort.message
            outcome.by_peer = result.abort.by_peer
        else:
            outcome.refused_first_frame = True
            decoded = (fr.decode(w) for w in written)
            aborts = [f for k, f in decoded if k == fr.ABORT and not isinstance(f, fr.TablesFrame)]
            if aborts:
                outcome.reason = AbortReason(aborts[-1].abort.reason).name.lower()
                outcome.message = aborts[-1].abort.message
            elif transport_error is not None:  # refused by gRPC below the session (a frame over 4 MiB)
                outcome.reason, outcome.message = "transport", transport_error
        if outcome.by_peer:  # the honest peer found the damage first and told the node, which ended with it
            outcome.verdict = "rejected"
        elif outcome.reason in (None, "unspecified", "internal") or not outcome.message:
            outcome.verdict = "crash"
            self.crashes.append(
                f"case {outcome.case.index}: the node ended without a clear reason ({outcome.reason})"
            )
        else:
            outcome.verdict = "rejected"

    def _bound(self) -> float:
        return self.limits.deadline_s + 2 * self.limits.abort_grace_s + SCHEDULING_ALLOWANCE_S

    async def run_case_in_process(self, server: SessionServer, case: FuzzCase) -> FuzzOutcome:
        """One case through the server's own stream handler, on an in-process stream."""
        outcome = FuzzOutcome(case)
        sid = hashlib.sha256(b"fuzz %d %d" % (self.seed, case.index)).digest()[:16]
        record = case.index % SECRET_SAMPLE == 0
        node, peer = self.sessions(case.program, case.node_role, sid, case.seed, record)
        future = server.expect(node)
        ctx = MemoryContext(self.pair.peer.issued.certificate)
        handler = asyncio.create_task(server._exchange(None, ctx))  # type: ignore[arg-type]
        handler.add_done_callback(lambda _t: ctx.to_peer.put_nowait(None))
        peer_task = asyncio.create_task(
            self._play_peer(case, peer, ctx.to_node.put, ctx.to_peer.get, outcome)
        )
        ended = False
        try:
            await asyncio.wait_for(asyncio.shield(handler), timeout=self._bound())
            ended = True
        except TimeoutError:
            handler.cancel()
        except Exception as exc:
            self.crashes.append(f"case {case.index}: the stream handler raised {type(exc).__name__}: {exc}")
            outcome.verdict = "crash"
        ctx.ended = True
        ctx.to_node.put_nowait(None)
        try:
            await asyncio.wait_for(peer_task, timeout=self._bound())
        except (TimeoutError, asyncio.CancelledError):
            self.crashes.append(f"case {case.index}: the fuzzing peer did not stop")
        except Exception as exc:
            self.crashes.append(f"case {case.index}: the fuzzing peer failed: {type(exc).__name__}: {exc}")
        server.withdraw(sid)
        if ended:
            self._judge(outcome, future, ctx.written)
        return outcome

    async def run_case_on_wire(
        self, server: SessionServer, channel: grpc.aio.Channel, case: FuzzCase
    ) -> FuzzOutcome:
        """One case over real TLS to a started server."""
        outcome = FuzzOutcome(case)
        sid = hashlib.sha256(b"fuzz wire %d %d" % (self.seed, case.index)).digest()[:16]
        record = case.index % SECRET_SAMPLE == 0
        node, peer = self.sessions(case.program, case.node_role, sid, case.seed, record)
        future = server.expect(node)
        call: grpc.aio.StreamStreamCall[bytes, bytes] = channel.stream_stream(METHOD_PATH)(
            timeout=self._bound()
        )
        written: list[bytes] = []
        errors: list[str] = []

        async def next_frame() -> bytes | None:
            try:
                data = await call.read()
            except grpc.aio.AioRpcError as exc:
                errors.append(f"{exc.code().name}: {exc.details()}")
                return None
            if data is grpc.aio.EOF:
                return None
            assert isinstance(data, bytes)  # no deserializer: frames arrive as bytes
            written.append(data)
            return data

        async def send_frame(data: bytes) -> None:
            with contextlib.suppress(grpc.aio.AioRpcError, asyncio.InvalidStateError, grpc.aio.UsageError):
                await call.write(data)

        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(
                self._play_peer(case, peer, send_frame, next_frame, outcome), timeout=self._bound()
            )
        if node.state != "new":  # it started: it must end by its own limits
            with contextlib.suppress(TimeoutError, asyncio.CancelledError):
                await asyncio.wait_for(asyncio.shield(future), timeout=self._bound())
        call.cancel()
        if not future.done() and not server.withdraw(sid):
            return outcome  # started, and still running past the bound: hung
        self._judge(outcome, future, written, errors[-1] if errors else None)
        return outcome

    # -- many cases ---------------------------------------------------------------------------------------------------------

    async def run(
        self, count: int, *, wire: int = WIRE_SAMPLE, concurrency: int = FUZZ_CONCURRENCY
    ) -> dict[str, Any]:
        """``count`` cases (``wire`` of them over TLS); returns the figures. Outcomes are in ``self.outcomes``."""
        import gc
        import tracemalloc

        cases = self.plan(count, wire=min(wire, count))
        queue = [c for c in cases if not c.wire]
        warm = max(1, len(queue) // 10)
        traced = min(TRACED_CASES, max(0, len(queue) - warm) // 2)
        batches = (queue[:warm], queue[warm : len(queue) - traced], queue[len(queue) - traced :])
        server = SessionServer(self.pair.node_tls(), limits=self.limits)  # its stream handler, in-process
        rss: list[float] = []
        retained = 0

        async def worker(items: list[FuzzCase]) -> None:
            for case in items:
                self._keep(await self.run_case_in_process(server, case))

        with CrashWatch() as watch:
            for i, batch in enumerate(batches):
                if i == 2 and batch:
                    gc.collect()
                    tracemalloc.start()
                    before = tracemalloc.take_snapshot()
                await asyncio.gather(*(worker(batch[j::concurrency]) for j in range(concurrency)))
                if i == 2 and batch:
                    gc.collect()
                    after = tracemalloc.take_snapshot()
                    tracemalloc.stop()
                    retained = node_retained(before, after)
                gc.collect()
                rss.append(resident_mib())
            wire_cases = [c for c in cases if c.wire]
            if wire_cases:
                await self._run_wire(wire_cases, concurrency)
            control = await self._control_session()
        self.crashes += watch.crashes
        self.log_lines = watch.lines
        self.refusals_kept = len(server.refused)
        verdicts = Counter(o.verdict for o in self.outcomes)
        return {
            "frames_fuzzed": sum(1 for o in self.outcomes if o.frames_sent),
            "fuzz_rejected": verdicts["rejected"],
            "fuzz_accepted": verdicts["accepted"],
            "fuzz_hung": verdicts["hung"],
            "fuzz_crashes": len(self.crashes),
            "fuzz_over_the_wire": len(wire_cases),
            "fuzz_rss_growth_mib": round(rss[-1] - rss[0], 1),
            "fuzz_node_retained_bytes_per_case": round(retained / traced, 1) if traced else None,
            "node_serves_after_fuzzing": control,
        }

    def _keep(self, outcome: FuzzOutcome) -> None:
        """Keep the outcome; the message only where it matters (a problem, or a case whose secrets are recorded)."""
        if outcome.verdict == "rejected" and outcome.case.index % SECRET_SAMPLE:
            outcome.message = ""
        self.outcomes.append(outcome)

    async def _run_wire(self, cases: list[FuzzCase], concurrency: int) -> None:
        async with SessionServer(self.pair.node_tls(), limits=self.limits) as server:
            tls = self.pair.peer_tls()
            options = [
                ("grpc.ssl_target_name_override", tls.server_name()),
                (
                    "grpc.max_send_message_length",
                    -1,
                ),  # let a frame over 4 MiB reach the node, which must refuse it
                ("grpc.max_receive_message_length", fr.MAX_FRAME_BYTES),
            ]
            async with grpc.aio.secure_channel(
                f"127.0.0.1:{server.port}", tls.channel_credentials(), options=options
            ) as channel:

                async def worker(items: list[FuzzCase]) -> None:
                    for case in items:
                        self._keep(await self.run_case_on_wire(server, channel, case))

                await asyncio.gather(*(worker(cases[i::concurrency]) for i in range(concurrency)))

    async def _control_session(self) -> bool:
        """After all the fuzzing, an honest session on a server of the same node completes."""
        from jointstat.transport.client import run_client

        async with SessionServer(self.pair.node_tls(), limits=self.limits) as server:
            node, peer = self.sessions("ot", Party.GARBLER, b"fuzz control session", 5)
            future = server.expect(node)
            result = await run_client(
                peer, f"127.0.0.1:{server.port}", self.pair.peer_tls(), limits=self.limits
            )
            served = await asyncio.wait_for(future, timeout=self._bound())
        return result.completed and served.completed


def resident_mib() -> float:
    """This process's resident set size now (VmRSS), in MiB."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    raise RuntimeError("no VmRSS in /proc/self/status")


def node_retained(before: Any, after: Any) -> int:
    """Bytes allocated between two tracemalloc snapshots and still held, in the node's code (not the harness's,
    not the benchmarks')."""
    package = Path(__file__).resolve().parent.parent
    outside = (str(package / "harness"), str(package / "bench"))
    total = 0
    for stat in after.compare_to(before, "filename"):
        name = stat.traceback[0].filename
        if name.startswith(str(package)) and not name.startswith(outside):
            total += stat.size_diff
    return total


@dataclass
class FuzzReport:
    """The fuzzing: every case's outcome, what escaped, the secret scan of the abort messages, the figures."""

    outcomes: list[FuzzOutcome]
    crashes: list[str]
    findings: list[Finding]
    figures: dict[str, Any]


async def run_fuzzing(frames: int, *, seed: int = 2028, wire: int = WIRE_SAMPLE) -> FuzzReport:
    """``frames`` mutated frames sent to a node's session server, the abort messages scanned for secrets."""
    fuzzer = Fuzzer(seed=seed)
    figures = await fuzzer.run(frames, wire=wire)
    texts = [
        ("python log", "\n".join(fuzzer.log_lines)),
        ("abort messages", "\n".join(o.message for o in fuzzer.outcomes)),
    ]
    findings = scan_for_secrets(fuzzer.secrets, (), texts)
    figures["secrets_found_in_logs"] = len(findings)
    figures["log_lines_scanned"] = sum(len(t.splitlines()) for _, t in texts)
    return FuzzReport(fuzzer.outcomes, fuzzer.crashes, findings, figures)
