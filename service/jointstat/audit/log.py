"""The writer of a node's append-only, hash-chained, signed session log (JSON Lines).

Theory of operation: :class:`SessionLog` owns one file. Opening it takes an exclusive ``flock`` (one writer per
log), reads what is there and verifies it to the tail under the node's own public key (``verify.LogVerifier``);
a log that does not verify, or that belongs to another node or key, is refused with the first bad record named —
the chain is never continued from a broken or foreign log. A new (or empty) log starts with a ``log_opened``
record naming the node and its public key.

Checkpoints (``records.Checkpoint``; what they catch: ``audit.verify``): the writer signs one right after
``log_opened`` (cause ``opened``), after every ``session_completed`` or ``session_aborted`` (``session_ended``),
when it closes the log (``closed``, unless the last record is a checkpoint already — a node closes its log when
it stops) and when it opens a log whose last record is not a checkpoint (``recovered``: the previous writer did
not close it — a crash — or records were removed; the place stays visible to an auditor).

Each append builds the record (``seq``, ``time`` from the injected clock, ``kind``, ``session``, ``body``,
``prev`` = SHA-256 of the previous line), signs it with Ed25519 (RFC 8032) over the canonical JSON (RFC 8785) of
everything but ``sig``, and writes the canonical line plus newline with one ``write`` on an ``O_APPEND``
descriptor, then ``fsync``. The file is created mode 0600. If a write or fsync fails the log object refuses
further appends (the file may end in a partial line, which the next open reports).

Only the typed methods below write records; each takes whitelisted fields (identifiers, digests, timings, byte
counts, signatures), so wire labels, Δ, input values or results have no field to go in. Session rules (a session
starts once, one transcript, the peer's attestation before completion, nothing after the end) are checked before
anything is written. Methods are thread-safe; they block for an fsync, so an event loop should call them from a
worker thread.
"""

from __future__ import annotations

import fcntl
import hashlib
import os
import stat
import threading
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Literal

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat.audit.records import (
    FORMAT,
    AuditError,
    Checkpoint,
    CheckpointCause,
    Kind,
    LogOpened,
    RecordBody,
    SessionRules,
    encode_b64,
    format_time,
    node_name_ok,
    public_key_text,
    session_id_ok,
    signing_input,
    validate_body,
)
from jointstat.audit.verify import LogVerifier
from jointstat.canonical import canonicalize
from jointstat.statements import sign_transcript

Clock = Callable[[], datetime]


def system_clock() -> datetime:
    """The wall clock in UTC (what a running node uses; tests inject their own)."""
    return datetime.now(UTC)


def _digest_hex(value: bytes, what: str) -> str:
    if not isinstance(value, bytes) or len(value) != 32:
        raise AuditError(f"{what}: must be 32 bytes (a SHA-256 digest)")
    return value.hex()


class SessionLog:
    """Append-only signed log of one node's sessions; see the module docstring."""

    def __init__(
        self,
        path: str | os.PathLike[str],
        signing_key: Ed25519PrivateKey,
        node_id: str,
        *,
        clock: Clock = system_clock,
    ) -> None:
        if not node_name_ok(node_id):
            raise AuditError(
                f"node id {node_id[:70]!r}: use lower-case letters, digits, '-' and '.' (DNS style)"
            )
        self.path = Path(path)
        self.node_id = node_id
        self._key = signing_key
        self._public: Ed25519PublicKey = signing_key.public_key()
        self._clock = clock
        self._lock = threading.Lock()
        self._broken = False
        self._last_kind: Kind | None = None
        self._fd = self._open()
        try:
            self._load()
        except BaseException:
            os.close(self._fd)
            self._fd = -1
            raise

    def _open(self) -> int:
        existed = self.path.exists()
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC, 0o600)
        except OSError as exc:
            raise AuditError(f"audit log {self.path}: cannot open ({exc.strerror})") from None
        try:
            info = os.fstat(fd)
            if not stat.S_ISREG(info.st_mode):
                raise AuditError(f"audit log {self.path}: not a regular file")
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                raise AuditError(f"audit log {self.path}: another process is writing it") from None
            if info.st_size == 0:
                os.fchmod(fd, 0o600)
            if not existed:
                _fsync_dir(self.path.parent)
        except BaseException:
            os.close(fd)
            raise
        return fd

    def _load(self) -> None:
        chunks = []
        offset = 0
        while True:
            chunk = os.pread(self._fd, 1 << 20, offset)
            if not chunk:
                break
            chunks.append(chunk)
            offset += len(chunk)
        data = b"".join(chunks)
        verifier = LogVerifier(self._public)
        verifier.feed(data)
        if not data:
            self._rules = SessionRules()
            self._seq, self._prev = 0, verifier.last_hash
            body = LogOpened(format=FORMAT, node=self.node_id, public_key=public_key_text(self._public))
            self._append(Kind.LOG_OPENED, None, body)
            self._checkpoint("opened")
            return
        report = verifier.finish(allow_open=True)
        if report.problem is not None:
            raise AuditError(f"audit log {self.path} does not verify, refusing to append: {report.problem}")
        if report.node != self.node_id:
            raise AuditError(f"audit log {self.path} belongs to node {report.node}, not {self.node_id}")
        self._rules = verifier.rules
        self._seq, self._prev = verifier.next_seq, verifier.last_hash
        self._last_kind = verifier.last_kind
        if self._last_kind is not Kind.CHECKPOINT:
            self._checkpoint("recovered")

    # -- public API ------------------------------------------------------------------------------------------

    @property
    def public_key(self) -> Ed25519PublicKey:
        return self._public

    @property
    def records(self) -> int:
        """Number of records in the log (the next record's ``seq``)."""
        return self._seq

    def open_sessions(self) -> list[str]:
        """Sessions started but neither completed nor aborted (e.g. cut short by a restart)."""
        with self._lock:
            return self._rules.open_sessions()

    def held_budget(self, session_id: str) -> str | None:
        """The ε an open session holds reserved of its job's privacy budget (its ``privacy_budget reserved``
        record, not yet spent or returned), or None."""
        with self._lock:
            state = self._rules.sessions.get(session_id)
            if state is None or state.outcome != "open" or state.budget != "reserved":
                return None
            return state.epsilon

    def snapshot(self) -> bytes:
        """The log's bytes as written so far, read under the writer's lock: whole records only, never a record
        half-way through its write (for verifying a log while its node runs). Blocks like an append."""
        with self._lock:
            if self._fd < 0:
                raise AuditError(f"audit log {self.path} is closed")
            chunks: list[bytes] = []
            offset = 0
            while True:
                chunk = os.pread(self._fd, 1 << 20, offset)
                if not chunk:
                    return b"".join(chunks)
                chunks.append(chunk)
                offset += len(chunk)

    def session_started(
        self,
        session_id: str,
        *,
        job: str,
        manifest_digest: bytes,
        role: Literal["garbler", "evaluator"],
        peer: str,
        peer_key: Ed25519PublicKey | None = None,
        peer_certificate_der: bytes | None = None,
    ) -> int:
        """Record a session's start; ``peer_key`` (the peer's signing key) lets the log check its attestation."""
        body: dict[str, object] = {
            "job": job,
            "manifest_digest": _digest_hex(manifest_digest, "manifest digest"),
            "role": role,
            "peer": peer,
            "peer_key": None if peer_key is None else public_key_text(peer_key),
            "peer_certificate": None
            if peer_certificate_der is None
            else hashlib.sha256(peer_certificate_der).hexdigest(),
        }
        return self._typed(Kind.SESSION_STARTED, session_id, body)

    def phase_finished(
        self, session_id: str, *, phase: str, duration_us: int, bytes_sent: int, bytes_received: int
    ) -> int:
        """Record one protocol phase's wall time (integer microseconds) and traffic."""
        body = {
            "phase": phase,
            "duration_us": duration_us,
            "bytes_sent": bytes_sent,
            "bytes_received": bytes_received,
        }
        return self._typed(Kind.PHASE_FINISHED, session_id, body)

    def transcript(self, session_id: str, digest: bytes) -> bytes:
        """Record the transcript digest with this node's signature over it; returns that 64-byte signature.

        The returned signature is what goes to the peer in the finish frame (``statements.sign_transcript``).
        """
        hexdigest = _digest_hex(digest, "transcript digest")
        if not isinstance(session_id, str) or not session_id_ok(session_id):
            raise AuditError(
                "session id: must be 1–128 characters of letters, digits and . _ : - (not first)"
            )
        signature = sign_transcript(self._key, session_id, digest)
        self._typed(Kind.TRANSCRIPT, session_id, {"digest": hexdigest, "signature": encode_b64(signature)})
        return signature

    def peer_attestation(self, session_id: str, signature: bytes) -> int:
        """Record the peer's signature over the same transcript digest (from its finish frame).

        If the session was started with ``peer_key``, a signature that does not verify is refused
        (``AuditError``) and nothing is written; the caller then aborts the session.
        """
        if not isinstance(signature, bytes) or len(signature) != 64:
            raise AuditError("peer signature: must be 64 bytes (Ed25519)")
        return self._typed(Kind.PEER_ATTESTATION, session_id, {"signature": encode_b64(signature)})

    def session_completed(self, session_id: str, *, duration_us: int) -> int:
        """Record that the session completed (after the peer's attestation)."""
        return self._typed(Kind.SESSION_COMPLETED, session_id, {"duration_us": duration_us})

    def privacy_budget(self, session_id: str, *, epsilon: str, action: str) -> int:
        """Record the session's spend of its job's privacy budget (``reserved``, then ``spent`` or ``returned``)."""
        return self._typed(Kind.PRIVACY_BUDGET, session_id, {"epsilon": epsilon, "action": action})

    def session_aborted(
        self,
        session_id: str,
        *,
        reason: str,
        by: Literal["self", "peer"] = "self",
        phase: str | None = None,
        detail: str = "",
    ) -> int:
        """Record an abort: ``reason`` is a snake_case code; ``detail`` a short fixed message (no values)."""
        body: dict[str, object] = {"reason": reason, "by": by, "phase": phase, "detail": detail}
        return self._typed(Kind.SESSION_ABORTED, session_id, body)

    def link_event(
        self,
        session_id: str,
        *,
        event: Literal["cut", "resumed", "resume_refused", "resume_attempt_failed"],
        at_us: int,
        frames_sent: int,
        frames_received: int,
        detail: str = "",
    ) -> int:
        """Record a cut of the session's connection, a resume, or a refused or failed resume attempt."""
        body: dict[str, object] = {
            "event": event,
            "at_us": at_us,
            "frames_sent": frames_sent,
            "frames_received": frames_received,
            "detail": detail,
        }
        return self._typed(Kind.LINK_EVENT, session_id, body)

    def close(self) -> None:
        """Sign a closing checkpoint (unless the last record is one) and close the file."""
        with self._lock:
            if self._fd >= 0:
                try:
                    if not self._broken and self._last_kind is not Kind.CHECKPOINT:
                        self._checkpoint("closed")
                finally:
                    os.close(self._fd)
                    self._fd = -1

    def __enter__(self) -> SessionLog:
        return self

    def __exit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        self.close()

    # -- internals -------------------------------------------------------------------------------------------

    def _typed(self, kind: Kind, session_id: str, body: dict[str, object]) -> int:
        if not isinstance(session_id, str) or not session_id_ok(session_id):
            raise AuditError(
                "session id: must be 1–128 characters of letters, digits and . _ : - (not first)"
            )
        typed = validate_body(kind, body)
        with self._lock:
            self._rules.check(kind, session_id, typed, self._public)
            seq = self._append(kind, session_id, typed)
            self._rules.apply(kind, session_id, typed, self._public, line=seq + 1)
            if kind in (Kind.SESSION_COMPLETED, Kind.SESSION_ABORTED):
                self._checkpoint("session_ended")
            return seq

    def _checkpoint(self, cause: CheckpointCause) -> int:
        """Append a checkpoint of the chain so far (the caller holds the lock, or is the constructor)."""
        body = Checkpoint(
            records=self._seq, head=self._prev, open_sessions=len(self._rules.open_sessions()), cause=cause
        )
        return self._append(Kind.CHECKPOINT, None, body)

    def _append(self, kind: Kind, session_id: str | None, body: RecordBody) -> int:
        if self._fd < 0:
            raise AuditError(f"audit log {self.path} is closed")
        if self._broken:
            raise AuditError(f"audit log {self.path}: an earlier write failed; reopen the log to check it")
        record: dict[str, object] = {
            "seq": self._seq,
            "time": format_time(self._clock()),
            "kind": kind.value,
            "session": session_id,
            "body": body.model_dump(),
            "prev": self._prev,
        }
        record["sig"] = encode_b64(self._key.sign(signing_input(record)))
        line = canonicalize(record)
        try:
            _write_all(self._fd, line + b"\n")
            os.fsync(self._fd)
        except OSError as exc:
            self._broken = True
            raise AuditError(f"audit log {self.path}: write failed ({exc.strerror})") from None
        seq = self._seq
        self._prev = hashlib.sha256(line).hexdigest()
        self._seq += 1
        self._last_kind = kind
        return seq


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        if written <= 0:
            raise OSError(0, "short write")
        view = view[written:]


def _fsync_dir(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
