"""The stand-in peer in a process of its own, for the kill fault: it SIGKILLs itself at the planned frame.

Theory of operation: ``PeerProcess.spawn`` starts a fresh interpreter (``spawn``) running ``peer_process_main``
with a ``PeerSpec``: the peer's keys, the job files, its session log (the harness closes its own copy first: one
writer at a time), the plan and the limits. In ``initiate`` mode the process proposes one run of ``JOB_ACCEPTED``
to the node when told to go and plays its session; in ``accept`` mode it serves the node's proposal of
``JOB_INITIATED`` (attempt 1) and reports its port. At the planned frame it sends the harness the secrets it has
recorded and the frame it fired at, then kills itself with SIGKILL — no abort frame, no TLS close. ``finish``
collects what it reported until it is gone (or, without a fault, its result), and says how it ended: killed,
hung past the bound, or an error it reported. The harness then reopens the peer's log, as a restarted node does.
"""

from __future__ import annotations

import asyncio
import contextlib
import multiprocessing as mp
import os
import signal
import time
from dataclasses import dataclass, field
from multiprocessing.connection import Connection
from pathlib import Path
from typing import Any, Literal

from jointstat.circuit.model import Party
from jointstat.harness.faultpoint import FaultPlan
from jointstat.harness.outcome import Side
from jointstat.harness.peer import HarnessAcceptor, LoggedNode, PeerKeys, run_initiator
from jointstat.harness.scanner import Secrets
from jointstat.harness.scenario import JobFiles, peer_job
from jointstat.transport.driver import Limits

START_TIMEOUT_S = 120.0


@dataclass(frozen=True)
class PeerSpec:
    """What a peer process is told (it must pickle)."""

    mode: Literal["initiate", "accept"]
    keys: Path
    files: JobFiles
    log: Path
    plan: FaultPlan
    limits: Limits
    node_port: int
    session_id: bytes = b""
    attempt: int = 1


def peer_process_main(spec: PeerSpec, conn: Connection) -> None:
    """Entry point of a peer process: play the peer's side of one session, SIGKILL itself at the planned frame."""
    try:
        asyncio.run(_peer_process(spec, conn))
    except BaseException as exc:
        with contextlib.suppress(Exception):
            conn.send({"error": f"{type(exc).__name__}: {exc}"})
    finally:
        conn.close()


async def _peer_process(spec: PeerSpec, conn: Connection) -> None:
    keys = PeerKeys.load(spec.keys)
    job = peer_job(spec.files)
    secrets = Secrets()
    logged = LoggedNode(keys, spec.log, secrets)

    def fire(_plan: FaultPlan, kind: str, direction: str) -> None:
        conn.send({"fired": f"{kind}, {direction}", "secrets": secrets.to_wire()})
        os.kill(os.getpid(), signal.SIGKILL)

    if spec.mode == "initiate":
        conn.send({"ready": True})
        await asyncio.to_thread(conn.recv)  # go
        side, _fired = await run_initiator(
            keys,
            job,
            logged,
            secrets,
            node_port=spec.node_port,
            target_port=spec.node_port,
            session_id=spec.session_id,
            attempt=spec.attempt,
            plan=spec.plan,
            fire=fire,
            limits=spec.limits,
        )
        conn.send(
            {"result": {"released": side.released, "reason": side.reason}, "secrets": secrets.to_wire()}
        )
    else:
        acceptor = HarnessAcceptor(keys, job, logged, secrets, fire, spec.limits)
        acceptor.plans[spec.attempt] = spec.plan
        port = await acceptor.start()
        conn.send({"ready": True, "port": port})
        await asyncio.to_thread(conn.recv)  # stop (unless the planned fault killed this process first)
        await acceptor.stop(None)
    logged.close()


@dataclass
class ProcessReport:
    """What a peer process reported, and how it ended."""

    side: Side
    fired: str | None = None
    secrets: Secrets = field(default_factory=Secrets)
    errors: list[str] = field(default_factory=list)


class PeerProcess:
    """A running peer process (module docstring)."""

    def __init__(self, proc: Any, conn: Connection, port: int) -> None:
        self.proc, self.conn, self.port = proc, conn, port

    @classmethod
    async def spawn(cls, spec: PeerSpec) -> PeerProcess:
        ctx = mp.get_context("spawn")
        parent, child = ctx.Pipe()
        proc = ctx.Process(
            target=peer_process_main, args=(spec, child), name="jointstat-fault-peer", daemon=True
        )
        proc.start()
        child.close()
        if not await asyncio.to_thread(parent.poll, START_TIMEOUT_S):
            proc.kill()
            raise RuntimeError(f"the peer process did not start within {START_TIMEOUT_S:g} s")
        try:
            message = parent.recv()
        except EOFError:
            message = {"error": f"it exited with code {proc.exitcode} before it was ready"}
        if "ready" not in message:
            proc.kill()
            raise RuntimeError(f"the peer process failed to start: {message.get('error')}")
        return cls(proc, parent, int(message.get("port", 0)))

    def go(self) -> None:
        """Let an initiating peer propose its run."""
        self.conn.send({"go": True})

    async def finish(self, party: Party, bound_s: float) -> ProcessReport:
        """Collect the process's reports until it is gone, at most ``bound_s`` seconds; then reap it."""
        t0 = time.monotonic()
        report = ProcessReport(Side(party=party))
        side = report.side
        deadline = t0 + bound_s
        while True:
            left = deadline - time.monotonic()
            if left <= 0 or not await asyncio.to_thread(self.conn.poll, left):
                side.hung = True
                break
            try:
                message = self.conn.recv()
            except EOFError:  # the process is gone
                break
            if "secrets" in message:
                report.secrets.merge(Secrets.from_wire(message["secrets"]))
            if "fired" in message:
                report.fired = message["fired"]
            if "result" in message:
                side.released = bool(message["result"]["released"])
                side.reason = message["result"]["reason"]
                with contextlib.suppress(OSError):
                    self.conn.send({"stop": True})
            if "error" in message:
                report.errors.append(f"peer process: {message['error']}")
        await asyncio.to_thread(self.proc.join, 10)
        if self.proc.is_alive():
            self.proc.kill()
            await asyncio.to_thread(self.proc.join)
            side.hung = True
        side.killed = self.proc.exitcode == -signal.SIGKILL
        if report.fired is not None and not side.killed:
            report.errors.append(
                f"the peer process fired its fault but ended with exit code {self.proc.exitcode}"
            )
        side.ended_after_s = None if side.hung else time.monotonic() - t0
        return report
