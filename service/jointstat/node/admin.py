"""The operator's API of a running node: a small gRPC service on the admin socket, one JSON object each way.

Theory of operation
-------------------
The node serves ``jointstat.admin.v1.Admin`` on ``node.admin`` only — a Unix socket (default
``<data_dir>/admin.sock``, in the owner-only data directory, the socket itself made 0600) or a loopback address;
the config refuses anything else, so the API is never reachable from the network. There is no TLS on it: whoever
can open the socket is the node's operator. Every method is unary and takes and returns one UTF-8 JSON object
(no generated stubs; the method names are the API):

=================  ==================================  =========================================================
method             request                             answer
=================  ==================================  =========================================================
``Status``         ``{}``                              node name, start time, addresses, sessions running
``ListJobs``       ``{}``                              ``jobs``: name, peer, role, schedule, next run, last run
``RunJob``         ``{"job": NAME}``                   ``job``, ``session`` (first attempt), ``scheduled_for``
``History``        ``{"job": NAME?, "limit": N?}``     ``runs``: the job store's rows, most recent first
``ListSessions``   ``{"limit": N?}``                   ``sessions``: live and recent sessions
``ShowSession``    ``{"session": ID}``                 ``session``: status, phase, AND gates done/total, bytes,
                                                       rate, time left, phases, result file
``Budget``         ``{"job": NAME?}``                  ``budgets``: each budgeted job's privacy budget: total,
                                                       period, spent, remaining, reserved, when spends free up
=================  ==================================  =========================================================

``ShowSession`` takes a whole session id or its beginning (the 12 characters ``sessions list`` prints) when one
session alone begins so. An unknown job or session answers ``NOT_FOUND``, a request that cannot be honoured (a job
this node only accepts, a run whose window is closed: the answer names the next opening) ``FAILED_PRECONDITION``, a malformed request ``INVALID_ARGUMENT``; the details say why. ``NodeAdmin`` answers the
methods for a running ``daemon.Node`` from its config, its job store and its session trackers (the console reads
the node through the same answers, ``node.nodeview``); ``AdminClient`` is the blocking client the
``jointstat jobs`` / ``jointstat sessions`` commands and the demo use.
"""

from __future__ import annotations

import asyncio
import json
import logging
from collections.abc import Awaitable, Callable, Iterable
from contextlib import AbstractContextManager
from typing import TYPE_CHECKING, Any

import grpc

from jointstat.node.progress import SessionTracker
from jointstat.node.store import RunRecord

if TYPE_CHECKING:
    from jointstat.node.config import JobConfig, NodeConfig
    from jointstat.node.daemon import Node

log = logging.getLogger("jointstat.node")

SERVICE = "jointstat.admin.v1.Admin"
METHODS = ("Status", "ListJobs", "RunJob", "History", "ListSessions", "ShowSession", "Budget")
CALL_TIMEOUT_S = 15.0


class AdminError(Exception):
    """The admin API refused a request or could not be reached; ``code`` is the gRPC status code."""

    def __init__(self, message: str, code: grpc.StatusCode | None = None) -> None:
        super().__init__(message)
        self.code = code


class RequestError(Exception):
    """Raised by an admin handler: answer with ``code`` and this message."""

    def __init__(self, code: grpc.StatusCode, message: str) -> None:
        super().__init__(message)
        self.code = code


def _encode(value: dict[str, Any]) -> bytes:
    return json.dumps(value, sort_keys=True, default=str).encode("utf-8")


def _decode(data: bytes) -> dict[str, Any]:
    try:
        value = json.loads(data.decode("utf-8")) if data else {}
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise RequestError(grpc.StatusCode.INVALID_ARGUMENT, "the request is not UTF-8 JSON") from None
    if not isinstance(value, dict):
        raise RequestError(grpc.StatusCode.INVALID_ARGUMENT, "the request must be a JSON object")
    return value


def _snake(name: str) -> str:
    return "".join("_" + c.lower() if c.isupper() else c for c in name).lstrip("_")


def admin_handler(target: NodeAdmin) -> grpc.GenericRpcHandler:
    """The generic handler serving ``target``'s methods as the admin service (``ListJobs`` → ``list_jobs``)."""

    def wrap(method: Callable[[dict[str, Any]], Awaitable[dict[str, Any]]]) -> grpc.RpcMethodHandler:
        async def handle(data: bytes, context: grpc.aio.ServicerContext) -> bytes:
            try:
                return _encode(await method(_decode(data)))
            except RequestError as exc:
                await context.abort(exc.code, str(exc))
                raise AssertionError("unreachable") from None

        return grpc.unary_unary_rpc_method_handler(
            handle, request_deserializer=None, response_serializer=None
        )

    handlers = {name: wrap(getattr(target, _snake(name))) for name in METHODS}
    return grpc.method_handlers_generic_handler(SERVICE, handlers)


def text_field(request: dict[str, Any], key: str, *, required: bool = True) -> str | None:
    value = request.get(key)
    if value is None and not required:
        return None
    if not isinstance(value, str) or not value:
        raise RequestError(grpc.StatusCode.INVALID_ARGUMENT, f"{key!r} must be a non-empty string")
    return value


def limit_field(request: dict[str, Any], default: int = 50) -> int:
    value = request.get("limit", default)
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 10_000:
        raise RequestError(grpc.StatusCode.INVALID_ARGUMENT, "'limit' must be an integer from 1 to 10000")
    return value


class NodeAdmin:
    """The admin API's answers for a running node (see the module docstring); each returns a JSON-ready dict."""

    def __init__(self, node: Node) -> None:
        self._node = node

    def _job(self, name: str) -> JobConfig:
        config = self._node.config
        try:
            return config.job(name)
        except KeyError:
            known = ", ".join(j.name for j in config.jobs) or "none"
            raise RequestError(grpc.StatusCode.NOT_FOUND, f"no job named {name!r} (jobs: {known})") from None

    async def status(self, request: dict[str, Any]) -> dict[str, Any]:
        node = self._node
        state, section = node.state, node.config.node
        assert state is not None
        return {
            "node": section.name,
            "started_at": None if node.started_at is None else node.started_at.isoformat(),
            "now": node.clock.now().isoformat(),
            "listen": str(section.listen),
            "peer_port": node.peer_port,
            "metrics_port": node.metrics_port,
            "health_port": node.health_port,
            "admin": str(section.admin),
            "sessions_running": state.running_sessions(),
            "max_sessions": section.max_sessions,
            "jobs": len(node.config.jobs),
            "stopping": state.stopping,
        }

    async def list_jobs(self, request: dict[str, Any]) -> dict[str, Any]:
        state = self._node.state
        assert state is not None
        now = self._node.clock.now()
        jobs = []
        for job in self._node.config.jobs:
            timing = job.timing()
            latest = timing.latest_fire(now)
            runs = await asyncio.to_thread(state.store.runs, job.name, 1)
            success = await asyncio.to_thread(state.store.last_success, job.name)
            jobs.append(
                {
                    "name": job.name,
                    "peer": job.peer,
                    "initiate": job.initiate,
                    "role": job.party.role_name,
                    "manifest": str(job.manifest),
                    "cron": job.schedule.cron,
                    "timezone": job.schedule.timezone,
                    "window_minutes": job.schedule.window_minutes,
                    "window_open": timing.in_window(latest, now),
                    "next_run": timing.next_fire(now).isoformat() if job.initiate else None,
                    "last_run": run_dict(runs[0]) if runs else None,
                    "last_success": None
                    if success is None or success.finished_at is None
                    else success.finished_at.isoformat(),
                    "results": str(job.results),
                    "privacy_budget": None
                    if job.privacy_budget is None or state.budgets is None
                    else state.budgets.report(job, now),
                }
            )
        return {"jobs": jobs}

    async def budget(self, request: dict[str, Any]) -> dict[str, Any]:
        node = self._node
        assert node.state is not None and node.state.budgets is not None and node.runner is not None
        name = text_field(request, "job", required=False)
        jobs = [self._job(name)] if name is not None else list(node.config.jobs)
        now = node.clock.now()
        out = []
        for job in jobs:
            if job.privacy_budget is None:
                continue
            try:
                epsilon = (await asyncio.to_thread(node.runner.preparer.compiled, job)).epsilon()
            except Exception:
                epsilon = None  # the manifest cannot be compiled: the report leaves the run's ε out
            report = node.state.budgets.report(job, now, epsilon)
            if report is not None:
                out.append(report)
        if name is not None and not out:
            raise RequestError(grpc.StatusCode.NOT_FOUND, f"job {name!r} has no privacy budget on this node")
        return {"now": now.isoformat(), "budgets": out}

    async def run_job(self, request: dict[str, Any]) -> dict[str, Any]:
        node = self._node
        assert node.state is not None
        name = text_field(request, "job")
        assert name is not None
        job = self._job(name)
        if not job.initiate:
            raise RequestError(
                grpc.StatusCode.FAILED_PRECONDITION,
                f"this node does not initiate job {name!r}; it runs when node {job.peer} starts it",
            )
        now = node.clock.now()
        timing = job.timing()
        if not timing.in_window(timing.latest_fire(now), now):
            raise RequestError(
                grpc.StatusCode.FAILED_PRECONDITION,
                f"the run window of job {name!r} ({job.schedule.cron} {job.schedule.timezone}, "
                f"{job.schedule.window_minutes} min) is closed at {now.isoformat()}; it next opens at "
                f"{timing.next_fire(now).isoformat()} — the peer would refuse the run (outside_window)",
            )
        if node.state.stopping:
            raise RequestError(grpc.StatusCode.FAILED_PRECONDITION, "the node is stopping")
        sid = node.start_run(job, now, "operator")
        role = job.party.role_name
        log.info(
            "job %s: run requested by the operator, this node the %s (session %s)", name, role, sid.hex()
        )
        return {"job": name, "role": role, "session": sid.hex(), "scheduled_for": now.isoformat()}

    async def history(self, request: dict[str, Any]) -> dict[str, Any]:
        state = self._node.state
        assert state is not None
        job = text_field(request, "job", required=False)
        runs = await asyncio.to_thread(state.store.runs, job, limit_field(request))
        return {"runs": [run_dict(r) for r in runs]}

    async def list_sessions(self, request: dict[str, Any]) -> dict[str, Any]:
        state = self._node.state
        assert state is not None
        limit = limit_field(request)
        live = list(state.sessions.values())[::-1]
        out: list[dict[str, Any]] = [_brief(t) for t in live]
        seen = {t.session_id for t in live}
        runs = await asyncio.to_thread(state.store.runs, None, limit)
        out += past_sessions(runs, seen, peer_of=job_peer(self._node.config))
        out.sort(key=lambda s: s["started_at"], reverse=True)
        return {"sessions": out[:limit]}

    async def show_session(self, request: dict[str, Any]) -> dict[str, Any]:
        state = self._node.state
        assert state is not None
        given = text_field(request, "session")
        assert given is not None
        known = list(state.sessions) + await asyncio.to_thread(state.store.sessions_starting, given.lower())
        try:
            sid = resolve_session(given, known, self._node.config.node.name)
        except LookupError as exc:
            raise RequestError(grpc.StatusCode.NOT_FOUND, str(exc)) from None
        tracker = state.sessions.get(sid)
        rows = [r for r in await asyncio.to_thread(state.store.runs, None, 10_000) if r.session_id == sid]
        if tracker is None and not rows:
            raise RequestError(
                grpc.StatusCode.NOT_FOUND, f"no session {sid} on node {self._node.config.node.name}"
            )
        out: dict[str, Any] = {"session": sid, "live": tracker is not None}
        if tracker is not None:
            out.update(tracker.snapshot())
        if rows:
            out["run"] = run_dict(rows[0])
            out.setdefault("job", rows[0].job)
            if rows[0].role is not None:
                out.setdefault("role", rows[0].role)
            if tracker is None:
                out["status"] = rows[0].status
                out["reason"] = rows[0].reason
                out["result_path"] = rows[0].result_path
            elif rows[0].status != "running":
                out["result_path"] = rows[0].result_path
        return {"session": out}


def resolve_session(given: str, known: list[str], node: str) -> str:
    """The one session id among ``known`` that ``given`` is or begins (the 12 characters ``sessions list`` shows);
    ``LookupError`` saying why when none or several are."""
    text = given.strip().lower()
    matches = sorted({sid for sid in known if sid.startswith(text)}) if text else []
    if text in matches:
        return text
    if not matches:
        raise LookupError(f"no session {given} on node {node}")
    if len(matches) > 1:
        shown = ", ".join(m[:16] for m in matches[:5])
        raise LookupError(f"{given} begins several sessions on node {node} ({shown}); give more characters")
    return matches[0]


def job_peer(config: NodeConfig) -> Callable[[str], str | None]:
    """The peer of a job by its name, or None for a job the config no longer has."""

    def peer_of(job: str) -> str | None:
        try:
            return config.job(job).peer
        except KeyError:
            return None

    return peer_of


def past_sessions(
    runs: Iterable[RunRecord], seen: set[str], peer_of: Callable[[str], str | None] | None = None
) -> list[dict[str, Any]]:
    """The sessions of ``runs`` not in ``seen`` (which grows by them), each from its first run, as the admin API
    lists a session that is not live; with ``peer_of`` (a job's peer), the session's peer and trigger too."""
    out: list[dict[str, Any]] = []
    for r in runs:
        if r.session_id and r.session_id not in seen:
            seen.add(r.session_id)
            entry: dict[str, Any] = {"session": r.session_id, "job": r.job, "role": r.role}
            if peer_of is not None:
                entry.update(peer=peer_of(r.job), trigger=r.trigger)
            entry.update(status=r.status, started_at=r.started_at.isoformat(), reason=r.reason, live=False)
            out.append(entry)
    return out


def run_dict(r: RunRecord) -> dict[str, Any]:
    """A job-store run as the admin API shows it."""
    return {
        "id": r.id,
        "job": r.job,
        "scheduled_for": r.scheduled_for.isoformat(),
        "attempt": r.attempt,
        "trigger": r.trigger,
        "role": r.role,
        "session": r.session_id,
        "status": r.status,
        "started_at": r.started_at.isoformat(),
        "finished_at": None if r.finished_at is None else r.finished_at.isoformat(),
        "reason": r.reason,
        "result_path": r.result_path,
    }


def _brief(t: SessionTracker) -> dict[str, Any]:
    snap = t.snapshot()
    keys = ("session", "job", "role", "peer", "trigger", "status", "reason", "phase", "started_at")
    return {**{k: snap[k] for k in keys}, "live": True}


class AdminClient(AbstractContextManager["AdminClient"]):
    """Blocking client of a node's admin API at a gRPC target (``unix:PATH`` or ``127.0.0.1:PORT``); closed when
    its ``with`` block ends."""

    def __init__(self, target: str, *, timeout: float = CALL_TIMEOUT_S) -> None:
        self.target = target
        self.timeout = timeout
        self._channel = grpc.insecure_channel(target)

    def close(self) -> None:
        self._channel.close()

    def __exit__(self, *_exc: object) -> None:
        self.close()

    def call(self, method: str, **request: Any) -> dict[str, Any]:
        if method not in METHODS:
            raise ValueError(f"no admin method {method!r}; the methods are {', '.join(METHODS)}")
        # No (de)serialiser: the request and the answer are the raw bytes of JSON objects.
        rpc: grpc.UnaryUnaryMultiCallable[bytes, bytes] = self._channel.unary_unary(
            f"/{SERVICE}/{method}", request_serializer=None, response_deserializer=None
        )
        try:
            data = rpc(_encode(request), timeout=self.timeout)
        except grpc.RpcError as exc:
            code = exc.code() if hasattr(exc, "code") else None
            details = exc.details() if hasattr(exc, "details") else str(exc)
            if code == grpc.StatusCode.UNAVAILABLE:
                raise AdminError(
                    f"no node answers on {self.target} (is it running? {details or 'unavailable'})", code
                ) from None
            raise AdminError(
                details or (code.name if code is not None else "admin call failed"), code
            ) from None
        value = json.loads(bytes(data).decode("utf-8"))
        if not isinstance(value, dict):
            raise AdminError("the node's answer is not a JSON object")
        return value

    def status(self) -> dict[str, Any]:
        return self.call("Status")

    def jobs(self) -> list[dict[str, Any]]:
        return list(self.call("ListJobs")["jobs"])

    def run_job(self, job: str) -> dict[str, Any]:
        return self.call("RunJob", job=job)

    def history(self, job: str | None = None, limit: int = 50) -> list[dict[str, Any]]:
        request: dict[str, Any] = {"limit": limit}
        if job is not None:
            request["job"] = job
        return list(self.call("History", **request)["runs"])

    def sessions(self, limit: int = 50) -> list[dict[str, Any]]:
        return list(self.call("ListSessions", limit=limit)["sessions"])

    def session(self, session_id: str) -> dict[str, Any]:
        return dict(self.call("ShowSession", session=session_id)["session"])

    def budgets(self, job: str | None = None) -> dict[str, Any]:
        return self.call("Budget", **({} if job is None else {"job": job}))
