"""Faults fired at a planned frame of a session's stream: where (phase, frame), how (cut, kill, stall), and firing.

Theory of operation
-------------------
A ``FaultPlan`` names a kind, a phase of the protocol (``scenario.PHASES``: hello, base OT, OT extension, tables —
the garbler's input labels and the garbled tables —, output labels — the returned labels and the decoding —,
finish) and a frame: the ``index``-th frame of that phase to cross the peer's stream, in either direction, in the
order it crosses. ``make_plans`` spreads plans over every (kind, phase) pair, round after round, with the node under
test in either role.

A ``FaultPoint`` sits in the peer's stream — a client stream (``FaultyStream``) or a server context
(``FaultyContext``) — and counts the session's frames per phase. When the planned frame reaches it, before the frame
crosses, it calls ``fire`` (which cuts or stalls the proxy between the nodes, or kills the peer's process), and
from then on nothing more crosses: a cut stream raises the stream's loss error on every read and write, a stalled
one holds every read and write until cancelled, and a killed process does not come back. In the finish phase a
fault fires at the first finish frame only: once one has crossed, one side may rightly complete (it holds the
other's signed transcript) — the fair-exchange limit of any two-party protocol, not a fault to inject.

The point also hands the harness every label that crosses it (the garbler's input labels, the returned output
labels), for the secret scan.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections import Counter
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from typing import Any, Literal

import grpc
import numpy as np

from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.garble.backends import DEFAULT_CHUNK_BYTES
from jointstat.harness.recording import sid_text
from jointstat.harness.scanner import Secrets
from jointstat.harness.scenario import FINISH, PHASES, frames_per_phase, phase_of
from jointstat.protocol import frames as fr
from jointstat.protocol.sides import Session
from jointstat.transport.channel import MESSAGE_OPTIONS, METHOD_PATH, ClientStream, SessionIds
from jointstat.transport.driver import Limits, SessionResult, StreamLost, drive
from jointstat.transport.tls import NodeTLS

CUT, KILL, STALL = "cut", "kill", "stall"
FAULT_KINDS = (CUT, KILL, STALL)
FaultKind = Literal["cut", "kill", "stall"]
PEER_CHUNK_BYTES = 1024  # the peer garbles 32 AND gates per table frame, so the tables phase has many frames


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
        return f"{how} at frame {self.index} of {self.phase}; the node {side} ({Party(self.node_role).role_name})"


def make_plans(count: int, seed: int, program: Program) -> list[FaultPlan]:
    """``count`` plans: every (kind, phase) in each shuffled round, the node's role flipping from round to round."""
    rng = np.random.default_rng(seed)
    frames = {
        Party.GARBLER: frames_per_phase(program, DEFAULT_CHUNK_BYTES),  # the node garbles
        Party.EVALUATOR: frames_per_phase(program, PEER_CHUNK_BYTES),  # the peer garbles
    }
    pairs = [(k, p) for k in FAULT_KINDS for p in PHASES]
    first_role = rng.integers(2, size=len(pairs))
    plans: list[FaultPlan] = []
    round_no = 0
    while len(plans) < count:
        for i in rng.permutation(len(pairs)):
            kind, phase = pairs[int(i)]
            role = (Party.GARBLER, Party.EVALUATOR)[(int(first_role[int(i)]) + round_no) % 2]
            index = 0 if phase == FINISH else int(rng.integers(frames[role][phase]))
            plans.append(FaultPlan(kind, phase, index, role, reset=bool(rng.integers(2))))  # type: ignore[arg-type]
            if len(plans) == count:
                break
        round_no += 1
    return plans


Fire = Callable[[FaultPlan, str, str], None]  # (plan, frame type, direction): performs the fault


class FaultPoint:
    """Counts a session's frames per phase at the peer's stream and fires the planned fault at the planned frame."""

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
                    if kind == fr.HELLO and not isinstance(frame, fr.TablesFrame):
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
        method: grpc.aio.StreamStreamMultiCallable[bytes, bytes] = channel.stream_stream(
            METHOD_PATH, request_serializer=None, response_deserializer=None
        )
        call = method(timeout=limits.deadline_s + 2 * limits.abort_grace_s)
        return await drive(session, FaultyStream(call, limits.abort_grace_s, point), limits)
