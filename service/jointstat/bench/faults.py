"""``jointstat bench faults``: a real node under injected faults and fuzzed frames, and the figures that show it.

Theory of operation
-------------------
*The node under test* is a ``jointstat.node.daemon.Node`` (the daemon of ``jointstat node run``, in this process,
with its job store, signed session log, result files and ``max_sessions``), configured with two jobs on one small
invented manifest (two bicycle-share schemes add up the metres their bikes rode): one its peer proposes (the node
evaluates and serves, as an accepting node does) and one it initiates itself (it garbles, connects, and retries a
failed attempt after a backoff with a new session — hence a fresh Δ and fresh labels). *The peer* is this harness
playing the other node: it proposes runs over ``Session/Propose`` or accepts the node's proposals, and plays its
side of each session with its own signed session log.

*Faults.* A plan names a kind, a phase and a frame: the phases are those of the protocol (hello, base OT, OT
extension, tables — the garbler's input labels and the garbled tables —, output labels — the returned labels and
the decoding —, finish), the frame is the k-th frame of that phase to cross the peer's stream, in either direction,
in the order it crosses. The peer's stream (:class:`FaultPoint` on a client stream or a server context) fires the
fault when that frame reaches it, before it crosses, and from then on nothing more crosses:

- ``cut``: the loopback TCP proxy between the two nodes (:class:`FaultProxy`) closes both TCP connections (a reset
  or an orderly close), so both gRPC ends see the connection drop;
- ``kill``: the peer runs as a process of its own and sends itself SIGKILL — no abort frame, no TLS close; when the
  peer node comes back (the harness reopens its log, as ``Node.start`` does), the session its log left open is
  recorded as aborted (``node_restarted``);
- ``stall``: the proxy stops forwarding in both directions and the peer holds the frame; the connection stays open
  and both sides must give up by their own limits.

In the finish phase the fault fires at the first finish frame to reach the peer's stream: once a finish frame has
crossed, one side may rightly complete (it holds the other's signed transcript) — the fair-exchange limit of any
two-party protocol, not a fault to inject. Every faulted attempt is followed by its job's retry: proposed again by
the peer (the node accepts a new session), or retried by the node itself.

*Verdicts.* A faulted session *aborted cleanly* when both sides ended without output, each with a reason, within
the session deadline (plus the abort grace and an allowance for a loaded machine), the node's job store has the
attempt ``aborted`` and no result file, the abort is the session's last record in both verified logs, and the
logs agree. A retry *completed* when both sides completed with the correct sum and count (the node's result file,
the peer's decoded outputs), both logs say so with the same transcript, and the garbler's Δ and every label
differ from the faulted attempt's. ``hung`` counts sessions a side had not ended by the bound;
``outputs_released_wrongly`` sides that released an output (a result file, decoded bits) from a faulted session,
or a wrong one from a retry; ``crashes`` exceptions that escaped a handler, the event loop or a thread, errors
logged by the node or gRPC, peer processes that died unplanned, and ``internal`` aborts.

*Frame fuzzing* (:class:`Fuzzer`): an honest peer session plays a session with a node's session server (the
``SessionServer`` a node serves on, with sessions made as a node makes them but without the daemon's proposals)
and one of its frames is mutated — bits flipped, truncated, a length prefix made oversized (or the whole frame over
the 4 MiB limit), the type made unknown (or its wire type wrong), or a valid frame sent out of order (one of
another type or of another session, or the previous frame again) — and the peer plays on. Most cases go through the
server's own stream handler on an in-process stream, a sample over the real wire. Each must end with the node's
session aborted with a clear reason (or the stream refused with an abort frame), no output, within a bound.
Memory: the resident set size after a warm-up tenth and at the end, and, for a last slice under ``tracemalloc``,
what the node's code still holds per case.

*Secrets in logs* (:func:`scan_for_secrets`): every Δ, wire label and input value of the run is recorded by the
harness (:class:`Secrets`; the node's own sessions through a recording ``new_session`` patched into
``node.jobs``) and every line of both session logs, the node's Python log and the abort messages is searched for
them in hex, base64, decimal, bit-string and Python-bytes forms.

Figures: ``sessions`` (faulted sessions and their retries), ``completed``, ``aborted_cleanly``, ``hung``,
``outputs_released_wrongly``, ``frames_fuzzed``, ``crashes`` (fault campaign and fuzzing together), then the
details: unclean sessions, faults per kind and phase, the fuzzing's verdicts and memory, and the secrets found.
Targets: ``hung`` = ``outputs_released_wrongly`` = ``crashes`` = 0, ``completed + aborted_cleanly = sessions``.

Two settings of the node under test are lowered for the run: its session deadline (``session_deadline_seconds``,
a config key) and ``node.jobs.CONNECT_TIMEOUT_S`` (a module constant, 60 s, the wait for a peer that never opens
an accepted session), both to the fault deadline, so an unopened session also ends within the deadline.
"""

from __future__ import annotations

import asyncio
import base64
import contextlib
import hashlib
import json
import logging
import multiprocessing as mp
import os
import signal
import socket
import struct
import sys
import threading
import time
from collections import Counter
from collections.abc import Awaitable, Callable, Iterable, Iterator
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from pathlib import Path
from typing import Any, Literal

import grpc
import numpy as np
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat.audit import SessionLog, compare_logs, verify_log
from jointstat.bench.report import emit
from jointstat.circuit.builder import Builder
from jointstat.circuit.compile import CompiledStatistic
from jointstat.circuit.encode import int_to_bits
from jointstat.circuit.layers import LayeredCircuit, schedule
from jointstat.circuit.model import Party
from jointstat.garble.halfgates import DEFAULT_CHUNK_BYTES
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason
from jointstat.protocol.session import EvaluatorSession, GarblerSession, NoOutputError, Session
from jointstat.transport.channel import MESSAGE_OPTIONS, METHOD_PATH, SERVICE_NAME, ClientStream, SessionIds
from jointstat.transport.driver import Limits, SessionResult, StreamLost, drive
from jointstat.transport.pki import Issued, issue, new_ca, node_tls
from jointstat.transport.server import SessionServer
from jointstat.transport.tls import NodeTLS
from jointstat.transport.wire.jointstat.v1 import session_pb2 as pb

# -- phases and fault kinds --------------------------------------------------------------------------------------------

HELLO, BASE_OT, EXTENSION, TABLES, OUTPUT_LABELS, FINISH = (
    "hello",
    "base_ot",
    "extension",
    "tables",
    "output_labels",
    "finish",
)
PHASES = (HELLO, BASE_OT, EXTENSION, TABLES, OUTPUT_LABELS, FINISH)
PHASE_OF_FRAME = {
    fr.HELLO: HELLO,
    fr.BASE_OT: BASE_OT,
    fr.OT_EXTENSION: EXTENSION,
    fr.GARBLER_INPUT_LABELS: TABLES,
    fr.GARBLED_TABLES: TABLES,
    fr.GARBLER_OUTPUT_LABELS: OUTPUT_LABELS,
    fr.EVALUATOR_OUTPUT_DECODING: OUTPUT_LABELS,
    fr.FINISH: FINISH,
}
CUT, KILL, STALL = "cut", "kill", "stall"
FAULT_KINDS = (CUT, KILL, STALL)
FaultKind = Literal["cut", "kill", "stall"]

# The peer's limits: a stalled link is given up after two idle seconds; a whole session has four.
FAULT_LIMITS = Limits(deadline_s=4.0, idle_timeout_s=2.0, abort_grace_s=0.5)
NODE_DEADLINE_S = 4  # the node's session_deadline_seconds for the run (its idle timeout stays the default)
SCHEDULING_ALLOWANCE_S = 3.0  # beyond deadline + grace, for a loaded two-core machine
CHUNK_BYTES = 1024  # the peer garbles 32 AND gates per table frame, so the tables phase has many frames
RETRY_BACKOFF_S = 1.0
DEFAULT_FUZZ_FRAMES = 10_000


def phase_of(kind: str) -> str | None:
    """The protocol phase a frame type belongs to (None for ``abort``)."""
    return PHASE_OF_FRAME.get(kind)


# -- the job: an invented scenario of two bicycle-share schemes ----------------------------------------------------------

NODE_NAME, PEER_NAME = "riverside-bikes", "hillside-bikes"
JOB_ACCEPTED = "fleet-metres-offered"  # the peer proposes it; the node evaluates and serves
JOB_INITIATED = "fleet-metres-started"  # the node proposes it, garbles, connects and retries
METRE_BITS = 40
MANIFEST_YAML = """\
# Invented: two bicycle-share schemes add up the metres their bikes rode in March, without showing per-bike figures.
job:
  name: fleet-metres
  version: 1
parties:
  garbler: {name: Riverside Bike Share}
  evaluator: {name: Hillside Bike Share}
tables:
  garbler:
    capacity: 4
    columns:
      - {name: metres, type: unsigned, width: 40}
  evaluator:
    capacity: 4
    columns:
      - {name: metres, type: unsigned, width: 40}
statistic:
  name: sum
  column: metres
outputs:
  garbler: [count, sum]
  evaluator: [count, sum]
"""
# Invented figures, 12 digits each (so a log scan cannot mistake them for a count or a duration).
NODE_METRES = (128_734_509_117, 119_604_822_391, 131_277_046_853)
PEER_METRES = (124_418_995_072, 117_062_340_589, 129_953_781_206)


def expected_result() -> dict[str, int]:
    """The job's answer for both sides, computed in plain Python."""
    return {"count": len(NODE_METRES) + len(PEER_METRES), "sum": sum(NODE_METRES) + sum(PEER_METRES)}


@dataclass(frozen=True)
class JobFiles:
    manifest: Path
    node_csv: Path
    peer_csv: Path


def write_job_files(directory: Path) -> JobFiles:
    """The manifest and the two schemes' CSV files (either table fits either role: same columns)."""
    directory.mkdir(parents=True, exist_ok=True)
    files = JobFiles(directory / "manifest.yaml", directory / "riverside.csv", directory / "hillside.csv")
    files.manifest.write_text(MANIFEST_YAML, encoding="utf-8")
    for path, rows in ((files.node_csv, NODE_METRES), (files.peer_csv, PEER_METRES)):
        path.write_text("metres\n" + "".join(f"{v}\n" for v in rows), encoding="utf-8")
    return files


@dataclass(frozen=True)
class PeerJob:
    """The peer's compiled job and its input bits in either role."""

    compiled: CompiledStatistic
    digest: bytes
    bits: dict[Party, np.ndarray]

    @property
    def layered(self) -> LayeredCircuit:
        return self.compiled.layered


def peer_job(files: JobFiles) -> PeerJob:
    from jointstat.circuit.compile import compile_manifest
    from jointstat.circuit.inputs import encode_inputs, read_csv
    from jointstat.circuit.manifest import load_manifest

    compiled = compile_manifest(load_manifest(files.manifest))
    bits = {}
    for party in Party:
        table = compiled.manifest.table(party)
        records = read_csv(files.peer_csv, table, columns=compiled.inputs[party].columns)
        bits[party] = encode_inputs(compiled, party, records)
    return PeerJob(compiled, bytes.fromhex(compiled.digest), bits)


def frames_per_phase(layered: LayeredCircuit, chunk_bytes: int) -> dict[str, int]:
    """How many frames of each phase cross a session's stream (both directions) for this circuit."""
    c = layered.circuit
    n_in_e = c.n_inputs(Party.EVALUATOR)
    chunk = chunk_bytes - chunk_bytes % 32
    labels = 16 * (2 + c.n_inputs(Party.GARBLER))
    return {
        HELLO: 2,
        BASE_OT: 2 if n_in_e else 0,
        EXTENSION: 2 if n_in_e else 0,  # one batch each way for up to 2^16 evaluator inputs
        TABLES: -(-labels // fr.MAX_PAYLOAD_BYTES) + -(-32 * layered.n_and // chunk),
        OUTPUT_LABELS: int(layered.output_slots[Party.GARBLER].size > 0)
        + int(layered.output_slots[Party.EVALUATOR].size > 0),
        FINISH: 2,
    }


# -- secrets the harness knows, and the log scan -----------------------------------------------------------------------


@dataclass
class Secrets:
    """Everything secret a run produced, as the harness saw it: Δs, wire labels (16 bytes each), input values."""

    blocks: set[bytes] = field(default_factory=set)
    values: set[int] = field(default_factory=set)
    deltas: dict[str, bytes] = field(default_factory=dict)  # session id -> Δ (garbler side)
    labels: dict[str, set[bytes]] = field(default_factory=dict)  # session id -> labels seen or made
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def add_delta(self, session_id: str, delta: bytes) -> None:
        with self._lock:
            self.deltas[session_id] = delta
            self.blocks.add(delta)

    def add_labels(self, session_id: str, raw: bytes) -> None:
        """Labels as the bytes of consecutive 16-byte blocks."""
        blocks = {raw[i : i + 16] for i in range(0, len(raw) - len(raw) % 16, 16)}
        with self._lock:
            self.labels.setdefault(session_id, set()).update(blocks)
            self.blocks.update(blocks)

    def add_value(self, value: int) -> None:
        with self._lock:
            self.values.add(int(value))

    def merge(self, other: Secrets) -> None:
        with self._lock:
            self.blocks |= other.blocks
            self.values |= other.values
            self.deltas.update(other.deltas)
            for sid, labels in other.labels.items():
                self.labels.setdefault(sid, set()).update(labels)

    def to_wire(self) -> dict[str, Any]:
        return {
            "deltas": {k: v.hex() for k, v in self.deltas.items()},
            "labels": {k: [b.hex() for b in v] for k, v in self.labels.items()},
            "values": sorted(self.values),
        }

    @classmethod
    def from_wire(cls, data: dict[str, Any]) -> Secrets:
        out = cls()
        for sid, delta in data["deltas"].items():
            out.add_delta(sid, bytes.fromhex(delta))
        for sid, labels in data["labels"].items():
            out.add_labels(sid, b"".join(bytes.fromhex(h) for h in labels))
        for v in data["values"]:
            out.add_value(v)
        return out


def _b64_inner(data: bytes) -> set[str]:
    """Base64 (standard and URL-safe) substrings that encode only bytes of ``data``, at each of the 3 alignments."""
    out: set[str] = set()
    for offset in range(3):
        encoded = base64.b64encode(bytes(offset) + data).decode()
        first = -(-offset // 3)  # first 3-byte group lying wholly inside data
        last = (offset + len(data)) // 3  # one past the last such group
        if last - first >= 2:
            inner = encoded[4 * first : 4 * last]
            out |= {inner, inner.replace("+", "-").replace("/", "_")}
    return out


def secret_forms(secrets: Secrets) -> dict[str, str]:
    """Every text form searched for, mapped to a description that names the kind and form but not the value."""
    forms: dict[str, str] = {}
    for i, block in enumerate(sorted(secrets.blocks)):
        what = f"wire label or Δ #{i}"
        forms[block.hex()] = f"{what} as hex"
        forms[block.hex().upper()] = f"{what} as upper-case hex"
        for text in _b64_inner(block):
            forms[text] = f"{what} as base64"
        for order in ("little", "big"):
            forms[str(int.from_bytes(block, order))] = f"{what} as a {order}-endian decimal integer"
        for j in (0, 8):
            word = int.from_bytes(block[j : j + 8], "little")
            if word >= 10**12:  # a decimal too short would match counts and timings by chance
                forms[str(word)] = f"{what} as a decimal 64-bit word"
        forms[repr(block)[2:-1]] = f"{what} as a Python bytes literal"
    for i, value in enumerate(sorted(secrets.values)):
        what = f"input value #{i}"
        forms[str(value)] = f"{what} as decimal"
        forms[f"{value:x}"] = f"{what} as hex"
        forms[f"{value:X}"] = f"{what} as upper-case hex"
        for order in ("little", "big"):
            raw = value.to_bytes(8, order)
            forms[raw.hex()] = f"{what} as {order}-endian bytes in hex"
            for text in _b64_inner(raw):
                forms[text] = f"{what} as base64 of {order}-endian bytes"
        bits = int_to_bits(value, METRE_BITS)
        lsb_first = "".join(str(int(b)) for b in bits)
        forms[lsb_first] = f"{what} as a bit string, least significant first"
        forms[lsb_first[::-1]] = f"{what} as a bit string, most significant first"
        forms[" ".join(lsb_first)] = f"{what} as a printed bit array"
    return forms


@dataclass(frozen=True)
class Finding:
    """A secret found in a log: where, and which secret in which form (never the secret itself)."""

    source: str
    line: int
    what: str


SCAN_PREFIX = (
    8  # every searched form is at least this long; shorter ones would match counts and times by chance
)


def _index(forms: dict[str, str]) -> dict[str, list[tuple[str, str]]]:
    """Forms by their first ``SCAN_PREFIX`` characters, so a line is searched in one pass, whatever the count."""
    index: dict[str, list[tuple[str, str]]] = {}
    for form, what in forms.items():
        if len(form) >= SCAN_PREFIX:
            index.setdefault(form[:SCAN_PREFIX], []).append((form, what))
    return index


def scan_text(source: str, text: str, forms: dict[str, str]) -> list[Finding]:
    """Every (line, secret) where a form of the secret occurs in the line."""
    index = _index(forms)
    found: list[Finding] = []
    for number, line in enumerate(text.splitlines(), start=1):
        hits: set[str] = set()
        for i in range(len(line) - SCAN_PREFIX + 1):
            for form, what in index.get(line[i : i + SCAN_PREFIX], ()):
                if what not in hits and line.startswith(form, i):
                    hits.add(what)
                    found.append(Finding(source, number, what))
    return found


def scan_for_secrets(
    secrets: Secrets, paths: Iterable[Path] = (), texts: Iterable[tuple[str, str]] = ()
) -> list[Finding]:
    """Search every line of the files ``paths`` and of the named ``texts`` for every form of every secret."""
    forms = secret_forms(secrets)
    found: list[Finding] = []
    for path in paths:
        found += scan_text(str(path), Path(path).read_text(errors="replace"), forms)
    for name, text in texts:
        found += scan_text(name, text, forms)
    return found


# -- sessions that record their secrets ----------------------------------------------------------------------------------


def sid_text(session_id: bytes) -> str:
    """A session id as the harness files its secrets: the text itself if it is printable ASCII, else hex."""
    return (
        session_id.decode()
        if session_id.isascii() and session_id.decode().isprintable()
        else session_id.hex()
    )


class RecordingGarbler(GarblerSession):
    """A garbler session that hands the harness its Δ (when drawn) and the labels it makes."""

    secrets: Secrets | None = None

    def _on_hello(self, frame: Any) -> tuple[str, list[bytes]]:
        out = super()._on_hello(frame)
        if self.secrets is not None and self._delta is not None:
            self.secrets.add_delta(sid_text(self.session_id), self._delta.astype("<u8").tobytes())
        return out

    def _build_garbling(self) -> None:
        super()._build_garbling()
        if self.secrets is None or self._engine is None or self._delta is None:
            return
        engine = self._engine
        made = [engine.constant_labels()]
        for party in Party:
            zero = engine.input_labels(party, np.zeros(self.layered.circuit.n_inputs(party), dtype=np.uint8))
            made += [zero, zero ^ self._delta]
        self.secrets.add_labels(sid_text(self.session_id), b"".join(m.astype("<u8").tobytes() for m in made))


class RecordingEvaluator(EvaluatorSession):
    """An evaluator session that hands the harness the labels it obtains and computes."""

    secrets: Secrets | None = None

    def _on_input_labels(self, frame: Any) -> tuple[str, list[bytes]]:
        if self.secrets is not None and self._own_labels is not None:
            self.secrets.add_labels(sid_text(self.session_id), self._own_labels.astype("<u8").tobytes())
        return super()._on_input_labels(frame)

    def _after_tables(self) -> tuple[str, list[bytes]]:
        if self.secrets is not None and self._engine is not None:
            for party in Party:
                raw = self._engine.output_labels(party).astype("<u8").tobytes()
                self.secrets.add_labels(sid_text(self.session_id), raw)
        return super()._after_tables()


def recording_session(secrets: Secrets, chunk_bytes: int | None = None) -> Callable[..., Session]:
    """A stand-in for ``protocol.session.new_session`` making sessions that record their secrets into ``secrets``."""

    def make(party: Party, **kwargs: Any) -> Session:
        session: RecordingGarbler | RecordingEvaluator
        if Party(party) == Party.GARBLER:
            if chunk_bytes is not None:
                kwargs["chunk_bytes"] = chunk_bytes
            session = RecordingGarbler(**kwargs)
        else:
            kwargs.pop("chunk_bytes", None)
            session = RecordingEvaluator(**kwargs)
        session.secrets = secrets
        return session

    return make


@contextlib.contextmanager
def node_under_test_settings(secrets: Secrets, connect_timeout_s: float) -> Iterator[None]:
    """While the node runs in this process: its sessions record their secrets, and it waits ``connect_timeout_s``
    for a peer to open an accepted session (see the module docstring). Restores both afterwards."""
    from jointstat.node import jobs

    saved = (jobs.new_session, jobs.CONNECT_TIMEOUT_S)
    jobs.new_session = recording_session(secrets)  # type: ignore[assignment]
    jobs.CONNECT_TIMEOUT_S = connect_timeout_s
    try:
        yield
    finally:
        jobs.new_session, jobs.CONNECT_TIMEOUT_S = saved  # type: ignore[assignment]


# -- the peer's keys (from the trial key set both nodes were made from) ---------------------------------------------------


@dataclass(frozen=True)
class PeerKeys:
    """What the peer node holds: its TLS certificate and key, its signing key, and the node's public material."""

    directory: Path
    certificate: bytes
    private_key: bytes
    signing_key: Ed25519PrivateKey
    node_certificate: bytes
    node_key: Ed25519PublicKey

    @classmethod
    def load(cls, directory: Path) -> PeerKeys:
        from jointstat.node.keys import (
            load_public_key,
            load_signing_key,
            signing_key_file,
            signing_public_file,
            tls_cert_file,
            tls_key_file,
        )

        return cls(
            directory=directory,
            certificate=(directory / tls_cert_file(PEER_NAME)).read_bytes(),
            private_key=(directory / tls_key_file(PEER_NAME)).read_bytes(),
            signing_key=load_signing_key(directory / signing_key_file(PEER_NAME)),
            node_certificate=(directory / tls_cert_file(NODE_NAME)).read_bytes(),
            node_key=load_public_key(directory / signing_public_file(NODE_NAME)),
        )

    def tls(self) -> NodeTLS:
        return NodeTLS(self.certificate, self.private_key, (self.node_certificate,))

    def node_identity(self, port: int) -> Any:
        """The node as the peer's proposals address it (``node.jobs.PeerIdentity``)."""
        from cryptography import x509
        from cryptography.hazmat.primitives import serialization

        from jointstat.node.jobs import PeerIdentity
        from jointstat.transport.tls import fingerprint

        cert = x509.load_pem_x509_certificate(self.node_certificate)
        return PeerIdentity(
            name=NODE_NAME,
            address=f"127.0.0.1:{port}",
            tls=self.tls(),
            fingerprint=fingerprint(cert),
            certificate_der=cert.public_bytes(serialization.Encoding.DER),
            signing_key=self.node_key,
        )


class LoggedNode:
    """The peer node's side of sessions, signed through its own session log the way a node does it.

    ``session_started`` before the session runs; the transcript digest signed (and recorded) by the log; the
    node's signature checked against the node's log key; then ``peer_attestation`` and ``session_completed``, or
    ``session_aborted`` with the reason. Session ids are logged in hex, as the node logs them.
    """

    def __init__(self, keys: PeerKeys, log_path: Path, secrets: Secrets) -> None:
        self.keys = keys
        self.log_path = Path(log_path)
        self.secrets = secrets
        self.log: SessionLog | None = None
        self.ids = SessionIds()
        self.reopen()

    def reopen(self) -> list[str]:
        """Open the log as a restarted node does; sessions left open are recorded as aborted. Returns their ids."""
        self.close()
        self.log = SessionLog(self.log_path, self.keys.signing_key, PEER_NAME)
        left = self.log.open_sessions()
        for sid in left:
            self.log.session_aborted(
                sid, reason="node_restarted", detail="the node stopped before this session ended"
            )
        return left

    def close(self) -> None:
        if self.log is not None:
            self.log.close()
            self.log = None

    def session(self, party: Party, sid: bytes, job: PeerJob) -> Session:
        assert self.log is not None
        from jointstat.node.jobs import session_signing

        log, text, node_key = self.log, sid.hex(), self.keys.node_key
        sign, verify = session_signing(log, self.keys.signing_key, node_key, text)
        make = recording_session(self.secrets, CHUNK_BYTES)
        session = make(
            party,
            session_id=sid,
            layered=job.layered,
            manifest_digest=job.digest,
            inputs=job.bits[party],
            sign=sign,
            verify=verify,
        )
        log.session_started(
            text,
            job=JOB_ACCEPTED if party == Party.GARBLER else JOB_INITIATED,
            manifest_digest=job.digest,
            role=fr.role_name(party),  # type: ignore[arg-type]
            peer=NODE_NAME,
            peer_key=node_key,
        )
        return session

    def ended(
        self, sid: bytes, result: SessionResult | None, *, duration_s: float, phase: str | None
    ) -> None:
        """Record how the session ended (``result`` None: it never opened on the wire)."""
        assert self.log is not None
        text = sid.hex()
        if result is not None and result.completed:
            assert result.peer_signature is not None
            self.log.peer_attestation(text, result.peer_signature)
            self.log.session_completed(text, duration_us=int(duration_s * 1e6))
            return
        if result is None or result.abort is None:
            self.log.session_aborted(
                text, reason="not_opened", phase=phase, detail="the node did not open the session in time"
            )
            return
        abort = result.abort
        self.log.session_aborted(
            text,
            reason=abort.reason.name.lower(),
            by="peer" if abort.by_peer else "self",
            phase=phase,
            detail=safe_detail(abort.message),
        )


def safe_detail(message: str) -> str:
    """An abort message fit for a log's ``detail``: long hex or base64-like tokens dropped, cut to 300 chars."""
    import re

    line = " ".join(message.split())
    line = re.sub(r"[0-9A-Fa-f]{32,}", "…", line)
    line = re.sub(r"[A-Za-z0-9+/_=-]{20,}", "…", line)
    return line[:300]


# -- injecting faults ------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class FaultPlan:
    """Where and how one session is broken: the ``index``-th frame of ``phase`` at the peer's stream."""

    kind: FaultKind
    phase: str
    index: int
    node_role: Party  # garbler: the node initiates (and retries); evaluator: the peer proposes
    reset: bool = True  # cut: a TCP reset (True) or an orderly close

    def describe(self) -> str:
        how = f"{self.kind} ({'reset' if self.reset else 'close'})" if self.kind == CUT else self.kind
        side = "initiates" if self.node_role == Party.GARBLER else "accepts"
        return (
            f"{how} at frame {self.index} of {self.phase}; the node {side} ({fr.role_name(self.node_role)})"
        )


def make_plans(count: int, seed: int, layered: LayeredCircuit) -> list[FaultPlan]:
    """``count`` fault plans: every (kind, phase) in each shuffled round, the node's role flipping from round to round."""
    rng = np.random.default_rng(seed)
    frames = {
        Party.GARBLER: frames_per_phase(layered, DEFAULT_CHUNK_BYTES),  # the node garbles
        Party.EVALUATOR: frames_per_phase(layered, CHUNK_BYTES),  # the peer garbles
    }
    pairs = [(k, p) for k in FAULT_KINDS for p in PHASES]
    first_role = rng.integers(2, size=len(pairs))
    plans: list[FaultPlan] = []
    round_no = 0
    while len(plans) < count:
        for i in rng.permutation(len(pairs)):
            kind, phase = pairs[int(i)]
            role = (Party.GARBLER, Party.EVALUATOR)[(int(first_role[int(i)]) + round_no) % 2]
            # In the finish phase only the first finish frame: once one has crossed, one side may rightly complete.
            index = 0 if phase == FINISH else int(rng.integers(frames[role][phase]))
            plans.append(FaultPlan(kind, phase, index, role, reset=bool(rng.integers(2))))  # type: ignore[arg-type]
            if len(plans) == count:
                break
        round_no += 1
    return plans


class FaultProxy:
    """A loopback TCP proxy between the peer and the node that can cut or stall every connection through it."""

    def __init__(self, target_port: int) -> None:
        self.target = target_port  # where new connections go (may be changed between sessions)
        self._server: asyncio.base_events.Server | None = None
        self._links: list[tuple[asyncio.StreamWriter, asyncio.StreamWriter]] = []
        self._tasks: set[asyncio.Task[None]] = set()
        self._stalled = False
        self._never = asyncio.Event()  # never set: what a stalled pump waits for
        self.port = 0

    async def start(self) -> int:
        self._server = await asyncio.start_server(self._accept, "127.0.0.1", 0)
        self.port = self._server.sockets[0].getsockname()[1]
        return self.port

    async def _accept(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            up_reader, up_writer = await asyncio.open_connection("127.0.0.1", self.target)
        except OSError:
            writer.transport.abort()
            return
        self._links.append((writer, up_writer))
        for src, dst in ((reader, up_writer), (up_reader, writer)):
            task = asyncio.create_task(self._pump(src, dst, writer, up_writer))
            self._tasks.add(task)
            task.add_done_callback(self._tasks.discard)

    async def _pump(
        self,
        src: asyncio.StreamReader,
        dst: asyncio.StreamWriter,
        a: asyncio.StreamWriter,
        b: asyncio.StreamWriter,
    ) -> None:
        try:
            while data := await src.read(1 << 16):
                if self._stalled:
                    await self._never.wait()
                dst.write(data)
                await dst.drain()
        except (ConnectionError, OSError):
            pass
        if not self._stalled:  # one end closed: close the other too, as a plain TCP path would
            for w in (a, b):
                w.transport.abort()
            with contextlib.suppress(ValueError):
                self._links.remove((a, b))

    def cut(self, reset: bool) -> None:
        """Close every connection now: with a TCP reset (``reset``) or an orderly close; buffered bytes are lost."""
        for a, b in self._links:
            for w in (a, b):
                if reset:
                    sock = w.get_extra_info("socket")
                    if sock is not None:
                        with contextlib.suppress(OSError):
                            sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
                w.transport.abort()

    def stall(self) -> None:
        """Stop forwarding in both directions; the connections stay open."""
        self._stalled = True

    def clear(self) -> None:
        """Drop every connection and forward again (between sessions)."""
        self.cut(reset=True)
        self._links.clear()
        for task in list(self._tasks):
            task.cancel()
        self._stalled = False

    async def close(self) -> None:
        self.cut(reset=False)
        for task in list(self._tasks):
            task.cancel()
        for task in list(self._tasks):
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()


Fire = Callable[[FaultPlan, str, str], None]  # (plan, frame type, direction) -> performs the fault


Fire = Callable[["FaultPlan", str, str], None]  # (plan, frame type, direction): performs the fault


class FaultPoint:
    """Counts a session's frames per phase at the peer's stream and fires the planned fault at the planned frame.

    After the fault nothing crosses: a cut stream raises ``StreamLost`` (a client stream) or ``OSError`` (a server
    context) on every read and write, a stalled one holds every read and write until cancelled, and a killed
    process does not come back. It also hands the harness the labels that cross it (to scan the logs for).
    """

    def __init__(
        self, plan: FaultPlan | None, fire: Fire | None, secrets: Secrets, session_id: bytes
    ) -> None:
        self.plan = plan
        self._fire = fire
        self._secrets = secrets
        self._sid = sid_text(session_id)
        self._seen: Counter[str] = Counter()
        self.fired: str | None = None  # "frame type, direction" once fired
        self._held = asyncio.Event()  # never set

    def look(self, data: bytes, direction: str) -> bool:
        """Count the frame; True if the fault fires on it."""
        try:
            kind, frame = fr.decode(data)
        except fr.ProtocolError:
            return False
        if kind in (fr.GARBLER_INPUT_LABELS, fr.GARBLER_OUTPUT_LABELS):
            self._secrets.add_labels(self._sid, fr.payload_of(kind, frame))
        phase = phase_of(kind)
        if phase is None or self.plan is None or self.fired is not None:
            return False
        index = self._seen[phase]
        self._seen[phase] += 1
        if phase == self.plan.phase and index == self.plan.index:
            self.fired = f"{kind}, {direction}"
            assert self._fire is not None
            self._fire(self.plan, kind, direction)
            return True
        return False

    async def after_fault(self, lost: type[Exception]) -> None:
        assert self.plan is not None
        if self.plan.kind == CUT:
            raise lost("the connection was cut under the session (injected fault)")
        await self._held.wait()  # stalled (killed: the process is gone before this runs)

    async def read(self, read: Callable[[], Awaitable[Any]], lost: type[Exception]) -> Any:
        if self.fired is not None:
            await self.after_fault(lost)
        data = await read()
        # A read already waiting when the fault fired (on a write) must not deliver what arrives after it.
        if self.fired is not None or (
            isinstance(data, bytes | bytearray) and self.look(bytes(data), "received")
        ):
            await self.after_fault(lost)
        return data

    async def write(
        self, data: bytes, write: Callable[[bytes], Awaitable[None]], lost: type[Exception]
    ) -> None:
        if self.fired is not None or self.look(data, "sent"):
            await self.after_fault(lost)
        await write(data)


class FaultyStream(ClientStream):
    """The peer's client stream with a :class:`FaultPoint`."""

    def __init__(self, call: grpc.aio.StreamStreamCall, grace_s: float, point: FaultPoint) -> None:
        super().__init__(call, grace_s)
        self.point = point

    async def read(self) -> bytes | None:
        data: bytes | None = await self.point.read(super().read, StreamLost)
        return data

    async def write(self, data: bytes) -> None:
        await self.point.write(data, super().write, StreamLost)


class FaultyContext:
    """A gRPC server context whose reads and writes pass a :class:`FaultPoint`, chosen by the first frame's id."""

    def __init__(self, context: grpc.aio.ServicerContext, points: dict[bytes, FaultPoint]) -> None:
        self._context = context
        self._points = points
        self.point: FaultPoint | None = None

    def auth_context(self) -> Any:
        return self._context.auth_context()

    def done(self) -> bool:
        return self._context.done()

    def cancelled(self) -> bool:
        return self._context.cancelled()

    async def abort(self, code: grpc.StatusCode, details: str) -> None:
        await self._context.abort(code, details)

    async def read(self) -> Any:
        if self.point is None:
            data = await self._context.read()
            if isinstance(data, bytes | bytearray):
                with contextlib.suppress(fr.ProtocolError):
                    kind, frame = fr.decode(bytes(data))
                    if kind == fr.HELLO:
                        self.point = self._points.get(bytes(frame.hello.session_id))
            if (
                self.point is not None
                and isinstance(data, bytes | bytearray)
                and self.point.look(bytes(data), "received")
            ):
                await self.point.after_fault(OSError)
            return data
        return await self.point.read(self._context.read, OSError)

    async def write(self, data: bytes) -> None:
        if self.point is None:
            await self._context.write(data)
            return
        await self.point.write(data, self._context.write, OSError)


async def connect(
    session: Session,
    target: str,
    tls: NodeTLS,
    limits: Limits,
    point: FaultPoint,
    session_ids: SessionIds | None = None,
) -> SessionResult:
    """``transport.run_client`` with the peer's faulty stream."""
    if session_ids is not None:
        session_ids.claim(session.session_id)
    options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", tls.server_name())]
    async with grpc.aio.secure_channel(target, tls.channel_credentials(), options=options) as channel:
        method = channel.stream_stream(METHOD_PATH, request_serializer=None, response_deserializer=None)
        call = method(timeout=limits.deadline_s + 2 * limits.abort_grace_s)
        return await drive(session, FaultyStream(call, limits.abort_grace_s, point), limits)


def end_bound(limits: Limits) -> float:
    """How long after its start a faulted session may take, on either side, before it counts as hung."""
    return limits.deadline_s + 2 * limits.abort_grace_s + SCHEDULING_ALLOWANCE_S


# -- one side's outcome, crash watch -----------------------------------------------------------------------------------


@dataclass
class Side:
    """How one side of one session ended, as the harness observed it."""

    party: Party
    opened: bool = True  # False: the node never saw the session's stream (withdrawn after its deadline)
    hung: bool = False
    killed: bool = False
    released: bool = False  # an output was available: from the session, its result, or a result file
    outputs: Any = None  # the peer's output bits; the node's result file outputs
    decoded: dict[str, Any] | None = (
        None  # the peer's outputs decoded by its compiled job (a retry, once judged)
    )
    store_status: str | None = None  # the node's job-store status of the attempt
    reason: str | None = None  # abort reason (snake case), "not_opened", or "node_stopped" for a killed peer
    message: str = ""
    by_peer: bool = False
    ended_after_s: float | None = None
    transcript: bytes | None = None


def released(session: Session) -> bool:
    """True if the session would hand out an output (it must not, unless it completed)."""
    try:
        session.outputs  # noqa: B018 - the property raises unless the session is done
    except NoOutputError:
        return False
    return True


def side_of(session: Session, result: SessionResult | None, ended_after_s: float | None) -> Side:
    side = Side(party=session.party, ended_after_s=ended_after_s)
    side.released = released(session) or (result is not None and result.outputs is not None)
    if result is not None:
        side.outputs = result.outputs
        side.transcript = result.transcript_digest
        if result.abort is not None:
            side.reason = result.abort.reason.name.lower()
            side.message = result.abort.message
            side.by_peer = result.abort.by_peer
    return side


class CrashWatch:
    """Counts what escaped: exceptions in event-loop callbacks and tasks, in threads, and errors logged by gRPC.

    It also keeps every Python log line emitted meanwhile at INFO and above (any logger: the level a node logs at,
    ``node.daemon.run_node``), for the secret scan.
    """

    def __init__(self) -> None:
        self.crashes: list[str] = []
        self.lines: list[str] = []
        self._handler = _ListHandler(self)
        self._old_hook = threading.excepthook
        self._old_level = logging.getLogger().level

    def loop_exception(self, _loop: asyncio.AbstractEventLoop, context: dict[str, Any]) -> None:
        exc = context.get("exception")
        self.crashes.append(
            f"event loop: {context.get('message')} ({type(exc).__name__ if exc else 'no exception'})"
        )

    def _thread_exception(self, args: threading.ExceptHookArgs) -> None:
        self.crashes.append(f"thread {args.thread.name if args.thread else '?'}: {args.exc_type.__name__}")

    def __enter__(self) -> CrashWatch:
        root = logging.getLogger()
        root.addHandler(self._handler)
        root.setLevel(min(root.level or logging.WARNING, logging.INFO))
        threading.excepthook = self._thread_exception
        with contextlib.suppress(RuntimeError):
            asyncio.get_running_loop().set_exception_handler(self.loop_exception)
        return self

    def __exit__(self, *_exc: object) -> None:
        root = logging.getLogger()
        root.removeHandler(self._handler)
        root.setLevel(self._old_level)
        threading.excepthook = self._old_hook
        with contextlib.suppress(RuntimeError):
            asyncio.get_running_loop().set_exception_handler(None)


class _ListHandler(logging.Handler):
    def __init__(self, watch: CrashWatch) -> None:
        super().__init__(logging.INFO)
        self._watch = watch

    def emit(self, record: logging.LogRecord) -> None:
        try:
            text = record.getMessage()
        except Exception:
            text = str(record.msg)
        if record.exc_info and record.exc_info[1] is not None:
            text += f" [{type(record.exc_info[1]).__name__}: {record.exc_info[1]}]"
        self._watch.lines.append(f"{record.name} {record.levelname} {text}")
        if record.levelno >= logging.ERROR and record.name.startswith(("grpc", "asyncio", "jointstat")):
            self._watch.crashes.append(f"logged by {record.name}: {text[:200]}")


# -- the peer: accepting the node's proposals, or proposing runs to the node -----------------------------------------------


@dataclass
class Accepted:
    """A session the peer accepted from the node's proposal."""

    session_id: bytes
    session: Session
    future: asyncio.Future[SessionResult]
    started: float


class HarnessAcceptor(SessionServer):
    """The peer as the accepting node of ``JOB_INITIATED``: answers the node's proposals and serves its sessions.

    ``plans[attempt]`` breaks the session of that attempt (its stream passes a :class:`FaultPoint`); ``ready``
    holds proposals back while the peer's log is away (a peer process has it).
    """

    def __init__(
        self, keys: PeerKeys, job: PeerJob, logged: LoggedNode, secrets: Secrets, fire: Fire, limits: Limits
    ) -> None:
        super().__init__(keys.tls(), limits=limits, services=[self._add_propose])
        self.job, self.logged, self.secrets, self.fire = job, logged, secrets, fire
        self.plans: dict[int, FaultPlan] = {}
        self.points: dict[bytes, FaultPoint] = {}
        self.accepted: dict[int, Accepted] = {}  # by attempt number (the latest run's)
        self.ready = asyncio.Event()
        self.ready.set()

    def _add_propose(self, server: grpc.aio.Server) -> None:
        from jointstat.node.jobs import PROPOSE_METHOD

        handler = grpc.unary_unary_rpc_method_handler(
            self._propose,
            request_deserializer=pb.RunProposal.FromString,
            response_serializer=pb.RunAnswer.SerializeToString,
        )
        server.add_generic_rpc_handlers(
            [grpc.method_handlers_generic_handler(SERVICE_NAME, {"Propose": handler})]
        )
        assert PROPOSE_METHOD == "Propose"

    async def _propose(self, request: pb.RunProposal, _context: grpc.aio.ServicerContext) -> pb.RunAnswer:
        await self.ready.wait()
        if request.job != JOB_INITIATED or bytes(request.manifest_digest) != self.job.digest:
            return pb.RunAnswer(
                accepted=False, reason=pb.REFUSAL_REASON_JOB_NOT_CONFIGURED, message="not this job"
            )
        sid = bytes(request.session_id)
        session = await asyncio.to_thread(self.logged.session, Party.EVALUATOR, sid, self.job)
        future = self.expect(session)
        self.points[sid] = FaultPoint(self.plans.pop(request.attempt, None), self.fire, self.secrets, sid)
        self.accepted[request.attempt] = Accepted(sid, session, future, time.monotonic())
        return pb.RunAnswer(accepted=True)

    async def _exchange(self, requests: object, context: grpc.aio.ServicerContext) -> None:
        await super()._exchange(requests, FaultyContext(context, self.points))  # type: ignore[arg-type]

    async def wait_for_attempt(self, attempt: int, timeout: float) -> Accepted | None:
        loop = asyncio.get_running_loop()
        end = loop.time() + timeout
        while attempt not in self.accepted:
            if loop.time() > end:
                return None
            await asyncio.sleep(0.02)
        return self.accepted.pop(attempt)

    async def outcome(self, acc: Accepted, phase: str | None) -> Side:
        """Wait for an accepted session: withdrawn if the node never opened it by the deadline; hung past the bound."""
        result: SessionResult | None = None
        limits = self._limits
        try:
            result = await asyncio.wait_for(asyncio.shield(acc.future), timeout=limits.deadline_s)
        except TimeoutError:
            if self.withdraw(acc.session_id):
                await asyncio.to_thread(
                    self.logged.ended, acc.session_id, None, duration_s=limits.deadline_s, phase=phase
                )
                side = side_of(acc.session, None, time.monotonic() - acc.started)
                side.opened, side.reason = False, "not_opened"
                side.message = "the node did not open the session in time"
                return side
            try:
                left = end_bound(limits) - (time.monotonic() - acc.started)
                result = await asyncio.wait_for(asyncio.shield(acc.future), timeout=max(left, 0.01))
            except TimeoutError:
                side = side_of(acc.session, None, None)
                side.hung = True
                return side
        elapsed = time.monotonic() - acc.started
        await asyncio.to_thread(self.logged.ended, acc.session_id, result, duration_s=elapsed, phase=phase)
        return side_of(acc.session, result, elapsed)


async def propose_run(
    keys: PeerKeys, job: PeerJob, logged: LoggedNode, *, node_port: int, session_id: bytes, attempt: int
) -> tuple[Session, pb.RunAnswer]:
    """The peer as the initiating node of ``JOB_ACCEPTED``: log the session's start, propose the run to the node.

    A refusal is logged as the session's abort (its reason the refusal code) and the session is failed.
    """
    from jointstat.node.jobs import REFUSAL_CODES, propose

    session = await asyncio.to_thread(logged.session, Party.GARBLER, session_id, job)
    proposal = pb.RunProposal(
        protocol_version=1,
        job=JOB_ACCEPTED,
        manifest_digest=job.digest,
        session_id=session_id,
        scheduled_for_us=round(time.time() * 1e6),
        role=pb.ROLE_GARBLER,
        attempt=attempt,
        trigger="operator",
    )
    answer = await propose(keys.node_identity(node_port), proposal)
    if not answer.accepted:
        code = REFUSAL_CODES.get(answer.reason, "refused")
        session.fail(AbortReason.SESSION_REFUSED, f"the node refused the run ({code}): {answer.message}")
        assert logged.log is not None
        await asyncio.to_thread(
            logged.log.session_aborted,
            session_id.hex(),
            reason=code,
            by="peer",
            phase="proposal",
            detail=safe_detail(answer.message),
        )
    return session, answer


async def play_initiated(
    session: Session,
    keys: PeerKeys,
    logged: LoggedNode,
    secrets: Secrets,
    *,
    target_port: int,
    plan: FaultPlan | None,
    fire: Fire | None,
    limits: Limits,
) -> tuple[Side, str | None]:
    """Play the garbler's side of an accepted session against ``target_port`` (the node, or a proxy before it)."""
    point = FaultPoint(plan, fire, secrets, session.session_id)
    t0 = time.monotonic()
    try:
        result = await asyncio.wait_for(
            connect(session, f"127.0.0.1:{target_port}", keys.tls(), limits, point, logged.ids),
            timeout=end_bound(limits),
        )
    except TimeoutError:
        side = side_of(session, None, None)
        side.hung = True
        return side, point.fired
    elapsed = time.monotonic() - t0
    phase = None if plan is None else plan.phase
    await asyncio.to_thread(logged.ended, session.session_id, result, duration_s=elapsed, phase=phase)
    return side_of(session, result, elapsed), point.fired


async def run_initiator(
    keys: PeerKeys,
    job: PeerJob,
    logged: LoggedNode,
    secrets: Secrets,
    *,
    node_port: int,
    target_port: int,
    session_id: bytes,
    attempt: int,
    plan: FaultPlan | None,
    fire: Fire | None,
    limits: Limits,
) -> tuple[Side, str | None]:
    """Propose the run (straight to the node), then play its session (to ``target_port``)."""
    t0 = time.monotonic()
    session, answer = await propose_run(
        keys, job, logged, node_port=node_port, session_id=session_id, attempt=attempt
    )
    if not answer.accepted:
        side = side_of(session, None, time.monotonic() - t0)
        side.opened, side.reason, side.message = False, "refused", answer.message
        return side, None
    return await play_initiated(
        session, keys, logged, secrets, target_port=target_port, plan=plan, fire=fire, limits=limits
    )


# -- the peer as a process of its own (the kill fault) -------------------------------------------------------------------


def peer_process_main(spec: dict[str, Any], conn: Connection) -> None:
    """Entry point of a peer process: play the peer's side of one session, SIGKILL itself at the planned frame."""
    try:
        asyncio.run(_peer_process(spec, conn))
    except BaseException as exc:
        with contextlib.suppress(Exception):
            conn.send({"error": f"{type(exc).__name__}: {exc}"})
    finally:
        conn.close()


async def _peer_process(spec: dict[str, Any], conn: Connection) -> None:
    keys = PeerKeys.load(Path(spec["keys"]))
    job = peer_job(JobFiles(*(Path(p) for p in spec["files"])))
    secrets = Secrets()
    logged = LoggedNode(keys, Path(spec["log"]), secrets)
    plan: FaultPlan = spec["plan"]
    limits: Limits = spec["limits"]

    def fire(_plan: FaultPlan, kind: str, direction: str) -> None:
        conn.send({"fired": f"{kind}, {direction}", "secrets": secrets.to_wire()})
        os.kill(os.getpid(), signal.SIGKILL)

    if spec["mode"] == "initiate":
        conn.send({"ready": True})
        await asyncio.to_thread(conn.recv)  # go
        side, _fired = await run_initiator(
            keys,
            job,
            logged,
            secrets,
            node_port=spec["node_port"],
            target_port=spec["node_port"],
            session_id=spec["session_id"],
            attempt=spec["attempt"],
            plan=plan,
            fire=fire,
            limits=limits,
        )
        conn.send(
            {"result": {"released": side.released, "reason": side.reason}, "secrets": secrets.to_wire()}
        )
    else:
        acceptor = HarnessAcceptor(keys, job, logged, secrets, fire, limits)
        acceptor.plans[1] = plan
        port = await acceptor.start()
        conn.send({"ready": True, "port": port})
        await asyncio.to_thread(conn.recv)  # stop (unless the planned fault killed this process first)
        await acceptor.stop(None)
    logged.close()


# -- the campaign --------------------------------------------------------------------------------------------------------


@dataclass
class SessionRecord:
    """One session of a campaign: what was planned, what each side did, and the verdict."""

    session_id: str  # hex, as both logs name it
    attempt: Literal["fault", "retry"]
    plan: FaultPlan | None
    node: Side
    peer: Side
    fired: str | None = None
    retry_of: str | None = None
    problems: list[str] = field(default_factory=list)
    verdict: str = "unjudged"


class NodeCampaign:
    """A running node under test and the harness peer; faulted sessions, each followed by its job's retry."""

    def __init__(
        self,
        workdir: Path,
        *,
        seed: int = 2027,
        limits: Limits = FAULT_LIMITS,
        max_sessions: int = 4,
        node_deadline_s: int = NODE_DEADLINE_S,
    ) -> None:
        self.workdir = Path(workdir)
        self.seed = seed
        self.limits = limits  # the peer's
        self.max_sessions = max_sessions
        self.node_deadline_s = node_deadline_s
        self.secrets = Secrets()
        self.records: list[SessionRecord] = []
        self.watch = CrashWatch()
        self.node: Any = None
        self._settings: contextlib.AbstractContextManager[None] | None = None
        self._store: Any = None

    # -- set-up ----------------------------------------------------------------------------------------------------------

    async def __aenter__(self) -> NodeCampaign:
        import sqlite3

        from jointstat.node.config import load_node_config
        from jointstat.node.daemon import Node
        from jointstat.node.trial import free_port, job_entry, make_trial_keys, node_config, write_config

        self.workdir.mkdir(parents=True, exist_ok=True)
        self.watch.__enter__()
        self.files = write_job_files(self.workdir / "job")
        trial = make_trial_keys(self.workdir / "keys", (NODE_NAME, PEER_NAME))
        self.keys = PeerKeys.load(trial.directory)
        self.job = peer_job(self.files)
        (self.workdir / PEER_NAME).mkdir(mode=0o700, exist_ok=True)
        self.peer_log = self.workdir / PEER_NAME / "sessions.jsonl"
        self.logged = LoggedNode(self.keys, self.peer_log, self.secrets)
        self.outbound = FaultProxy(0)  # the node's peer address: the node's sessions to the peer pass it
        await self.outbound.start()
        self.acceptor = HarnessAcceptor(
            self.keys, self.job, self.logged, self.secrets, self._fire_outbound, self.limits
        )
        self.outbound.target = await self.acceptor.start()
        entry = {"manifest": self.files.manifest, "peer": PEER_NAME, "csv": self.files.node_csv}
        config = node_config(
            name=NODE_NAME,
            peer=PEER_NAME,
            keys=trial,
            data_dir=self.workdir / NODE_NAME,
            listen_port=free_port(),
            peer_port=self.outbound.port,
            metrics_port=0,
            admin=f"127.0.0.1:{free_port()}",
            jobs=[
                job_entry(name=JOB_ACCEPTED, initiate=False, role="evaluator", **entry),  # type: ignore[arg-type]
                job_entry(  # type: ignore[arg-type]
                    name=JOB_INITIATED,
                    initiate=True,
                    role="garbler",
                    attempts=3,
                    backoff_seconds=RETRY_BACKOFF_S,
                    **entry,
                ),
            ],
            max_sessions=self.max_sessions,
            session_deadline_seconds=self.node_deadline_s,
        )
        path = write_config(self.workdir / f"{NODE_NAME}.yaml", config)
        self._settings = node_under_test_settings(self.secrets, float(self.node_deadline_s))
        self._settings.__enter__()
        self.node = Node(load_node_config(path))
        await self.node.start()
        self.node_port = int(self.node.peer_port)
        self.node_log = Path(self.node.config.node.session_log)
        store = Path(self.node.config.node.job_store)
        self._store = sqlite3.connect(f"file:{store}?mode=ro", uri=True, check_same_thread=False)
        return self

    async def __aexit__(self, *_exc: object) -> None:
        if self.node is not None:
            await self.node.stop()
        if self._store is not None:
            self._store.close()
        if self._settings is not None:
            self._settings.__exit__(None, None, None)
        await self.acceptor.stop(None)
        await self.outbound.close()
        self.logged.close()
        self.watch.__exit__()

    def _fire_outbound(self, plan: FaultPlan, _kind: str, _direction: str) -> None:
        if plan.kind == CUT:
            self.outbound.cut(plan.reset)
        elif plan.kind == STALL:
            self.outbound.stall()

    @property
    def node_bound(self) -> float:
        limits = self.node.state.limits
        return end_bound(limits)

    # -- the node's side, read from the node itself ------------------------------------------------------------------

    def _row(self, sid: str) -> tuple[str, str | None, str | None] | None:
        row = self._store.execute(
            "SELECT status, reason, result_path FROM runs WHERE session_id = ? ORDER BY id DESC LIMIT 1",
            (sid,),
        ).fetchone()
        return None if row is None else (str(row[0]), row[1], row[2])

    async def node_side(self, sid: str, party: Party, t0: float) -> Side:
        """The node's account of session ``sid``: its tracker, its job-store row and its result file."""
        state = self.node.state
        bound = self.node_bound
        while True:
            tracker = state.sessions.get(sid)
            row = self._row(sid)
            if tracker is not None and tracker.ended and row is not None and row[0] != "running":
                break
            if time.monotonic() - t0 > bound:
                side = Side(party=party, hung=True)
                side.message = f"tracker {'missing' if tracker is None else tracker.status}, store {row}"
                return side
            await asyncio.sleep(0.02)
        side = Side(party=party, ended_after_s=time.monotonic() - t0)
        status, reason, result_path = row
        side.store_status = status
        if status != "completed":
            side.reason = tracker.reason or status
            side.message = reason or ""
        results = list(Path(self.node.config.job(tracker.job).results).glob(f"*-{sid}.json"))
        side.released = result_path is not None or bool(results)
        if result_path is not None:
            side.outputs = json.loads(Path(result_path).read_text(encoding="utf-8"))["outputs"]
        return side

    # -- one faulted session and its retry, the node accepting ---------------------------------------------------------

    async def _peer_initiates(
        self, plan: FaultPlan | None, attempt: int, sid: bytes
    ) -> tuple[Side, str | None]:
        if plan is not None and plan.kind == KILL:
            self.logged.close()  # the peer process takes the log (one writer at a time)
            proc, conn, _ = await self._spawn("initiate", plan, sid, attempt)
            conn.send({"go": True})
            return await self._process_outcome(proc, conn, sid, Party.GARBLER)
        proxy = None
        if plan is not None:
            proxy = FaultProxy(self.node_port)
            await proxy.start()

        def fire(plan: FaultPlan, _kind: str, _direction: str) -> None:
            assert proxy is not None
            if plan.kind == CUT:
                proxy.cut(plan.reset)
            else:
                proxy.stall()

        try:
            return await run_initiator(
                self.keys,
                self.job,
                self.logged,
                self.secrets,
                node_port=self.node_port,
                target_port=self.node_port if proxy is None else proxy.port,
                session_id=sid,
                attempt=attempt,
                plan=plan,
                fire=fire if plan is not None else None,
                limits=self.limits,
            )
        finally:
            if proxy is not None:
                self._proxies.append(proxy)

    async def run_accepted(self, plan: FaultPlan | None, attempt: int = 1) -> SessionRecord:
        """One session of the job the node accepts: proposed by the peer, broken by ``plan`` (if any)."""
        self._proxies: list[FaultProxy] = []
        sid = os.urandom(16)
        t0 = time.monotonic()
        peer, fired = await self._peer_initiates(plan, attempt, sid)
        node = await self.node_side(sid.hex(), Party.EVALUATOR, t0)
        for proxy in self._proxies:
            await proxy.close()
        self._proxies.clear()
        return SessionRecord(sid.hex(), "fault" if plan is not None else "retry", plan, node, peer, fired)

    async def node_accepts(self, plan: FaultPlan) -> None:
        first = await self.run_accepted(plan, 1)
        retry = await self.run_accepted(None, 2)
        retry.retry_of = first.session_id
        self.records += [first, retry]

    # -- one faulted run with the node's own retry, the node initiating ------------------------------------------------

    async def node_initiates(self, plan: FaultPlan) -> None:
        proc = conn = None
        if plan.kind == KILL:
            self.logged.close()
            self.acceptor.ready.clear()
            proc, conn, port = await self._spawn("accept", plan, b"", 1)
            self.outbound.target = port
        else:
            self.acceptor.plans[1] = plan
        t0 = time.monotonic()
        started = await self.node.admin_run_job({"job": JOB_INITIATED})
        sid = str(started["session"])
        if proc is not None and conn is not None:

            def back_in_process() -> None:  # the peer node is back: its in-process acceptor takes the retry
                self.outbound.target = self.acceptor.port
                self.acceptor.ready.set()

            peer, fired = await self._process_outcome(
                proc, conn, bytes.fromhex(sid), Party.EVALUATOR, back_in_process
            )
        else:
            acc = await self.acceptor.wait_for_attempt(1, self.node_bound)
            if acc is None:
                peer, fired = Side(party=Party.EVALUATOR, hung=True, message="no proposal came"), None
            else:
                peer = await self.acceptor.outcome(acc, plan.phase)
                fired = self.acceptor.points.pop(acc.session_id).fired
        node = await self.node_side(sid, Party.GARBLER, t0)
        self.outbound.clear()
        self.acceptor.plans.clear()
        attempts = [(sid, plan, node, peer, fired)]
        acc = await self.acceptor.wait_for_attempt(2, RETRY_BACKOFF_S * 2 + self.node_bound)
        if acc is None:
            missing = Side(party=Party.GARBLER, hung=True, message="the node did not retry the job")
            attempts.append((f"{sid}-retry", None, missing, Side(party=Party.EVALUATOR), None))
        else:
            t1 = time.monotonic()
            peer = await self.acceptor.outcome(acc, None)
            self.acceptor.points.pop(acc.session_id, None)
            node = await self.node_side(acc.session_id.hex(), Party.GARBLER, t1)
            attempts.append((acc.session_id.hex(), None, node, peer, None))
        self._add(attempts)

    def _add(self, attempts: list[tuple[str, FaultPlan | None, Side, Side, str | None]]) -> None:
        first = attempts[0][0]
        for i, (sid, plan, node, peer, fired) in enumerate(attempts):
            kind: Literal["fault", "retry"] = "fault" if i == 0 else "retry"
            self.records.append(SessionRecord(sid, kind, plan, node, peer, fired, None if i == 0 else first))

    # -- the peer process ----------------------------------------------------------------------------------------------

    async def _spawn(
        self, mode: str, plan: FaultPlan, sid: bytes, attempt: int
    ) -> tuple[Any, Connection, int]:
        spec = {
            "mode": mode,
            "keys": str(self.keys.directory),
            "files": [str(self.files.manifest), str(self.files.node_csv), str(self.files.peer_csv)],
            "log": str(self.peer_log),
            "plan": plan,
            "session_id": sid,
            "attempt": attempt,
            "node_port": self.node_port,
            "limits": self.limits,
        }
        ctx = mp.get_context("spawn")
        parent, child = ctx.Pipe()
        proc = ctx.Process(
            target=peer_process_main, args=(spec, child), name="jointstat-fault-peer", daemon=True
        )
        proc.start()
        child.close()
        if not await asyncio.to_thread(parent.poll, 120):
            proc.kill()
            raise RuntimeError("the peer process did not start within 120 s")
        try:
            message = parent.recv()
        except EOFError:
            message = {"error": f"it exited with code {proc.exitcode} before it was ready"}
        if "ready" not in message:
            proc.kill()
            raise RuntimeError(f"the peer process failed to start: {message.get('error')}")
        return proc, parent, int(message.get("port", 0))

    async def _process_outcome(
        self,
        proc: Any,
        conn: Connection,
        sid: bytes,
        party: Party,
        on_death: Callable[[], None] | None = None,
    ) -> tuple[Side, str | None]:
        t0 = time.monotonic()
        fired: str | None = None
        side = Side(party=party)
        deadline = t0 + end_bound(self.limits) + self.node_bound
        while True:
            left = deadline - time.monotonic()
            if left <= 0 or not await asyncio.to_thread(conn.poll, left):
                side.hung = True
                break
            try:
                message = conn.recv()
            except EOFError:  # the process is gone
                break
            if "secrets" in message:
                self.secrets.merge(Secrets.from_wire(message["secrets"]))
            if "fired" in message:
                fired = message["fired"]
            if "result" in message:
                side.released = bool(message["result"]["released"])
                side.reason = message["result"]["reason"]
                with contextlib.suppress(OSError):
                    conn.send({"stop": True})
            if "error" in message:
                self.watch.crashes.append(f"peer process: {message['error']}")
        await asyncio.to_thread(proc.join, 10)
        if proc.is_alive():
            proc.kill()
            await asyncio.to_thread(proc.join)
            side.hung = True
        side.killed = proc.exitcode == -signal.SIGKILL
        if fired is not None and not side.killed:
            self.watch.crashes.append(
                f"the peer process fired its fault but ended with exit code {proc.exitcode}"
            )
        side.ended_after_s = None if side.hung else time.monotonic() - t0
        left_open = await asyncio.to_thread(self.logged.reopen)  # the peer node comes back
        if on_death is not None:
            on_death()
        if side.killed:
            side.reason = "node_restarted" if sid.hex() in left_open else side.reason
            side.message = "the peer process was killed; its log closed the session when it came back"
        return side, fired

    # -- the whole ------------------------------------------------------------------------------------------------------

    def scan(self) -> tuple[list[Finding], list[tuple[str, str]]]:
        """Search both session logs, the Python log, the node's job store and the abort messages for every secret
        the run made (Δs, labels, both schemes' input figures). Returns the findings and the texts searched."""
        for value in NODE_METRES + PEER_METRES:
            self.secrets.add_value(value)
        texts = [
            ("python log", "\n".join(self.watch.lines)),
            ("node job store", _store_text(Path(self.node.config.node.job_store))),
            ("abort messages", "\n".join(f"{r.node.message}\n{r.peer.message}" for r in self.records)),
        ]
        return scan_for_secrets(self.secrets, [self.node_log, self.peer_log], texts), texts

    async def run(self, sessions: int) -> list[SessionRecord]:
        """``sessions`` sessions: faulted ones, each followed by its job's retry (the last may have none)."""
        if sessions < 1:
            raise ValueError(f"sessions must be at least 1, got {sessions}")
        plans = make_plans(-(-sessions // 2), self.seed, self.job.layered)
        for plan in plans:
            if plan.node_role == Party.GARBLER:
                await self.node_initiates(plan)
            else:
                await self.node_accepts(plan)
        del self.records[sessions:]
        return self.records


# -- judging a campaign ------------------------------------------------------------------------------------------------------

NODE_REASONS = {
    CUT: {"connection_lost", "deadline", "peer_never_connected"},
    KILL: {"connection_lost", "deadline", "peer_never_connected"},
    STALL: {"deadline", "connection_lost", "peer_never_connected"},
}
PEER_REASONS = {
    CUT: {"connection_lost", "deadline", "not_opened"},
    KILL: {"node_restarted"},
    STALL: {"deadline", "connection_lost", "not_opened"},
}


def judge(campaign: NodeCampaign) -> list[str]:
    """Give every record its verdict and problems, from both sides' outcomes and both verified logs.

    Returns the problems that belong to no single session (a log that does not verify, say).
    """
    node_key = campaign.keys.node_key
    peer_key = campaign.keys.signing_key.public_key()
    reports = {
        "node": verify_log(campaign.node_log, node_key),
        "peer": verify_log(campaign.peer_log, peer_key),
    }
    general = [f"{name} log does not verify: {r.problem}" for name, r in reports.items() if not r.ok]
    compared = compare_logs(campaign.node_log, campaign.peer_log, mine_key=node_key, theirs_key=peer_key)
    by_id = {r.session_id: r for r in campaign.records}
    expected = expected_result()
    for record in campaign.records:
        sid, problems = record.session_id, record.problems
        problems += [p for p in compared.problems if f"session {sid}:" in p]
        sides = {"node": record.node, "peer": record.peer}
        states = {name: reports[name].sessions.get(sid) for name in sides}
        bounds = {"node": campaign.node_bound, "peer": end_bound(campaign.limits) + campaign.node_bound}
        if record.node.hung or record.peer.hung:
            record.verdict = "hung"
            problems += [f"{n} did not end ({s.message})" for n, s in sides.items() if s.hung]
            continue
        if record.attempt == "fault":
            plan = record.plan
            assert plan is not None
            if record.node.released or record.peer.released:
                record.verdict = "released_wrongly"
                continue
            if record.fired is None:
                problems.append("the planned fault never fired")
            allowed = {"node": NODE_REASONS[plan.kind], "peer": PEER_REASONS[plan.kind]}
            for name, side in sides.items():
                state = states[name]
                if side.reason is None:
                    problems.append(f"{name} ended without an abort reason")
                elif side.reason not in allowed[name]:
                    problems.append(
                        f"{name} aborted for {side.reason!r}, which a {plan.kind} does not explain"
                    )
                if side.ended_after_s is None or side.ended_after_s > bounds[name]:
                    problems.append(f"{name} ended after {side.ended_after_s} s, beyond {bounds[name]:g} s")
                if state is None or state.outcome != "aborted":
                    problems.append(f"{name} log: {'no such session' if state is None else state.outcome}")
            if record.node.store_status != "aborted":
                problems.append(f"node job store: {record.node.store_status}, not aborted")
            record.verdict = "unclean" if problems else "aborted_cleanly"
            continue
        wrong = False
        node_out = record.node.outputs
        if node_out is None:
            problems.append(f"node did not complete ({record.node.reason}: {record.node.message[:160]})")
        elif node_out != expected:
            wrong = True
            problems.append("node released a wrong result")
        if record.peer.outputs is None:
            problems.append(f"peer did not complete ({record.peer.reason}: {record.peer.message[:160]})")
        else:
            decoded = campaign.job.compiled.decode(record.peer.party, record.peer.outputs)
            record.peer.decoded = {k: decoded.get(k) for k in expected}
            if record.peer.decoded != expected:
                wrong = True
                problems.append("peer released a wrong result")
        for name, state in states.items():
            if state is None or state.outcome != "completed":
                problems.append(f"{name} log: {'no such session' if state is None else state.outcome}")
        if all(s is not None for s in states.values()) and states["node"].digest != states["peer"].digest:  # type: ignore[union-attr]
            problems.append("the two logs hold different transcript digests")
        problems += freshness_problems(campaign.secrets, by_id.get(record.retry_of or ""), record)
        record.verdict = "released_wrongly" if wrong else ("unclean" if problems else "completed")
    return general


def freshness_problems(secrets: Secrets, before: SessionRecord | None, retry: SessionRecord) -> list[str]:
    """What is not fresh in the retry: its Δ equal to the faulted attempt's, or any label shared with it."""
    problems = []
    delta = secrets.deltas.get(retry.session_id)
    if delta is None:
        problems.append("no Δ was recorded for the retry")
    if not secrets.labels.get(retry.session_id):
        problems.append("no labels were recorded for the retry")
    if before is None:
        return problems
    if delta is not None and delta == secrets.deltas.get(before.session_id):
        problems.append("the retry garbled with the faulted attempt's Δ")
    shared = secrets.labels.get(retry.session_id, set()) & secrets.labels.get(before.session_id, set())
    if shared:
        problems.append(f"the retry used {len(shared)} labels of the faulted attempt")
    return problems


# -- throw-away identities for the fuzzer ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class Identity:
    """One node's name, TLS certificate and key, and Ed25519 log-signing key."""

    name: str
    issued: Issued
    signing_key: Ed25519PrivateKey

    @property
    def public_key(self) -> Ed25519PublicKey:
        return self.signing_key.public_key()


@dataclass(frozen=True)
class Pair:
    """Two nodes' identities for fuzzing a session server (each pins the other's certificate)."""

    node: Identity
    peer: Identity

    @classmethod
    def fresh(cls, node: str = "riverside-bikes", peer: str = "hillside-bikes") -> Pair:
        ca = new_ca("bicycle schemes trial CA")
        return cls(
            Identity(node, issue(ca, f"{node}.test"), Ed25519PrivateKey.generate()),
            Identity(peer, issue(ca, f"{peer}.test"), Ed25519PrivateKey.generate()),
        )

    def node_tls(self) -> NodeTLS:
        return node_tls(self.node.issued, self.peer.issued)

    def peer_tls(self) -> NodeTLS:
        return node_tls(self.peer.issued, self.node.issued)


# -- frame fuzzing ------------------------------------------------------------------------------------------------------------

BIT_FLIP, TRUNCATE, OVERSIZED, UNKNOWN_TYPE, OUT_OF_ORDER = (
    "bit_flip",
    "truncate",
    "oversized_length",
    "unknown_type",
    "out_of_order",
)
MUTATIONS = (BIT_FLIP, TRUNCATE, OVERSIZED, UNKNOWN_TYPE, OUT_OF_ORDER)
FUZZ_LIMITS = Limits(deadline_s=5.0, idle_timeout_s=0.5, abort_grace_s=0.1)
FUZZ_CHUNK_BYTES = 128  # 4 garbled AND gates per frame: several table frames even for tiny circuits
FUZZ_CONCURRENCY = 4
WIRE_SAMPLE = 200  # fuzz cases sent over real TLS
SECRET_SAMPLE = 25  # one case in this many records its Δ and labels, to scan the abort messages for
TRACED_CASES = 500  # the last in-process cases, run under tracemalloc
HUGE_LENGTHS = (2**31 - 1, 2**32 + 5, 2**63 - 1, 2**64 - 1)
FUZZ_MANIFEST_DIGEST = hashlib.sha256(b"invented manifest: fuzzing a bicycle-share node").digest()


def plain_circuit() -> LayeredCircuit:
    """A fuzzing job without oblivious transfer: the evaluator has no input; 16 AND gates, 4 table frames."""
    bld = Builder()
    a = bld.input(Party.GARBLER, 16)
    bld.output(Party.EVALUATOR, bld.and_(a[:8], a[8:]))
    bld.output(Party.GARBLER, bld.or_(a[:8], a[8:]))
    return schedule(bld.build())


def small_ot_circuit() -> LayeredCircuit:
    """A fuzzing job with oblivious transfer for 8 evaluator inputs; 16 AND gates, 4 table frames."""
    bld = Builder()
    a = bld.input(Party.GARBLER, 8)
    b = bld.input(Party.EVALUATOR, 8)
    bld.output(Party.EVALUATOR, bld.and_(a, b))
    bld.output(Party.GARBLER, bld.or_(a, b))
    return schedule(bld.build())


def _varint(value: int) -> bytes:
    out = bytearray()
    while True:
        byte = value & 0x7F
        value >>= 7
        if value:
            out.append(byte | 0x80)
        else:
            out.append(byte)
            return bytes(out)


def _read_varint(data: bytes, at: int) -> tuple[int, int] | None:
    """(value, position after it), or None if the bytes end inside it."""
    value, shift = 0, 0
    while at < len(data) and shift < 70:
        byte = data[at]
        value |= (byte & 0x7F) << shift
        at += 1
        if not byte & 0x80:
            return value, at
        shift += 7
    return None


def mutate(
    data: bytes, how: str, rng: np.random.Generator, references: list[bytes], previous: bytes | None = None
) -> list[bytes]:
    """The frames sent in place of the valid frame ``data``, mutated ``how`` (see the module docstring).

    ``references`` are valid frames of another session (for frames out of order), ``previous`` the frame this
    session sent before ``data``.
    """
    if how == BIT_FLIP:
        out = bytearray(data)
        for pos in rng.choice(
            8 * len(out), size=min(int(rng.choice([1, 1, 2, 3, 8])), 8 * len(out)), replace=False
        ):
            out[int(pos) // 8] ^= 1 << (int(pos) % 8)
        return [bytes(out)]
    if how == TRUNCATE:
        return [data[: int(rng.integers(len(data)))]]
    if how == OVERSIZED:
        if rng.random() < 0.01:  # the whole frame beyond the 4 MiB limit
            return [fr.payload_frame(fr.GARBLED_TABLES, bytes(32)) + bytes(fr.MAX_FRAME_BYTES)]
        # A length prefix claiming more bytes than its message holds: the frame body's own (after the frame's tag),
        # or that of the body's first field when that field is length-delimited.
        outer = _read_varint(data, 1)
        assert outer is not None
        length, body_at = outer
        at, after, room = 1, body_at, len(data) - body_at
        if rng.random() < 0.5 and body_at + 1 < len(data) and data[body_at] & 7 == 2:
            inner = _read_varint(data, body_at + 1)
            if inner is not None:
                at, after = body_at + 1, inner[1]
                room = body_at + length - after
        claim = int(rng.choice([room + 1, room + 1 + int(rng.integers(1, 1 << 20)), *HUGE_LENGTHS]))
        return [data[:at] + _varint(claim) + data[after:]]
    if how == UNKNOWN_TYPE:
        parsed = _read_varint(data, 0)
        assert parsed is not None
        _, after = parsed
        if rng.random() < 0.2:  # a known frame type with the wrong wire type (a number, not a message)
            field_number = int(rng.integers(1, 10))
            return [_varint(field_number << 3) + _varint(int(rng.integers(1 << 20))) + data[after:]]
        field_number = int(rng.choice([int(rng.integers(10, 16)), int(rng.integers(16, 2048)), 2**29 - 1]))
        return [_varint(field_number << 3 | 2) + data[after:]]
    if how == OUT_OF_ORDER:
        kind = fr.decode(data)[0]
        choice = rng.random()
        same = [r for r in references if fr.decode(r)[0] == kind]
        other = [r for r in references if fr.decode(r)[0] not in (kind, fr.ABORT)]
        if choice < 0.4 and other:  # a valid frame of another type first
            return [other[int(rng.integers(len(other)))], data]
        if choice < 0.7 and same:  # the same kind of frame from another session, instead of this one
            return [same[int(rng.integers(len(same)))]]
        if previous is not None:  # the previous frame of this session again, before this one
            return [previous, data]
        return [other[int(rng.integers(len(other)))], data]
    raise ValueError(f"unknown mutation {how!r}")


@dataclass(frozen=True)
class FuzzCase:
    """One mutated frame: in a session on ``circuit`` with the node as ``node_role``, the peer's ``target``-th frame."""

    index: int
    circuit: Literal["plain", "ot"]
    node_role: Party
    target: int
    mutation: str
    seed: int
    wire: bool = False


@dataclass
class FuzzOutcome:
    case: FuzzCase
    verdict: Literal["rejected", "accepted", "hung", "crash"] = "hung"
    reason: str | None = None
    message: str = ""
    by_peer: bool = False
    refused_first_frame: bool = False
    frames_sent: int = 0


class _FakeContext:
    """What ``SessionServer``'s stream handler uses of a gRPC servicer context, over two in-process queues."""

    def __init__(self, peer_certificate: bytes) -> None:
        self.to_node: asyncio.Queue[bytes | None] = asyncio.Queue()
        self.to_peer: asyncio.Queue[bytes | None] = asyncio.Queue()
        self._auth = {
            "transport_security_type": [b"ssl"],
            "ssl_tls_version": [b"TLSv1.3"],
            "x509_pem_cert": [peer_certificate],
        }
        self.ended = False
        self.written: list[bytes] = []

    def auth_context(self) -> dict[str, list[bytes]]:
        return self._auth

    async def read(self) -> Any:
        data = await self.to_node.get()
        return grpc.aio.EOF if data is None else data

    async def write(self, data: bytes) -> None:
        self.written.append(data)
        self.to_peer.put_nowait(data)

    def done(self) -> bool:
        return self.ended

    def cancelled(self) -> bool:
        return False

    async def abort(self, code: grpc.StatusCode, details: str) -> None:
        raise RuntimeError(f"the stream was refused: {code.name}: {details}")


class Fuzzer:
    """Sends mutated frames to a node (a ``SessionServer``) from an honest peer session that plays on."""

    def __init__(self, seed: int = 4099, limits: Limits = FUZZ_LIMITS) -> None:
        self.seed = seed
        self.limits = limits
        self.pair = Pair.fresh()
        self.gk, self.ek = self.pair.node.signing_key, self.pair.peer.signing_key
        self.secrets = Secrets()
        self.circuits = {"plain": plain_circuit(), "ot": small_ot_circuit()}
        self.references: dict[tuple[str, Party], list[bytes]] = {}
        self.peer_frames: dict[tuple[str, Party], int] = {}
        self.outcomes: list[FuzzOutcome] = []
        self.crashes: list[str] = []
        self.log_lines: list[str] = []
        self.refusals_kept = 0
        self._record_references()

    # -- sessions ------------------------------------------------------------------------------------------------------

    def _sessions(
        self, circuit: str, node_role: Party, sid: bytes, seed: int, record: bool = True
    ) -> tuple[Session, Session]:
        """(the node's session, the peer's session) with invented inputs; with ``record``, they record secrets."""
        from jointstat.protocol.signing import signer, verifier

        layered = self.circuits[circuit]
        rng = np.random.default_rng(seed)
        keys = {node_role: self.gk, Party.EVALUATOR if node_role == Party.GARBLER else Party.GARBLER: self.ek}
        out: dict[Party, Session] = {}
        for party in Party:
            other = Party.EVALUATOR if party == Party.GARBLER else Party.GARBLER
            common: dict[str, Any] = {
                "session_id": sid,
                "layered": layered,
                "manifest_digest": FUZZ_MANIFEST_DIGEST,
                "inputs": rng.integers(0, 2, layered.circuit.n_inputs(party), dtype=np.uint8),
                "sign": signer(keys[party]),
                "verify": verifier(keys[other].public_key()),
            }
            session: RecordingGarbler | RecordingEvaluator
            if party == Party.GARBLER:
                session = RecordingGarbler(chunk_bytes=FUZZ_CHUNK_BYTES, **common)
            else:
                session = RecordingEvaluator(**common)
            session.secrets = self.secrets if record else None
            out[party] = session
        peer_role = Party.EVALUATOR if node_role == Party.GARBLER else Party.GARBLER
        return out[node_role], out[peer_role]

    def _record_references(self) -> None:
        """One honest in-memory session per circuit: its frames are the valid frames sent out of order."""
        from jointstat.protocol.pipe import run_in_memory

        for circuit in self.circuits:
            seen: list[tuple[Party, bytes]] = []
            node, peer = self._sessions(circuit, Party.GARBLER, b"reference-" + circuit.encode(), 1)
            assert isinstance(node, GarblerSession) and isinstance(peer, EvaluatorSession)

            def keep(to: Party, data: bytes, seen: list[tuple[Party, bytes]] = seen) -> list[bytes]:
                seen.append((to, data))
                return [data]

            run_in_memory(node, peer, intercept=keep)
            if not (node.done and peer.done):
                raise RuntimeError(f"the reference session on the {circuit} circuit did not complete")
            frames = [data for _, data in seen]
            for node_role in Party:
                self.references[(circuit, node_role)] = frames
                # Frames the peer sends: those delivered to the node's role.
                self.peer_frames[(circuit, node_role)] = sum(1 for to, _ in seen if to == node_role)

    def plan(self, count: int, *, ot_share: float = 0.05, wire: int = 0) -> list[FuzzCase]:
        """``count`` cases, mutations in turn, ``ot_share`` of them on the circuit with oblivious transfer."""
        rng = np.random.default_rng(self.seed)
        cases = []
        for i in range(count):
            circuit: Literal["plain", "ot"] = "ot" if rng.random() < ot_share else "plain"
            role = Party.GARBLER if rng.integers(2) else Party.EVALUATOR
            target = int(rng.integers(self.peer_frames[(circuit, role)]))
            cases.append(
                FuzzCase(
                    i,
                    circuit,
                    role,
                    target,
                    MUTATIONS[i % len(MUTATIONS)],
                    int(rng.integers(2**62)),
                    i < wire,
                )
            )
        return cases

    # -- one case --------------------------------------------------------------------------------------------------------

    async def _play_peer(
        self,
        case: FuzzCase,
        peer: Session,
        send_frame: Callable[[bytes], Any],
        next_frame: Callable[[], Any],
        outcome: FuzzOutcome,
    ) -> None:
        rng = np.random.default_rng(case.seed)
        references = self.references[(case.circuit, case.node_role)]
        sent = 0

        previous: bytes | None = None

        async def send(frames: list[bytes]) -> None:
            nonlocal sent, previous
            for data in frames:
                chosen = (
                    mutate(data, case.mutation, rng, references, previous) if sent == case.target else [data]
                )
                for f in chosen:
                    await send_frame(f)
                    outcome.frames_sent += 1
                sent += 1
                previous = data

        await send(peer.start())
        while True:
            data = await next_frame()
            if data is None:
                return
            try:
                replies = peer.receive(data)  # inline: a tiny circuit, and thread hops would dominate
            except fr.ProtocolError as exc:
                if exc.frame is not None:
                    await send_frame(exc.frame)
                continue  # read on until the node closes the stream
            await send(replies)
            if isinstance(peer, GarblerSession) and peer.ready_to_stream:
                try:
                    streamed = list(peer.produce())
                except fr.ProtocolError as exc:
                    streamed = [exc.frame] if exc.frame is not None else []
                await send(streamed)

    def _judge(
        self,
        outcome: FuzzOutcome,
        future: asyncio.Future[SessionResult],
        written: list[bytes],
        transport_error: str | None = None,
    ) -> None:
        """The verdict: the node's session result if it started, else the refusal it wrote (or gRPC's status)."""
        if future.done() and not future.cancelled():
            result = future.result()
            if result.completed:
                outcome.verdict = "accepted"
                return
            assert result.abort is not None
            outcome.reason = result.abort.reason.name.lower()
            outcome.message = result.abort.message
            outcome.by_peer = result.abort.by_peer
        else:
            outcome.refused_first_frame = True
            aborts = [f for k, f in (fr.decode(w) for w in written) if k == fr.ABORT]
            if aborts:
                outcome.reason = AbortReason(aborts[-1].abort.reason).name.lower()
                outcome.message = aborts[-1].abort.message
            elif transport_error is not None:  # refused by gRPC below the session (a frame over 4 MiB)
                outcome.reason, outcome.message = "transport", transport_error
        if outcome.by_peer:  # the honest peer found the damage first and told the node, which ended with it
            outcome.verdict = "rejected"
        elif outcome.reason in (None, "unspecified", "internal") or not outcome.message:
            outcome.verdict = "crash"
            self.crashes.append(
                f"case {outcome.case.index}: the node ended without a clear reason ({outcome.reason})"
            )
        else:
            outcome.verdict = "rejected"

    def _bound(self) -> float:
        return self.limits.deadline_s + 2 * self.limits.abort_grace_s + SCHEDULING_ALLOWANCE_S

    async def run_case_in_process(self, server: SessionServer, case: FuzzCase) -> FuzzOutcome:
        """One case through the server's own stream handler, on an in-process stream."""
        outcome = FuzzOutcome(case)
        sid = hashlib.sha256(b"fuzz %d %d" % (self.seed, case.index)).digest()[:16]
        record = case.index % SECRET_SAMPLE == 0
        node, peer = self._sessions(case.circuit, case.node_role, sid, case.seed, record)
        future = server.expect(node)
        ctx = _FakeContext(self.pair.peer.issued.certificate)
        handler = asyncio.create_task(server._exchange(None, ctx))
        handler.add_done_callback(lambda _t: ctx.to_peer.put_nowait(None))
        peer_task = asyncio.create_task(
            self._play_peer(case, peer, ctx.to_node.put, ctx.to_peer.get, outcome)
        )
        ended = False
        try:
            await asyncio.wait_for(asyncio.shield(handler), timeout=self._bound())
            ended = True
        except TimeoutError:
            handler.cancel()
        except Exception as exc:
            self.crashes.append(f"case {case.index}: the stream handler raised {type(exc).__name__}: {exc}")
            outcome.verdict = "crash"
        ctx.ended = True
        ctx.to_node.put_nowait(None)
        try:
            await asyncio.wait_for(peer_task, timeout=self._bound())
        except (TimeoutError, asyncio.CancelledError):
            self.crashes.append(f"case {case.index}: the fuzzing peer did not stop")
        except Exception as exc:
            self.crashes.append(f"case {case.index}: the fuzzing peer failed: {type(exc).__name__}: {exc}")
        server.withdraw(sid)
        if ended:
            self._judge(outcome, future, ctx.written)
        return outcome

    async def run_case_on_wire(
        self, server: SessionServer, channel: grpc.aio.Channel, case: FuzzCase
    ) -> FuzzOutcome:
        """One case over real TLS to a started server."""
        outcome = FuzzOutcome(case)
        sid = hashlib.sha256(b"fuzz wire %d %d" % (self.seed, case.index)).digest()[:16]
        record = case.index % SECRET_SAMPLE == 0
        node, peer = self._sessions(case.circuit, case.node_role, sid, case.seed, record)
        future = server.expect(node)
        call = channel.stream_stream(METHOD_PATH)(timeout=self._bound())
        written: list[bytes] = []
        errors: list[str] = []

        async def next_frame() -> bytes | None:
            try:
                data = await call.read()
            except grpc.aio.AioRpcError as exc:
                errors.append(f"{exc.code().name}: {exc.details()}")
                return None
            if data is grpc.aio.EOF:
                return None
            written.append(bytes(data))
            return bytes(data)

        async def send_frame(data: bytes) -> None:
            with contextlib.suppress(grpc.aio.AioRpcError, asyncio.InvalidStateError, grpc.aio.UsageError):
                await call.write(data)

        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(
                self._play_peer(case, peer, send_frame, next_frame, outcome), timeout=self._bound()
            )
        if node.state != "new":  # it started: it must end by its own limits
            with contextlib.suppress(TimeoutError, asyncio.CancelledError):
                await asyncio.wait_for(asyncio.shield(future), timeout=self._bound())
        call.cancel()
        if not future.done() and not server.withdraw(sid):
            return outcome  # started, and still running past the bound: hung
        self._judge(outcome, future, written, errors[-1] if errors else None)
        return outcome

    # -- many cases ---------------------------------------------------------------------------------------------------------

    async def run(
        self, count: int, *, wire: int = WIRE_SAMPLE, concurrency: int = FUZZ_CONCURRENCY
    ) -> dict[str, Any]:
        """``count`` cases (``wire`` of them over TLS); returns the figures. Outcomes are in ``self.outcomes``.

        Memory: the resident set size after a warm-up tenth of the in-process cases and after the rest; then a
        last slice of cases runs under ``tracemalloc``, and what the node's code (``jointstat`` outside
        ``bench``) still holds afterwards is reported per case.
        """
        import gc
        import tracemalloc

        cases = self.plan(count, wire=min(wire, count))
        queue = [c for c in cases if not c.wire]
        warm = max(1, len(queue) // 10)
        traced = min(TRACED_CASES, max(0, len(queue) - warm) // 2)
        batches = (queue[:warm], queue[warm : len(queue) - traced], queue[len(queue) - traced :])
        server = SessionServer(self.pair.node_tls(), limits=self.limits)  # its stream handler, in-process
        rss: list[float] = []
        retained = 0

        async def worker(items: list[FuzzCase]) -> None:
            for case in items:
                self._keep(await self.run_case_in_process(server, case))

        with CrashWatch() as watch:
            for i, batch in enumerate(batches):
                if i == 2 and batch:
                    gc.collect()
                    tracemalloc.start()
                    before = tracemalloc.take_snapshot()
                await asyncio.gather(*(worker(batch[j::concurrency]) for j in range(concurrency)))
                if i == 2 and batch:
                    gc.collect()
                    after = tracemalloc.take_snapshot()
                    tracemalloc.stop()
                    retained = _node_retained(before, after)
                gc.collect()
                rss.append(resident_mib())
            wire_cases = [c for c in cases if c.wire]
            if wire_cases:
                await self._run_wire(wire_cases, concurrency)
            control = await self._control_session()
        self.crashes += watch.crashes
        self.log_lines = watch.lines
        self.refusals_kept = len(server.refused)
        verdicts = Counter(o.verdict for o in self.outcomes)
        return {
            "frames_fuzzed": sum(1 for o in self.outcomes if o.frames_sent),
            "fuzz_rejected": verdicts["rejected"],
            "fuzz_accepted": verdicts["accepted"],
            "fuzz_hung": verdicts["hung"],
            "fuzz_crashes": len(self.crashes),
            "fuzz_over_the_wire": len(wire_cases),
            "fuzz_rss_growth_mib": round(rss[-1] - rss[0], 1),
            "fuzz_node_retained_bytes_per_case": round(retained / traced, 1) if traced else None,
            "node_serves_after_fuzzing": control,
        }

    def _keep(self, outcome: FuzzOutcome) -> None:
        """Keep the outcome; the message only where it matters (a problem, or a case whose secrets are recorded)."""
        if outcome.verdict == "rejected" and outcome.case.index % SECRET_SAMPLE:
            outcome.message = ""
        self.outcomes.append(outcome)

    async def _run_wire(self, cases: list[FuzzCase], concurrency: int) -> None:
        async with SessionServer(self.pair.node_tls(), limits=self.limits) as server:
            tls = self.pair.peer_tls()
            options = [
                ("grpc.ssl_target_name_override", tls.server_name()),
                (
                    "grpc.max_send_message_length",
                    -1,
                ),  # let a frame over 4 MiB reach the node, which must refuse it
                ("grpc.max_receive_message_length", fr.MAX_FRAME_BYTES),
            ]
            async with grpc.aio.secure_channel(
                f"127.0.0.1:{server.port}", tls.channel_credentials(), options=options
            ) as channel:

                async def worker(items: list[FuzzCase]) -> None:
                    for case in items:
                        self._keep(await self.run_case_on_wire(server, channel, case))

                await asyncio.gather(*(worker(cases[i::concurrency]) for i in range(concurrency)))

    async def _control_session(self) -> bool:
        """After all the fuzzing, an honest session on a server of the same node completes."""
        async with SessionServer(self.pair.node_tls(), limits=self.limits) as server:
            sid = b"fuzz control session"
            node, peer = self._sessions("ot", Party.GARBLER, sid, 5)
            future = server.expect(node)
            from jointstat.transport.client import run_client

            result = await run_client(
                peer, f"127.0.0.1:{server.port}", self.pair.peer_tls(), limits=self.limits
            )
            served = await asyncio.wait_for(future, timeout=self._bound())
        return result.completed and served.completed


def resident_mib() -> float:
    """This process's resident set size now (VmRSS), in MiB."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    raise RuntimeError("no VmRSS in /proc/self/status")


def _node_retained(before: Any, after: Any) -> int:
    """Bytes allocated between two tracemalloc snapshots and still held, in the node's code (not the harness)."""
    package = str(Path(__file__).resolve().parent.parent)
    harness = str(Path(__file__).resolve().parent)
    total = 0
    for stat in after.compare_to(before, "filename"):
        name = stat.traceback[0].filename
        if name.startswith(package) and not name.startswith(harness):
            total += stat.size_diff
    return total


# -- the benchmark --------------------------------------------------------------------------------------------------------


@dataclass
class CampaignReport:
    """The fault campaign: its records (judged), what went wrong outside them, the secret scan, the figures."""

    records: list[SessionRecord]
    problems: list[str]
    crashes: list[str]
    findings: list[Finding]
    figures: dict[str, Any]
    secrets: Secrets
    logs: list[Path]
    node_bound_s: float  # how long the node may take to end a session before it counts as hung


@dataclass
class FuzzReport:
    """The fuzzing: every case's outcome, what escaped, the secret scan of the abort messages, the figures."""

    outcomes: list[FuzzOutcome]
    crashes: list[str]
    findings: list[Finding]
    figures: dict[str, Any]


@dataclass
class FaultsReport:
    """Everything one ``bench faults`` run measured: the figures, and the two reports behind them."""

    figures: dict[str, Any]
    campaign: CampaignReport
    fuzz: FuzzReport

    @property
    def problems(self) -> list[str]:
        return self.campaign.problems + self.campaign.crashes + self.fuzz.crashes


def _store_text(path: Path) -> str:
    import sqlite3

    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        return "\n".join(" ".join(str(v) for v in row) for row in db.execute("SELECT * FROM runs"))
    finally:
        db.close()


async def run_campaign(sessions: int, workdir: Path, *, seed: int = 2027) -> CampaignReport:
    """``sessions`` sessions against a node under test in ``workdir``, judged and scanned for secrets."""
    async with NodeCampaign(workdir, seed=seed) as campaign:
        await campaign.run(sessions)
    problems = judge(campaign)
    findings, texts = campaign.scan()
    logs = [campaign.node_log, campaign.peer_log]
    verdicts = Counter(r.verdict for r in campaign.records)
    internal = [r for r in campaign.records for s in (r.node, r.peer) if s.reason == "internal"]
    crashes = campaign.watch.crashes + [f"session {r.session_id}: internal abort" for r in internal]
    problems += [
        f"{r.session_id} ({r.verdict}): {'; '.join(r.problems)}" for r in campaign.records if r.problems
    ]
    figures = {
        "sessions": len(campaign.records),
        "completed": verdicts["completed"],
        "aborted_cleanly": verdicts["aborted_cleanly"],
        "hung": verdicts["hung"],
        "outputs_released_wrongly": verdicts["released_wrongly"],
        "unclean": verdicts["unclean"],
        "crashes": len(crashes),
        "faults": dict(sorted(Counter(r.plan.kind for r in campaign.records if r.plan).items())),
        "phases": dict(sorted(Counter(r.plan.phase for r in campaign.records if r.plan).items())),
        "node_initiated_faults": sum(
            1 for r in campaign.records if r.plan and r.plan.node_role == Party.GARBLER
        ),
        "secrets_found_in_logs": len(findings),
        "log_lines_scanned": sum(len(p.read_text(encoding="utf-8").splitlines()) for p in logs)
        + sum(len(t.splitlines()) for _, t in texts),
    }
    return CampaignReport(
        campaign.records, problems, crashes, findings, figures, campaign.secrets, logs, campaign.node_bound
    )


async def run_fuzzing(frames: int, *, seed: int = 2028, wire: int = WIRE_SAMPLE) -> FuzzReport:
    """``frames`` mutated frames sent to a node's session server, the abort messages scanned for secrets."""
    fuzzer = Fuzzer(seed=seed)
    figures = await fuzzer.run(frames, wire=wire)
    texts = [
        ("python log", "\n".join(fuzzer.log_lines)),
        ("abort messages", "\n".join(o.message for o in fuzzer.outcomes)),
    ]
    findings = scan_for_secrets(fuzzer.secrets, (), texts)
    figures["secrets_found_in_logs"] = len(findings)
    figures["log_lines_scanned"] = sum(len(t.splitlines()) for _, t in texts)
    return FuzzReport(fuzzer.outcomes, fuzzer.crashes, findings, figures)


async def measure_async(sessions: int, frames: int, workdir: Path, *, seed: int = 2027) -> FaultsReport:
    """The fault campaign (``sessions`` sessions) and the fuzzing (``frames`` mutated frames); the figures."""
    start = time.monotonic()
    campaign = await run_campaign(sessions, workdir, seed=seed)
    fuzz = await run_fuzzing(frames, seed=seed + 1) if frames else FuzzReport([], [], [], {})
    c, f = campaign.figures, fuzz.figures
    figures: dict[str, Any] = {
        "sessions": c["sessions"],
        "completed": c["completed"],
        "aborted_cleanly": c["aborted_cleanly"],
        "hung": c["hung"] + f.get("fuzz_hung", 0),
        "outputs_released_wrongly": c["outputs_released_wrongly"] + f.get("fuzz_accepted", 0),
        "frames_fuzzed": f.get("frames_fuzzed", 0),
        "crashes": c["crashes"] + f.get("fuzz_crashes", 0),
        "unclean": c["unclean"],
        "faults": c["faults"],
        "phases": c["phases"],
        "node_initiated_faults": c["node_initiated_faults"],
        **{k: v for k, v in f.items() if k.startswith(("fuzz_", "node_")) and k not in ("fuzz_crashes",)},
        "secrets_found_in_logs": c["secrets_found_in_logs"] + f.get("secrets_found_in_logs", 0),
        "log_lines_scanned": c["log_lines_scanned"] + f.get("log_lines_scanned", 0),
        "wall_s": round(time.monotonic() - start, 1),
    }
    return FaultsReport(figures, campaign, fuzz)


def measure(sessions: int, frames: int = DEFAULT_FUZZ_FRAMES, *, seed: int = 2027) -> FaultsReport:
    import tempfile

    with tempfile.TemporaryDirectory(prefix="jointstat-faults-") as tmp:
        return asyncio.run(measure_async(sessions, frames, Path(tmp), seed=seed))


def targets_met(figures: dict[str, Any]) -> bool:
    """The issue's targets — nothing hung, no output released wrongly, no crash, every session completed or aborted
    cleanly — and no secret in any log."""
    return (
        figures["hung"] == 0
        and figures["outputs_released_wrongly"] == 0
        and figures["crashes"] == 0
        and figures["completed"] + figures["aborted_cleanly"] == figures["sessions"]
        and figures["secrets_found_in_logs"] == 0
    )


def run(sessions: int, frames: int, as_json: bool) -> int:
    from jointstat.cli import UserError

    if sessions < 1:
        raise UserError(f"bench faults: --sessions must be at least 1, got {sessions}")
    if frames < 0:
        raise UserError(f"bench faults: --frames must be 0 or more, got {frames}")
    report = measure(sessions, frames)
    emit(
        "fault injection and frame fuzzing (a node under test, loopback mutual TLS)", report.figures, as_json
    )
    findings = report.campaign.findings + report.fuzz.findings
    for problem in report.problems + [f"secret in {f.source}, line {f.line}: {f.what}" for f in findings]:
        print(f"problem: {problem}", file=sys.stderr)
    return 0 if targets_met(report.figures) else 1
