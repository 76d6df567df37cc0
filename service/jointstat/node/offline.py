"""A stopped node's records, read straight from its files: the job store and the session log.

Theory of operation
-------------------
``jointstat jobs history``, ``sessions list`` and ``sessions show`` ask a running node through its admin API. When
no node answers there, they read the same records here instead: the job store (``node.job_store``, opened without
creating it) and the signed session log (``node.session_log``, read line by line; nothing is written to either).
The answers have the admin API's shapes (``admin.run_dict`` and the session dictionaries of ``NodeAdmin``), marked
``"live": False``, so the commands print them the same way. A session's phases come from the log's
``phase_finished`` records of that session; a session id may be given by its beginning, as to the admin API
(``admin.resolve_session``). Only what the node itself recorded is shown: no secret is in either file.
"""

from __future__ import annotations

import json
from contextlib import AbstractContextManager
from pathlib import Path
from typing import Any

from jointstat.node.admin import job_peer, past_sessions, resolve_session, run_dict
from jointstat.node.config import NodeConfig
from jointstat.node.store import JobStore, StoreError


class OfflineError(Exception):
    """The node's files cannot be read, or hold no such session; the message says which."""


class StoppedNode(AbstractContextManager["StoppedNode"]):
    """The records of a node that is not running (see the module docstring); closed when its ``with`` block
    ends."""

    def __init__(self, config: NodeConfig) -> None:
        self.config = config
        try:
            self._store = JobStore(config.node.job_store, create=False)
        except StoreError as exc:
            raise OfflineError(str(exc)) from None

    def close(self) -> None:
        self._store.close()

    def __exit__(self, *_exc: object) -> None:
        self.close()

    def history(self, job: str | None = None, limit: int = 50) -> list[dict[str, Any]]:
        return [run_dict(r) for r in self._store.runs(job, limit)]

    def sessions(self, limit: int = 50) -> list[dict[str, Any]]:
        out = past_sessions(self._store.runs(None, 10_000), set(), peer_of=job_peer(self.config))
        out.sort(key=lambda s: s["started_at"], reverse=True)
        return out[:limit]

    def budgets(self, job: str | None = None) -> dict[str, Any]:
        """The budgets as the stored spends leave them now (an open reservation still counts)."""
        from datetime import UTC, datetime

        from jointstat.circuit.compile import compile_manifest
        from jointstat.circuit.manifest import load_manifest
        from jointstat.node.spending import Budgets

        now = datetime.now(UTC)
        budgets = Budgets(self.config.jobs, self._store)
        jobs = [j for j in self.config.jobs if job is None or j.name == job]
        if job is not None and not jobs:
            known = ", ".join(j.name for j in self.config.jobs) or "none"
            raise OfflineError(f"no job named {job!r} (jobs: {known})")
        out = []
        for j in jobs:
            try:
                epsilon = compile_manifest(load_manifest(j.manifest)).epsilon() if j.privacy_budget else None
            except Exception:
                epsilon = None
            report = budgets.report(j, now, epsilon)
            if report is not None:
                out.append(report)
        if job is not None and not out:
            raise OfflineError(f"job {job!r} has no privacy budget on node {self.config.node.name}")
        return {"now": now.isoformat(), "budgets": out}

    def session(self, given: str) -> dict[str, Any]:
        name = self.config.node.name
        try:
            sid = resolve_session(given, self._store.sessions_starting(given.strip().lower()), name)
        except LookupError as exc:
            raise OfflineError(str(exc)) from None
        run = self._store.run_of_session(sid)
        assert run is not None
        out: dict[str, Any] = {
            "session": sid,
            "live": False,
            "run": run_dict(run),
            "job": run.job,
            "role": run.role,
            "trigger": run.trigger,
            "status": run.status,
            "reason": run.reason,
            "started_at": run.started_at.isoformat(),
            "result_path": run.result_path,
        }
        peer, phases = _from_log(self.config.node.session_log, sid)
        if peer is not None:
            out["peer"] = peer
        out["phases"] = phases
        return out


def _from_log(path: Path, sid: str) -> tuple[str | None, list[dict[str, Any]]]:
    """The peer and the phases the session log records for session ``sid`` (none if the log is missing)."""
    peer: str | None = None
    phases: list[dict[str, Any]] = []
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except FileNotFoundError:
        return None, []
    except (OSError, UnicodeDecodeError) as exc:
        raise OfflineError(f"session log {path}: cannot read it ({exc})") from None
    for number, line in enumerate(lines, start=1):
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            raise OfflineError(
                f"session log {path}, line {number}: not JSON (check it: jointstat audit verify)"
            ) from None
        if not isinstance(record, dict) or record.get("session") != sid:
            continue
        body = record.get("body") or {}
        if record.get("kind") == "session_started":
            peer = body.get("peer")
        elif record.get("kind") == "phase_finished":
            phases.append(
                {
                    "phase": body.get("phase"),
                    "duration_us": int(body.get("duration_us", 0)),
                    "bytes_sent": int(body.get("bytes_sent", 0)),
                    "bytes_received": int(body.get("bytes_received", 0)),
                }
            )
    return peer, phases
