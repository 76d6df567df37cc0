"""The node daemon (``jointstat node run``): peer service, health, metrics, admin API and the job scheduler.

Theory of operation
-------------------
``Node.start()`` checks the config's files and secrets (every problem named by field path; group- or
world-readable keys refused), reads the keys, opens the job store and the session log (an exclusive lock: one
process per log), closes what a previous process left open — runs still ``running`` become ``aborted``, sessions
the log shows started but never ended get ``session_aborted`` (reason ``node_restarted``) — and then serves, all on
one asyncio event loop:

- the peer-facing gRPC server on ``node.listen`` (``transport.SessionServer``, mutual TLS with the pinned peer
  certificates), carrying ``Session/Exchange``, ``Session/Propose`` (``transport.proposals``, answered by
  ``node.jobs``) and the standard gRPC health service ``grpc.health.v1.Health``; the health service also on
  ``node.health`` in plain text when configured, for probes that hold no client certificate;
- the Prometheus endpoint on ``node.metrics`` (``node.metrics``);
- the admin API on ``node.admin`` (``node.admin``: ``NodeAdmin`` answers it from this node);
- the operator console in the browser on ``node.console`` when set (``node.console``, seeing the node only
  through ``node.nodeview.DaemonView``);
- the scheduler: once at start-up, each initiated job's latest scheduled time whose window is still open and which
  the store has no run for — if it fell after this node's first start (``<data_dir>/first-start``), since a node
  that did not exist missed nothing — is run (catch-up); then it sleeps on the injected clock (``node.clock``)
  until the next scheduled time of any initiated job and starts the runs that are due (``schedule.Planner``).

``Node.stop()`` (SIGTERM or SIGINT in ``run_node``): health turns NOT_SERVING, new proposals are refused, the
scheduler stops; every running session — initiated or served — is asked to end (``NodeState.shutdown``) and
sends its peer an abort frame with the reason ``peer_shutdown`` before its stream closes; once they have ended
(or after a few seconds) the remaining job tasks are cancelled and the peer server stops. Every session is logged
``session_aborted`` and stored ``aborted`` before the log and the store are closed. A result file is only ever written whole
(atomically), so a stop leaves either a complete result or none. The console, when set, stops first.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import os
import signal
import stat
import sys
import time
from collections.abc import Callable
from datetime import datetime
from pathlib import Path
from typing import Any

import grpc
from grpc_health.v1 import health, health_pb2, health_pb2_grpc

from jointstat.audit.log import SessionLog
from jointstat.audit.records import AuditError
from jointstat.node.admin import NodeAdmin, admin_handler
from jointstat.node.clock import Clock, SystemClock
from jointstat.node.config import ConfigError, JobConfig, NodeConfig, UnixSocket
from jointstat.node.jobs import JobRunner, NodeState, new_session_id, session_limits
from jointstat.node.keys import NodeKeys, load_node_keys
from jointstat.node.metrics import NodeMetrics
from jointstat.node.secrets import SecretFileError
from jointstat.node.spending import Budgets
from jointstat.node.store import JobStore, StoreError
from jointstat.protocol.sides import Session, new_session
from jointstat.transport.proposals import proposal_service
from jointstat.transport.server import SessionServer
from jointstat.units import plural

log = logging.getLogger("jointstat.node")

FIRST_START_FILE = "first-start"
STOP_TIMEOUT_S = 30.0
SHUTDOWN_MARGIN_S = 1.0  # common practice: slack beyond a session's own grace periods when the node stops
KEEP_ENDED_SESSIONS = 200


def job_summary(job: JobConfig) -> str:
    """``garbler with riverside-baths, initiates``: the job's manifest role, peer and who opens its sessions."""
    opens = "initiates" if job.initiate else "accepts the peer's proposals"
    return f"{job.party.role_name} with {job.peer}, {opens}"


class Node:
    """One running node; see the module docstring. Not started until ``await start()``."""

    def __init__(
        self,
        config: NodeConfig,
        *,
        clock: Clock | None = None,
        session_factory: Callable[..., Session] | None = None,
    ) -> None:
        """``session_factory`` makes each session (default ``protocol.session.new_session``; a test harness passes
        one whose sessions record their secrets, to search the logs for them)."""
        self.config = config
        self.clock: Clock = clock or SystemClock()
        self._session_factory = session_factory or new_session
        self.metrics = NodeMetrics()
        self.admin = NodeAdmin(self)  # the admin API's answers (``node.admin``), also read by the console
        self.state: NodeState | None = None
        self.runner: JobRunner | None = None
        self.health = health.aio.HealthServicer()
        self.peer_port: int | None = None
        self.health_port: int | None = None
        self.metrics_port: int | None = None
        self.console_port: int | None = None
        self.started_at: datetime | None = None
        self._server: SessionServer | None = None
        self._health_server: grpc.aio.Server | None = None
        self._admin_server: grpc.aio.Server | None = None
        self._console: Any = None  # console.Console when node.console is set
        self._scheduler: asyncio.Task[None] | None = None
        self._warm: asyncio.Task[None] | None = None
        self._jobs: set[asyncio.Task[Any]] = set()
        self._stop_requested = asyncio.Event()
        self._stopped = False
        self._first_start: datetime | None = None

    # -- start ---------------------------------------------------------------------------------------------------

    async def start(self) -> None:
        config, node = self.config, self.config.node
        problems = config.file_problems() + config.secret_problems()
        if problems:
            raise ConfigError(config.source, problems)
        keys = await asyncio.to_thread(load_node_keys, config)
        from jointstat.node.secrets import ensure_private_dir

        ensure_private_dir(node.data_dir)
        ensure_private_dir(node.session_log.parent)
        self.started_at = self.clock.now()
        self._first_start = self._read_first_start(node.data_dir, self.started_at)
        store = JobStore(node.job_store)
        try:
            session_log = SessionLog(node.session_log, keys.signing_key, node.name, clock=self.clock.now)
        except BaseException:
            store.close()
            raise
        self.state = NodeState(
            config=config,
            keys=keys,
            store=store,
            session_log=session_log,
            clock=self.clock,
            metrics=self.metrics,
            limits=session_limits(node),
            new_session=self._session_factory,
            budgets=await asyncio.to_thread(Budgets, config.jobs, store),
        )
        try:
            await self._recover()
            self.runner = JobRunner(self.state)
            problems = await self._budget_problems()
            if problems:
                raise ConfigError(config.source, problems)
            await self._serve(keys)
        except BaseException:
            await self._close_everything()
            raise
        self._scheduler = asyncio.create_task(self._schedule(), name="jointstat-scheduler")
        self._warm = asyncio.create_task(self._compile_manifests(), name="jointstat-compile")
        log.info("node %s: started", node.name)
        for job in config.jobs:
            log.info("job %s: %s", job.name, job_summary(job))

    async def _budget_problems(self) -> list[Any]:
        """Every job whose privacy budget is smaller than one run's ε (its manifest compiled now, and cached)."""
        from jointstat.node.spending import run_epsilon_problem

        assert self.runner is not None
        problems = []
        for i, job in enumerate(self.config.jobs):
            if job.privacy_budget is None:
                continue
            try:
                compiled = await asyncio.to_thread(self.runner.preparer.compiled, job)
            except Exception:
                continue  # reported when a run needs it, and by node check
            problem = run_epsilon_problem(job, i, compiled.epsilon())
            if problem is not None:
                problems.append(problem)
        return problems

    async def _compile_manifests(self) -> None:
        """Compile every job's manifest once in the background, so the first proposal is answered quickly."""
        assert self.runner is not None
        for job in self.config.jobs:
            try:
                await asyncio.to_thread(self.runner.preparer.compiled, job)
            except Exception as exc:
                log.warning("job %s: its manifest cannot be compiled: %s", job.name, str(exc).splitlines()[0])

    @staticmethod
    def _read_first_start(data_dir: Path, now: datetime) -> datetime:
        from jointstat.node.secrets import write_private_file

        path = data_dir / FIRST_START_FILE
        try:
            return datetime.fromisoformat(path.read_text(encoding="ascii").strip())
        except FileNotFoundError:
            write_private_file(path, (now.isoformat() + "\n").encode("ascii"))
            return now
        except (OSError, ValueError, UnicodeDecodeError):
            raise ConfigError(
                str(path), _problem("not the node's first start time (ISO 8601); remove the file to reset it")
            ) from None

    async def _recover(self) -> None:
        assert self.state is not None
        now = self.clock.now()
        closed = await asyncio.to_thread(self.state.store.close_interrupted, now)
        if closed:
            log.warning(
                "job store: %s left running by the previous process marked aborted", plural(closed, "run")
            )
        assert self.state.budgets is not None
        for held in await asyncio.to_thread(self.state.budgets.recover, now):
            log.warning(
                "privacy budget of job %s: the reservation of run %s was left open by the previous process;"
                " counted as spent (whether its result was released is not known)",
                held.job,
                held.run_id,
            )
        session_log = self.state.session_log
        for sid in await asyncio.to_thread(session_log.open_sessions):
            epsilon = await asyncio.to_thread(session_log.held_budget, sid)
            if epsilon is not None:
                await asyncio.to_thread(session_log.privacy_budget, sid, epsilon=epsilon, action="spent")
            await asyncio.to_thread(
                self.state.session_log.session_aborted,
                sid,
                reason="node_restarted",
                by="self",
                phase=None,
                detail="the node stopped before this session ended",
            )
            log.warning("session log: session %s left open by the previous process logged aborted", sid)
        for job in self.config.jobs:
            last = await asyncio.to_thread(self.state.store.last_success, job.name)
            if last is not None and last.finished_at is not None:
                self.metrics.last_success.labels(job.name).set(last.finished_at.timestamp())

    async def _serve(self, keys: NodeKeys) -> None:
        assert self.state is not None and self.runner is not None
        node = self.config.node
        proposals = proposal_service(
            keys.server_tls.pinned_fingerprints, keys.peer_by_fingerprint, self.runner.on_proposal
        )

        def add_health(server: grpc.aio.Server) -> None:
            health_pb2_grpc.add_HealthServicer_to_server(self.health, server)

        self._server = SessionServer(
            keys.server_tls,
            address=str(node.listen),
            limits=self.state.limits,
            session_ids=self.state.session_ids,
            services=[proposals, add_health],
            shutdown=self.state.shutdown,
        )
        self.state.server = self._server
        self.peer_port = await self._server.start()
        if node.health is not None:
            server = grpc.aio.server()
            health_pb2_grpc.add_HealthServicer_to_server(self.health, server)
            port = server.add_insecure_port(str(node.health))
            if port == 0:
                raise OSError(f"node.health: cannot listen on {node.health}")
            await server.start()
            self._health_server, self.health_port = server, port
        self.metrics_port = await asyncio.to_thread(self.metrics.serve, node.metrics.host, node.metrics.port)
        admin = grpc.aio.server()
        admin.add_generic_rpc_handlers([admin_handler(self.admin)])
        if isinstance(node.admin, UnixSocket):
            _clear_stale_socket(node.admin.path)
        if admin.add_insecure_port(str(node.admin)) == 0:
            raise OSError(f"node.admin: cannot listen on {node.admin}")
        await admin.start()
        if isinstance(node.admin, UnixSocket):
            os.chmod(node.admin.path, 0o600)
        self._admin_server = admin
        if node.console is not None:
            await self._start_console()
        await self.health.set("", health_pb2.HealthCheckResponse.SERVING)

    async def _start_console(self) -> None:
        """The operator console in the browser (``node.console``), seeing the node only through ``DaemonView``."""
        from jointstat.node.console import Console
        from jointstat.node.nodeview import DaemonView

        node = self.config.node
        assert node.console is not None
        console = Console(
            DaemonView(self),
            host=node.console.host,
            port=node.console.port,
            behind_proxy=node.console_behind_proxy,
            token_file=node.console_token_path(),
            make_token=node.console_token_file is None,
        )
        self.console_port = await console.start()
        self._console = console

    # -- scheduling ----------------------------------------------------------------------------------------------

    def start_run(self, job: JobConfig, scheduled_for: datetime, trigger: str) -> bytes:
        """Start the attempts at one run of an initiated job in a task of its own; the first attempt's session id."""
        assert self.runner is not None
        sid = new_session_id()
        task = asyncio.create_task(
            self.runner.run_job(job, scheduled_for, trigger, sid), name=f"job-{job.name}"
        )
        self._jobs.add(task)
        task.add_done_callback(self._job_done)
        self._prune_sessions()
        return sid

    def _job_done(self, task: asyncio.Task[Any]) -> None:
        self._jobs.discard(task)
        if not task.cancelled() and task.exception() is not None:
            exc = task.exception()
            log.error("a job run failed unexpectedly: %s: %s", type(exc).__name__, exc)

    def _prune_sessions(self) -> None:
        assert self.state is not None
        sessions = self.state.sessions
        ended = [sid for sid, t in sessions.items() if t.ended]
        for sid in ended[: max(0, len(ended) - KEEP_ENDED_SESSIONS)]:
            del sessions[sid]

    async def _schedule(self) -> None:
        assert self.state is not None and self.runner is not None and self._first_start is not None
        planner = self.runner.planner
        initiated = {j.name: j for j in self.config.jobs if j.initiate}
        now = self.clock.now()
        done = await asyncio.to_thread(self.state.store.scheduled_done)
        for run in planner.missed(now, done):
            if run.scheduled_for >= self._first_start:
                log.info(
                    "job %s: run of %s missed while the node was down; running it now",
                    run.job,
                    run.scheduled_for,
                )
                self.start_run(initiated[run.job], run.scheduled_for, "schedule")
        while not self.state.stopping:
            for run in planner.due(self.clock.now()):
                log.info("job %s: scheduled run of %s is due", run.job, run.scheduled_for.isoformat())
                self.start_run(initiated[run.job], run.scheduled_for, "schedule")
            if not initiated:
                await self._stop_requested.wait()
                return
            now = self.clock.now()
            wake = min(job.timing().next_fire(now) for job in initiated.values())
            sleeper = asyncio.ensure_future(self.clock.sleep_until(wake))
            stopper = asyncio.ensure_future(self._stop_requested.wait())
            try:
                await asyncio.wait({sleeper, stopper}, return_when=asyncio.FIRST_COMPLETED)
            finally:
                sleeper.cancel()
                stopper.cancel()

    # -- stop ----------------------------------------------------------------------------------------------------

    def request_stop(self) -> None:
        """Ask the node to stop (what SIGTERM and SIGINT do); ``wait_for_stop`` returns."""
        self._stop_requested.set()

    async def wait_for_stop(self) -> None:
        await self._stop_requested.wait()

    async def stop(self) -> None:
        """Stop serving, abort and log running sessions, close the log and the store (see the module docstring)."""
        if self._stopped:
            return
        self._stopped = True
        self._stop_requested.set()
        state = self.state
        running = state.running_sessions() if state is not None else 0
        if state is not None:
            state.stopping = True
        with contextlib.suppress(Exception):
            await self.health.enter_graceful_shutdown()
        await self._stop_console()
        for background in (self._scheduler, self._warm):
            if background is not None:
                background.cancel()
                with contextlib.suppress(asyncio.CancelledError, Exception):
                    await background
        if state is not None:
            # Each running session tells its peer why it ends (peer_shutdown) before its stream closes.
            state.shutdown.request()
            # A session gets the abort grace to send its abort and as long again for the peer to end the call.
            await state.shutdown.drained(timeout=2 * state.limits.abort_grace_s + SHUTDOWN_MARGIN_S)
        for task in list(self._jobs):
            task.cancel()
        if self._server is not None:
            # A graceful stop: calls that have ended keep their last frames (the abort saying why) until the peer
            # has read them; an immediate stop would cancel them on the peer's side with an internal error.
            grace = state.limits.abort_grace_s if state is not None else None
            await self._server.stop(grace)
        pending = set(self._jobs) | (set(self.runner.served) if self.runner is not None else set())
        if pending:
            _, left = await asyncio.wait(pending, timeout=STOP_TIMEOUT_S)
            for task in left:
                log.error("a session did not finish its records within %g s of the stop", STOP_TIMEOUT_S)
                task.cancel()
        await self._close_everything()
        log.info(
            "node %s: stopped (%s)",
            self.config.node.name,
            "1 session was running and has been aborted"
            if running == 1
            else f"{running} sessions were running and have been aborted",
        )

    async def _stop_console(self) -> None:
        console, self._console = self._console, None
        if console is not None:
            with contextlib.suppress(Exception):
                await console.stop()

    async def _close_everything(self) -> None:
        await self._stop_console()
        if self._server is not None:
            with contextlib.suppress(Exception):
                await self._server.stop(None)
        for server in (self._health_server, self._admin_server):
            if server is not None:
                with contextlib.suppress(Exception):
                    await server.stop(None)
        self._health_server = self._admin_server = None
        await asyncio.to_thread(self.metrics.stop)
        if self.state is not None:
            self.state.session_log.close()
            self.state.store.close()
        admin = self.config.node.admin
        if isinstance(admin, UnixSocket):
            with contextlib.suppress(OSError):
                if stat.S_ISSOCK(admin.path.lstat().st_mode):
                    admin.path.unlink()


def _clear_stale_socket(path: Path) -> None:
    """Remove a socket file left by a previous process (this process holds the session log's lock)."""
    try:
        info = path.lstat()
    except FileNotFoundError:
        return
    if not stat.S_ISSOCK(info.st_mode):
        raise OSError(f"node.admin: {path} exists and is not a socket")
    path.unlink()


def _url_host(host: str) -> str:
    return f"[{host}]" if ":" in host else host


def _problem(message: str) -> list[Any]:
    from jointstat.problems import Problem

    return [Problem("", message)]


async def _run(config: NodeConfig) -> int:
    node = Node(config)
    loop = asyncio.get_running_loop()
    try:
        await node.start()
    except ConfigError as exc:
        print(exc, file=sys.stderr)
        return 1
    except (OSError, AuditError, StoreError, SecretFileError, RuntimeError) as exc:
        print(f"node {config.node.name}: cannot start: {exc}", file=sys.stderr)
        return 1
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, node.request_stop)
    n = config.node
    extra = f", health {n.health.host}:{node.health_port}" if n.health is not None else ""
    if n.console is not None:
        extra += f", console http://{_url_host(n.console.host)}:{node.console_port}/"
    jobs = "; ".join(f"{job.name} ({job_summary(job)})" for job in config.jobs)
    print(
        f"node {n.name}: serving peers on {n.listen.host}:{node.peer_port}, admin {n.admin}, "
        f"metrics {n.metrics.host}:{node.metrics_port}{extra}; {len(config.jobs)} {'job' if len(config.jobs) == 1 else 'jobs'}"
        + (f": {jobs}" if jobs else ""),
        flush=True,
    )
    try:
        await node.wait_for_stop()
        log.info("node %s: stop requested", n.name)
    finally:
        await node.stop()
    return 0


def utc_formatter() -> logging.Formatter:
    """The node's log lines: the time in UTC, marked so (``2026-03-04 10:00:00,123 UTC``), level, logger, message."""
    formatter = logging.Formatter("%(asctime)s UTC %(levelname)s %(name)s: %(message)s")
    formatter.converter = time.gmtime
    return formatter


def run_node(config: NodeConfig, *, grpc_logs: bool = False) -> int:
    """Run the node until SIGTERM or SIGINT; returns the process exit code.

    Without ``grpc_logs`` the records of gRPC's Python loggers (``grpc.*``) stay out of the node's log; its C
    core's lines are kept out by ``node run`` (``GRPC_VERBOSITY``, which gRPC reads when it is first imported).
    """
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(utc_formatter())
    logging.basicConfig(level=logging.INFO, handlers=[handler])
    if not grpc_logs:
        logging.getLogger("grpc").setLevel(logging.CRITICAL + 1)
    return asyncio.run(_run(config))
