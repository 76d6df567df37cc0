"""``jointstat bench faults``: sessions under injected faults, fuzzed frames, and the figures that show both.

Theory of operation
-------------------
*Fault injection.* A node under test serves sessions on 127.0.0.1 over mutual TLS; a peer node connects to it. A
fault plan names a kind, a phase and a frame: the *phases* are those of the session protocol (hello, base OT,
OT extension, tables — the garbler's input labels and the garbled tables —, output labels — the returned labels
and the decoding —, finish), and the frame is the k-th frame of that phase to cross the peer's stream, in either
direction, in the order it crosses. The peer's stream (:class:`FaultyStream`) fires the fault when that frame
reaches it, before the frame crosses:

- ``cut``: the loopback TCP proxy between the two nodes (:class:`FaultProxy`) closes both TCP connections (with a
  reset or an orderly close), so both gRPC ends see the connection drop; the peer sees nothing after it;
- ``kill``: the peer is a process of its own and sends itself SIGKILL — no abort frame, no TLS close, the kernel
  closes the socket; when the peer node "restarts" (the harness reopens its log) the sessions the log left open
  are recorded as aborted (``node_stopped``), as a node does when it starts;
- ``stall``: the proxy stops forwarding in both directions and the peer holds the frame: nothing more crosses,
  the connection stays open, and both sides must give up by their own idle timeout.

In the finish phase the fault fires at the first finish frame to reach the peer's stream: once a finish frame has
crossed, one side may rightly complete (it holds the other's signed transcript), which is the fair-exchange limit
of any two-party protocol, not a fault to inject. Each faulted session is followed by the retry of its job: a new
session id, new session objects, hence a fresh Δ and fresh labels, on the same node. Every session of both
nodes goes through a signed session log (``audit.SessionLog``), the way a node uses it: ``session_started`` at
the start, the transcript signed through the log, ``peer_attestation`` and ``session_completed`` or
``session_aborted`` at the end.

A faulted session *aborted cleanly* when both sides ended without output, each with a reason and a message,
within the session deadline (plus the abort grace and a scheduling allowance), the abort is the session's last
record in both verified logs (and the two logs agree), and the retry then completed with correct outputs, a Δ
and labels that differ from the faulted attempt's, and ``session_completed`` in both logs. ``hung`` counts
sessions in which a side had not ended by that bound; ``outputs_released_wrongly`` counts sides that released an
output from a faulted session, or a wrong output from a retry; ``crashes`` counts exceptions that escaped a
handler, an event loop or a thread, peers that died unplanned, and aborts for ``internal`` reasons.

*Frame fuzzing* (:func:`fuzz`). An honest peer session plays a session with the node, and one of its frames is
mutated — bits flipped, truncated, a length prefix made oversized (or the whole frame over the 4 MiB limit), the
frame type made unknown (or its wire type wrong), or a valid frame sent out of order (a frame of another type or
of another session, or a duplicate) — and the peer then plays on. Most cases run through the server's own
frame-handling path (``SessionServer``'s stream handler, with its first-frame checks and the driver) on an
in-process stream; a sample goes over the real wire. Each case must end with the node's session aborted with a
clear reason (or the stream refused with an abort frame), no output, within a per-case bound; memory is measured
before and after (resident set size).

*Secrets in logs* (:func:`scan_for_secrets`). Every Δ, wire label and input value of the run is recorded by the
harness (:class:`Secrets`) and every log line written is searched for them in hex, base64, decimal, bit-string
and Python-bytes forms.

Figures: ``sessions`` (faulted sessions and their retries), ``completed`` (retries that completed correctly),
``aborted_cleanly``, ``hung``, ``outputs_released_wrongly``, ``frames_fuzzed``, ``crashes``; targets: ``hung`` =
``outputs_released_wrongly`` = ``crashes`` = 0 and ``completed + aborted_cleanly = sessions``.
"""

from __future__ import annotations

import asyncio
import base64
import contextlib
import hashlib
import logging
import multiprocessing as mp
import os
import signal
import socket
import struct
import sys
import tempfile
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from pathlib import Path
from typing import Any, Literal

import grpc
import numpy as np
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat.audit import SessionLog, compare_logs, transcript_signature_ok, verify_log
from jointstat.bench.report import emit
from jointstat.circuit.builder import Builder
from jointstat.circuit.encode import int_to_bits
from jointstat.circuit.layers import LayeredCircuit, schedule
from jointstat.circuit.model import Party
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason
from jointstat.protocol.session import EvaluatorSession, GarblerSession, NoOutputError, Session
from jointstat.transport.channel import MESSAGE_OPTIONS, METHOD_PATH, ClientStream, SessionIds
from jointstat.transport.driver import Limits, SessionResult, StreamLost, drive
from jointstat.transport.pki import Issued, issue, new_ca, node_tls
from jointstat.transport.server import SessionServer
from jointstat.transport.tls import NodeTLS

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

# Limits of the fault sessions: a stalled link is given up after one idle second; the whole session has four.
FAULT_LIMITS = Limits(deadline_s=4.0, idle_timeout_s=1.0, abort_grace_s=0.5)
SCHEDULING_ALLOWANCE_S = 3.0  # beyond deadline + grace, for a loaded two-core machine
CHUNK_BYTES = 1024  # 32 garbled AND gates per table frame, so the tables phase has several frames
VALUE_BITS = 64
DEFAULT_FUZZ_FRAMES = 10_000


def phase_of(kind: str) -> str | None:
    """The protocol phase a frame type belongs to (None for ``abort``)."""
    return PHASE_OF_FRAME.get(kind)


# -- the job: an invented comparison between two bicycle-sharing schemes -----------------------------------------------


def fault_circuit() -> LayeredCircuit:
    """The fault sessions' job: two 64-bit fleet-kilometre totals, one per scheme.

    The evaluator (hillside) learns the sum; the garbler (riverside) learns whether its total is the smaller one
    and whether the two are equal. 191 AND gates: six table frames of ``CHUNK_BYTES``.
    """
    bld = Builder()
    a = bld.input(Party.GARBLER, VALUE_BITS)
    b = bld.input(Party.EVALUATOR, VALUE_BITS)
    bld.output(Party.EVALUATOR, bld.add(a, b))
    bld.output(Party.GARBLER, np.stack([bld.less_than(a, b), bld.equal(a, b)]))
    return schedule(bld.build())


def expected_outputs(a: int, b: int) -> dict[Party, np.ndarray]:
    """The job's outputs computed in plain Python integers (independent of the circuit)."""
    mask = (1 << VALUE_BITS) - 1
    return {
        Party.EVALUATOR: int_to_bits((a + b) & mask, VALUE_BITS),
        Party.GARBLER: np.array([int(a < b), int(a == b)], dtype=np.uint8),
    }


def invented_value(rng: np.random.Generator) -> int:
    """A fleet total for one run: 19 decimal digits (from 2^62), so a log scan cannot mistake it for a count."""
    return int(rng.integers(1 << 62, (1 << 63) - 1, dtype=np.int64))


MANIFEST_DIGEST = hashlib.sha256(
    b"invented manifest: riverside and hillside bicycle schemes, fleet km"
).digest()
JOB = "fleet-kilometres"


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
        bits = int_to_bits(value, VALUE_BITS)
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


def scan_text(source: str, text: str, forms: dict[str, str]) -> list[Finding]:
    found: list[Finding] = []
    for number, line in enumerate(text.splitlines(), start=1):
        for form, what in forms.items():
            if form in line:
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
    """A garbler session that hands the harness its Δ and the labels it makes (to compare and to scan for)."""

    secrets: Secrets | None = None

    def _build_garbling(self) -> None:
        super()._build_garbling()
        if self.secrets is None or self._engine is None or self._delta is None:
            return
        sid = sid_text(self.session_id)
        engine = self._engine
        delta = self._delta.astype("<u8").tobytes()
        self.secrets.add_delta(sid, delta)
        made = [engine.constant_labels()]
        for party in Party:
            zero = engine.input_labels(party, np.zeros(self.layered.circuit.n_inputs(party), dtype=np.uint8))
            made += [zero, zero ^ self._delta]
        self.secrets.add_labels(sid, b"".join(m.astype("<u8").tobytes() for m in made))


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


# -- node identities and the logged session glue ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Identity:
    """One node's name, TLS certificate and key, and Ed25519 log-signing key."""

    name: str
    issued: Issued
    signing_key: Ed25519PrivateKey

    @property
    def public_key(self) -> Ed25519PublicKey:
        return self.signing_key.public_key()

    def raw_signing_key(self) -> bytes:
        return self.signing_key.private_bytes(
            serialization.Encoding.Raw, serialization.PrivateFormat.Raw, serialization.NoEncryption()
        )


@dataclass(frozen=True)
class Pair:
    """The node under test and its peer (each pins the other's certificate)."""

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


def safe_detail(message: str) -> str:
    """An abort message fit for the log's ``detail``: long hex or base64-like tokens dropped, cut to 300 chars."""
    words = []
    for word in message.replace("\n", " ").split(" "):
        core = word.strip(".,;:()'\"")
        if len(core) >= 16 and core.replace("-", "").replace("_", "").isalnum():
            word = "…"
        words.append(word)
    return " ".join(words)[:300]


class LoggedNode:
    """A node's side of sessions: sessions whose transcript is signed through the node's signed session log.

    This is the glue a node puts around the sans-I/O session: ``session_started`` before the session runs, the
    transcript digest signed (and recorded) by the log, the peer's signature checked against the peer's log key,
    then ``peer_attestation`` and ``session_completed``, or ``session_aborted`` with the reason.
    """

    def __init__(
        self, me: Identity, peer_name: str, peer_key: Ed25519PublicKey, log_path: Path, secrets: Secrets
    ) -> None:
        self.me = me
        self.peer_name = peer_name
        self.peer_key = peer_key
        self.log_path = Path(log_path)
        self.secrets = secrets
        self.log: SessionLog | None = SessionLog(self.log_path, me.signing_key, me.name)
        self.ids = SessionIds()

    def reopen(self) -> list[str]:
        """Open the log as a restarted node does; sessions left open are recorded as aborted. Returns their ids."""
        if self.log is not None:
            self.log.close()
        self.log = SessionLog(self.log_path, self.me.signing_key, self.me.name)
        left = self.log.open_sessions()
        for sid in left:
            self.log.session_aborted(sid, reason="node_stopped", detail="the node stopped during the session")
        return left

    def close(self) -> None:
        if self.log is not None:
            self.log.close()
            self.log = None

    def session(self, party: Party, sid: str, layered: LayeredCircuit, value: int) -> Session:
        assert self.log is not None
        log = self.log
        peer_key = self.peer_key
        self.secrets.add_value(value)
        bits = int_to_bits(value, VALUE_BITS)

        def sign(digest: bytes) -> bytes:
            return log.transcript(sid, digest)

        def verify(signature: bytes, digest: bytes) -> bool:
            return transcript_signature_ok(peer_key, sid, digest, signature)

        common: dict[str, Any] = {
            "session_id": sid.encode(),
            "layered": layered,
            "manifest_digest": MANIFEST_DIGEST,
            "inputs": bits,
            "sign": sign,
            "verify": verify,
        }
        session: RecordingGarbler | RecordingEvaluator
        if party == Party.GARBLER:
            session = RecordingGarbler(chunk_bytes=CHUNK_BYTES, **common)
        else:
            session = RecordingEvaluator(**common)
        session.secrets = self.secrets
        log.session_started(
            sid,
            job=JOB,
            manifest_digest=MANIFEST_DIGEST,
            role=fr.role_name(party),  # type: ignore[arg-type]
            peer=self.peer_name,
            peer_key=peer_key,
        )
        return session

    def ended(self, sid: str, result: SessionResult | None, *, duration_s: float, phase: str | None) -> None:
        """Record how the session ended (``result`` None: it never started on the wire)."""
        assert self.log is not None
        if result is not None and result.completed:
            assert result.peer_signature is not None
            self.log.peer_attestation(sid, result.peer_signature)
            self.log.session_completed(sid, duration_us=int(duration_s * 1e6))
            return
        if result is None or result.abort is None:
            self.log.session_aborted(
                sid, reason="not_opened", phase=phase, detail="the peer did not open the session in time"
            )
            return
        abort = result.abort
        self.log.session_aborted(
            sid,
            reason=abort.reason.name.lower(),
            by="peer" if abort.by_peer else "self",
            phase=phase,
            detail=safe_detail(abort.message),
        )


# -- injecting faults ------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class FaultPlan:
    """Where and how one session is broken: the ``index``-th frame of ``phase`` at the peer's stream."""

    kind: FaultKind
    phase: str
    index: int
    node_role: Party  # the role of the node under test; the peer plays the other
    reset: bool = True  # cut: a TCP reset (True) or an orderly close

    def describe(self) -> str:
        how = f"{self.kind} ({'reset' if self.reset else 'close'})" if self.kind == CUT else self.kind
        return f"{how} at frame {self.index} of {self.phase}, node is the {fr.role_name(self.node_role)}"


def frames_per_phase(layered: LayeredCircuit, chunk_bytes: int = CHUNK_BYTES) -> dict[str, int]:
    """How many frames of each phase cross a session's stream (both directions) for this circuit."""
    c = layered.circuit
    n_in_e = c.n_inputs(Party.EVALUATOR)
    table_bytes = 32 * layered.n_and
    chunk = chunk_bytes - chunk_bytes % 32
    labels = 16 * (2 + c.n_inputs(Party.GARBLER))
    return {
        HELLO: 2,
        BASE_OT: 2 if n_in_e else 0,
        EXTENSION: 2 if n_in_e else 0,  # one batch each way for up to 2^16 evaluator inputs
        TABLES: -(-labels // fr.MAX_PAYLOAD_BYTES) + -(-table_bytes // chunk),
        OUTPUT_LABELS: int(layered.output_slots[Party.GARBLER].size > 0)
        + int(layered.output_slots[Party.EVALUATOR].size > 0),
        FINISH: 2,
    }


def make_plans(count: int, seed: int, layered: LayeredCircuit) -> list[FaultPlan]:
    """``count`` fault plans: every (kind, phase) pair once in a shuffled round before any repeats."""
    rng = np.random.default_rng(seed)
    per_phase = frames_per_phase(layered)
    pairs = [(k, p) for k in FAULT_KINDS for p in PHASES if per_phase[p]]
    plans: list[FaultPlan] = []
    while len(plans) < count:
        for i in rng.permutation(len(pairs)):
            kind, phase = pairs[int(i)]
            # In the finish phase only the first finish frame: once one has crossed, one side may rightly complete.
            index = 0 if phase == FINISH else int(rng.integers(per_phase[phase]))
            role = Party.GARBLER if rng.integers(2) else Party.EVALUATOR
            plans.append(FaultPlan(kind, phase, index, role, reset=bool(rng.integers(2))))  # type: ignore[arg-type]
            if len(plans) == count:
                break
    return plans


class FaultProxy:
    """A loopback TCP proxy between the peer and the node that can cut or stall every connection through it."""

    def __init__(self, target_port: int) -> None:
        self._target = target_port
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
            up_reader, up_writer = await asyncio.open_connection("127.0.0.1", self._target)
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


class FaultyStream(ClientStream):
    """The peer's client stream: counts frames per phase and fires the planned fault at the planned frame.

    After the fault nothing crosses: a cut stream raises ``StreamLost`` on every read and write, a stalled one
    holds every read and write until it is cancelled, and a killed process does not come back. It also hands the
    harness the labels that cross it (to scan the logs for).
    """

    def __init__(
        self,
        call: grpc.aio.StreamStreamCall,
        grace_s: float,
        plan: FaultPlan | None,
        fire: Fire | None,
        secrets: Secrets,
        session_id: str,
    ) -> None:
        super().__init__(call, grace_s)
        self.plan = plan
        self._fire = fire
        self._secrets = secrets
        self._sid = session_id
        self._seen: Counter[str] = Counter()
        self.fired: str | None = None  # "frame type, direction" once fired
        self.fired_at: float | None = None
        self._held = asyncio.Event()  # never set

    def _look(self, data: bytes, direction: str) -> bool:
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
            self.fired_at = time.monotonic()
            assert self._fire is not None
            self._fire(self.plan, kind, direction)
            return True
        return False

    async def _after_fault(self) -> None:
        assert self.plan is not None
        if self.plan.kind == CUT:
            raise StreamLost("the connection was cut under the session (injected fault)")
        await self._held.wait()  # stalled (or killed: the process is gone before this runs)

    async def read(self) -> bytes | None:
        if self.fired is not None:
            await self._after_fault()
        data = await super().read()
        # A read already waiting when the fault fired (on a write) must not deliver what arrives after it.
        if self.fired is not None or (data is not None and self._look(data, "received")):
            await self._after_fault()
        return data

    async def write(self, data: bytes) -> None:
        if self.fired is not None or self._look(data, "sent"):
            await self._after_fault()
        await super().write(data)


async def connect(
    session: Session,
    target: str,
    tls: NodeTLS,
    limits: Limits,
    stream_factory: Callable[[grpc.aio.StreamStreamCall], ClientStream],
    session_ids: SessionIds | None = None,
) -> SessionResult:
    """``transport.run_client`` with the stream made by ``stream_factory`` (the peer's faulty stream)."""
    if session_ids is not None:
        session_ids.claim(session.session_id)
    options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", tls.server_name())]
    async with grpc.aio.secure_channel(target, tls.channel_credentials(), options=options) as channel:
        method = channel.stream_stream(METHOD_PATH, request_serializer=None, response_deserializer=None)
        call = method(timeout=limits.deadline_s + 2 * limits.abort_grace_s)
        return await drive(session, stream_factory(call), limits)


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
    released: bool = False  # an output was available from the session or its result
    outputs: np.ndarray | None = None
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

    It also keeps every Python log line emitted meanwhile (any logger, any level), for the secret scan.
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
        root.setLevel(logging.DEBUG)
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
        super().__init__(logging.DEBUG)
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


# -- the peer as a process of its own (the kill fault) -----------------------------------------------------------------


def killed_peer_main(spec: dict[str, Any], conn: Connection) -> None:
    """Entry point of a peer process: play one side of a session, SIGKILL itself at the planned frame."""
    try:
        asyncio.run(_killed_peer(spec, conn))
    except BaseException as exc:
        with contextlib.suppress(Exception):
            conn.send({"error": f"{type(exc).__name__}: {exc}"})
    finally:
        conn.close()


async def _killed_peer(spec: dict[str, Any], conn: Connection) -> None:
    me = Identity(
        spec["name"],
        Issued(spec["certificate"], spec["private_key"]),
        Ed25519PrivateKey.from_private_bytes(spec["signing_key"]),
    )
    secrets = Secrets()
    logged = LoggedNode(
        me,
        spec["peer_name"],
        Ed25519PublicKey.from_public_bytes(spec["peer_key"]),
        Path(spec["log"]),
        secrets,
    )
    layered = fault_circuit()
    plan: FaultPlan = spec["plan"]
    party = Party.EVALUATOR if plan.node_role == Party.GARBLER else Party.GARBLER
    sid = spec["session_id"]
    session = logged.session(party, sid, layered, spec["value"])
    conn.send({"ready": True})
    await asyncio.to_thread(conn.recv)  # go

    def fire(_plan: FaultPlan, kind: str, direction: str) -> None:
        conn.send({"fired": f"{kind}, {direction}", "secrets": secrets.to_wire()})
        os.kill(os.getpid(), signal.SIGKILL)

    tls = node_tls(me.issued, spec["peer_certificate"])
    limits: Limits = spec["limits"]
    t0 = time.monotonic()
    result = await connect(
        session,
        f"127.0.0.1:{spec['port']}",
        tls,
        limits,
        lambda call: FaultyStream(call, limits.abort_grace_s, plan, fire, secrets, sid),
    )
    await asyncio.to_thread(logged.ended, sid, result, duration_s=time.monotonic() - t0, phase=plan.phase)
    logged.close()
    conn.send(
        {
            "result": {
                "completed": result.completed,
                "reason": None if result.abort is None else result.abort.reason.name,
            },
            "secrets": secrets.to_wire(),
        }
    )


# -- the campaign --------------------------------------------------------------------------------------------------------


@dataclass
class SessionRecord:
    """One session of a campaign: what was planned, what each side did, and the verdict."""

    session_id: str
    attempt: Literal["fault", "retry"]
    plan: FaultPlan | None
    node: Side
    peer: Side
    values: tuple[int, int]  # (garbler's, evaluator's)
    fired: str | None = None
    retry_of: str | None = None
    problems: list[str] = field(default_factory=list)
    verdict: str = "unjudged"


VERDICTS = ("completed", "aborted_cleanly", "hung", "released_wrongly", "unclean")
ALLOWED_REASONS = {
    # What each side may give as its reason, per fault kind (the peer's own view and the node's view).
    CUT: {"connection_lost", "deadline", "not_opened"},
    KILL: {"connection_lost", "deadline", "not_opened", "node_stopped"},
    STALL: {"deadline", "connection_lost", "not_opened"},
}


class FaultCampaign:
    """A node under test (``SessionServer`` with its signed log) and a peer, running faulted sessions and retries."""

    def __init__(self, workdir: Path, *, seed: int = 2027, limits: Limits = FAULT_LIMITS) -> None:
        self.workdir = Path(workdir)
        self.seed = seed
        self.limits = limits
        self.rng = np.random.default_rng(seed)
        self.layered = fault_circuit()
        self.pair = Pair.fresh()
        self.secrets = Secrets()
        self.node_log = self.workdir / "riverside-sessions.jsonl"
        self.peer_log = self.workdir / "hillside-sessions.jsonl"
        self.records: list[SessionRecord] = []
        self.watch = CrashWatch()
        self.server: SessionServer | None = None
        self.node: LoggedNode | None = None
        self.peer: LoggedNode | None = None

    async def __aenter__(self) -> FaultCampaign:
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.watch.__enter__()
        p = self.pair
        self.node = LoggedNode(p.node, p.peer.name, p.peer.public_key, self.node_log, self.secrets)
        self.peer = LoggedNode(p.peer, p.node.name, p.node.public_key, self.peer_log, self.secrets)
        self.server = SessionServer(p.node_tls(), limits=self.limits)
        await self.server.start()
        return self

    async def __aexit__(self, *_exc: object) -> None:
        if self.server is not None:
            await self.server.stop(None)
        for side in (self.node, self.peer):
            if side is not None:
                side.close()
        self.watch.__exit__()

    # -- the node under test ------------------------------------------------------------------------------------------

    def _node_expects(
        self, party: Party, sid: str, value: int
    ) -> tuple[Session, asyncio.Future[SessionResult], float]:
        assert self.node is not None and self.server is not None
        session = self.node.session(party, sid, self.layered, value)
        return session, self.server.expect(session), time.monotonic()

    async def _node_outcome(self, session: Session, future: asyncio.Future[SessionResult], t0: float) -> Side:
        """Wait for the node's session: withdrawn if the peer never opened it by the deadline; hung past the bound."""
        assert self.node is not None and self.server is not None
        sid = session.session_id.decode()
        result: SessionResult | None = None
        try:
            result = await asyncio.wait_for(asyncio.shield(future), timeout=self.limits.deadline_s)
        except TimeoutError:
            if self.server.withdraw(session.session_id):
                await asyncio.to_thread(
                    self.node.ended, sid, None, duration_s=time.monotonic() - t0, phase=None
                )
                side = side_of(session, None, time.monotonic() - t0)
                side.opened, side.reason = False, "not_opened"
                side.message = "the peer did not open the session in time"
                return side
            try:
                left = end_bound(self.limits) - (time.monotonic() - t0)
                result = await asyncio.wait_for(asyncio.shield(future), timeout=max(left, 0.01))
            except TimeoutError:
                side = side_of(session, None, None)
                side.hung = True
                return side
        elapsed = time.monotonic() - t0
        await asyncio.to_thread(self.node.ended, sid, result, duration_s=elapsed, phase=None)
        return side_of(session, result, elapsed)

    # -- the peer ------------------------------------------------------------------------------------------------------

    async def _peer_in_process(
        self, party: Party, sid: str, value: int, plan: FaultPlan | None, port: int, proxy: FaultProxy | None
    ) -> tuple[Side, str | None]:
        assert self.peer is not None
        session = self.peer.session(party, sid, self.layered, value)
        streams: list[FaultyStream] = []

        def fire(plan: FaultPlan, _kind: str, _direction: str) -> None:
            assert proxy is not None
            if plan.kind == CUT:
                proxy.cut(plan.reset)
            else:
                proxy.stall()

        def factory(call: grpc.aio.StreamStreamCall) -> ClientStream:
            streams.append(FaultyStream(call, self.limits.abort_grace_s, plan, fire, self.secrets, sid))
            return streams[-1]

        t0 = time.monotonic()
        try:
            result = await asyncio.wait_for(
                connect(
                    session, f"127.0.0.1:{port}", self.pair.peer_tls(), self.limits, factory, self.peer.ids
                ),
                timeout=end_bound(self.limits),
            )
        except TimeoutError:
            side = side_of(session, None, None)
            side.hung = True
            return side, streams[0].fired if streams else None
        elapsed = time.monotonic() - t0
        await asyncio.to_thread(
            self.peer.ended, sid, result, duration_s=elapsed, phase=None if plan is None else plan.phase
        )
        return side_of(session, result, elapsed), streams[0].fired if streams else None

    async def _spawn_peer(self, sid: str, value: int, plan: FaultPlan) -> tuple[Any, Connection]:
        assert self.peer is not None and self.server is not None
        self.peer.close()  # the peer process takes over its log (one writer at a time)
        p = self.pair
        spec = {
            "name": p.peer.name,
            "certificate": p.peer.issued.certificate,
            "private_key": p.peer.issued.private_key,
            "signing_key": p.peer.raw_signing_key(),
            "peer_name": p.node.name,
            "peer_key": p.node.public_key.public_bytes(
                serialization.Encoding.Raw, serialization.PublicFormat.Raw
            ),
            "peer_certificate": p.node.issued.certificate,
            "log": str(self.peer_log),
            "plan": plan,
            "session_id": sid,
            "value": value,
            "port": self.server.port,
            "limits": self.limits,
        }
        ctx = mp.get_context("spawn")
        parent, child = ctx.Pipe()
        proc = ctx.Process(
            target=killed_peer_main, args=(spec, child), name="jointstat-fault-peer", daemon=True
        )
        proc.start()
        child.close()
        if not await asyncio.to_thread(parent.poll, 120):
            proc.kill()
            raise RuntimeError("the peer process did not start within 120 s")
        message = parent.recv()
        if "ready" not in message:
            proc.kill()
            raise RuntimeError(f"the peer process failed to start: {message.get('error')}")
        return proc, parent

    async def _peer_process_outcome(
        self, proc: Any, conn: Connection, sid: str, party: Party
    ) -> tuple[Side, str | None]:
        assert self.peer is not None
        t0 = time.monotonic()
        conn.send({"go": True})
        fired: str | None = None
        side = Side(party=party)
        deadline = t0 + end_bound(self.limits)
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
                side.released = bool(message["result"]["completed"])
                side.reason = (message["result"]["reason"] or "").lower() or None
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
                f"peer process fired its fault but ended with exit code {proc.exitcode}"
            )
        side.ended_after_s = None if side.hung else time.monotonic() - t0
        left_open = await asyncio.to_thread(self.peer.reopen)  # the peer node "restarts"
        if side.killed:
            side.reason = "node_stopped" if sid in left_open else side.reason
            side.message = "the peer process was killed; its log closed the session on restart"
        return side, fired

    # -- sessions ---------------------------------------------------------------------------------------------------------

    def _values(self) -> tuple[int, int]:
        return invented_value(self.rng), invented_value(self.rng)

    async def fault_session(self, plan: FaultPlan, sid: str, values: tuple[int, int]) -> SessionRecord:
        assert self.server is not None
        node_party = plan.node_role
        peer_party = Party.EVALUATOR if node_party == Party.GARBLER else Party.GARBLER
        own = {Party.GARBLER: values[0], Party.EVALUATOR: values[1]}
        if plan.kind == KILL:
            proc, conn = await self._spawn_peer(sid, own[peer_party], plan)
            session, future, t0 = self._node_expects(node_party, sid, own[node_party])
            node_task = asyncio.create_task(self._node_outcome(session, future, t0))
            peer, fired = await self._peer_process_outcome(proc, conn, sid, peer_party)
        else:
            proxy = FaultProxy(self.server.port)
            await proxy.start()
            session, future, t0 = self._node_expects(node_party, sid, own[node_party])
            node_task = asyncio.create_task(self._node_outcome(session, future, t0))
            try:  # the proxy stays (stalled or cut) until both sides have given up
                peer, fired = await self._peer_in_process(
                    peer_party, sid, own[peer_party], plan, proxy.port, proxy
                )
                node = await node_task
            finally:
                await proxy.close()
        if plan.kind == KILL:
            node = await node_task
        record = SessionRecord(sid, "fault", plan, node, peer, values, fired=fired)
        self.records.append(record)
        return record

    async def retry_session(
        self, node_party: Party, sid: str, values: tuple[int, int], retry_of: str
    ) -> SessionRecord:
        assert self.server is not None
        peer_party = Party.EVALUATOR if node_party == Party.GARBLER else Party.GARBLER
        own = {Party.GARBLER: values[0], Party.EVALUATOR: values[1]}
        session, future, t0 = self._node_expects(node_party, sid, own[node_party])
        node_task = asyncio.create_task(self._node_outcome(session, future, t0))
        peer, _ = await self._peer_in_process(peer_party, sid, own[peer_party], None, self.server.port, None)
        node = await node_task
        record = SessionRecord(sid, "retry", None, node, peer, values, retry_of=retry_of)
        self.records.append(record)
        return record

    async def run(self, sessions: int) -> list[SessionRecord]:
        """``sessions`` sessions: faulted ones, each followed by its job's retry (the last may have none)."""
        if sessions < 1:
            raise ValueError(f"sessions must be at least 1, got {sessions}")
        faults = -(-sessions // 2)
        plans = make_plans(faults, self.seed, self.layered)
        done = 0
        for i, plan in enumerate(plans):
            values = self._values()
            first = f"{JOB}-{i:04d}-attempt-1"
            await self.fault_session(plan, first, values)
            done += 1
            if done < sessions:
                await self.retry_session(plan.node_role, f"{JOB}-{i:04d}-attempt-2", values, first)
                done += 1
        return self.records


# -- judging a campaign ------------------------------------------------------------------------------------------------------


def judge(
    records: list[SessionRecord],
    secrets: Secrets,
    node_log: Path,
    peer_log: Path,
    pair: Pair,
    limits: Limits,
) -> list[str]:
    """Give every record its verdict and problems, from the sides' outcomes and both verified logs.

    Returns the problems that belong to no single session (a log that does not verify, say).
    """
    node_report = verify_log(node_log, pair.node.public_key)
    peer_report = verify_log(peer_log, pair.peer.public_key)
    general = [
        f"{name} log does not verify: {r.problem}"
        for name, r in (("node", node_report), ("peer", peer_report))
        if not r.ok
    ]
    compared = compare_logs(
        node_log, peer_log, mine_key=pair.node.public_key, theirs_key=pair.peer.public_key
    )
    by_id = {r.session_id: r for r in records}
    bound = end_bound(limits)
    for record in records:
        sid = record.session_id
        problems = record.problems
        problems += [p for p in compared.problems if f"session {sid}:" in p]
        sides = (("node", record.node, node_report), ("peer", record.peer, peer_report))
        if record.node.hung or record.peer.hung:
            record.verdict = "hung"
            continue
        if record.attempt == "fault":
            assert record.plan is not None
            if record.node.released or record.peer.released:
                record.verdict = "released_wrongly"
                continue
            if record.fired is None:
                problems.append("the planned fault never fired")
            for name, side, report in sides:
                state = report.sessions.get(sid)
                if side.reason is None or not side.message:
                    problems.append(f"{name} ended without an abort reason and message")
                elif side.reason not in ALLOWED_REASONS[record.plan.kind]:
                    problems.append(
                        f"{name} aborted for {side.reason!r}, not a reason a {record.plan.kind} explains"
                    )
                if side.ended_after_s is None or side.ended_after_s > bound:
                    problems.append(f"{name} ended after {side.ended_after_s} s, beyond {bound:g} s")
                if state is None or state.outcome != "aborted":
                    problems.append(f"{name} log: {'no such session' if state is None else state.outcome}")
            record.verdict = "unclean" if problems else "aborted_cleanly"
            continue
        expected = expected_outputs(*record.values)
        wrong = False
        for name, side, report in sides:
            state = report.sessions.get(sid)
            if side.outputs is None:
                problems.append(f"{name} did not complete ({side.reason}: {side.message[:160]})")
            elif not np.array_equal(side.outputs, expected[side.party]):
                wrong = True
                problems.append(f"{name} released a wrong output")
            if state is None or state.outcome != "completed":
                problems.append(f"{name} log: {'no such session' if state is None else state.outcome}")
        if record.node.transcript != record.peer.transcript:
            problems.append("the two sides' transcript digests differ")
        problems += freshness_problems(secrets, by_id.get(record.retry_of or ""), record)
        record.verdict = "released_wrongly" if wrong else ("unclean" if problems else "completed")
    return general


def freshness_problems(secrets: Secrets, before: SessionRecord | None, retry: SessionRecord) -> list[str]:
    """What is not fresh in the retry: its Δ equal to the faulted attempt's, or any label shared with it."""
    problems = []
    delta = secrets.deltas.get(retry.session_id)
    if delta is None:
        problems.append("no Δ was recorded for the retry")
    if before is None:
        return problems
    if delta is not None and delta == secrets.deltas.get(before.session_id):
        problems.append("the retry garbled with the faulted attempt's Δ")
    shared = secrets.labels.get(retry.session_id, set()) & secrets.labels.get(before.session_id, set())
    if shared:
        problems.append(f"the retry used {len(shared)} labels of the faulted attempt")
    if not secrets.labels.get(retry.session_id):
        problems.append("no labels were recorded for the retry")
    return problems


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
        # A length prefix claiming more bytes than follow: the frame's own (after its tag) or its first field's.
        outer = _read_varint(data, 1)
        assert outer is not None
        _, body_at = outer
        at = 1 if rng.random() < 0.5 or body_at + 1 >= len(data) else body_at + 1
        parsed = _read_varint(data, at)
        assert parsed is not None
        length, after = parsed
        claim = int(rng.choice([length + 1, length + 1 + int(rng.integers(1, 1 << 20)), *HUGE_LENGTHS]))
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
                "manifest_digest": MANIFEST_DIGEST,
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
class FaultsReport:
    """Everything one ``bench faults`` run measured: the figures, and the records behind them."""

    figures: dict[str, Any]
    records: list[SessionRecord]
    fuzz: list[FuzzOutcome]
    findings: list[Finding]
    crashes: list[str]
    problems: list[str]


async def measure_async(sessions: int, frames: int, workdir: Path, *, seed: int = 2027) -> FaultsReport:
    """Run the fault campaign (``sessions`` sessions) and the fuzzer (``frames`` mutated frames) in ``workdir``."""
    start = time.monotonic()
    async with FaultCampaign(workdir, seed=seed) as campaign:
        await campaign.run(sessions)
    problems = judge(
        campaign.records,
        campaign.secrets,
        campaign.node_log,
        campaign.peer_log,
        campaign.pair,
        campaign.limits,
    )
    fuzzer = Fuzzer(seed=seed + 1)
    fuzz_figures = await fuzzer.run(frames) if frames else {}
    secrets = Secrets()
    secrets.merge(campaign.secrets)
    secrets.merge(fuzzer.secrets)
    texts = [("python log (fault sessions)", "\n".join(campaign.watch.lines))]
    texts.append(("python log (fuzzing)", "\n".join(fuzzer.log_lines)))
    texts.append(
        (
            "abort messages (fault sessions)",
            "\n".join(r.node.message + "\n" + r.peer.message for r in campaign.records),
        )
    )
    texts.append(("abort messages (fuzzing)", "\n".join(o.message for o in fuzzer.outcomes)))
    findings = scan_for_secrets(secrets, [campaign.node_log, campaign.peer_log], texts)
    verdicts = Counter(r.verdict for r in campaign.records)
    internal = [r for r in campaign.records for side in (r.node, r.peer) if side.reason == "internal"]
    crashes = (
        campaign.watch.crashes
        + fuzzer.crashes
        + [f"session {r.session_id}: internal abort" for r in internal]
    )
    figures: dict[str, Any] = {
        "sessions": len(campaign.records),
        "completed": verdicts["completed"],
        "aborted_cleanly": verdicts["aborted_cleanly"],
        "hung": verdicts["hung"] + fuzz_figures.get("fuzz_hung", 0),
        "outputs_released_wrongly": verdicts["released_wrongly"] + fuzz_figures.get("fuzz_accepted", 0),
        "frames_fuzzed": fuzz_figures.get("frames_fuzzed", 0),
        "crashes": len(crashes),
        "unclean": verdicts["unclean"],
        "faults": dict(sorted(Counter(r.plan.kind for r in campaign.records if r.plan).items())),
        "phases": dict(sorted(Counter(r.plan.phase for r in campaign.records if r.plan).items())),
        **{k: v for k, v in fuzz_figures.items() if k not in ("frames_fuzzed", "fuzz_crashes")},
        "secrets_found_in_logs": len(findings),
        "log_lines_scanned": sum(
            len(Path(p).read_text().splitlines()) for p in (campaign.node_log, campaign.peer_log)
        )
        + sum(len(t.splitlines()) for _, t in texts),
        "wall_s": round(time.monotonic() - start, 1),
    }
    problems += [
        f"{r.session_id} ({r.verdict}): {'; '.join(r.problems)}" for r in campaign.records if r.problems
    ]
    return FaultsReport(figures, campaign.records, fuzzer.outcomes, findings, crashes, problems)


def measure(sessions: int, frames: int = DEFAULT_FUZZ_FRAMES, *, seed: int = 2027) -> FaultsReport:

    with tempfile.TemporaryDirectory(prefix="jointstat-faults-") as tmp:
        return asyncio.run(measure_async(sessions, frames, Path(tmp), seed=seed))


def targets_met(figures: dict[str, Any]) -> bool:
    """The issue's targets: nothing hung, no output released wrongly, no crash, every session completed or aborted
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
        "fault injection and frame fuzzing (one node under test, loopback mutual TLS)",
        report.figures,
        as_json,
    )
    for problem in (
        report.problems + report.crashes + [f"{f.source}:{f.line}: {f.what}" for f in report.findings]
    ):
        print(f"problem: {problem}", file=sys.stderr)
    return 0 if targets_met(report.figures) else 1
