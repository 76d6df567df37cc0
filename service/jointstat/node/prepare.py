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
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from jointstat.circuit.compile import CompiledStatistic
from jointstat.circuit.model import Party
from jointstat.node.config import JobConfig

MAX_MESSAGE = 300  # characters of a failure's description kept for logs and the job store


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

    def inputs(self, job: JobConfig, compiled: CompiledStatistic) -> np.ndarray:
        """This node's input bits for ``job`` (blocking)."""
        from jointstat.circuit.inputs import encode_inputs, read_csv, read_sql

        party = job.party
        table = compiled.manifest.table(party)
        columns = compiled.inputs[party].columns
        if job.input.csv is not None:
            records = read_csv(job.input.csv.path, table, columns=columns, key_secret=self._key_secret)
        else:
            sql = job.input.sql
            assert sql is not None
            records = read_sql(
                sql.connection_url(), sql.query, table, columns=columns, key_secret=self._key_secret
            )
        return encode_inputs(compiled, party, records)

    def prepare(self, job: JobConfig) -> Prepared:
        """The compiled manifest and this node's input, within the memory limit (blocking)."""
        from jointstat.circuit.plan import check_limits

        t0 = time.monotonic()
        compiled = self.compiled(job)
        if self._memory_limit is not None:
            check_limits(compiled, memory_limit=self._memory_limit)
        bits = self.inputs(job, compiled)
        return Prepared(compiled, job.party, bytes.fromhex(compiled.digest), bits, time.monotonic() - t0)


def describe_failure(exc: BaseException) -> str:
    """A one-line account of why preparing failed (the errors name files, rows and columns, never values)."""
    text = str(exc).strip().splitlines()
    first = text[0] if text else type(exc).__name__
    more = f" (and {len(text) - 1} more problems)" if len(text) > 1 else ""
    return (first + more)[:MAX_MESSAGE]
