"""Preparing a job on this node: its compiled manifest and this node's encoded input.

Theory of operation
-------------------
``Preparer.compiled(job)`` loads and compiles the job's manifest (``circuit.compile``) and measures its program
with the count backend, once per file: the result is cached by path, size and modification time, so a changed
manifest is compiled again and an unchanged one never twice; one compilation runs at a time, and a second caller
waits for the first's result. ``Preparer.inputs(job, compiled)`` reads this node's records (CSV or SQL, identifier
keys hashed with the key-hashing secret; ``circuit.inputs``) against the table of the manifest party the job's
``role`` names and encodes them as input bits. ``prepare(job)`` does both, refusing first a program that needs more
memory than ``node.session_memory_mib`` allows (``circuit.plan.check_limits``), before any input is read.

Everything here blocks (files, a database, compilation): the node calls it from a worker thread. The errors name
files, rows and columns, never values; ``describe_failure`` makes one line of them for logs and the job store.

Why a run could not be prepared decides whether trying again can help (``failure_code``): the input's source cannot
be opened — a missing or unreadable file, a database that does not answer, a password file that cannot be read —
is ``input_unavailable`` (it may come back: retried); the records are there but break the manifest — a value that
is not a number or out of range, a missing column, more rows than the capacity, no key-hashing secret for
identifier columns — is ``input_invalid``; a manifest that cannot be compiled or needs more memory than the node
allows is ``manifest_unusable``. Neither of the last two can cure itself, so neither is retried. Before reading,
``inputs`` opens the source once (the file, or a database connection) so that an unreachable source is told apart
from bad records.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from jointstat.circuit.compile import CompiledStatistic
from jointstat.circuit.inputs import Records
from jointstat.circuit.model import Party
from jointstat.node.config import JobConfig

MAX_MESSAGE = 300  # characters of a failure's description kept for logs and the job store
INPUT_UNAVAILABLE = "input_unavailable"
INPUT_INVALID = "input_invalid"
MANIFEST_UNUSABLE = "manifest_unusable"


class InputUnavailable(Exception):
    """The job's input source cannot be opened now (file, database, password file); trying later may help."""


@dataclass(frozen=True)
class Prepared:
    """A job ready to run on this node: its compiled manifest and this node's encoded input bits."""

    compiled: CompiledStatistic
    party: Party
    digest: bytes
    inputs: np.ndarray
    seconds: float  # the time it took: the session's ``prepare`` phase


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

    def records(self, job: JobConfig, compiled: CompiledStatistic) -> Records:
        """This node's records for ``job``, read and checked against its table (blocking)."""
        from jointstat.circuit.inputs import read_csv, read_sql

        party = job.party
        table = compiled.manifest.table(party)
        columns = compiled.inputs[party].columns
        open_source(job)
        if job.input.csv is not None:
            return read_csv(job.input.csv.path, table, columns=columns, key_secret=self._key_secret)
        sql = job.input.sql
        assert sql is not None
        return read_sql(sql.connection_url(), sql.query, table, columns=columns, key_secret=self._key_secret)

    def inputs(self, job: JobConfig, compiled: CompiledStatistic) -> np.ndarray:
        """This node's input bits for ``job`` (blocking)."""
        from jointstat.circuit.inputs import encode_inputs

        return encode_inputs(compiled, job.party, self.records(job, compiled))

    def prepare(self, job: JobConfig) -> Prepared:
        """The compiled manifest and this node's input, within the memory limit (blocking)."""
        from jointstat.circuit.plan import check_limits

        t0 = time.monotonic()
        compiled = self.compiled(job)
        if self._memory_limit is not None:
            check_limits(compiled, memory_limit=self._memory_limit)
        bits = self.inputs(job, compiled)
        return Prepared(compiled, job.party, bytes.fromhex(compiled.digest), bits, time.monotonic() - t0)


def open_source(job: JobConfig) -> None:
    """Open the job's input source once and close it; ``InputUnavailable`` naming it if that fails."""
    from jointstat.node.secrets import SecretFileError

    if job.input.csv is not None:
        path = job.input.csv.path
        try:
            with open(path, "rb"):
                pass
        except OSError as exc:
            raise InputUnavailable(f"{path}: cannot open the file ({exc.strerror or exc})") from None
        return
    sql = job.input.sql
    assert sql is not None
    from sqlalchemy import create_engine
    from sqlalchemy.exc import ArgumentError, SQLAlchemyError

    from jointstat.circuit.inputs import describe_query

    shown = describe_query(sql.url, sql.query)
    try:
        url = sql.connection_url()
    except SecretFileError as exc:
        raise InputUnavailable(str(exc)) from None
    try:
        engine = create_engine(url)
        try:
            with engine.connect():
                pass
        finally:
            engine.dispose()
    except (ArgumentError, SQLAlchemyError, ImportError) as exc:
        raise InputUnavailable(f"{shown}: cannot connect to the database ({type(exc).__name__})") from None


def failure_code(exc: BaseException) -> str:
    """The reason code of a failure to prepare a run (see the module docstring)."""
    from jointstat.circuit.inputs import InputError
    from jointstat.circuit.manifest import ManifestError
    from jointstat.circuit.plan import LimitError

    if isinstance(exc, InputError):
        return INPUT_INVALID
    if isinstance(exc, ManifestError | LimitError):
        return MANIFEST_UNUSABLE
    return INPUT_UNAVAILABLE


def describe_failure(exc: BaseException) -> str:
    """A one-line account of why preparing failed (the errors name files, rows and columns, never values)."""
    text = str(exc).strip().splitlines()
    first = text[0] if text else type(exc).__name__
    more = f" (and {len(text) - 1} more problems)" if len(text) > 1 else ""
    return (first + more)[:MAX_MESSAGE]
