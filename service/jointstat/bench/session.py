"""``jointstat bench session``: a whole two-party session between two node processes on loopback, over TLS.

Theory of operation: the benchmark makes a private CA, two node certificates and two Ed25519 signing keys, then
starts two processes (``spawn``, so each is a fresh interpreter with its own memory): the garbler serves on
127.0.0.1 with ``SessionServer``, the evaluator connects with ``run_client``; each pins the other's certificate.
Each process measures the same program itself (the wide program of ``bench garble``: ``and_gates`` AND gates in
calls of ``width`` lanes, half the final state to each party) with invented inputs, runs its side of the session —
hello, base OT and OT extension for the evaluator's inputs, the garbled tables streamed in frames of
``chunk_bytes`` while the program runs, output labels, decoding, signed finish — and reports its figures.

Figures: ``wall_s`` runs from the evaluator's first connection attempt to the later of the two sides' ends (the
program is measured on the count backend before, timed separately as ``setup_s``); ``bytes_on_wire`` counts every
frame in both directions at the garbler's transport (frame bytes plus the 5-byte gRPC message prefix, see
``transport.driver``). Memory, per process: ``*_peak_rss_mib`` is its whole peak resident set size (the kernel's
high-water mark), ``*_session_peak_rss_mib`` the peak during the session alone (the high-water mark is reset,
through ``/proc/self/clear_refs``, just before; None where the kernel does not allow it). Each side checks its own
outputs against the same program on the plain backend after the session (``outputs_correct``).

Link: after the session the evaluator pulls ``PUMP_BYTES`` from the garbler over a fresh stream of the same kind
(gRPC, mutual TLS, 1 MiB messages, loopback, the same two processes) and times it: ``link_bytes_per_s`` is what
the transport itself carries here, and ``link_utilisation`` the session's bytes per second over that.
"""

from __future__ import annotations

import asyncio
import gc
import multiprocessing as mp
import resource
import time
from multiprocessing.connection import Connection
from typing import Any

import numpy as np

from jointstat.bench.report import emit

DEFAULT_WIDTH = 1 << 14
DEFAULT_CHUNK_BYTES = 1 << 20
PUMP_BYTES = 1 << 29
PUMP_MESSAGE = 1 << 20
PUMP_PATH = "/jointstat.bench.Pump/Stream"
SESSION_ID = b"bench-session-loopback"
CHILD_TIMEOUT_S = 1800.0


def _peak_rss_mib() -> float:
    """This process's peak resident set size so far (the kernel's high-water mark, VmHWM), in MiB."""
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _reset_peak_rss() -> bool:
    """Restart the high-water mark from the current RSS (Linux: "5" to /proc/self/clear_refs); False if not possible."""
    try:
        with open("/proc/self/clear_refs", "w") as refs:
            refs.write("5")
    except OSError:
        return False
    return True


def node_process(spec: dict[str, Any], conn: Connection) -> None:
    """One node process: build the circuit, run one side of the session, send the figures back."""
    try:
        conn.send(asyncio.run(_node_async(spec, conn)))
    except BaseException as exc:
        conn.send({"error": f"{spec['role']}: {type(exc).__name__}: {exc}"})
    finally:
        conn.close()


async def _node_async(spec: dict[str, Any], conn: Connection) -> dict[str, Any]:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

    from jointstat.bench.garble import wide_program
    from jointstat.circuit.model import Party
    from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
    from jointstat.transport import Limits, SessionServer, run_client
    from jointstat.transport.tls import NodeTLS

    t0 = time.monotonic()
    program = wide_program(spec["and_gates"], spec["width"])
    setup_s = time.monotonic() - t0
    rng = np.random.default_rng(2024)
    bits = {p: rng.integers(0, 2, program.n_inputs(p), dtype=np.uint8) for p in Party}  # invented inputs
    tls = NodeTLS(spec["certificate"], spec["private_key"], (spec["peer_certificate"],))
    key = Ed25519PrivateKey.from_private_bytes(spec["signing_key"])
    peer = Ed25519PublicKey.from_public_bytes(spec["peer_public_key"])
    common = {
        "session_id": SESSION_ID,
        "program": program,
        "manifest_digest": spec["manifest_digest"],
        "sign": signer(key),
        "verify": verifier(peer),
    }
    limits = Limits(deadline_s=CHILD_TIMEOUT_S, idle_timeout_s=120.0)
    setup_peak = _peak_rss_mib()
    gc.collect()
    separate_peak = _reset_peak_rss()
    session: GarblerSession | EvaluatorSession
    if spec["role"] == "garbler":
        party = Party.GARBLER
        session = GarblerSession(inputs=bits[party], chunk_bytes=spec["chunk_bytes"], **common)
        server = SessionServer(tls, address="127.0.0.1:0", limits=limits, services=[_add_pump])
        port = await server.start()
        expected = server.expect(session)
        conn.send({"port": port})
        result = await expected
        start = float("nan")
        end = time.monotonic()
        await asyncio.get_running_loop().run_in_executor(None, conn.poll, CHILD_TIMEOUT_S)  # the pump is done
        conn.recv()
        await server.stop(1.0)
    else:
        party = Party.EVALUATOR
        session = EvaluatorSession(inputs=bits[party], **common)
        start = time.monotonic()
        result = await run_client(session, f"127.0.0.1:{spec['port']}", tls, limits=limits)
        end = time.monotonic()
    session_peak = _peak_rss_mib() if separate_peak else None
    peak = max(
        setup_peak, _peak_rss_mib()
    )  # before the link measurement, whose buffers are not the session's
    pump_s = await _pump(f"127.0.0.1:{spec['port']}", tls) if party == Party.EVALUATOR else None
    figures: dict[str, Any] = {
        "role": spec["role"],
        "completed": result.completed,
        "abort": None if result.abort is None else f"{result.abort.reason.name}: {result.abort.message}",
        "start": start,
        "end": end,
        "setup_s": setup_s,
        "bytes_sent": result.counters.bytes_sent,
        "bytes_received": result.counters.bytes_received,
        "frames": result.counters.frames_sent + result.counters.frames_received,
        "peak_rss_mib": peak,
        "session_peak_rss_mib": session_peak,
        "and_gates": program.size.and_gates,
        "evaluator_inputs": program.n_inputs(Party.EVALUATOR),
        "pump_s": pump_s,
    }
    if result.completed and spec["check"]:
        assert result.outputs is not None  # a completed session carries its own outputs
        from jointstat.circuit.backend import PlainBackend
        from jointstat.circuit.builder import Builder

        plain = PlainBackend(bits)
        program.run(Builder(plain))
        figures["outputs_correct"] = bool(np.array_equal(plain.outputs(party), result.outputs))
    return figures


def _add_pump(server: Any) -> None:
    """Register the link measurement on the garbler's port: a stream of PUMP_MESSAGE-byte messages."""
    import grpc

    async def stream(request: bytes, context: Any) -> Any:
        total = int.from_bytes(request, "little")
        message = bytes(PUMP_MESSAGE)
        for _ in range(total // PUMP_MESSAGE):
            yield message

    handler: grpc.RpcMethodHandler[bytes, bytes] = grpc.unary_stream_rpc_method_handler(
        stream, request_deserializer=None, response_serializer=None
    )
    server.add_generic_rpc_handlers(
        (grpc.method_handlers_generic_handler("jointstat.bench.Pump", {"Stream": handler}),)
    )


async def _pump(target: str, tls: Any) -> float:
    """Seconds to pull PUMP_BYTES from the garbler's port (same TLS, same message options as a session)."""
    import grpc

    from jointstat.transport.channel import MESSAGE_OPTIONS

    options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", tls.server_name())]
    async with grpc.aio.secure_channel(target, tls.channel_credentials(), options=options) as channel:
        method: grpc.aio.UnaryStreamMultiCallable[bytes, bytes] = channel.unary_stream(
            PUMP_PATH, request_serializer=None, response_deserializer=None
        )
        start = time.monotonic()
        got = 0
        async for message in method(PUMP_BYTES.to_bytes(8, "little")):
            got += len(message)
        elapsed = time.monotonic() - start
    if got != PUMP_BYTES:
        raise RuntimeError(f"link measurement: received {got} of {PUMP_BYTES} bytes")
    return elapsed


def _receive(conn: Connection, what: str) -> dict[str, Any]:
    if not conn.poll(CHILD_TIMEOUT_S):
        raise RuntimeError(f"{what}: no answer within {CHILD_TIMEOUT_S:g} s")
    message = conn.recv()
    if "error" in message:
        raise RuntimeError(message["error"])
    return message


def node_specs(
    and_gates: int, *, width: int = DEFAULT_WIDTH, chunk_bytes: int = DEFAULT_CHUNK_BYTES
) -> tuple[dict[str, Any], dict[str, Any]]:
    """Fresh certificates and signing keys for the two node processes: (garbler spec, evaluator spec).

    The evaluator's spec still needs the garbler's ``port``.
    """
    import hashlib

    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    from jointstat.transport.pki import issue, new_ca

    if and_gates < 1:
        raise ValueError(f"--and-gates must be at least 1, got {and_gates}")
    ca = new_ca("bench CA")
    garbler_cert, evaluator_cert = issue(ca, "garbler.bench.test"), issue(ca, "evaluator.bench.test")
    g_key, e_key = Ed25519PrivateKey.generate(), Ed25519PrivateKey.generate()
    raw = serialization.Encoding.Raw
    priv, pub = serialization.PrivateFormat.Raw, serialization.PublicFormat.Raw
    nokey = serialization.NoEncryption()
    base = {
        "and_gates": and_gates,
        "width": width,
        "chunk_bytes": chunk_bytes,
        "manifest_digest": hashlib.sha256(b"invented manifest: session benchmark").digest(),
        "check": True,
    }
    g_spec = {
        **base,
        "role": "garbler",
        "certificate": garbler_cert.certificate,
        "private_key": garbler_cert.private_key,
        "peer_certificate": evaluator_cert.certificate,
        "signing_key": g_key.private_bytes(raw, priv, nokey),
        "peer_public_key": e_key.public_key().public_bytes(raw, pub),
    }
    e_spec = {
        **base,
        "role": "evaluator",
        "certificate": evaluator_cert.certificate,
        "private_key": evaluator_cert.private_key,
        "peer_certificate": garbler_cert.certificate,
        "signing_key": e_key.private_bytes(raw, priv, nokey),
        "peer_public_key": g_key.public_key().public_bytes(raw, pub),
    }
    return g_spec, e_spec


def measure(
    and_gates: int, *, width: int = DEFAULT_WIDTH, chunk_bytes: int = DEFAULT_CHUNK_BYTES
) -> dict[str, Any]:
    """Run the two-process session and return each side's figures."""
    g_spec, e_spec = node_specs(and_gates, width=width, chunk_bytes=chunk_bytes)
    ctx = mp.get_context("spawn")
    g_parent, g_child = ctx.Pipe()
    e_parent, e_child = ctx.Pipe()
    garbler = ctx.Process(target=node_process, args=(g_spec, g_child), name="jointstat-bench-garbler")
    evaluator: mp.process.BaseProcess | None = None
    garbler.start()
    try:
        e_spec["port"] = _receive(g_parent, "garbler")["port"]
        evaluator = ctx.Process(target=node_process, args=(e_spec, e_child), name="jointstat-bench-evaluator")
        evaluator.start()
        e_fig = _receive(e_parent, "evaluator")
        g_parent.send({"pump": "done"})
        g_fig = _receive(g_parent, "garbler")
    finally:
        for proc in (evaluator, garbler):
            if proc is not None:
                proc.join(timeout=30)
                if proc.is_alive():
                    proc.kill()
                    proc.join()
    if not (g_fig["completed"] and e_fig["completed"]):
        raise RuntimeError(f"session did not complete: garbler {g_fig['abort']}; evaluator {e_fig['abort']}")
    return {"garbler": g_fig, "evaluator": e_fig}


def _round(value: float | None) -> float | None:
    return None if value is None else round(value, 1)


def run(and_gates: int, as_json: bool) -> int:
    from jointstat.problems import UserError

    if and_gates < 1:
        raise UserError(f"bench session: --and-gates must be at least 1, got {and_gates}")
    sides = measure(and_gates)
    g, e = sides["garbler"], sides["evaluator"]
    wall = max(g["end"], e["end"]) - e["start"]
    n_and = g["and_gates"]
    on_wire = g["bytes_sent"] + g["bytes_received"]
    figures: dict[str, Any] = {
        "and_gates": n_and,
        "wall_s": round(wall, 3),
        "and_per_s": round(n_and / wall, 1),
        "bytes_on_wire": on_wire,
        "bytes_per_and": round(on_wire / n_and, 4),
        "garbler_peak_rss_mib": round(g["peak_rss_mib"], 1),
        "evaluator_peak_rss_mib": round(e["peak_rss_mib"], 1),
        "garbler_session_peak_rss_mib": _round(g["session_peak_rss_mib"]),
        "evaluator_session_peak_rss_mib": _round(e["session_peak_rss_mib"]),
        "garbler_to_evaluator_bytes": g["bytes_sent"],
        "evaluator_to_garbler_bytes": g["bytes_received"],
        "evaluator_counted_bytes": e["bytes_sent"] + e["bytes_received"],
        "frames": g["frames"],
        "evaluator_inputs_by_ot": g["evaluator_inputs"],
        "setup_s": round(max(g["setup_s"], e["setup_s"]), 3),
    }
    link = PUMP_BYTES / e["pump_s"]
    figures["link_bytes_per_s"] = round(link, 1)
    figures["link_utilisation"] = round((on_wire / wall) / link, 3)
    figures["outputs_correct"] = bool(g.get("outputs_correct") and e.get("outputs_correct"))
    emit("session benchmark (two node processes on loopback, mutual TLS)", figures, as_json)
    return 1 if figures["outputs_correct"] is False else 0
