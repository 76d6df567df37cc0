"""Verify one session log, and cross-check the logs of the two nodes that ran the same sessions.

Theory of operation: :class:`LogVerifier` reads a log line by line and stops at the first bad record, which it
names by line number, sequence number and the check that failed, in this order:

``json``       the line is not strict UTF-8 JSON;
``canonical``  the line is JSON but not its RFC 8785 canonical form (so it is not the bytes that were signed);
``record``     the envelope or body is malformed (missing/extra fields, wrong types, unknown kind);
``sequence``   ``seq`` is not one more than the previous record's;
``chain``      ``prev`` is not the SHA-256 of the previous line (a record was changed, dropped or inserted);
``key``        the first record is not ``log_opened``, or its public key is not the one pinned with ``--key``;
``signature``  the Ed25519 signature (RFC 8032) does not verify under the node's key;
``session``    the record breaks the per-session rules (see ``records.SessionRules``), including a transcript or
               peer signature that does not verify;
``checkpoint`` a checkpoint misstates the chain before it (its size, its head or the number of open sessions);
``truncated``  the file ends in the middle of a line;
``unclosed``   the last record is not a checkpoint (unless ``allow_open``);
``open``       a session was started and never ended (unless ``allow_open``).

Because every line must be the canonical form of its value, every value has one accepted spelling, and every
field but ``sig`` is signed while ``sig`` itself must verify: any change to any byte of a record is caught at that
record (or, for the newline between two records, as a JSON error where they merge). The hash chain additionally
catches records removed, reordered or inserted whole — anywhere but at the end.

What the chain and its checkpoints catch, and what they do not
---------------------------------------------------------------
Removing records from the *end* of a log leaves a shorter log whose links and signatures all verify: a hash
chain alone cannot show it. So the writer signs a ``checkpoint`` — the number of records before it and the
SHA-256 of the last of them (the size and head of the chain, as RFC 6962 §3.5's signed tree head gives the size
and root of a Merkle tree), and how many sessions are open — when it creates a log, when a session ends, when it
closes the log, and when it reopens a log that was not closed (cause ``recovered``). A log must end with a
checkpoint and leave no session open, so removing the last records of a session, or anything written after the
last checkpoint, is caught (``unclosed`` or ``open``); ``allow_open`` waives both for the log of a running node,
whose tail is legitimately unfinished, and then nothing after the last checkpoint is protected.

Not caught by a log on its own:

- cutting it back to an earlier checkpoint, i.e. removing whole ended sessions together with their checkpoints:
  the shorter log is a valid log. It is caught against something kept elsewhere — the peer's log (``audit
  compare`` names a session with a transcript on one side only) or a checkpoint noted earlier (its ``records``
  and ``head``: a later log must have that head at that size, the check an RFC 6962 client makes against tree
  heads it has seen);
- records lost or removed at a ``recovered`` checkpoint: the writer found the log not closed (a crash, or records
  removed while the node was down) and cannot tell which; the report lists those lines;
- anything done by whoever holds the node's signing key, who can write and sign any log; pinning the public key
  (``--key``) only stops a log re-signed under another key.

Without ``public_key`` the key is taken from the log's own first record (trust on first use); an auditor who has
the node's public key from elsewhere pins it, and a log re-signed end to end under another key then fails.

:func:`compare_logs` verifies both logs, matches sessions by id and checks that each pair agrees on job, manifest
digest, complementary roles, peer names, outcome and transcript digest, and that the peer signature each side
recorded verifies under the other log's key — so both organisations' logs attest to the same run.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from os import PathLike
from pathlib import Path
from typing import Any

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

from jointstat.audit.records import (
    ENVELOPE_FIELDS,
    GENESIS,
    AuditError,
    Checkpoint,
    Kind,
    LogOpened,
    SessionRules,
    SessionState,
    decode_b64,
    public_key_from_text,
    public_key_text,
    session_id_ok,
    signing_input,
    time_ok,
    validate_body,
)
from jointstat.canonical import CanonicalError, canonicalize, parse
from jointstat.statements import transcript_signature_ok

_HEX = frozenset("0123456789abcdef")


@dataclass(frozen=True)
class Problem:
    """The first bad record: its 1-based line, its ``seq`` when readable, the check that failed, and why."""

    line: int
    seq: int | None
    check: str
    message: str

    def __str__(self) -> str:
        where = f"line {self.line}" + (f" (seq {self.seq})" if self.seq is not None else "")
        return f"{where}: {self.check}: {self.message}"

    def to_dict(self) -> dict[str, Any]:
        return {"line": self.line, "seq": self.seq, "check": self.check, "message": self.message}


@dataclass(frozen=True)
class VerifyReport:
    """The outcome of verifying one log; ``records`` counts the good records before any problem."""

    records: int
    node: str | None
    public_key: str | None
    last_hash: str
    problem: Problem | None
    sessions: dict[str, SessionState] = field(default_factory=dict)
    last_checkpoint: int | None = None  # line of the last checkpoint record
    ends_with_checkpoint: bool = False
    recovered: list[int] = field(default_factory=list)  # lines of ``recovered`` checkpoints

    @property
    def ok(self) -> bool:
        return self.problem is None

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "records": self.records,
            "node": self.node,
            "public_key": self.public_key,
            "last_hash": self.last_hash,
            "problem": None if self.problem is None else self.problem.to_dict(),
            "sessions": [s.to_dict() for s in self.sessions.values()],
            "last_checkpoint": self.last_checkpoint,
            "ends_with_checkpoint": self.ends_with_checkpoint,
            "recovered": self.recovered,
        }


class _Bad(Exception):
    def __init__(self, check: str, message: str) -> None:
        super().__init__(message)
        self.check = check
        self.message = message


class LogVerifier:
    """Incremental verifier: ``feed`` bytes in any pieces, then ``finish`` for the report.

    ``clone`` copies the state after the records read so far (it is what verifying those same bytes from the
    start would give), which lets a caller resume from a verified prefix.
    """

    def __init__(self, public_key: Ed25519PublicKey | None = None) -> None:
        self._pinned = None if public_key is None else public_key_text(public_key)
        self._key: Ed25519PublicKey | None = None
        self._key_text: str | None = None
        self.node: str | None = None
        self.next_seq = 0
        self.last_hash = GENESIS
        self.rules = SessionRules()
        self.last_kind: Kind | None = None
        self.last_checkpoint: int | None = None
        self.recovered: list[int] = []
        self._buffer = b""
        self._problem: Problem | None = None

    def clone(self) -> LogVerifier:
        twin = LogVerifier.__new__(LogVerifier)
        twin.__dict__.update(self.__dict__)
        twin.rules = self.rules.copy()
        twin.recovered = list(self.recovered)
        return twin

    @property
    def problem(self) -> Problem | None:
        return self._problem

    @property
    def public_key(self) -> Ed25519PublicKey | None:
        return self._key

    def feed(self, data: bytes) -> None:
        if self._problem is not None:
            return
        buf = self._buffer + data if self._buffer else bytes(data)
        start = 0
        while True:
            end = buf.find(b"\n", start)
            if end < 0:
                break
            self._line(buf[start:end])
            start = end + 1
            if self._problem is not None:
                self._buffer = b""
                return
        self._buffer = buf[start:]

    def finish(self, allow_open: bool = False) -> VerifyReport:
        """The report; unless ``allow_open``, a log must end with a checkpoint and leave no session open."""
        problem = self._problem
        if problem is None:
            last = self.next_seq
            if self._buffer:
                problem = Problem(
                    last + 1, None, "truncated", "the last line has no newline (an incomplete record)"
                )
            elif last == 0:
                problem = Problem(1, None, "record", "the log is empty (no log_opened record)")
            elif not allow_open and self.last_kind is not Kind.CHECKPOINT:
                since = f"line {self.last_checkpoint}" if self.last_checkpoint is not None else "the start"
                problem = Problem(
                    last,
                    last - 1,
                    "unclosed",
                    f"the log does not end with a signed checkpoint (the last is at {since}): records after it "
                    "may have been removed; the log of a running node ends so (verify it with --allow-open)",
                )
            elif not allow_open and self.rules.open_sessions():
                first = self.rules.sessions[self.rules.open_sessions()[0]]
                problem = Problem(
                    last,
                    last - 1,
                    "open",
                    f"session {first.session_id} (line {first.line}) was started and never ended: its last records "
                    "may have been removed; a node that stops ends its sessions (--allow-open for a running node)",
                )
        return VerifyReport(
            records=self.next_seq,
            node=self.node,
            public_key=self._key_text,
            last_hash=self.last_hash,
            problem=problem,
            sessions=dict(self.rules.sessions),
            last_checkpoint=self.last_checkpoint,
            ends_with_checkpoint=self.last_kind is Kind.CHECKPOINT,
            recovered=list(self.recovered),
        )

    def _line(self, line: bytes) -> None:
        seq: int | None = None
        try:
            try:
                value = parse(line)
            except CanonicalError as exc:
                raise _Bad("json", str(exc)) from None
            if isinstance(value, dict) and type(value.get("seq")) is int:
                seq = value["seq"]
            try:
                canonical = canonicalize(value)
            except CanonicalError as exc:
                raise _Bad("canonical", str(exc)) from None
            if canonical != line:
                raise _Bad("canonical", "not in RFC 8785 canonical form, so not the bytes that were signed")
            self._check(value, line)
        except _Bad as bad:
            self._problem = Problem(self.next_seq + 1, seq, bad.check, bad.message)

    def _check(self, record: Any, line: bytes) -> None:
        if not isinstance(record, dict):
            raise _Bad("record", "a record must be a JSON object")
        missing, extra = ENVELOPE_FIELDS - record.keys(), record.keys() - ENVELOPE_FIELDS
        if missing or extra:
            parts = []
            if missing:
                parts.append("missing " + ", ".join(sorted(missing)))
            if extra:
                parts.append("unexpected " + ", ".join(sorted(extra)))
            raise _Bad("record", "; ".join(parts))
        seq, time, kind_text, session = record["seq"], record["time"], record["kind"], record["session"]
        prev, sig, body = record["prev"], record["sig"], record["body"]
        if type(seq) is not int:
            raise _Bad("record", "seq must be an integer")
        if not isinstance(time, str) or not time_ok(time):
            raise _Bad(
                "record", "time must be RFC 3339 UTC with microseconds, e.g. 2025-03-01T02:00:00.000000Z"
            )
        if not isinstance(prev, str) or len(prev) != 64 or not _HEX.issuperset(prev):
            raise _Bad("record", "prev must be 64 lower-case hex digits")
        if not isinstance(sig, str):
            raise _Bad("record", "sig must be a string")
        try:
            kind = Kind(kind_text)
        except ValueError:
            raise _Bad("record", f"unknown kind {str(kind_text)[:40]!r}") from None
        if kind in (Kind.LOG_OPENED, Kind.CHECKPOINT):
            if session is not None:
                raise _Bad("record", f"{kind.value} has no session")
        elif not isinstance(session, str) or not session_id_ok(session):
            raise _Bad("record", "session must be an id of letters, digits and . _ : - (1–128 characters)")
        if seq != self.next_seq:
            raise _Bad("sequence", f"seq is {seq}, expected {self.next_seq}")
        if prev != self.last_hash:
            if self.next_seq == 0:
                raise _Bad("chain", "the first record's prev must be 64 zeros")
            raise _Bad(
                "chain", f"prev is not the SHA-256 of line {self.next_seq} (a record changed or went missing)"
            )
        try:
            typed = validate_body(kind, body)
        except AuditError as exc:
            raise _Bad("record", str(exc)) from None
        if self.next_seq == 0:
            if kind is not Kind.LOG_OPENED:
                raise _Bad("key", "the first record must be log_opened (it names the node's public key)")
            assert isinstance(typed, LogOpened)
            if self._pinned is not None and typed.public_key != self._pinned:
                raise _Bad(
                    "key", f"the log names public key {typed.public_key}, not the pinned key {self._pinned}"
                )
            key = public_key_from_text(typed.public_key)
            if key is None:
                raise _Bad("key", "log_opened public_key is not an Ed25519 public key")
            self._key, self._key_text, self.node = key, typed.public_key, typed.node
        elif kind is Kind.LOG_OPENED:
            raise _Bad("record", "log_opened may only be the first record")
        assert self._key is not None
        signature = decode_b64(sig, 64)
        if signature is None:
            raise _Bad("signature", "sig is not the base64 of a 64-byte Ed25519 signature")
        unsigned = {k: v for k, v in record.items() if k != "sig"}
        try:
            self._key.verify(signature, signing_input(unsigned))
        except InvalidSignature:
            raise _Bad("signature", "the signature does not verify under the node's key") from None
        if kind is Kind.CHECKPOINT:
            assert isinstance(typed, Checkpoint)
            self._check_checkpoint(typed, seq, prev)
        elif kind is not Kind.LOG_OPENED:
            try:
                self.rules.apply(kind, session, typed, self._key, line=self.next_seq + 1)
            except AuditError as exc:
                raise _Bad("session", str(exc)) from None
        self.last_hash = hashlib.sha256(line).hexdigest()
        self.next_seq += 1
        self.last_kind = kind

    def _check_checkpoint(self, body: Checkpoint, seq: int, prev: str) -> None:
        if body.records != seq:
            raise _Bad("checkpoint", f"it states {body.records} records before it; there are {seq}")
        if body.head != prev:
            raise _Bad("checkpoint", "its head is not the SHA-256 of the record before it")
        open_now = len(self.rules.open_sessions())
        if body.open_sessions != open_now:
            raise _Bad("checkpoint", f"it states {body.open_sessions} open sessions; the log has {open_now}")
        self.last_checkpoint = seq + 1
        if body.cause == "recovered":
            self.recovered.append(seq + 1)


LogSource = bytes | str | PathLike[str]


def _read(source: LogSource) -> bytes:
    if isinstance(source, bytes):
        return source
    return Path(source).read_bytes()


def verify_log(
    source: LogSource, public_key: Ed25519PublicKey | None = None, *, allow_open: bool = False
) -> VerifyReport:
    """Verify a whole log given as bytes or a path (``OSError`` if it cannot be read); ``allow_open`` accepts
    a log that does not end with a checkpoint or leaves sessions open (a running node's)."""
    verifier = LogVerifier(public_key)
    verifier.feed(_read(source))
    return verifier.finish(allow_open=allow_open)


@dataclass(frozen=True)
class CompareReport:
    """Cross-check of two nodes' logs; ``problems`` name the session and the disagreement."""

    mine: VerifyReport
    theirs: VerifyReport
    matched: list[str]
    only_mine: list[str]
    only_theirs: list[str]
    problems: list[str]
    notes: list[str]

    @property
    def ok(self) -> bool:
        return self.mine.ok and self.theirs.ok and not self.problems

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "mine": {"node": self.mine.node, "records": self.mine.records, "problem": _p(self.mine.problem)},
            "theirs": {
                "node": self.theirs.node,
                "records": self.theirs.records,
                "problem": _p(self.theirs.problem),
            },
            "matched": self.matched,
            "only_mine": self.only_mine,
            "only_theirs": self.only_theirs,
            "problems": self.problems,
            "notes": self.notes,
        }


def _p(problem: Problem | None) -> dict[str, Any] | None:
    return None if problem is None else problem.to_dict()


def _attested_by(signer_key_text: str | None, session: SessionState, signature_text: str | None) -> bool:
    key = None if signer_key_text is None else public_key_from_text(signer_key_text)
    signature = None if signature_text is None else decode_b64(signature_text, 64)
    if key is None or signature is None or session.digest is None:
        return False
    return transcript_signature_ok(key, session.session_id, bytes.fromhex(session.digest), signature)


def _compare_session(
    sid: str, a: SessionState, b: SessionState, mine: VerifyReport, theirs: VerifyReport
) -> list[str]:
    out = []
    if a.peer != theirs.node:
        out.append(f"session {sid}: my log names peer {a.peer}, but their log is node {theirs.node}")
    if b.peer != mine.node:
        out.append(f"session {sid}: their log names peer {b.peer}, but my log is node {mine.node}")
    if a.peer_key is not None and a.peer_key != theirs.public_key:
        out.append(f"session {sid}: my log pinned a peer key that is not their log's key")
    if b.peer_key is not None and b.peer_key != mine.public_key:
        out.append(f"session {sid}: their log pinned a peer key that is not my log's key")
    if a.job != b.job:
        out.append(f"session {sid}: job differs (mine {a.job}, theirs {b.job})")
    if a.manifest_digest != b.manifest_digest:
        out.append(
            f"session {sid}: manifest digest differs (mine {a.manifest_digest}, theirs {b.manifest_digest})"
        )
    if {a.role, b.role} != {"garbler", "evaluator"}:
        out.append(
            f"session {sid}: roles are not one garbler and one evaluator (mine {a.role}, theirs {b.role})"
        )
    if a.outcome != b.outcome:
        out.append(f"session {sid}: outcome differs (mine {a.outcome}, theirs {b.outcome})")
    if a.digest is not None and b.digest is not None and a.digest != b.digest:
        out.append(f"session {sid}: transcript digests differ (mine {a.digest}, theirs {b.digest})")
    if a.peer_signature is not None and not _attested_by(theirs.public_key, a, a.peer_signature):
        out.append(f"session {sid}: the peer signature in my log does not verify under their log's key")
    if b.peer_signature is not None and not _attested_by(mine.public_key, b, b.peer_signature):
        out.append(f"session {sid}: the peer signature in their log does not verify under my log's key")
    if a.peer_signature is not None and a.peer_signature != b.own_signature and b.own_signature is not None:
        out.append(f"session {sid}: my log's peer signature is not the signature their log says it sent")
    if b.peer_signature is not None and b.peer_signature != a.own_signature and a.own_signature is not None:
        out.append(f"session {sid}: their log's peer signature is not the signature my log says it sent")
    return out


def compare_logs(
    mine: LogSource,
    theirs: LogSource,
    *,
    mine_key: Ed25519PublicKey | None = None,
    theirs_key: Ed25519PublicKey | None = None,
    allow_open: bool = False,
) -> CompareReport:
    """Verify both logs, match their sessions by id and check that each pair attests to the same run."""
    a = verify_log(mine, mine_key, allow_open=allow_open)
    b = verify_log(theirs, theirs_key, allow_open=allow_open)
    problems: list[str] = []
    notes: list[str] = []
    if not a.ok:
        problems.append(f"my log does not verify: {a.problem}")
    if not b.ok:
        problems.append(f"their log does not verify: {b.problem}")
    if a.ok and b.ok and a.public_key == b.public_key:
        problems.append("both logs are signed by the same key; they are not two nodes' logs")
    matched = [sid for sid in a.sessions if sid in b.sessions]
    for sid in matched:
        problems.extend(_compare_session(sid, a.sessions[sid], b.sessions[sid], a, b))
    only_mine = [sid for sid in a.sessions if sid not in b.sessions and a.sessions[sid].peer == b.node]
    only_theirs = [sid for sid in b.sessions if sid not in a.sessions and b.sessions[sid].peer == a.node]
    for sid, side, logs in [(s, "my", a) for s in only_mine] + [(s, "their", b) for s in only_theirs]:
        state = logs.sessions[sid]
        if state.outcome == "completed" or state.digest is not None:
            problems.append(
                f"session {sid}: {side} log has a transcript for it, the other log has no such session"
            )
        else:
            notes.append(
                f"session {sid}: only in {side} log ({state.outcome}; it never reached a transcript)"
            )
    return CompareReport(a, b, matched, only_mine, only_theirs, problems, notes)
