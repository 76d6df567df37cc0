"""The node configuration: one YAML file saying who the node is, where it listens, its keys, peers and jobs.

Theory of operation
-------------------
``load_node_config(path)`` reads the file with a YAML loader that refuses a key given twice (a silently dropped
key could hide a typo), validates it with the pydantic models below (strict: no unknown keys, no type coercion)
and returns a frozen ``NodeConfig``. Every problem found is collected and raised together as one ``ConfigError``
whose lines read ``<file>: <field path>: <what is wrong>``, e.g. ``jobs[1].schedule.cron: not a five-field cron
expression``; a YAML syntax error names its line and column.

Sections and defaults (all paths relative to the config file's directory unless absolute):

* ``node`` — ``name`` (DNS style), ``listen`` (host:port for peers, mutual TLS), ``admin`` (loopback host:port or
  ``unix:PATH``; default ``unix:<data_dir>/admin.sock``), ``metrics`` (host:port, default 127.0.0.1:7303),
  ``health`` (optional plaintext host:port serving only the standard gRPC health service, for orchestrator probes),
  ``data_dir``, ``job_store`` (default ``<data_dir>/jobs.sqlite3``), ``session_log`` (default
  ``<data_dir>/sessions.jsonl``), ``results_dir`` (default ``<data_dir>/results``), ``max_sessions`` (default 4),
  ``session_deadline_seconds`` (default 3600), ``session_memory_mib`` (default 8192: a job whose program would
  need more memory per party, as ``jointstat plan`` estimates it, is refused before its input is read),
  ``console`` (host:port of the operator console in the browser; off when absent; loopback only unless
  ``console_behind_proxy`` is true), ``console_token_file`` (the console's login token, secret; default
  ``<data_dir>/console.token``, made at the console's first start), ``resume`` (how a session outlives a cut of
  its connection, ``transport.driver``: ``grace_seconds`` both nodes keep a session whose OT has ended, default 60,
  0 turns resuming off; ``replay_buffer_mib`` the garbler's buffer of frames not yet acknowledged, which also caps
  the flow window, default 64; ``reconnect_first_seconds`` 0.25 doubling up to ``reconnect_max_seconds`` 10, the
  initiator's waits between reconnection attempts; ``restarts`` 3, how many times an initiated run whose connection
  was cut before its OT ended starts again at once with a fresh session).
* ``tls`` — ``certificate`` (this node's, PEM) and ``private_key`` (secret). There is no CA setting: the transport
  trusts only the pinned peer certificates (``jointstat.transport.tls``), never an issuer.
* ``signing_key`` (secret), ``key_hashing_secret`` (secret, optional; needed by manifests with identifier keys).
* ``peers`` — ``name``, ``address`` (host:port), ``certificate`` (the pinned peer certificate, PEM; it is the
  trust anchor, so it is required, and must hold that one certificate only — no chain, no CA), ``certificate_sha256``
  (optional: hex SHA-256 of the certificate's DER, checked against the file, for reading aloud when the file is
  exchanged), ``signing_public_key`` (PEM or base64).
* ``jobs`` — ``name``, ``manifest``, ``peer`` (a configured peer), ``input`` (exactly one of ``csv: {path}`` or
  ``sql: {url, query, password_file}``), ``schedule`` (``cron``, ``timezone`` default UTC, ``window_minutes``
  default 120), ``role`` (``garbler`` or ``evaluator``: which of the manifest's two parties this node is for
  this job — the table its input is read against and the outputs it receives), ``initiate`` (this node opens
  the session; independent of the role), ``retries`` (``attempts`` 3, ``backoff_seconds`` 60,
  ``backoff_factor`` 2), ``results`` (directory, default ``<results_dir>/<job name>``), ``privacy_budget``
  (optional: ``epsilon``, the most ε the job's results may release in any rolling ``period_days``, default 30;
  an exact decimal, ``"3"`` or ``"0.5"``; ``node.spending`` keeps it).

Defaults that depend on other fields are filled in before validation from the raw text, so a derived path is
resolved and checked like one written out. Cross-field rules (peer names unique and not the node's own, job names
unique, a job's peer configured, the node's listening addresses distinct, job result directories distinct) run
once every field is valid. ``JobConfig.timing()`` gives the job's ``jointstat.node.schedule.JobTiming``.

File checks are separate from parsing, so a config can be validated where its keys are absent (a build machine):
``secret_problems()`` and ``file_problems()`` are ``jointstat.node.keys``' checks of the secret files (owner-only,
regular, parse) and of the public ones (certificates parse and are current, pinned fingerprints match, public keys
load, manifests exist), where the node's keys are also read. Messages name the field and the file, never a
secret's content; a database URL carrying a password is refused (the password belongs in ``password_file``) and
never echoed.
"""

from __future__ import annotations

import ipaddress
import os
import posixpath
import re
from dataclasses import dataclass
from datetime import datetime, timedelta
from fractions import Fraction
from pathlib import Path
from typing import Annotated, Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import (
    AfterValidator,
    BeforeValidator,
    Field,
    PrivateAttr,
    ValidationError,
    ValidationInfo,
    model_validator,
)
from pydantic_core import PydanticCustomError

from jointstat.audit.records import node_name_ok
from jointstat.circuit.model import Party
from jointstat.circuit.parameters import ExactDecimal
from jointstat.fields import StrictModel, between
from jointstat.node.schedule import JobTiming, ScheduleError
from jointstat.problems import Problem, ProblemError, field_path, pydantic_message, read_yaml

UNIX_PREFIX = "unix:"
MAX_UNIX_PATH_BYTES = 107  # sun_path is 108 bytes on Linux, one of them the terminating NUL
DEFAULT_METRICS = "127.0.0.1:7303"
CONSOLE_TOKEN_FILE = "console.token"
JOB_NAME = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}")
_HOST_LABEL = re.compile(r"(?!-)[A-Za-z0-9-]{1,63}(?<!-)")


# -- errors ------------------------------------------------------------------------------------------------------------


class ConfigError(ProblemError):
    """A node config that cannot be used; ``problems`` lists every field path found wrong."""


# -- addresses ---------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class HostPort:
    """A TCP address; ``str()`` gives the form gRPC takes (IPv6 in brackets)."""

    host: str
    port: int

    def __str__(self) -> str:
        return f"[{self.host}]:{self.port}" if ":" in self.host else f"{self.host}:{self.port}"

    @property
    def is_loopback(self) -> bool:
        if self.host == "localhost":
            return True
        try:
            return ipaddress.ip_address(self.host).is_loopback
        except ValueError:
            return False

    @property
    def is_wildcard(self) -> bool:
        return self.host in ("0.0.0.0", "::")


@dataclass(frozen=True)
class UnixSocket:
    """A Unix-domain socket; ``str()`` gives ``unix:PATH``, the form gRPC takes."""

    path: Path

    def __str__(self) -> str:
        return f"{UNIX_PREFIX}{self.path}"


def _check_host(host: str) -> str:
    if host.startswith("["):
        if not host.endswith("]"):
            raise ValueError("an IPv6 address must be written in brackets, e.g. [::1]:7300")
        inner = host[1:-1]
        try:
            return str(ipaddress.IPv6Address(inner))
        except ValueError:
            raise ValueError(f"{inner[:60]!r} in brackets is not an IPv6 address") from None
    if ":" in host:
        raise ValueError("an IPv6 address must be written in brackets, e.g. [::1]:7300")
    try:
        return str(ipaddress.IPv4Address(host))
    except ValueError:
        pass
    labels = host.rstrip(".").split(".")
    if len(host) > 253 or not all(_HOST_LABEL.fullmatch(label) for label in labels):
        raise ValueError(f"{host[:60]!r} is not a host name or IP address")
    if labels[-1].isdigit():
        raise ValueError(f"{host[:60]!r} is not a host name or IP address")
    return host.lower()


def parse_host_port(text: object, *, allow_port_zero: bool = False) -> HostPort:
    """``host:port`` (host a DNS name, IPv4 address or bracketed IPv6 address) → ``HostPort``."""
    if isinstance(text, HostPort):
        return text
    if not isinstance(text, str):
        raise ValueError(f"must be host:port text, not {type(text).__name__}")
    host, sep, port = text.strip().rpartition(":")
    if not sep or not host:
        raise ValueError("must be host:port")
    if not port.isascii() or not port.isdigit():
        raise ValueError(f"must be host:port; the port {port[:10]!r} is not a number")
    lowest = 0 if allow_port_zero else 1
    if not lowest <= int(port) <= 65535:
        raise ValueError(f"the port must be between {lowest} and 65535")
    return HostPort(_check_host(host).strip("[]"), int(port))


def _base(info: ValidationInfo) -> Path | None:
    context = info.context
    if isinstance(context, dict) and isinstance(context.get("base"), Path):
        return context["base"]
    return None


def _path_problem(text: object) -> str | None:
    if not isinstance(text, str):
        return f"must be a path (text), not {type(text).__name__}"
    if not text.strip():
        return "must not be empty"
    if "\x00" in text:
        return "must not contain a NUL character"
    if text.startswith("~"):
        return "'~' is not expanded; write the path out in full or relative to this file"
    return None


def resolve_path(text: str, base: Path | None) -> Path:
    """``text`` as a path, relative to ``base`` unless absolute, with ``.`` and ``..`` folded (links kept)."""
    p = Path(text)
    if base is not None and not p.is_absolute():
        p = base / p
    return Path(os.path.normpath(p))


def _to_path(value: object, info: ValidationInfo) -> Path:
    if isinstance(value, Path):
        return value
    problem = _path_problem(value)
    if problem is not None:
        raise ValueError(problem)
    assert isinstance(value, str)
    return resolve_path(value, _base(info))


def _to_bind(value: object) -> HostPort:
    return parse_host_port(value, allow_port_zero=True)


def _to_peer_address(value: object) -> HostPort:
    return parse_host_port(value)


def _to_admin(value: object, info: ValidationInfo) -> HostPort | UnixSocket:
    if isinstance(value, HostPort | UnixSocket):
        return value
    if isinstance(value, str) and value.startswith(UNIX_PREFIX):
        raw = value[len(UNIX_PREFIX) :]
        if raw.startswith("//"):  # gRPC also spells an absolute path unix:///path
            raw = "/" + raw.lstrip("/")
        problem = _path_problem(raw)
        if problem is not None:
            raise ValueError(f"unix socket path {problem}")
        path = resolve_path(raw, _base(info))
        if len(os.fsencode(path)) > MAX_UNIX_PATH_BYTES:
            raise ValueError(
                f"the socket path {path} is longer than {MAX_UNIX_PATH_BYTES} bytes; choose a shorter one"
            )
        return UnixSocket(path)
    try:
        address = parse_host_port(value)
    except ValueError as exc:
        raise ValueError(f"{exc} (loopback) or unix:PATH") from None
    if not address.is_loopback:
        raise ValueError(
            f"{address} is not a loopback address; the admin API listens only on 127.0.0.1, [::1], "
            "localhost or a unix:PATH socket"
        )
    return address


def _node_name(value: str) -> str:
    if not node_name_ok(value):
        raise ValueError("use lower-case letters, digits, '-' and '.' (DNS style, at most 63 characters)")
    return value


def _job_name(value: str) -> str:
    if not JOB_NAME.fullmatch(value):
        raise ValueError(
            "use lower-case letters, digits, '.', '_' or '-' (at most 64, not starting with . _ -)"
        )
    return value


def _cron(value: str) -> str:
    from croniter import croniter

    if len(value.split()) != 5 or not croniter.is_valid(value):
        raise ValueError("not a five-field cron expression (minute hour day-of-month month day-of-week)")
    return " ".join(value.split())


def _timezone(value: str) -> str:
    try:
        ZoneInfo(value)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(f"{value[:60]!r} is not a known IANA time zone (e.g. Europe/Paris, UTC)") from None
    return value


def _sha256_hex(value: str) -> str:
    digits = value.replace(":", "").strip().lower()
    if not re.fullmatch(r"[0-9a-f]{64}", digits):
        raise ValueError("must be 64 hexadecimal digits (SHA-256), colons between byte pairs allowed")
    return digits


def _non_empty(value: str) -> str:
    if not value.strip():
        raise ValueError("must not be empty")
    return value


def _database_url(value: str, info: ValidationInfo) -> str:
    """A SQLAlchemy URL without a password; a relative SQLite file resolves like the config's other paths."""
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError

    try:
        url = make_url(value)
    except (ArgumentError, ValueError):
        raise ValueError("not a database URL (dialect://user@host/database)") from None
    if url.password is not None:
        raise ValueError("holds a password; put the password in a file named by password_file (owner-only)")
    database, base = url.database, _base(info)
    if (
        url.drivername.startswith("sqlite")
        and database  # a file, not an in-memory database nor a file: URI
        and database != ":memory:"
        and not database.startswith("file:")
        and base is not None
        and not Path(database).is_absolute()
    ):
        url = url.set(database=str(resolve_path(database, base)))
    return url.render_as_string(hide_password=False)


ConfigPath = Annotated[Path, BeforeValidator(_to_path)]
BindAddress = Annotated[HostPort, BeforeValidator(_to_bind)]
PeerAddress = Annotated[HostPort, BeforeValidator(_to_peer_address)]
AdminAddress = Annotated[HostPort | UnixSocket, BeforeValidator(_to_admin)]
NodeName = Annotated[str, AfterValidator(_node_name)]
JobName = Annotated[str, AfterValidator(_job_name)]
Text = Annotated[str, AfterValidator(_non_empty)]


# -- models ----------------------------------------------------------------------------------------------------------


def _derived(data: dict[str, Any], key: str) -> str:
    """A raw path field usable as the base of a derived default, else ``.`` (its own error is reported)."""
    value = data.get(key)
    return value if isinstance(value, str) and _path_problem(value) is None else "."


class ResumeConfig(StrictModel):
    """How a session outlives a cut of its connection (``transport.driver``; module docstring)."""

    grace_seconds: Annotated[float, between(0, 86400)] = 60.0
    replay_buffer_mib: Annotated[int, between(4, 1 << 16)] = 64
    reconnect_first_seconds: Annotated[float, between(0.01, 3600)] = 0.25
    reconnect_max_seconds: Annotated[float, between(0.01, 3600)] = 10.0
    restarts: Annotated[int, between(0, 100)] = 3

    @property
    def replay_buffer_bytes(self) -> int:
        return self.replay_buffer_mib * 2**20

    def problems(self) -> list[Problem]:
        if self.reconnect_max_seconds < self.reconnect_first_seconds:
            return [
                Problem(
                    "node.resume.reconnect_max_seconds",
                    f"must be at least reconnect_first_seconds ({self.reconnect_first_seconds:g})",
                )
            ]
        return []


class NodeSection(StrictModel):
    """Who this node is and where it listens and keeps its files."""

    name: NodeName
    listen: BindAddress
    admin: AdminAddress
    metrics: BindAddress = parse_host_port(DEFAULT_METRICS)
    health: BindAddress | None = None
    data_dir: ConfigPath
    job_store: ConfigPath
    session_log: ConfigPath
    results_dir: ConfigPath
    max_sessions: Annotated[int, between(1, 64)] = 4
    session_deadline_seconds: Annotated[int, between(1, 86400)] = 3600
    session_memory_mib: Annotated[int, between(64, 1 << 22)] = 8192
    console: BindAddress | None = None
    console_behind_proxy: bool = False
    console_token_file: ConfigPath | None = None
    resume: ResumeConfig = ResumeConfig()

    @property
    def session_memory_bytes(self) -> int:
        """The most memory one session's program may need (``jointstat plan`` reports a job's need)."""
        return self.session_memory_mib * 2**20

    @model_validator(mode="before")
    @classmethod
    def _fill_defaults(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        data = dict(data)
        base = _derived(data, "data_dir")
        data.setdefault("job_store", posixpath.join(base, "jobs.sqlite3"))
        data.setdefault("session_log", posixpath.join(base, "sessions.jsonl"))
        data.setdefault("results_dir", posixpath.join(base, "results"))
        data.setdefault("admin", UNIX_PREFIX + posixpath.join(base, "admin.sock"))
        return data

    def addresses(self) -> dict[str, HostPort | UnixSocket]:
        """The node's own listening addresses by field name."""
        out: dict[str, HostPort | UnixSocket] = {"listen": self.listen, "admin": self.admin}
        out["metrics"] = self.metrics
        if self.health is not None:
            out["health"] = self.health
        if self.console is not None:
            out["console"] = self.console
        return out

    def console_token_path(self) -> Path:
        """The console's login token file: ``console_token_file``, else ``<data_dir>/console.token``."""
        return self.console_token_file or self.data_dir / CONSOLE_TOKEN_FILE

    def console_problems(self) -> list[Problem]:
        """The console is off unless ``console`` is set; it binds to loopback unless ``console_behind_proxy``."""
        problems = []
        if self.console is None:
            if self.console_behind_proxy:
                problems.append(
                    Problem("node.console_behind_proxy", "applies only to the console; set node.console")
                )
            if self.console_token_file is not None:
                problems.append(
                    Problem("node.console_token_file", "applies only to the console; set node.console")
                )
            return problems
        if not self.console.is_loopback and not self.console_behind_proxy:
            problems.append(
                Problem(
                    "node.console",
                    f"{self.console} is not a loopback address; the console speaks plain HTTP, so it listens "
                    "only on 127.0.0.1, [::1] or localhost unless node.console_behind_proxy is true (you serve "
                    "it to others only through your own TLS-terminating proxy)",
                )
            )
        if self.console_behind_proxy and self.console.is_loopback:
            problems.append(
                Problem(
                    "node.console_behind_proxy",
                    "the console address is loopback; set this only when a TLS-terminating proxy serves the "
                    "console (the login cookie is then marked Secure and works over HTTPS only)",
                )
            )
        return problems


class TlsSection(StrictModel):
    """This node's TLS certificate and key for mutual TLS with its peers."""

    certificate: ConfigPath
    private_key: ConfigPath


class PeerConfig(StrictModel):
    """A peer organisation's node: where to reach it and the keys it is known by."""

    name: NodeName
    address: PeerAddress
    certificate: ConfigPath
    certificate_sha256: Annotated[str, AfterValidator(_sha256_hex)] | None = None
    signing_public_key: ConfigPath


class CsvInput(StrictModel):
    path: ConfigPath


class SqlInput(StrictModel):
    """A query against a SQLAlchemy database URL; the password, if any, comes from ``password_file``."""

    url: Annotated[str, AfterValidator(_database_url)]
    query: Text
    password_file: ConfigPath | None = None

    def shown_url(self) -> str:
        """The URL as messages may show it (no password is ever in it)."""
        return self.url

    def connection_url(self) -> str:
        """The URL with the password from ``password_file`` put in; for connecting only, never for messages."""
        if self.password_file is None:
            return self.url
        from sqlalchemy.engine import make_url

        from jointstat.node.secrets import SecretFileError, read_secret_file

        data = read_secret_file(self.password_file, "database password")
        try:
            password = data.decode("utf-8").rstrip("\r\n")
        except UnicodeDecodeError:
            raise SecretFileError(f"database password {self.password_file}: not UTF-8 text") from None
        return make_url(self.url).set(password=password).render_as_string(hide_password=False)


class InputConfig(StrictModel):
    """Where a job's records come from: exactly one of ``csv`` or ``sql``."""

    csv: CsvInput | None = None
    sql: SqlInput | None = None

    @model_validator(mode="after")
    def _exactly_one(self) -> InputConfig:
        if (self.csv is None) == (self.sql is None):
            raise PydanticCustomError("one_input", "give exactly one of csv or sql")
        return self


class ScheduleConfig(StrictModel):
    """When the job runs: a cron expression in a time zone, and how long after each time a run may start."""

    cron: Annotated[str, AfterValidator(_cron)]
    timezone: Annotated[str, AfterValidator(_timezone)] = "UTC"
    window_minutes: Annotated[int, between(1, 7 * 24 * 60)] = 120


class RetryConfig(StrictModel):
    """How often a failed run is tried again inside its window, waiting backoff · factor^(k−1) after attempt k."""

    attempts: Annotated[int, between(1, 100)] = 3
    backoff_seconds: Annotated[float, between(0, 86400)] = 60.0
    backoff_factor: Annotated[float, between(1, 10)] = 2.0


def _positive_decimal(value: str) -> str:
    from fractions import Fraction

    if Fraction(value) <= 0:
        raise ValueError("must be greater than 0")
    return value


class BudgetConfig(StrictModel):
    """A job's privacy budget on this node: at most ``epsilon`` released in any ``period_days`` (rolling)."""

    epsilon: Annotated[ExactDecimal, AfterValidator(_positive_decimal)]
    period_days: Annotated[int, between(1, 3660)] = 30

    @property
    def total(self) -> Fraction:
        return Fraction(self.epsilon)

    @property
    def period(self) -> timedelta:
        return timedelta(days=self.period_days)


class JobConfig(StrictModel):
    """One scheduled joint computation with one peer."""

    name: JobName
    manifest: ConfigPath
    peer: NodeName
    input: InputConfig
    schedule: ScheduleConfig
    role: Annotated[
        Literal["garbler", "evaluator"],
        Field(description="which of the manifest's two parties this node is for this job"),
    ]
    initiate: bool
    retries: RetryConfig = RetryConfig()
    results: ConfigPath
    privacy_budget: BudgetConfig | None = None

    @property
    def party(self) -> Party:
        """The manifest party this node is for the job: its configured ``role``, never who initiates."""
        return Party[self.role.upper()]

    def timing(self) -> JobTiming:
        """The job's timing for ``jointstat.node.schedule.Planner``."""
        return JobTiming(
            job=self.name,
            cron=self.schedule.cron,
            timezone=self.schedule.timezone,
            window=timedelta(minutes=self.schedule.window_minutes),
            attempts=self.retries.attempts,
            backoff=timedelta(seconds=self.retries.backoff_seconds),
            backoff_factor=self.retries.backoff_factor,
        )


class NodeConfig(StrictModel):
    """A whole node configuration file."""

    node: NodeSection
    tls: TlsSection
    signing_key: ConfigPath
    key_hashing_secret: ConfigPath | None = None
    peers: Annotated[list[PeerConfig], Field(min_length=1)]
    jobs: list[JobConfig] = []  # noqa: RUF012 (pydantic copies a default for each model)

    _source: str = PrivateAttr("<node config>")

    @model_validator(mode="before")
    @classmethod
    def _fill_job_results(cls, data: Any) -> Any:
        if not isinstance(data, dict) or not isinstance(data.get("jobs"), list):
            return data
        node = data.get("node")
        node = node if isinstance(node, dict) else {}
        if "results_dir" in node:
            results_dir = _derived(node, "results_dir")
        else:
            results_dir = posixpath.join(_derived(node, "data_dir"), "results")
        jobs = []
        for job in data["jobs"]:
            if isinstance(job, dict) and "results" not in job:
                name = job.get("name")
                results = "."  # a name that is missing or wrong has its own error
                if isinstance(name, str) and JOB_NAME.fullmatch(name):
                    results = posixpath.join(results_dir, name)
                job = {**job, "results": results}
            jobs.append(job)
        return {**data, "jobs": jobs}

    @model_validator(mode="after")
    def _cross_check(self) -> NodeConfig:
        problems = self.cross_problems()
        if problems:
            raise PydanticCustomError(
                "config_cross_check",
                "{count} problem(s) across fields",
                {"count": len(problems), "problems": tuple(problems)},
            )
        return self

    @property
    def source(self) -> str:
        """The file this config was read from (for messages)."""
        return self._source

    def peer(self, name: str) -> PeerConfig:
        for peer in self.peers:
            if peer.name == name:
                return peer
        raise KeyError(name)

    def job(self, name: str) -> JobConfig:
        for job in self.jobs:
            if job.name == name:
                return job
        raise KeyError(name)

    def timings(self) -> list[JobTiming]:
        return [job.timing() for job in self.jobs]

    def cross_problems(self) -> list[Problem]:
        """Rules between fields: unique names, known peers, distinct addresses and result directories."""
        problems: list[Problem] = []
        seen_peers: dict[str, int] = {}
        for i, peer in enumerate(self.peers):
            if peer.name == self.node.name:
                problems.append(Problem(f"peers[{i}].name", f"{peer.name!r} is this node's own name"))
            elif (first := _seen_before(seen_peers, peer.name, i)) is not None:
                problems.append(
                    Problem(f"peers[{i}].name", f"{peer.name!r} is already used by peers[{first}]")
                )
        seen_jobs: dict[str, int] = {}
        seen_results: dict[Path, int] = {}
        known = ", ".join(seen_peers) or "none"
        for i, job in enumerate(self.jobs):
            if (first := _seen_before(seen_jobs, job.name, i)) is not None:
                problems.append(Problem(f"jobs[{i}].name", f"{job.name!r} is already used by jobs[{first}]"))
            if job.peer not in seen_peers:
                problems.append(Problem(f"jobs[{i}].peer", f"no peer named {job.peer!r} (peers: {known})"))
            if (first := _seen_before(seen_results, job.results, i)) is not None:
                problems.append(Problem(f"jobs[{i}].results", f"same directory as jobs[{first}].results"))
            try:
                job.timing()
            except ScheduleError as exc:  # the field validators apply the same rules; kept as a guarantee
                problems.append(Problem(f"jobs[{i}].schedule", str(exc)))
        problems += self._address_problems()
        problems += self.node.console_problems()
        problems += self.node.resume.problems()
        if self.node.job_store == self.node.session_log:
            problems.append(Problem("node.session_log", "must be a different file from node.job_store"))
        return problems

    def _address_problems(self) -> list[Problem]:
        problems = []
        taken: list[tuple[str, HostPort | UnixSocket]] = []
        for field_name, address in self.node.addresses().items():
            for other_name, other in taken:
                if _clash(address, other):
                    problems.append(Problem(f"node.{field_name}", f"same address as node.{other_name}"))
                    break
            taken.append((field_name, address))
        return problems

    # -- file checks (``jointstat.node.keys`` reads the key files) ------------------------------------------

    def secret_problems(self) -> list[Problem]:
        """Each secret file must exist, be owner-only and parse; the TLS key must match the certificate."""
        from jointstat.node.keys import secret_problems

        return secret_problems(self)

    def check_secrets(self) -> None:
        """Raise ``ConfigError`` listing every secret-file problem (none: return)."""
        problems = self.secret_problems()
        if problems:
            raise ConfigError(self.source, problems)

    def file_problems(self, now: datetime | None = None) -> list[Problem]:
        """The public files: certificates parse and are valid at ``now``, pins match, keys load, manifests exist."""
        from jointstat.node.keys import file_problems

        return file_problems(self, now)


def _seen_before(seen: dict[Any, int], key: Any, index: int) -> int | None:
    """The index ``key`` was first seen at, or None when it is new (then it is noted as seen at ``index``)."""
    first = seen.setdefault(key, index)
    return None if first == index else first


def _clash(a: HostPort | UnixSocket, b: HostPort | UnixSocket) -> bool:
    if isinstance(a, UnixSocket) or isinstance(b, UnixSocket):
        return a == b
    if a.port != b.port or a.port == 0:
        return False
    return a.host == b.host or a.is_wildcard or b.is_wildcard


# -- loading -----------------------------------------------------------------------------------------------------------


def _problems(exc: ValidationError) -> list[Problem]:
    problems: list[Problem] = []
    for err in exc.errors(include_url=False):
        ctx = err.get("ctx") or {}
        if err["type"] == "config_cross_check":
            prefix = field_path(err["loc"])
            for p in ctx["problems"]:
                problems.append(Problem(f"{prefix}.{p.path}" if prefix else p.path, p.message))
            continue
        message = pydantic_message(err)
        if err["type"] == "missing" and len(err["loc"]) == 3 and err["loc"][::2] == ("jobs", "role"):
            message += (
                " (garbler or evaluator: the party of the job's manifest this node is, as the two organisations "
                "agreed; it does not follow from initiate)"
            )
        problems.append(Problem(field_path(err["loc"]), message))
    return problems


def parse_node_config(text: str, source: str = "<node config>", base: Path | None = None) -> NodeConfig:
    """Validate node config text; relative paths resolve against ``base``. Raises ``ConfigError``."""
    try:
        data = read_yaml(text)
    except ValueError as exc:
        raise ConfigError(source, [Problem("", str(exc))]) from None
    if not isinstance(data, dict):
        raise ConfigError(
            source, [Problem("", "a node config is a YAML mapping (node, tls, peers, jobs, …)")]
        )
    try:
        config = NodeConfig.model_validate(data, context={"base": base})
    except ValidationError as exc:
        raise ConfigError(source, _problems(exc)) from None
    config._source = source
    return config


def load_node_config(path: str | os.PathLike[str]) -> NodeConfig:
    """Read and validate a node config file; relative paths in it resolve against the file's directory."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(str(p), [Problem("", "no such file")]) from None
    except (OSError, UnicodeDecodeError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) else "not UTF-8 text"
        raise ConfigError(str(p), [Problem("", f"cannot read the file ({reason})")]) from None
    return parse_node_config(text, str(p), Path(os.path.abspath(p.parent)))
