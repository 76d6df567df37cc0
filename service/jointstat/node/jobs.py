"""Running jobs: proposing a run to the peer, accepting or refusing the peer's proposals, one session per attempt.

Theory of operation
-------------------
Roles: each node's job config says which of the manifest's two parties it is (``role: garbler`` or
``evaluator``) — that decides the table its input is read against, the session it runs and the outputs it
decodes. Which node opens the session (``initiate``) is a separate setting: the initiator connects as the
session's client and the acceptor serves, whatever their roles (the transport lets either party serve). The
proposal carries the proposer's role and the acceptor refuses it (``role_mismatch``) unless its own role is
the other one, so two nodes claiming the same party never start a session, and neither node's role is ever
inferred from who proposes.

*Initiating* one attempt (``JobRunner.attempt``), each with a fresh random session id, hence fresh Δ, labels and
OT secrets: record the run in the job store (``running``); prepare — compile the manifest (cached per file) and
read and encode this node's input (CSV or SQL, identifier keys hashed with the key-hashing secret) in a worker
thread; write ``session_started`` to the session log; call ``Session/Propose`` on the peer (pinned mutual TLS)
with the job, the manifest digest, the session id, the scheduled time and the role. A refusal is logged
(``session_aborted`` with the peer's reason code, e.g. ``outside_window``) and stored (``refused``). Once
accepted, the session runs over ``Session/Exchange``; its ``sign`` callback is the session log's ``transcript``
(so the log records the transcript digest and this node's signature over it as the finish frame is made; the
hello is signed with the same key) and ``verify`` checks the peer's signatures (``session_signing``). Afterwards
the phases go to the log, then either the peer's attestation, the result file and ``session_completed`` — or
``session_aborted`` with the abort's reason — and the store row is closed. ``run_job`` repeats failed attempts
after the configured backoff (``schedule.Planner.retry_at``) while the window is open; refusals that retrying
cannot cure (job not configured, digest mismatch, outside the window, role mismatch, malformed) are not retried.

*Accepting* (``JobRunner.on_proposal``, called by the peer-facing server with the authenticated peer's name):
the proposal is refused, in this order, when the node is stopping, the protocol version differs, the fields are
malformed, no job of that name is configured for that peer, the roles clash, the node's own clock is not inside
the job's window (``[T, T + window)`` for the latest scheduled time T), the manifest digest differs, the node's
input cannot be read, or the node runs ``max_sessions`` sessions already. Every refusal of a well-formed proposal
is logged (``session_started`` then ``session_aborted``) and stored (``refused``) before the answer goes out.
Otherwise the node builds its session, logs its start, tells the server to ``expect`` that session id from that
peer's pinned certificate, answers *accepted*, and a task waits for the session's result and records it as
above. A peer that never opens the accepted session is given ``CONNECT_TIMEOUT_S`` or the session deadline, whichever
is shorter.

Results: the node's own outputs, decoded by the compiled manifest (``withheld`` and the named values, or
nothing but ``withheld`` when the disclosure rule withheld them), are written as JSON to
``<job results>/<UTC time>-<session id>.json`` owner-only and atomically (``secrets.write_private_file``). The
other party's inputs, labels, Δ and results never reach this node's logs or store.

Stopping: the node first asks its running sessions to end (``NodeState.shutdown``, ``transport.driver.Shutdown``):
each sends its peer an abort frame with the reason ``peer_shutdown``, which the peer logs, and is logged here
``session_aborted`` (reason ``cancelled``) and stored ``aborted``. Attempts still proposing or waiting are then
cancelled and recorded the same way. Records of an ending session are written in a shielded
task, so a cancellation never leaves a session half-recorded.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import re
import secrets
import threading
import time
from collections.abc import Callable, Coroutine
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TypeVar

import grpc
import numpy as np
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat import statements
from jointstat.audit.log import SessionLog
from jointstat.audit.records import AuditError
from jointstat.circuit.compile import CompiledStatistic
from jointstat.circuit.model import Party
from jointstat.node.clock import Clock
from jointstat.node.config import JOB_NAME, JobConfig, NodeConfig
from jointstat.node.metrics import NodeMetrics
from jointstat.node.progress import ABORTED, COMPLETED, FAILED, PROPOSING, REFUSED, SessionTracker
from jointstat.node.results import RESULT_FORMAT
from jointstat.node.schedule import Planner
from jointstat.node.store import JobStore
from jointstat.protocol import Session, Sign, Verify, new_session
from jointstat.protocol.frames import AbortReason
from jointstat.statements import TRANSCRIPT, Statement
from jointstat.transport.channel import MESSAGE_OPTIONS, SERVICE_NAME, SessionIds, describe_rpc_error
from jointstat.transport.driver import Limits, SessionResult, Shutdown
from jointstat.transport.server import SessionServer
from jointstat.transport.tls import NodeTLS, fingerprint, pinned_certificate
from jointstat.wire.jointstat.v1 import session_pb2 as pb

log = logging.getLogger("jointstat.node")

PROTOCOL_VERSION = 1  # of run proposals (unchanged since version 1 of the wire format)
PROPOSE_METHOD = pb.DESCRIPTOR.services_by_name["Session"].methods_by_name["Propose"].name
PROPOSE_PATH = f"/{SERVICE_NAME}/{PROPOSE_METHOD}"
PROPOSAL_TIMEOUT_S = 300.0  # the peer may compile the manifest before it answers
CONNECT_TIMEOUT_S = 60.0
SESSION_ID_BYTES = 16
MAX_MESSAGE = 300

# Refusal codes: the wire enum's names in snake case are the reasons in logs, the store and metrics.
REFUSAL_CODES: dict[int, str] = {
    value.number: value.name.removeprefix("REFUSAL_REASON_").lower()
    for value in pb.RefusalReason.DESCRIPTOR.values
    if value.number != 0
}
NOT_RETRIED = frozenset(
    {
        "job_not_configured",
        "digest_mismatch",
        "outside_window",
        "role_mismatch",
        "both_initiate",
        "malformed",
        "protocol_version",
    }
)

T = TypeVar("T")


def role_of(job: JobConfig) -> Party:
    """The manifest party this node is for ``job``: its configured ``role``, never who initiates."""
    return Party.GARBLER if job.role == "garbler" else Party.EVALUATOR


def other_role(party: Party) -> Party:
    """The manifest's other party."""
    return Party.EVALUATOR if Party(party) == Party.GARBLER else Party.GARBLER


def role_name(party: Party) -> str:
    return "garbler" if Party(party) == Party.GARBLER else "evaluator"


def new_session_id() -> bytes:
    return secrets.token_bytes(SESSION_ID_BYTES)


def abort_code(reason: AbortReason) -> str:
    """``AbortReason.MANIFEST_MISMATCH`` → ``manifest_mismatch`` (the session log's reason words)."""
    return AbortReason(reason).name.lower()


def plain_detail(text: str) -> str:
    """A message fit for a log's ``detail``: one line, at most 300 characters, no long hex or base64 tokens."""
    line = " ".join(str(text).split())
    line = re.sub(r"[0-9A-Fa-f]{32,}", "…", line)
    line = re.sub(r"[A-Za-z0-9+/_=-]{20,}", "…", line)
    return line[:MAX_MESSAGE]


# -- keys and identities -------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PeerIdentity:
    name: str
    address: str
    tls: NodeTLS  # client side: pins this peer only
    fingerprint: bytes
    certificate_der: bytes
    signing_key: Ed25519PublicKey


@dataclass(frozen=True)
class NodeKeys:
    """What the node holds after reading its key files (checked owner-only by ``NodeConfig.check_secrets``)."""

    signing_key: Ed25519PrivateKey
    server_tls: NodeTLS  # pins every peer
    peers: dict[str, PeerIdentity]
    key_secret: bytes | None

    def peer_by_fingerprint(self, value: bytes) -> PeerIdentity | None:
        for peer in self.peers.values():
            if peer.fingerprint == value:
                return peer
        return None


def load_node_keys(config: NodeConfig) -> NodeKeys:
    """Read the node's secrets and its peers' public files; raises ``ConfigError`` listing secret problems."""
    from jointstat.node.keys import load_public_key, load_signing_key, read_tls_key
    from jointstat.node.secrets import read_secret_file

    config.check_secrets()
    own_cert = config.tls.certificate.read_bytes()
    tls_key = read_tls_key(config.tls.private_key)
    peer_certs = {p.name: p.certificate.read_bytes() for p in config.peers}
    peers = {}
    for p in config.peers:
        pem = peer_certs[p.name]
        cert = pinned_certificate(pem, f"peer {p.name}: {p.certificate}")
        if p.certificate_sha256 is not None and fingerprint(cert).hex() != p.certificate_sha256:
            raise ValueError(f"peer {p.name}: {p.certificate} is not the certificate of certificate_sha256")
        peers[p.name] = PeerIdentity(
            name=p.name,
            address=str(p.address),
            tls=NodeTLS(own_cert, tls_key, (pem,)),
            fingerprint=fingerprint(cert),
            certificate_der=cert.public_bytes(serialization.Encoding.DER),
            signing_key=load_public_key(p.signing_public_key),
        )
    secret = None
    if config.key_hashing_secret is not None:
        secret = read_secret_file(config.key_hashing_secret, "key-hashing secret")
    return NodeKeys(
        signing_key=load_signing_key(config.signing_key),
        server_tls=NodeTLS(own_cert, tls_key, tuple(peer_certs.values())),
        peers=peers,
        key_secret=secret,
    )


def session_signing(
    session_log: SessionLog, key: Ed25519PrivateKey, peer_key: Ed25519PublicKey, sid: str
) -> tuple[Sign, Verify]:
    """A session's ``sign`` and ``verify`` on a node: its hello signed with the node's key, its transcript signed by
    the session log (which records the digest and the signature as the finish frame is made), the peer's checked
    against ``peer_key``; both refuse statements of any session but ``sid`` (``jointstat.statements``)."""

    def sign(statement: Statement) -> bytes:
        if statement.session != sid:
            raise ValueError("asked to sign a statement of another session")
        if statement.kind == TRANSCRIPT:
            return session_log.transcript(sid, statement.digest)
        return statements.sign(key, statement)

    def verify(signature: bytes, statement: Statement) -> bool:
        return statement.session == sid and statements.signature_ok(peer_key, statement, signature)

    return sign, verify


# -- preparing a job ------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Prepared:
    """A job ready to run on this node: its compiled manifest and this node's encoded input bits."""

    compiled: CompiledStatistic
    party: Party
    digest: bytes
    inputs: np.ndarray
    seconds: float


class Preparer:
    """Compiles manifests (cached by file, size and modification time) and reads a job's input."""

    def __init__(self, key_secret: bytes | None, memory_limit: int | None = None) -> None:
        self._key_secret = key_secret
        self._memory_limit = (
            memory_limit  # a job whose program needs more is refused before its input is read
        )
        self._cache: dict[Path, tuple[tuple[int, int], CompiledStatistic]] = {}
        self._lock = (
            threading.Lock()
        )  # one compilation at a time: a second caller waits for the first's result

    def compiled(self, job: JobConfig) -> CompiledStatistic:
        """The compiled manifest of ``job`` (blocking: call from a worker thread)."""
        from jointstat.circuit.compile import compile_manifest
        from jointstat.circuit.manifest import load_manifest

        path = job.manifest
        with self._lock:
            info = path.stat()
            stamp = (info.st_size, info.st_mtime_ns)
            hit = self._cache.get(path)
            if hit is not None and hit[0] == stamp:
                return hit[1]
            compiled = compile_manifest(load_manifest(path))
            _ = compiled.digest  # measure the program now (count backend), off the event loop
            self._cache[path] = (stamp, compiled)
            return compiled

    def inputs(self, job: JobConfig, compiled: CompiledStatistic) -> np.ndarray:
        """This node's input bits for ``job`` (blocking)."""
        from jointstat.circuit.inputs import encode_inputs, read_csv, read_sql

        party = role_of(job)
        table = compiled.manifest.table(party)
        columns = compiled.inputs[party].columns
        if job.input.csv is not None:
            records = read_csv(job.input.csv.path, table, columns=columns, key_secret=self._key_secret)
        else:
            sql = job.input.sql
            assert sql is not None
            records = read_sql(
                sql.connection_url(), sql.query, table, columns=columns, key_secret=self._key_secret
            )
        return encode_inputs(compiled, party, records)

    def prepare(self, job: JobConfig) -> Prepared:
        from jointstat.circuit.plan import check_limits

        t0 = time.monotonic()
        compiled = self.compiled(job)
        if self._memory_limit is not None:
            check_limits(compiled, memory_limit=self._memory_limit)
        bits = self.inputs(job, compiled)
        return Prepared(compiled, role_of(job), bytes.fromhex(compiled.digest), bits, time.monotonic() - t0)


def describe_failure(exc: BaseException) -> str:
    """A one-line account of why preparing failed (the errors name files, rows and columns, never values)."""
    text = str(exc).strip().splitlines()
    first = text[0] if text else type(exc).__name__
    more = f" (and {len(text) - 1} more problems)" if len(text) > 1 else ""
    return (first + more)[:MAX_MESSAGE]


def write_result(
    job: JobConfig,
    *,
    session_id: str,
    party: Party,
    digest: bytes,
    scheduled_for: datetime,
    finished_at: datetime,
    outputs: dict[str, Any],
) -> Path:
    """Write this node's result of one session, owner-only and atomically; returns the file's path."""
    from jointstat.node.secrets import ensure_private_dir, write_private_file

    directory = ensure_private_dir(job.results)
    stamp = finished_at.astimezone(UTC).strftime("%Y%m%dT%H%M%SZ")
    body = {
        "format": RESULT_FORMAT,
        "job": job.name,
        "session": session_id,
        "role": role_name(party),
        "manifest_digest": digest.hex(),
        "scheduled_for": scheduled_for.astimezone(UTC).isoformat(),
        "finished_at": finished_at.astimezone(UTC).isoformat(),
        "withheld": outputs.get("withheld") if outputs else None,
        "outputs": {k: v for k, v in outputs.items() if k != "withheld"},
    }
    data = (json.dumps(body, indent=2) + "\n").encode("utf-8")
    return write_private_file(directory / f"{stamp}-{session_id}.json", data)


# -- the runner -----------------------------------------------------------------------------------------------------


@dataclass
class NodeState:
    """What the runner shares with the daemon."""

    config: NodeConfig
    keys: NodeKeys
    store: JobStore
    session_log: SessionLog
    clock: Clock
    metrics: NodeMetrics
    limits: Limits
    session_ids: SessionIds = field(default_factory=SessionIds)
    server: SessionServer | None = None
    sessions: dict[str, SessionTracker] = field(default_factory=dict)
    stopping: bool = False
    shutdown: Shutdown = field(default_factory=Shutdown)  # ends running sessions with peer_shutdown on stop
    new_session: Callable[..., Session] = new_session  # makes each session (``protocol.session.new_session``)

    def running_sessions(self) -> int:
        return sum(1 for t in self.sessions.values() if not t.ended)


async def _to_thread(fn: Callable[..., T], *args: Any, **kwargs: Any) -> T:
    return await asyncio.to_thread(fn, *args, **kwargs)


async def _finish_despite_cancel(coro: Coroutine[Any, Any, T]) -> T:
    """Run ``coro`` to its end even if the caller is cancelled meanwhile (then re-raise the cancellation)."""
    task = asyncio.ensure_future(coro)
    try:
        return await asyncio.shield(task)
    except asyncio.CancelledError:
        await task
        raise


@dataclass(frozen=True)
class Attempt:
    job_name: str
    scheduled_for: datetime
    attempt: int
    trigger: str
    session_id: bytes
    job: JobConfig | None = None  # None only for a refused proposal of a job this node does not have

    @property
    def sid(self) -> str:
        return self.session_id.hex()


class JobRunner:
    """Runs the node's side of jobs; see the module docstring."""

    def __init__(self, state: NodeState) -> None:
        self.state = state
        self.preparer = Preparer(state.keys.key_secret, state.config.node.session_memory_bytes)
        self.planner = Planner(
            [j.timing() for j in state.config.jobs if j.initiate], started_at=state.clock.now()
        )
        self.served: set[asyncio.Task[Any]] = set()  # tasks waiting for sessions this node accepted

    # -- small helpers ------------------------------------------------------------------------------------------

    def _tracker(self, a: Attempt, party: Party, peer: str) -> SessionTracker:
        tracker = SessionTracker(
            session_id=a.sid,
            job=a.job_name,
            role=party,
            peer=peer,
            trigger=a.trigger,
            started_at=self.state.clock.now(),
        )
        self.state.sessions[a.sid] = tracker
        return tracker

    def _sign_verify(self, sid: str, peer: PeerIdentity) -> tuple[Sign, Verify]:
        return session_signing(self.state.session_log, self.state.keys.signing_key, peer.signing_key, sid)

    async def _log_start(self, a: Attempt, party: Party, peer: PeerIdentity, digest: bytes) -> None:
        await _to_thread(
            self.state.session_log.session_started,
            a.sid,
            job=a.job_name,
            manifest_digest=digest,
            role=role_name(party),
            peer=peer.name,
            peer_key=peer.signing_key,
            peer_certificate_der=peer.certificate_der,
        )
        self.state.metrics.started.labels(a.job_name, role_name(party)).inc()

    async def _log_abort(self, sid: str, *, reason: str, by: str, phase: str | None, detail: str) -> None:
        session_log = self.state.session_log
        try:
            await _to_thread(
                session_log.session_aborted,
                sid,
                reason=reason,
                by=by,
                phase=phase,
                detail=plain_detail(detail),
            )
        except AuditError:  # a detail the log will not take: keep the reason, drop the words
            await _to_thread(session_log.session_aborted, sid, reason=reason, by=by, phase=phase, detail="")

    async def _log_phases(self, tracker: SessionTracker) -> None:
        for p in tracker.phases:
            await _to_thread(
                self.state.session_log.phase_finished,
                tracker.session_id,
                phase=p.name,
                duration_us=p.duration_us,
                bytes_sent=p.bytes_sent,
                bytes_received=p.bytes_received,
            )

    def _ended(self, tracker: SessionTracker, status: str, reason: str | None) -> None:
        tracker.end(status, reason)
        snap = tracker.snapshot()
        self.state.metrics.session_ended(
            job=tracker.job,
            role=tracker.role_name,
            outcome=status,
            reason=reason,
            bytes_sent=tracker.counters.bytes_sent,
            bytes_received=tracker.counters.bytes_received,
            rate=snap["and_gates_per_s"],
            finished_at=self.state.clock.now(),
        )
        self.state.metrics.running.set(self.state.running_sessions())

    async def _store_finish(
        self, run_id: int, status: str, reason: str | None, result: str | None = None
    ) -> None:
        await _to_thread(
            self.state.store.finish,
            run_id,
            status,
            finished_at=self.state.clock.now(),
            reason=None if reason is None else reason[:MAX_MESSAGE],
            result_path=result,
        )

    # -- initiating ------------------------------------------------------------------------------------------------

    async def run_job(
        self, job: JobConfig, scheduled_for: datetime, trigger: str, first_session_id: bytes | None = None
    ) -> str:
        """All attempts at one scheduled (or operator-triggered) run; returns the last attempt's status."""
        attempt, sid = 1, first_session_id or new_session_id()
        while True:
            status, reason = await self.attempt(Attempt(job.name, scheduled_for, attempt, trigger, sid, job))
            if status == COMPLETED or self.state.stopping or reason in NOT_RETRIED:
                return status
            at = self.planner.retry_at(job.name, scheduled_for, attempt, self.state.clock.now())
            if at is None:
                return status
            log.info("job %s: attempt %d %s; next attempt at %s", job.name, attempt, status, at.isoformat())
            await self.state.clock.sleep_until(at)
            if self.state.stopping:
                return status
            attempt, sid = attempt + 1, new_session_id()

    async def attempt(self, a: Attempt) -> tuple[str, str | None]:
        """One attempt as the initiating node; returns (status, reason code or None)."""
        state, job = self.state, a.job
        assert job is not None
        peer = state.keys.peers[job.peer]
        party = role_of(job)
        run_id = await _to_thread(
            state.store.start,
            job.name,
            a.scheduled_for,
            a.attempt,
            started_at=state.clock.now(),
            trigger=a.trigger,
            session_id=a.sid,
            role=role_name(party),
        )
        if state.stopping:
            await self._store_finish(run_id, "aborted", "cancelled: the node is stopping")
            return ABORTED, "cancelled"
        limit = state.config.node.max_sessions
        if state.running_sessions() >= limit:
            reason = f"busy: this node already runs {limit} sessions (node.max_sessions)"
            await self._store_finish(run_id, FAILED, reason)
            return FAILED, "busy"
        tracker = self._tracker(a, party, peer.name)
        state.metrics.running.set(state.running_sessions())
        try:
            prepared = await _to_thread(self.preparer.prepare, job)
        except asyncio.CancelledError:
            self._ended(tracker, ABORTED, "cancelled")
            await _finish_despite_cancel(
                self._store_finish(run_id, "aborted", "cancelled: the node is stopping")
            )
            raise
        except Exception as exc:
            reason = f"input_unavailable: {describe_failure(exc)}"
            log.warning("job %s: cannot prepare this node's input: %s", job.name, describe_failure(exc))
            self._ended(tracker, FAILED, "input_unavailable")
            await self._store_finish(run_id, FAILED, reason)
            return FAILED, "input_unavailable"
        tracker.add_phase("prepare", prepared.seconds)
        try:
            return await self._propose_and_run(a, run_id, tracker, peer, prepared)
        except (asyncio.CancelledError, KeyboardInterrupt):
            raise
        except Exception as exc:  # a failure of this node's own machinery (the log, the store, the disk)
            log.exception("job %s: attempt %d failed inside the node", job.name, a.attempt)
            if not tracker.ended:
                self._ended(tracker, FAILED, "internal")
            with contextlib.suppress(Exception):
                await self._store_finish(
                    run_id, FAILED, f"internal: {type(exc).__name__}: {describe_failure(exc)}"
                )
            return FAILED, "internal"

    async def _propose_and_run(
        self, a: Attempt, run_id: int, tracker: SessionTracker, peer: PeerIdentity, prepared: Prepared
    ) -> tuple[str, str | None]:
        state = self.state
        await _finish_despite_cancel(self._log_start(a, prepared.party, peer, prepared.digest))
        tracker.status = PROPOSING
        proposal = pb.RunProposal(
            protocol_version=PROTOCOL_VERSION,
            job=a.job_name,
            manifest_digest=prepared.digest,
            session_id=a.session_id,
            scheduled_for_us=round(a.scheduled_for.timestamp() * 1_000_000),
            role=pb.ROLE_GARBLER if prepared.party == Party.GARBLER else pb.ROLE_EVALUATOR,
            attempt=a.attempt,
            trigger=a.trigger,
        )
        t0 = time.monotonic()
        try:
            answer = await propose(peer, proposal)
        except asyncio.CancelledError:
            await _finish_despite_cancel(
                self._close(a, run_id, tracker, "cancelled", "self", "the node is stopping")
            )
            raise
        except grpc.aio.AioRpcError as exc:
            tracker.add_phase("proposal", time.monotonic() - t0)
            detail = f"the proposal did not reach the peer ({describe_rpc_error(exc)})"
            await _finish_despite_cancel(self._close(a, run_id, tracker, "peer_unreachable", "self", detail))
            return ABORTED, "peer_unreachable"
        tracker.add_phase("proposal", time.monotonic() - t0)
        if not answer.accepted:
            code = REFUSAL_CODES.get(answer.reason, "refused")
            message = plain_detail(answer.message) or code
            log.warning("job %s: the peer %s refused the run: %s (%s)", a.job_name, peer.name, code, message)
            await _finish_despite_cancel(
                self._close(a, run_id, tracker, code, "peer", message, status=REFUSED, phase="proposal")
            )
            return REFUSED, code
        sign, verify = self._sign_verify(a.sid, peer)
        session = state.new_session(
            prepared.party,
            session_id=a.session_id,
            program=prepared.compiled.as_program(),
            manifest_digest=prepared.digest,
            inputs=prepared.inputs,
            sign=sign,
            verify=verify,
        )
        tracker.attach(session)
        from jointstat.transport.client import run_client

        try:
            result = await run_client(
                session,
                peer.address,
                peer.tls,
                peer_fingerprint=peer.fingerprint,
                limits=state.limits,
                session_ids=state.session_ids,
                counters=tracker.counters,
                on_progress=tracker.on_progress,
                shutdown=state.shutdown,
            )
        except asyncio.CancelledError:
            await _finish_despite_cancel(
                self._close(a, run_id, tracker, "cancelled", "self", "the node is stopping")
            )
            raise
        return await _finish_despite_cancel(self._conclude(a, run_id, tracker, session, result, prepared))

    async def _close(
        self,
        a: Attempt,
        run_id: int,
        tracker: SessionTracker,
        reason: str,
        by: str,
        detail: str,
        *,
        status: str = ABORTED,
        phase: str | None = None,
    ) -> None:
        """End a logged session without a result: phases, ``session_aborted``, the store row."""
        phase = phase or tracker.phase
        self._ended(tracker, status, reason)
        await self._log_phases(tracker)
        await self._log_abort(a.sid, reason=reason, by=by, phase=phase, detail=detail)
        await self._store_finish(run_id, "refused" if status == REFUSED else "aborted", f"{reason}: {detail}")

    async def _conclude(
        self,
        a: Attempt,
        run_id: int,
        tracker: SessionTracker,
        session: Session,
        result: SessionResult,
        prepared: Prepared,
    ) -> tuple[str, str | None]:
        if not result.completed or result.peer_signature is None:
            abort = result.abort
            reason = abort_code(abort.reason) if abort is not None else "internal"
            by = "peer" if abort is not None and abort.by_peer else "self"
            detail = abort.message if abort is not None else "the session ended without a result"
            if self.state.stopping and by == "self":
                # The transport may see this node's own stop as a lost stream; the log says what happened.
                reason, detail = "cancelled", "the node was stopped during the session"
            log.warning("job %s: session %s aborted: %s", a.job_name, a.sid, reason)
            await self._close(a, run_id, tracker, reason, by, detail)
            return ABORTED, reason
        finished = self.state.clock.now()
        outputs = prepared.compiled.decode(prepared.party, result.outputs)
        tracker.close_phases()
        await self._log_phases(tracker)
        try:
            await _to_thread(self.state.session_log.peer_attestation, a.sid, result.peer_signature)
        except AuditError as exc:
            self._ended(tracker, ABORTED, "bad_signature")
            await self._log_abort(a.sid, reason="bad_signature", by="self", phase="finish", detail=str(exc))
            await self._store_finish(run_id, "aborted", "bad_signature: the peer's attestation was refused")
            return ABORTED, "bad_signature"
        assert a.job is not None
        path = await _to_thread(
            write_result,
            a.job,
            session_id=a.sid,
            party=prepared.party,
            digest=prepared.digest,
            scheduled_for=a.scheduled_for,
            finished_at=finished,
            outputs=outputs,
        )
        tracker.result_path = str(path)
        duration = round(tracker.elapsed_s() * 1e6)
        await _to_thread(self.state.session_log.session_completed, a.sid, duration_us=max(0, duration))
        await self._store_finish(run_id, "completed", None, str(path))
        self._ended(tracker, COMPLETED, None)
        log.info("job %s: session %s completed; result in %s", a.job_name, a.sid, path)
        return COMPLETED, None

    # -- accepting -----------------------------------------------------------------------------------------------

    async def on_proposal(self, request: pb.RunProposal, peer: PeerIdentity) -> pb.RunAnswer:
        """Decide on a peer's proposal (see the module docstring); logs and stores every refusal."""
        state = self.state
        now = state.clock.now()
        sid_bytes = bytes(request.session_id)
        digest = bytes(request.manifest_digest)
        if state.stopping:
            return _refusal(pb.REFUSAL_REASON_SHUTTING_DOWN, "this node is stopping; try again later")
        if request.protocol_version != PROTOCOL_VERSION:
            return _refusal(
                pb.REFUSAL_REASON_PROTOCOL_VERSION,
                f"this node speaks protocol version {PROTOCOL_VERSION}, not {request.protocol_version}",
            )
        problem = _malformed(request, sid_bytes, digest)
        if problem is not None:
            log.warning("peer %s: malformed proposal refused: %s", peer.name, problem)
            return _refusal(pb.REFUSAL_REASON_MALFORMED, problem)
        sid = sid_bytes.hex()
        if sid_bytes in state.session_ids or sid in state.sessions:
            return _refusal(pb.REFUSAL_REASON_MALFORMED, "this session id has been used before")
        scheduled = datetime.fromtimestamp(request.scheduled_for_us / 1e6, UTC)
        peer_role = Party.GARBLER if request.role == pb.ROLE_GARBLER else Party.EVALUATOR
        job = next((j for j in state.config.jobs if j.name == request.job and j.peer == peer.name), None)
        # The role this node records for the refusal or the session: its configured one, if it has the job.
        own_role = role_of(job) if job is not None else other_role(peer_role)
        trigger = "peer"

        async def refuse(code: int, message: str, job_digest: bytes, when: datetime) -> pb.RunAnswer:
            name = REFUSAL_CODES[code]
            log.warning(
                "job %s: refused the run proposed by %s: %s (%s)", request.job, peer.name, name, message
            )
            run_id = await _to_thread(
                state.store.start,
                request.job,
                when,
                request.attempt,
                started_at=now,
                trigger=trigger,
                session_id=sid,
                role=role_name(own_role),
            )
            a = Attempt(request.job, when, request.attempt, trigger, sid_bytes, job)
            tracker = self._tracker(a, own_role, peer.name)
            try:
                await self._log_start(a, own_role, peer, job_digest)
            except AuditError:
                await self._store_finish(run_id, "refused", f"{name}: {message}")
                self._ended(tracker, REFUSED, name)
                return _refusal(pb.REFUSAL_REASON_MALFORMED, "this session id has been used before")
            await self._close(a, run_id, tracker, name, "self", message, status=REFUSED, phase="proposal")
            return _refusal(code, message)

        if job is None:
            return await refuse(
                pb.REFUSAL_REASON_JOB_NOT_CONFIGURED,
                f"node {state.config.node.name} has no job {request.job!r} with peer {peer.name}",
                digest,
                scheduled,
            )
        timing = job.timing()
        latest = timing.latest_fire(now)
        if own_role == peer_role:
            return await refuse(
                pb.REFUSAL_REASON_ROLE_MISMATCH,
                f"both nodes are configured as the {role_name(peer_role)} of job {job.name}; the role of "
                "one of them must be the manifest's other party",
                digest,
                latest,
            )
        if job.initiate:
            # With both nodes initiating, every scheduled time would run twice; refuse so the operators fix it.
            return await refuse(
                pb.REFUSAL_REASON_BOTH_INITIATE,
                f"node {state.config.node.name} initiates job {job.name} itself; exactly one of the two nodes may"
                " (set initiate: false on one of them)",
                digest,
                latest,
            )
        if not timing.in_window(latest, now):
            return await refuse(
                pb.REFUSAL_REASON_OUTSIDE_WINDOW,
                f"outside the run window here: the latest scheduled time {latest.isoformat()} plus "
                f"{job.schedule.window_minutes} min has passed (now {now.isoformat()})",
                digest,
                latest,
            )
        try:
            compiled = await _to_thread(self.preparer.compiled, job)
        except Exception as exc:
            return await refuse(
                pb.REFUSAL_REASON_INPUT_UNAVAILABLE,
                f"the job's manifest cannot be used here: {describe_failure(exc)}",
                digest,
                latest,
            )
        own_digest = bytes.fromhex(compiled.digest)
        if own_digest != digest:
            return await refuse(
                pb.REFUSAL_REASON_DIGEST_MISMATCH,
                f"manifest digests differ (here {own_digest.hex()[:16]}…, proposed {digest.hex()[:16]}…)",
                own_digest,
                latest,
            )
        t0 = time.monotonic()
        try:
            bits = await _to_thread(self.preparer.inputs, job, compiled)
        except Exception as exc:
            log.warning("job %s: cannot prepare this node's input: %s", job.name, describe_failure(exc))
            return await refuse(
                pb.REFUSAL_REASON_INPUT_UNAVAILABLE,
                "this node cannot read or encode its input for the job (its operator has the details)",
                own_digest,
                latest,
            )
        prepared = Prepared(compiled, own_role, own_digest, bits, time.monotonic() - t0)
        limit = state.config.node.max_sessions
        if state.stopping:
            return _refusal(pb.REFUSAL_REASON_SHUTTING_DOWN, "this node is stopping; try again later")
        if state.running_sessions() >= limit:
            return await refuse(
                pb.REFUSAL_REASON_BUSY, f"this node already runs {limit} sessions", own_digest, latest
            )
        a = Attempt(job.name, latest, request.attempt, trigger, sid_bytes, job)
        tracker = self._tracker(a, own_role, peer.name)  # reserves a slot before the next await
        state.metrics.running.set(state.running_sessions())
        tracker.add_phase("prepare", prepared.seconds)
        run_id = await _to_thread(
            state.store.start,
            job.name,
            latest,
            request.attempt,
            started_at=now,
            trigger=trigger,
            session_id=sid,
            role=role_name(own_role),
        )
        try:
            await self._log_start(a, own_role, peer, own_digest)
        except AuditError:
            self._ended(tracker, REFUSED, "malformed")
            await self._store_finish(run_id, "refused", "malformed: this session id has been used before")
            return _refusal(pb.REFUSAL_REASON_MALFORMED, "this session id has been used before")
        sign, verify = self._sign_verify(sid, peer)
        session = state.new_session(
            own_role,
            session_id=sid_bytes,
            program=compiled.as_program(),
            manifest_digest=own_digest,
            inputs=bits,
            sign=sign,
            verify=verify,
        )
        tracker.attach(session)
        assert state.server is not None
        future = state.server.expect(
            session,
            peer_fingerprint=peer.fingerprint,
            limits=state.limits,
            counters=tracker.counters,
            on_progress=tracker.on_progress,
        )
        task = asyncio.create_task(self._serve(a, run_id, tracker, session, future, prepared))
        self.served.add(task)
        task.add_done_callback(self.served.discard)
        log.info("job %s: accepted the run proposed by %s (session %s)", job.name, peer.name, sid)
        return pb.RunAnswer(accepted=True)

    async def _serve(
        self,
        a: Attempt,
        run_id: int,
        tracker: SessionTracker,
        session: Session,
        future: asyncio.Future[SessionResult],
        prepared: Prepared,
    ) -> None:
        server = self.state.server
        assert server is not None
        # The peer opens an accepted session at once; waiting longer than the session's own deadline is pointless.
        wait_s = min(CONNECT_TIMEOUT_S, float(self.state.config.node.session_deadline_seconds))
        try:
            done, _ = await asyncio.wait({future}, timeout=wait_s)
            if not done and server.withdraw(session.session_id):
                detail = f"the peer did not open the accepted session within {wait_s:g} s"
                await _finish_despite_cancel(
                    self._close(a, run_id, tracker, "peer_never_connected", "self", detail)
                )
                return
            result = await future
        except asyncio.CancelledError:
            await _finish_despite_cancel(
                self._close(a, run_id, tracker, "cancelled", "self", "the node is stopping")
            )
            raise
        await _finish_despite_cancel(self._conclude(a, run_id, tracker, session, result, prepared))


def _refusal(code: int, message: str) -> pb.RunAnswer:
    return pb.RunAnswer(accepted=False, reason=code, message=plain_detail(message))


def _malformed(request: pb.RunProposal, sid: bytes, digest: bytes) -> str | None:
    if not JOB_NAME.fullmatch(request.job):
        return "the job name is not a valid job name"
    if not 1 <= len(sid) <= 64:
        return "the session id must be 1 to 64 bytes"
    if len(digest) != 32:
        return "the manifest digest must be 32 bytes (SHA-256)"
    if request.role not in (pb.ROLE_GARBLER, pb.ROLE_EVALUATOR):
        return "the proposing node's role is not given"
    if request.attempt < 1:
        return "the attempt number must be at least 1"
    if request.trigger not in ("schedule", "operator"):
        return "the trigger must be 'schedule' or 'operator'"
    if not -(2**62) < request.scheduled_for_us < 2**62:
        return "the scheduled time is out of range"
    return None


async def propose(peer: PeerIdentity, proposal: pb.RunProposal) -> pb.RunAnswer:
    """Send a proposal to the peer over pinned mutual TLS; raises ``grpc.aio.AioRpcError`` if it does not arrive."""
    options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", peer.tls.server_name())]
    async with grpc.aio.secure_channel(
        peer.address, peer.tls.channel_credentials(peer.fingerprint), options=options
    ) as channel:
        call = channel.unary_unary(
            PROPOSE_PATH,
            request_serializer=pb.RunProposal.SerializeToString,
            response_deserializer=pb.RunAnswer.FromString,
        )
        answer: pb.RunAnswer = await call(proposal, timeout=PROPOSAL_TIMEOUT_S)
        return answer


def proposal_service(runner_of: Callable[[], JobRunner], keys: NodeKeys) -> Callable[[grpc.aio.Server], None]:
    """The ``Session/Propose`` handler, to register on the peer-facing server (``SessionServer(services=…)``)."""
    from jointstat.transport.tls import PeerRefused, check_peer

    async def handle(request: pb.RunProposal, context: grpc.aio.ServicerContext) -> pb.RunAnswer:
        try:
            fp = check_peer(context.auth_context(), keys.server_tls.pinned_fingerprints)
        except PeerRefused as exc:
            await context.abort(grpc.StatusCode.PERMISSION_DENIED, str(exc))
            raise AssertionError("unreachable") from None
        peer = keys.peer_by_fingerprint(fp)
        if peer is None:  # pinned but not a configured peer: cannot happen with a config-built NodeTLS
            await context.abort(grpc.StatusCode.PERMISSION_DENIED, "not a configured peer")
            raise AssertionError("unreachable")
        return await runner_of().on_proposal(request, peer)

    def add(server: grpc.aio.Server) -> None:
        handler = grpc.unary_unary_rpc_method_handler(
            handle,
            request_deserializer=pb.RunProposal.FromString,
            response_serializer=pb.RunAnswer.SerializeToString,
        )
        server.add_generic_rpc_handlers(
            [grpc.method_handlers_generic_handler(SERVICE_NAME, {PROPOSE_METHOD: handler})]
        )

    return add


__all__ = [
    "CONNECT_TIMEOUT_S",
    "PROPOSE_PATH",
    "REFUSAL_CODES",
    "Attempt",
    "JobRunner",
    "NodeKeys",
    "NodeState",
    "PeerIdentity",
    "Prepared",
    "Preparer",
    "abort_code",
    "load_node_keys",
    "new_session_id",
    "other_role",
    "proposal_service",
    "propose",
    "role_name",
    "role_of",
    "session_signing",
    "write_result",
]
