"""The stand-in peer node: the harness plays the node under test's peer, with its own keys and signed session log.

Theory of operation
-------------------
The node under test is a real ``node.daemon.Node``; its peer is this module, playing the other node of the same
trial key set (``PeerKeys``) on the invented job (``scenario``). It does what a peer node does, from the same
parts a node is made of:

- ``LoggedNode`` signs and logs the peer's side of every session the way a node does (``audit.SessionLog``):
  ``session_started`` before the session runs, the transcript digest signed (and recorded) by the log, the node's
  signature checked against the node's log key, then ``peer_attestation`` and ``session_completed``, or
  ``session_aborted`` with the reason. ``reopen`` is a restart: sessions the log left open are closed as aborted
  (``node_restarted``). Its sessions record their secrets (``harness.recording``).
- ``HarnessAcceptor`` is the peer accepting the node's proposals of ``JOB_INITIATED``: a ``SessionServer`` that
  answers ``Session/Propose`` and serves the sessions it accepted, each stream passing a ``FaultPoint``.
- ``propose_run`` / ``play_initiated`` / ``run_initiator`` are the peer initiating ``JOB_ACCEPTED``: propose the
  run to the node (``transport.proposals.propose``), then garble and stream the session to the node, or to a proxy before it.
"""

from __future__ import annotations

import asyncio
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import grpc
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat.audit import SessionLog
from jointstat.audit.records import plain_detail
from jointstat.circuit.model import Party
from jointstat.harness.faultpoint import PEER_CHUNK_BYTES, FaultPlan, FaultPoint, FaultyContext, Fire, connect
from jointstat.harness.outcome import Side, end_bound, side_of
from jointstat.harness.recording import recording_session
from jointstat.harness.scanner import Secrets
from jointstat.harness.scenario import JOB_ACCEPTED, JOB_INITIATED, NODE_NAME, PEER_NAME, PeerJob
from jointstat.protocol.frames import AbortReason
from jointstat.protocol.sides import Session
from jointstat.transport.channel import SERVICE_NAME, SessionIds
from jointstat.transport.driver import Limits, SessionResult
from jointstat.transport.server import SessionServer
from jointstat.transport.tls import NodeTLS
from jointstat.wire.jointstat.v1 import session_pb2 as pb


@dataclass(frozen=True)
class PeerKeys:
    """What the peer node holds: its TLS certificate and key, its signing key, and the node's public material."""

    directory: Path
    certificate: bytes
    private_key: bytes
    signing_key: Ed25519PrivateKey
    node_certificate: bytes
    node_key: Ed25519PublicKey

    @classmethod
    def load(cls, directory: Path) -> PeerKeys:
        from jointstat.node.keys import (
            load_public_key,
            load_signing_key,
            signing_key_file,
            signing_public_file,
            tls_cert_file,
            tls_key_file,
        )

        return cls(
            directory=directory,
            certificate=(directory / tls_cert_file(PEER_NAME)).read_bytes(),
            private_key=(directory / tls_key_file(PEER_NAME)).read_bytes(),
            signing_key=load_signing_key(directory / signing_key_file(PEER_NAME)),
            node_certificate=(directory / tls_cert_file(NODE_NAME)).read_bytes(),
            node_key=load_public_key(directory / signing_public_file(NODE_NAME)),
        )

    def tls(self) -> NodeTLS:
        return NodeTLS(self.certificate, self.private_key, (self.node_certificate,))

    def node_identity(self, port: int) -> Any:
        """The node as the peer's proposals address it (``node.keys.PeerIdentity``)."""
        from cryptography import x509
        from cryptography.hazmat.primitives import serialization

        from jointstat.node.keys import PeerIdentity
        from jointstat.transport.tls import fingerprint

        cert = x509.load_pem_x509_certificate(self.node_certificate)
        return PeerIdentity(
            name=NODE_NAME,
            address=f"127.0.0.1:{port}",
            tls=self.tls(),
            fingerprint=fingerprint(cert),
            certificate_der=cert.public_bytes(serialization.Encoding.DER),
            signing_key=self.node_key,
        )


class LoggedNode:
    """The peer node's side of sessions, signed through its own session log the way a node does it."""

    def __init__(self, keys: PeerKeys, log_path: Path, secrets: Secrets) -> None:
        self.keys = keys
        self.log_path = Path(log_path)
        self.secrets = secrets
        self.log: SessionLog | None = None
        self.ids = SessionIds()
        self.reopen()

    def reopen(self) -> list[str]:
        """Open the log as a restarted node does; sessions left open are recorded as aborted. Returns their ids."""
        self.close()
        self.log = SessionLog(self.log_path, self.keys.signing_key, PEER_NAME)
        left = self.log.open_sessions()
        for sid in left:
            self.log.session_aborted(
                sid, reason="node_restarted", detail="the node stopped before this session ended"
            )
        return left

    def close(self) -> None:
        if self.log is not None:
            self.log.close()
            self.log = None

    def session(self, party: Party, sid: bytes, job: PeerJob) -> Session:
        """A recording session for ``party``, its start logged; it signs through the log."""
        assert self.log is not None
        from jointstat.node.keys import session_signing

        log, text, node_key = self.log, sid.hex(), self.keys.node_key
        sign, verify = session_signing(log, self.keys.signing_key, node_key, text)
        make = recording_session(self.secrets, PEER_CHUNK_BYTES)
        session = make(
            party,
            session_id=sid,
            program=job.program,
            manifest_digest=job.digest,
            inputs=job.bits[party],
            sign=sign,
            verify=verify,
        )
        log.session_started(
            text,
            job=JOB_ACCEPTED if party == Party.GARBLER else JOB_INITIATED,
            manifest_digest=job.digest,
            role=Party(party).role_name,
            peer=NODE_NAME,
            peer_key=node_key,
        )
        return session

    def ended(
        self, sid: bytes, result: SessionResult | None, *, duration_s: float, phase: str | None
    ) -> None:
        """Record how the session ended (``result`` None: it never opened on the wire)."""
        assert self.log is not None
        text = sid.hex()
        if result is not None and result.completed:
            assert result.peer_signature is not None
            self.log.peer_attestation(text, result.peer_signature)
            self.log.session_completed(text, duration_us=int(duration_s * 1e6))
            return
        if result is None or result.abort is None:
            self.log.session_aborted(
                text, reason="not_opened", phase=phase, detail="the node did not open the session in time"
            )
            return
        abort = result.abort
        self.log.session_aborted(
            text,
            reason=abort.reason.name.lower(),
            by="peer" if abort.by_peer else "self",
            phase=phase,
            detail=plain_detail(abort.message),
        )


# -- the peer accepting the node's proposals -----------------------------------------------------------------------


@dataclass
class Accepted:
    """A session the peer accepted from the node's proposal."""

    session_id: bytes
    session: Session
    future: asyncio.Future[SessionResult]
    started: float


class HarnessAcceptor(SessionServer):
    """The peer as the accepting node of ``JOB_INITIATED``: answers the node's proposals and serves its sessions.

    ``plans[attempt]`` breaks the session of that attempt (its stream passes a :class:`FaultPoint`); ``ready``
    holds proposals back while the peer's log is away (a peer process has it).
    """

    def __init__(
        self, keys: PeerKeys, job: PeerJob, logged: LoggedNode, secrets: Secrets, fire: Fire, limits: Limits
    ) -> None:
        super().__init__(keys.tls(), limits=limits, services=[self._add_propose])
        self.job, self.logged, self.secrets, self.fire = job, logged, secrets, fire
        self.plans: dict[int, FaultPlan] = {}
        self.points: dict[bytes, FaultPoint] = {}
        self.accepted: dict[int, Accepted] = {}  # by attempt number (the latest run's)
        self.ready = asyncio.Event()
        self.ready.set()

    def _add_propose(self, server: grpc.aio.Server) -> None:
        from jointstat.transport.proposals import PROPOSE_METHOD

        handler = grpc.unary_unary_rpc_method_handler(
            self._propose,
            request_deserializer=pb.RunProposal.FromString,
            response_serializer=pb.RunAnswer.SerializeToString,
        )
        server.add_generic_rpc_handlers(
            [grpc.method_handlers_generic_handler(SERVICE_NAME, {PROPOSE_METHOD: handler})]
        )

    async def _propose(self, request: pb.RunProposal, _context: grpc.aio.ServicerContext) -> pb.RunAnswer:
        await self.ready.wait()
        if request.job != JOB_INITIATED or bytes(request.manifest_digest) != self.job.digest:
            return pb.RunAnswer(
                accepted=False, reason=pb.REFUSAL_REASON_JOB_NOT_CONFIGURED, message="not this job"
            )
        sid = bytes(request.session_id)
        session = await asyncio.to_thread(self.logged.session, Party.EVALUATOR, sid, self.job)
        future = self.expect(session)
        self.points[sid] = FaultPoint(self.plans.pop(request.attempt, None), self.fire, self.secrets, sid)
        self.accepted[request.attempt] = Accepted(sid, session, future, time.monotonic())
        return pb.RunAnswer(accepted=True)

    async def _exchange(self, requests: object, context: grpc.aio.ServicerContext) -> None:
        await super()._exchange(requests, FaultyContext(context, self.points))  # type: ignore[arg-type]

    async def wait_for_attempt(self, attempt: int, timeout: float) -> Accepted | None:
        loop = asyncio.get_running_loop()
        end = loop.time() + timeout
        while attempt not in self.accepted:
            if loop.time() > end:
                return None
            await asyncio.sleep(0.02)
        return self.accepted.pop(attempt)

    async def outcome(self, acc: Accepted, phase: str | None) -> Side:
        """Wait for an accepted session: withdrawn if the node never opened it by the deadline; hung past the bound."""
        result: SessionResult | None = None
        limits = self._limits
        try:
            result = await asyncio.wait_for(asyncio.shield(acc.future), timeout=limits.deadline_s)
        except TimeoutError:
            if self.withdraw(acc.session_id):
                await asyncio.to_thread(
                    self.logged.ended, acc.session_id, None, duration_s=limits.deadline_s, phase=phase
                )
                side = side_of(acc.session, None, time.monotonic() - acc.started)
                side.opened, side.reason = False, "not_opened"
                side.message = "the node did not open the session in time"
                return side
            try:
                left = end_bound(limits) - (time.monotonic() - acc.started)
                result = await asyncio.wait_for(asyncio.shield(acc.future), timeout=max(left, 0.01))
            except TimeoutError:
                side = side_of(acc.session, None, None)
                side.hung = True
                return side
        elapsed = time.monotonic() - acc.started
        await asyncio.to_thread(self.logged.ended, acc.session_id, result, duration_s=elapsed, phase=phase)
        return side_of(acc.session, result, elapsed)


# -- the peer initiating runs of the job the node accepts ------------------------------------------------------------


async def propose_run(
    keys: PeerKeys, job: PeerJob, logged: LoggedNode, *, node_port: int, session_id: bytes, attempt: int
) -> tuple[Session, pb.RunAnswer]:
    """The peer as the initiating node of ``JOB_ACCEPTED``: log the session's start, propose the run to the node.

    A refusal is logged as the session's abort (its reason the refusal code) and the session is failed.
    """
    from jointstat.transport.proposals import PROTOCOL_VERSION, REFUSAL_CODES, propose

    session = await asyncio.to_thread(logged.session, Party.GARBLER, session_id, job)
    proposal = pb.RunProposal(
        protocol_version=PROTOCOL_VERSION,
        job=JOB_ACCEPTED,
        manifest_digest=job.digest,
        session_id=session_id,
        scheduled_for_us=round(time.time() * 1e6),
        role=pb.ROLE_GARBLER,
        attempt=attempt,
        trigger="operator",
    )
    answer = await propose(keys.node_identity(node_port), proposal)
    if not answer.accepted:
        code = REFUSAL_CODES.get(answer.reason, "refused")
        session.fail(AbortReason.SESSION_REFUSED, f"the node refused the run ({code}): {answer.message}")
        assert logged.log is not None
        await asyncio.to_thread(
            logged.log.session_aborted,
            session_id.hex(),
            reason=code,
            by="peer",
            phase="proposal",
            detail=plain_detail(answer.message),
        )
    return session, answer


async def play_initiated(
    session: Session,
    keys: PeerKeys,
    logged: LoggedNode,
    secrets: Secrets,
    *,
    target_port: int,
    plan: FaultPlan | None,
    fire: Fire | None,
    limits: Limits,
) -> tuple[Side, str | None]:
    """Play the garbler's side of an accepted session against ``target_port`` (the node, or a proxy before it)."""
    point = FaultPoint(plan, fire, secrets, session.session_id)
    t0 = time.monotonic()
    try:
        result = await asyncio.wait_for(
            connect(session, f"127.0.0.1:{target_port}", keys.tls(), limits, point, logged.ids),
            timeout=end_bound(limits),
        )
    except TimeoutError:
        side = side_of(session, None, None)
        side.hung = True
        return side, point.fired
    elapsed = time.monotonic() - t0
    phase = None if plan is None else plan.phase
    await asyncio.to_thread(logged.ended, session.session_id, result, duration_s=elapsed, phase=phase)
    return side_of(session, result, elapsed), point.fired


async def run_initiator(
    keys: PeerKeys,
    job: PeerJob,
    logged: LoggedNode,
    secrets: Secrets,
    *,
    node_port: int,
    target_port: int,
    session_id: bytes,
    attempt: int,
    plan: FaultPlan | None,
    fire: Fire | None,
    limits: Limits,
) -> tuple[Side, str | None]:
    """Propose the run (straight to the node), then play its session (to ``target_port``)."""
    t0 = time.monotonic()
    session, answer = await propose_run(
        keys, job, logged, node_port=node_port, session_id=session_id, attempt=attempt
    )
    if not answer.accepted:
        side = side_of(session, None, time.monotonic() - t0)
        side.opened, side.reason, side.message = False, "refused", answer.message
        return side, None
    return await play_initiated(
        session, keys, logged, secrets, target_port=target_port, plan=plan, fire=fire, limits=limits
    )
