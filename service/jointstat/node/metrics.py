"""The node's Prometheus metrics and the HTTP endpoint that serves them (``node.metrics``).

Theory of operation: each node owns one ``CollectorRegistry`` (two nodes in one test process do not share
counters) holding the series below, and serves it in the Prometheus text format with ``prometheus_client``'s
HTTP server on the configured address (a thread; port 0 picks a free port). Labels are job names, roles and
abort reasons — never an input value, a key or a result.

- ``jointstat_sessions_started_total{job,role}``, ``jointstat_sessions_completed_total{job,role}``,
  ``jointstat_sessions_aborted_total{job,role,reason}`` (a refused run counts as aborted with the refusal's code);
- ``jointstat_session_bytes_sent_total{job}``, ``jointstat_session_bytes_received_total{job}`` (frames and gRPC
  message prefixes, as ``transport.driver`` counts them);
- ``jointstat_and_gates_per_second{job}``: AND gates per second of the job's latest session;
- ``jointstat_last_success_timestamp_seconds{job}``: when the job last completed (Unix time; from the job store
  at start-up);
- ``jointstat_sessions_running``: sessions running now;
- ``jointstat_link_cuts_total{job,role}``, ``jointstat_link_resumes_total{job,role}``,
  ``jointstat_link_resumes_refused_total{job,role}``: cuts of a session's connection, resumes on a new one, and
  resume attempts refused (``transport.driver``'s link events, counted as a session ends);
- ``jointstat_session_restarts_total{job}``: initiated sessions started afresh at once after a cut before their
  OT had ended.
"""

from __future__ import annotations

import threading
from datetime import datetime

from prometheus_client import CollectorRegistry, Counter, Gauge, start_http_server


class NodeMetrics:
    """The metric series of one node."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.started = Counter("jointstat_sessions_started", "Sessions started", ["job", "role"], registry=r)
        self.completed = Counter(
            "jointstat_sessions_completed", "Sessions completed", ["job", "role"], registry=r
        )
        self.aborted = Counter(
            "jointstat_sessions_aborted",
            "Sessions aborted or refused, by reason",
            ["job", "role", "reason"],
            registry=r,
        )
        self.bytes_sent = Counter(
            "jointstat_session_bytes_sent", "Bytes sent in sessions", ["job"], registry=r
        )
        self.bytes_received = Counter(
            "jointstat_session_bytes_received", "Bytes received in sessions", ["job"], registry=r
        )
        self.gates_per_second = Gauge(
            "jointstat_and_gates_per_second",
            "AND gates per second of the job's latest session",
            ["job"],
            registry=r,
        )
        self.last_success = Gauge(
            "jointstat_last_success_timestamp_seconds",
            "When the job last completed (Unix time)",
            ["job"],
            registry=r,
        )
        self.running = Gauge("jointstat_sessions_running", "Sessions running now", registry=r)
        self.cuts = Counter(
            "jointstat_link_cuts", "Cuts of a session's connection", ["job", "role"], registry=r
        )
        self.resumes = Counter(
            "jointstat_link_resumes", "Sessions resumed on a new connection", ["job", "role"], registry=r
        )
        self.resumes_refused = Counter(
            "jointstat_link_resumes_refused", "Resume attempts refused", ["job", "role"], registry=r
        )
        self.restarts = Counter(
            "jointstat_session_restarts",
            "Initiated sessions started afresh after a cut before their OT had ended",
            ["job"],
            registry=r,
        )
        self._server: object | None = None
        self._thread: threading.Thread | None = None

    def session_ended(
        self,
        *,
        job: str,
        role: str,
        outcome: str,
        reason: str | None,
        bytes_sent: int,
        bytes_received: int,
        rate: float | None,
        finished_at: datetime,
    ) -> None:
        if outcome == "completed":
            self.completed.labels(job, role).inc()
            self.last_success.labels(job).set(finished_at.timestamp())
        else:
            self.aborted.labels(job, role, reason or "unknown").inc()
        if bytes_sent:
            self.bytes_sent.labels(job).inc(bytes_sent)
        if bytes_received:
            self.bytes_received.labels(job).inc(bytes_received)
        if rate is not None:
            self.gates_per_second.labels(job).set(rate)

    def link_events(self, *, job: str, role: str, cuts: int, resumes: int, refused: int) -> None:
        if cuts:
            self.cuts.labels(job, role).inc(cuts)
        if resumes:
            self.resumes.labels(job, role).inc(resumes)
        if refused:
            self.resumes_refused.labels(job, role).inc(refused)

    def serve(self, host: str, port: int) -> int:
        """Start the HTTP endpoint; returns the bound port."""
        server, thread = start_http_server(port, addr=host, registry=self.registry)
        self._server, self._thread = server, thread
        return int(server.server_port)

    def stop(self) -> None:
        server = self._server
        if server is not None:
            server.shutdown()  # type: ignore[attr-defined]
            server.server_close()  # type: ignore[attr-defined]
            self._server = None
        if self._thread is not None:
            self._thread.join(timeout=5)
            self._thread = None
