"""A node process killed in the middle of a session: the surviving node aborts and releases nothing.

The garbler runs as its own process (the benchmark's node process, started with ``spawn``); the evaluator runs
here. After the evaluator has evaluated a few table frames the garbler process is killed with SIGKILL — no abort
frame, no stream shutdown, just a dead socket — and the evaluator must end with ``connection lost`` and no output.
"""

from __future__ import annotations

import asyncio
import multiprocessing as mp
import os
import signal

import grpc
import numpy as np
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey
from jointstat.bench.garble import wide_program
from jointstat.bench.session import node_process, node_specs, session_id
from jointstat.circuit.model import Party
from jointstat.protocol import AbortReason, EvaluatorSession, signer, verifier
from jointstat.protocol import frames as fr
from jointstat.transport import Limits
from jointstat.transport.channel import MESSAGE_OPTIONS, METHOD_PATH, ClientStream
from jointstat.transport.driver import drive
from jointstat.transport.tls import NodeTLS


class KillAfterTables(ClientStream):
    """Reads normally; once ``tables`` table frames have arrived, kills process ``pid``."""

    def __init__(self, call: grpc.aio.StreamStreamCall, pid: int, tables: int) -> None:
        super().__init__(call, grace_s=2)
        self.pid, self.tables, self.seen = pid, tables, 0
        self.killed = False

    async def read(self) -> bytes | None:
        data = await super().read()
        if data is not None and not self.killed and fr.decode(data)[0] == fr.GARBLED_TABLES:
            self.seen += 1
            if self.seen == self.tables:
                os.kill(self.pid, signal.SIGKILL)
                self.killed = True
        return data


async def test_killing_the_garbler_process_mid_stream_aborts_the_evaluator_with_no_output() -> None:
    g_spec, e_spec = node_specs(1 << 18, width=4096, chunk_bytes=1 << 12)  # 8 MiB of tables in 4 KiB frames
    ctx = mp.get_context("spawn")
    parent, child = ctx.Pipe()
    garbler = ctx.Process(target=node_process, args=(g_spec, child), name="jointstat-test-garbler")
    garbler.start()
    try:
        assert parent.poll(120), "the garbler process did not start"
        port = parent.recv()["port"]
        parent.send({"run": 1, "linked": False})  # the garbler process expects the session of run 1
        assert parent.poll(60) and parent.recv() == {"ready": 1}
        program = wide_program(1 << 18, 4096)  # the program the garbler process measures and runs
        evaluator = EvaluatorSession(
            session_id=session_id(1, 1),
            program=program,
            manifest_digest=e_spec["manifest_digest"],
            inputs=np.zeros(program.n_inputs(Party.EVALUATOR), dtype=np.uint8),
            sign=signer(Ed25519PrivateKey.from_private_bytes(e_spec["signing_key"])),
            verify=verifier(Ed25519PublicKey.from_public_bytes(e_spec["peer_public_key"])),
        )
        tls = NodeTLS(e_spec["certificate"], e_spec["private_key"], (e_spec["peer_certificate"],))
        limits = Limits(deadline_s=60, idle_timeout_s=20, abort_grace_s=1)
        options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", tls.server_name())]
        async with grpc.aio.secure_channel(
            f"127.0.0.1:{port}", tls.channel_credentials(), options=options
        ) as ch:
            stream = KillAfterTables(ch.stream_stream(METHOD_PATH)(timeout=60), garbler.pid, tables=5)
            result = await asyncio.wait_for(drive(evaluator, stream, limits), timeout=60)
    finally:
        if garbler.is_alive():
            garbler.kill()
        garbler.join()
    assert stream.killed and garbler.exitcode == -signal.SIGKILL
    assert not result.completed and result.outputs is None and evaluator.failed
    assert result.abort is not None and result.abort.reason == AbortReason.CONNECTION_LOST
    assert result.counters.bytes_received < 32 * program.size.and_gates  # it never got the whole circuit
    assert 0 < evaluator.and_gates_done < program.size.and_gates  # it was evaluating when the garbler died
