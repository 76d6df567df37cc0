"""The job store: one SQLite file (owner-only) recording every run of every job and its outcome.

Theory of operation
-------------------
A *run* is one attempt at one scheduled time of one job: it is recorded when it starts (status ``running``) and
updated once when it ends (``completed``, ``aborted``, ``refused`` or ``failed``, with the reason). Each change is
one SQLite transaction, so a crash leaves either the old or the new row, never half of one; a run still marked
``running`` when the node starts again is closed as ``aborted`` ("node stopped during the run"). Results
themselves are files written by the node; the store keeps their path. Each run also records the manifest
party this node played (``garbler`` or ``evaluator``); a store made before that column existed gains it, empty
for its old rows, when opened. No secret and no input value is stored.
"""

from __future__ import annotations

import os
import sqlite3
import threading
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from jointstat.node.secrets import SecretFileError, ensure_private_dir

SCHEMA = """
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    job TEXT NOT NULL,
    scheduled_for TEXT NOT NULL,
    attempt INTEGER NOT NULL,
    trigger TEXT NOT NULL,
    session_id TEXT,
    status TEXT NOT NULL,
    started_at TEXT NOT NULL,
    finished_at TEXT,
    reason TEXT,
    result_path TEXT,
    role TEXT
);
CREATE INDEX IF NOT EXISTS runs_by_job ON runs (job, scheduled_for);
"""

RUN_COLUMNS = (
    "id, job, scheduled_for, attempt, trigger, session_id, status, started_at, finished_at, reason, result_path,"
    " role"
)  # named, not *, so the order is the same in a store that gained ``role`` by ALTER TABLE
STATUSES = ("running", "completed", "aborted", "refused", "failed")


class StoreError(RuntimeError):
    """The job store cannot be opened or written; the message names the file."""


@dataclass(frozen=True)
class RunRecord:
    id: int
    job: str
    scheduled_for: datetime
    attempt: int
    trigger: str
    session_id: str | None
    status: str
    started_at: datetime
    finished_at: datetime | None
    reason: str | None
    result_path: str | None
    role: str | None = None  # "garbler" or "evaluator"; None for runs recorded before roles were stored


def _iso(t: datetime) -> str:
    if t.tzinfo is None:
        raise StoreError("times stored in the job store must carry a time zone")
    return t.astimezone(UTC).isoformat(timespec="microseconds")


def _parse(s: str | None) -> datetime | None:
    return datetime.fromisoformat(s) if s else None


def _record(r: tuple[Any, ...]) -> RunRecord:
    return RunRecord(
        id=r[0],
        job=r[1],
        scheduled_for=_parse(r[2]),  # type: ignore[arg-type]
        attempt=r[3],
        trigger=r[4],
        session_id=r[5],
        status=r[6],
        started_at=_parse(r[7]),  # type: ignore[arg-type]
        finished_at=_parse(r[8]),
        reason=r[9],
        result_path=r[10],
        role=r[11],
    )


class JobStore:
    """Runs of jobs in an SQLite file created owner-only (0600)."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        try:
            ensure_private_dir(self.path.parent)
            fd = os.open(self.path, os.O_CREAT | os.O_RDWR, 0o600)
            os.close(fd)
            mode = self.path.stat().st_mode & 0o777
            if mode & 0o077:
                raise StoreError(f"job store {self.path}: mode {mode:o} lets others read it; use chmod 600")
            self._db = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False)
            # The node calls the store from worker threads at once (sessions ending together, proposals arriving
            # together): one connection runs one statement or transaction at a time, so every use takes the lock.
            self._lock = threading.Lock()
            self._db.execute("PRAGMA journal_mode=WAL")
            self._db.executescript(SCHEMA)
            columns = {row[1] for row in self._db.execute("PRAGMA table_info(runs)")}
            if "role" not in columns:  # a store written before runs recorded their role
                self._db.execute("ALTER TABLE runs ADD COLUMN role TEXT")
        except sqlite3.Error as exc:
            raise StoreError(f"job store {self.path}: {exc}") from exc
        except SecretFileError as exc:
            raise StoreError(f"job store {self.path}: {exc}") from None
        for suffix in ("-wal", "-shm"):
            side = Path(str(self.path) + suffix)
            if side.exists():
                side.chmod(0o600)

    def close(self) -> None:
        with self._lock:
            self._db.close()

    def _write(self, sql: str, args: tuple[object, ...]) -> int:
        try:
            with self._lock, self._db:
                self._db.execute("BEGIN IMMEDIATE")
                cur = self._db.execute(sql, args)
                return int(cur.lastrowid or 0)
        except sqlite3.Error as exc:
            raise StoreError(f"job store {self.path}: {exc}") from exc

    def start(
        self,
        job: str,
        scheduled_for: datetime,
        attempt: int,
        *,
        started_at: datetime,
        trigger: str = "schedule",
        session_id: str | None = None,
        role: str | None = None,
    ) -> int:
        """Record that a run starts (``role``: the manifest party this node plays); returns its id."""
        if role not in (None, "garbler", "evaluator"):
            raise StoreError(f"a run's role must be 'garbler' or 'evaluator', got {role!r}")
        return self._write(
            "INSERT INTO runs (job, scheduled_for, attempt, trigger, session_id, status, started_at, role)"
            " VALUES (?, ?, ?, ?, ?, 'running', ?, ?)",
            (job, _iso(scheduled_for), attempt, trigger, session_id, _iso(started_at), role),
        )

    def finish(
        self,
        run_id: int,
        status: str,
        *,
        finished_at: datetime,
        reason: str | None = None,
        result_path: str | None = None,
    ) -> None:
        """Record how a run ended (once)."""
        if status not in STATUSES or status == "running":
            raise StoreError(f"run status must be one of {', '.join(STATUSES[1:])}, got {status!r}")
        self._write(
            "UPDATE runs SET status = ?, finished_at = ?, reason = ?, result_path = ? WHERE id = ? AND status = 'running'",
            (status, _iso(finished_at), reason, result_path, run_id),
        )

    def close_interrupted(self, now: datetime) -> int:
        """Mark runs left ``running`` by a previous process as aborted; returns how many."""
        try:
            with self._lock, self._db:
                cur = self._db.execute(
                    "UPDATE runs SET status = 'aborted', finished_at = ?, reason = 'node stopped during the run'"
                    " WHERE status = 'running'",
                    (_iso(now),),
                )
                return cur.rowcount
        except sqlite3.Error as exc:
            raise StoreError(f"job store {self.path}: {exc}") from exc

    def runs(self, job: str | None = None, limit: int = 100) -> list[RunRecord]:
        """The most recent runs first."""
        sql = (
            f"SELECT {RUN_COLUMNS} FROM runs"
            + (" WHERE job = ?" if job else "")
            + " ORDER BY id DESC LIMIT ?"
        )
        with self._lock:
            rows = self._db.execute(sql, (job, limit) if job else (limit,)).fetchall()
        return [_record(r) for r in rows]

    def run_of_session(self, session_id: str) -> RunRecord | None:
        """The latest run recorded with this session id (hex), or None."""
        sql = f"SELECT {RUN_COLUMNS} FROM runs WHERE session_id = ? ORDER BY id DESC LIMIT 1"
        with self._lock:
            row = self._db.execute(sql, (session_id,)).fetchone()
        return None if row is None else _record(row)

    def scheduled_done(self) -> set[tuple[str, datetime]]:
        """(job, scheduled time) pairs that have at least one run, of any outcome."""
        with self._lock:
            rows = self._db.execute(
                "SELECT DISTINCT job, scheduled_for FROM runs WHERE trigger = 'schedule'"
            ).fetchall()
        return {(job, datetime.fromisoformat(t)) for job, t in rows}

    def last_success(self, job: str) -> RunRecord | None:
        done = [r for r in self.runs(job, limit=1000) if r.status == "completed"]
        return done[0] if done else None
