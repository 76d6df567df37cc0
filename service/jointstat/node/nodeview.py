"""The daemon's side of the console's interface: ``DaemonView`` answers ``console.view.NodeView`` for a ``Node``.

Theory of operation
-------------------
Everything the console sees goes through here, built from what the daemon already offers its operators: the
admin API's answers (``Node.admin``, ``admin.NodeAdmin``: ``list_jobs``, ``list_sessions``, ``show_session``,
``run_job`` — the same answers ``jointstat jobs`` and ``jointstat sessions`` print), a running session's
``progress.SessionTracker.snapshot``, the job result files (``node.results``), the session log's
``SessionLog.snapshot`` and the public signing keys. Each answer is converted into the console's plain records, so
a change inside the daemon touches this file and not the console. Nothing here reads a private key, an input or a
label; the records have no field for one.
"""

from __future__ import annotations

import asyncio
from datetime import datetime
from typing import TYPE_CHECKING, Any

from jointstat.node.admin import RequestError
from jointstat.node.console.view import (
    JobView,
    LogKeys,
    PhaseView,
    ResultView,
    RunRefused,
    RunView,
    SessionView,
)
from jointstat.node.results import ResultFileError, job_results

if TYPE_CHECKING:
    from jointstat.node.daemon import Node

RUN_START_WAIT_S = (
    5.0  # at most this long for a run's first attempt to be followed (it is at once unless the node is busy)
)


def _time(text: str | None) -> datetime | None:
    return None if not text else datetime.fromisoformat(text)


def run_view(d: dict[str, Any]) -> RunView:
    """An admin API run (``History``, ``ListJobs``' ``last_run``) as the console's record."""
    started = datetime.fromisoformat(d["started_at"])
    return RunView(
        job=d["job"],
        status=d["status"],
        trigger=d["trigger"],
        scheduled_for=datetime.fromisoformat(d["scheduled_for"]),
        started_at=started,
        finished_at=_time(d.get("finished_at")),
        reason=d.get("reason"),
        session=d.get("session"),
        attempt=int(d["attempt"]),
    )


def job_view(d: dict[str, Any]) -> JobView:
    """An admin API job (``ListJobs``) as the console's record."""
    return JobView(
        name=d["name"],
        role=d["role"],
        peer=d["peer"],
        initiates=bool(d["initiate"]),
        cron=d["cron"],
        timezone=d["timezone"],
        window_minutes=int(d["window_minutes"]),
        window_open=bool(d["window_open"]),
        next_run=_time(d.get("next_run")),
        last_run=None if not d.get("last_run") else run_view(d["last_run"]),
        last_success=_time(d.get("last_success")),
    )


def session_view(d: dict[str, Any]) -> SessionView:
    """An admin API session (``ListSessions`` entry, ``ShowSession``, a tracker snapshot) as the console's record."""
    phases = tuple(
        PhaseView(p["phase"], p["duration_us"] / 1e6, int(p["bytes_sent"]), int(p["bytes_received"]))
        for p in d.get("phases") or ()
    )
    run = d.get("run") or {}
    return SessionView(
        session=d["session"],
        job=d["job"],
        role=d.get("role"),
        peer=d.get("peer"),
        trigger=d.get("trigger") or run.get("trigger"),
        status=d["status"],
        reason=d.get("reason"),
        phase=d.get("phase"),
        started_at=datetime.fromisoformat(d.get("started_at") or run["started_at"]),
        live=bool(d.get("live", True)),
        and_gates_done=int(d.get("and_gates_done") or 0),
        and_gates_total=d.get("and_gates_total"),
        bytes_sent=int(d.get("bytes_sent") or 0),
        bytes_received=int(d.get("bytes_received") or 0),
        and_gates_per_s=d.get("and_gates_per_s"),
        seconds_left=d.get("eta_s"),
        elapsed_s=d.get("elapsed_s"),
        phases=phases,
        has_result=bool(d.get("result_path")),
    )


class DaemonView:
    """``NodeView`` for a running ``Node`` (see the module docstring)."""

    def __init__(self, node: Node) -> None:
        self._node = node

    @property
    def node_name(self) -> str:
        return self._node.config.node.name

    async def jobs(self) -> list[JobView]:
        answer = await self._node.admin.list_jobs({})
        return [job_view(j) for j in answer["jobs"]]

    async def sessions(self, limit: int) -> list[SessionView]:
        answer = await self._node.admin.list_sessions({"limit": limit})
        return [session_view(s) for s in answer["sessions"]]

    async def session(self, session_id: str) -> SessionView | None:
        state = self._node.state
        tracker = None if state is None else state.sessions.get(session_id)
        if tracker is not None:  # followed by the node: its tracker has it all (no job-store read)
            return session_view({**tracker.snapshot(), "live": True})
        try:
            answer = await self._node.admin.show_session({"session": session_id})
        except RequestError:
            return None
        return session_view(answer["session"])

    async def results(self, job: str, limit: int) -> list[ResultView]:
        directory = self._node.config.job(job).results
        out = []
        for r in await asyncio.to_thread(job_results, directory, limit):
            if isinstance(r, ResultFileError):
                out.append(ResultView(job=job, session=None, finished_at=None, withheld=None, problem=str(r)))
            else:
                out.append(ResultView(r.job, r.session, r.finished_at, r.withheld, dict(r.outputs)))
        return out

    async def run_now(self, job: str) -> str:
        """Start the run (``NodeAdmin.run_job``) and wait until the node follows its session, so that the session's
        page opened next shows it live (the run is recorded, then its tracker made, in the job's own task)."""
        try:
            answer = await self._node.admin.run_job({"job": job})
        except RequestError as exc:
            raise RunRefused(str(exc)) from None
        session = str(answer["session"])
        state = self._node.state
        loop = asyncio.get_running_loop()
        deadline = loop.time() + RUN_START_WAIT_S
        while state is not None and session not in state.sessions and loop.time() < deadline:
            await asyncio.sleep(0.01)
        return session

    async def session_log(self) -> bytes:
        state = self._node.state
        assert state is not None
        return await asyncio.to_thread(state.session_log.snapshot)

    def log_keys(self) -> LogKeys:
        state = self._node.state
        assert state is not None
        return LogKeys(
            own=state.session_log.public_key,
            peers={name: peer.signing_key for name, peer in state.keys.peers.items()},
        )
