"""``jointstat bench session``: a whole two-party session between two node processes, over TLS on loopback or
through the link emulator.

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
through ``/proc/self/clear_refs``, just before; None where the kernel does not allow it). CPU, per process:
``*_cpu_s`` is the CPU time (user and system, all threads: garbling or evaluating, the transcript hash, gRPC and
TLS) the session took. Each side checks its own outputs against the same program on the plain backend after the
session (``outputs_correct``).

Link, on loopback (no ``--link``): after the session the evaluator pulls ``PUMP_BYTES`` from the garbler over a
fresh stream of the same kind (gRPC, mutual TLS, 1 MiB messages, loopback, the same two processes) and times it:
``link_bytes_per_s`` is what the transport itself carries here, and ``link_utilisation`` the session's bytes per
second over that; ``link_s`` is the time of that transfer and ``link_garbler_cpu_s``/``link_evaluator_cpu_s`` the
CPU each process spent on it, so the session's CPU can be set against the transport's own.

Link, emulated (``--link RATE --rtt TIME``): the evaluator connects through the link emulator in a process of its
own (``harness.link.LinkProcess``: that rate each way, half the round trip as each one-way delay), the garbler
serves behind it; sessions may resume after a cut (``resume_grace_s`` 30 s). ``link_bytes_per_s`` is the emulated
rate, ``link_utilisation`` the session's bytes in its busier direction (garbler to evaluator: the tables) per
second of ``wall_s`` over that rate, ``link_carried_utilisation`` the same from the emulator's own count of the
bytes it delivered (TLS and HTTP/2 framing included); ``link_mean_late_us``/``link_max_late_us`` how late the
emulator's delivery timers fired (its error on the delay), ``flow_*`` what the garbler's flow window measured
(``transport.flow``). With ``--cuts N`` the same session runs twice in the same two processes, first through an
uncut link, then through one that cuts every connection (TCP resets) after each N+1-th of the tables has reached
the evaluator: the figures are the cut run's, ``slowdown`` its wall time over the uncut run's
(``baseline_wall_s``), ``resumed`` the resumes the evaluator made, ``restarted`` the sessions started afresh after
a cut before OT had ended (a new session id, fresh randomness), ``outputs_correct`` both runs' outputs.
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

from jointstat.bench.report import emit, session_outcome

DEFAULT_WIDTH = 1 << 14
DEFAULT_CHUNK_BYTES = 1 << 20
PUMP_BYTES = 1 << 29
PUMP_MESSAGE = 1 << 20
PUMP_PATH = "/jointstat.bench.Pump/Stream"
SESSION_ID = b"bench-session-loopback"
CHILD_TIMEOUT_S = 1800.0
RESUME_GRACE_S = 30.0
MAX_ATTEMPTS = 3  # a session and up to two restarts after cuts before OT


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
    """One node process: build the program, then run the sessions the parent asks for, sending the figures back."""
    try:
        asyncio.run(_node_async(spec, conn))
    except BaseException as exc:
        conn.send({"error": f"{spec['role']}: {type(exc).__name__}: {exc}"})
    finally:
        conn.close()


def session_id(run: int, attempt: int) -> bytes:
    """The id of a node process's session: run ``run`` (1, 2: uncut and cut), attempt ``attempt`` (1 + restarts)."""
    return SESSION_ID + f"-{run}-{attempt}".encode()


def _limits(linked: bool) -> Any:
    from jointstat.transport import Limits

    if not linked:
        return Limits(deadline_s=CHILD_TIMEOUT_S, idle_timeout_s=120.0)
    return Limits(
        deadline_s=CHILD_TIMEOUT_S,
        idle_timeout_s=30.0,
        resume_grace_s=RESUME_GRACE_S,
        reconnect_initial_s=0.02,
        reconnect_max_s=1.0,
    )


async def _node_async(spec: dict[str, Any], conn: Connection) -> None:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

    from jointstat.bench.garble import wide_program
    from jointstat.circuit.model import Party
    from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
    from jointstat.transport import SessionServer, run_client
    from jointstat.transport.tls import NodeTLS

    loop = asyncio.get_running_loop()
    t0 = time.monotonic()
    program = wide_program(spec["and_gates"], spec["width"])
    setup_s = time.monotonic() - t0
    rng = np.random.default_rng(2024)
    bits = {p: rng.integers(0, 2, program.n_inputs(p), dtype=np.uint8) for p in Party}  # invented inputs
    tls = NodeTLS(spec["certificate"], spec["private_key"], (spec["peer_certificate"],))
    key = Ed25519PrivateKey.from_private_bytes(spec["signing_key"])
    peer = Ed25519PublicKey.from_public_bytes(spec["peer_public_key"])
    common = {
        "program": program,
        "manifest_digest": spec["manifest_digest"],
        "sign": signer(key),
        "verify": verifier(peer),
    }
    setup_peak = _peak_rss_mib()
    garbler = spec["role"] == "garbler"
    party = Party.GARBLER if garbler else Party.EVALUATOR
    plain: np.ndarray | None = None
    server: SessionServer | None = None
    if garbler:
        server = SessionServer(tls, address="127.0.0.1:0", limits=_limits(True), services=[_add_pump])
        conn.send({"port": await server.start()})

    def new(run: int, attempt: int) -> Any:
        sid = session_id(run, attempt)
        if garbler:
            return GarblerSession(
                session_id=sid, inputs=bits[party], chunk_bytes=spec["chunk_bytes"], **common
            )
        return EvaluatorSession(session_id=sid, inputs=bits[party], **common)

    while True:
        order = await loop.run_in_executor(None, conn.recv)
        if order.get("stop"):
            break
        if "pump" in order:
            conn.send({"pump_s": await _pump(f"127.0.0.1:{order['pump']}", tls)})
            continue
        if "cpu" in order:
            conn.send({"cpu_s": time.process_time()})
            continue
        run, limits = order["run"], _limits(order["linked"])
        gc.collect()
        separate_peak = _reset_peak_rss()
        results = []
        start, cpu_start = time.monotonic(), time.process_time()
        if server is not None:
            waiting = []
            for attempt in range(1, MAX_ATTEMPTS + 1):
                session = new(run, attempt)
                waiting.append((session, server.expect(session, limits=limits)))
            conn.send({"ready": run})
            for _session, expected in waiting:
                result = await expected
                results.append(result)
                if result.completed or not _may_restart(result):
                    break
            for session, _ in waiting[len(results) :]:
                server.withdraw(session.session_id)
        else:
            for attempt in range(1, MAX_ATTEMPTS + 1):
                result = await run_client(new(run, attempt), f"127.0.0.1:{order['port']}", tls, limits=limits)
                results.append(result)
                if result.completed or not _restartable(result):
                    break
        end, cpu_s = time.monotonic(), time.process_time() - cpu_start
        result = results[-1]
        figures: dict[str, Any] = {
            **session_outcome(spec["role"], result, start, end),
            "setup_s": setup_s,
            "cpu_s": cpu_s,
            "bytes_sent": sum(r.counters.bytes_sent for r in results),
            "bytes_received": sum(r.counters.bytes_received for r in results),
            "frames": sum(r.counters.frames_sent + r.counters.frames_received for r in results),
            "peak_rss_mib": max(setup_peak, _peak_rss_mib()),
            "session_peak_rss_mib": _peak_rss_mib() if separate_peak else None,
            "and_gates": program.size.and_gates,
            "evaluator_inputs": program.n_inputs(Party.EVALUATOR),
            "cuts": sum(r.cuts for r in results),
            "resumed": sum(r.resumes for r in results),
            "restarted": len(results) - 1,
            "events": [f"{e.at_s:.3f}s {e.kind}: {e.detail}" for r in results for e in r.events],
            "flow": None if result.flow is None else vars(result.flow),
        }
        if result.completed and spec["check"]:
            assert result.outputs is not None  # a completed session carries its own outputs
            if plain is None:
                from jointstat.circuit.backend import PlainBackend
                from jointstat.circuit.builder import Builder

                backend = PlainBackend(bits)
                program.run(Builder(backend))
                plain = backend.outputs(party)
            figures["outputs_correct"] = bool(np.array_equal(plain, result.outputs))
        conn.send(figures)
    if server is not None:
        await server.stop(1.0)


def _restartable(result: Any) -> bool:
    """The evaluator (it connects): its session was lost to a cut before its OT had ended
    (``SessionResult.restartable``), so it starts a fresh one."""
    return bool(result.restartable)


def _may_restart(result: Any) -> bool:
    """The garbler (it serves): its session was lost with its connection, so the evaluator may start a fresh one
    (the evaluator decides; its OT ends after the garbler's)."""
    from jointstat.protocol import AbortReason

    return result.abort is not None and result.abort.reason == AbortReason.CONNECTION_LOST


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


def _start_nodes(g_spec: dict[str, Any], e_spec: dict[str, Any]) -> tuple[Any, Any, Any, Any]:
    ctx = mp.get_context("spawn")
    g_parent, g_child = ctx.Pipe()
    e_parent, e_child = ctx.Pipe()
    garbler = ctx.Process(target=node_process, args=(g_spec, g_child), name="jointstat-bench-garbler")
    evaluator = ctx.Process(target=node_process, args=(e_spec, e_child), name="jointstat-bench-evaluator")
    garbler.start()
    evaluator.start()
    return garbler, evaluator, g_parent, e_parent


def _cpu_seconds(parent: Connection) -> float:
    """A node process's CPU seconds so far (user and system, all its threads)."""
    parent.send({"cpu": True})
    return float(_receive(parent, "node")["cpu_s"])


def _session_run(
    g_parent: Connection, e_parent: Connection, run: int, port: int, linked: bool
) -> dict[str, Any]:
    g_parent.send({"run": run, "linked": linked})
    _receive(g_parent, "garbler")  # ready: it expects the session
    e_parent.send({"run": run, "port": port, "linked": linked})
    e_fig = _receive(e_parent, "evaluator")
    g_fig = _receive(g_parent, "garbler")
    if not (g_fig["completed"] and e_fig["completed"]):
        raise RuntimeError(
            f"session did not complete: garbler {g_fig['abort']}; evaluator {e_fig['abort']}; "
            f"events {e_fig['events'][-3:]}"
        )
    return {"garbler": g_fig, "evaluator": e_fig}


def measure(
    and_gates: int,
    *,
    width: int = DEFAULT_WIDTH,
    chunk_bytes: int = DEFAULT_CHUNK_BYTES,
    link: Any = None,
    cuts: int = 0,
) -> dict[str, Any]:
    """Run the two-process session (twice with ``cuts``: uncut, then cut) and return each run's figures.

    ``link`` is a ``harness.link.LinkConfig`` (None: loopback, and the transport's own speed is measured).
    """
    from jointstat.harness.link import CutAfterBytes, LinkConfig, LinkProcess

    g_spec, e_spec = node_specs(and_gates, width=width, chunk_bytes=chunk_bytes)
    garbler, evaluator, g_parent, e_parent = _start_nodes(g_spec, e_spec)
    out: dict[str, Any] = {}
    try:
        port = _receive(g_parent, "garbler")["port"]
        if link is None:
            out["run"] = _session_run(g_parent, e_parent, 1, port, False)
            cpu_before = [_cpu_seconds(parent) for parent in (g_parent, e_parent)]
            e_parent.send({"pump": port})
            out["pump_s"] = _receive(e_parent, "evaluator")["pump_s"]
            cpu_after = [_cpu_seconds(parent) for parent in (g_parent, e_parent)]
            out["pump_cpu_s"] = [after - before for before, after in zip(cpu_before, cpu_after, strict=True)]
        else:
            table_bytes = 32 * and_gates
            plans: list[tuple[str, tuple[CutAfterBytes, ...]]] = [("baseline", ())] if cuts else []
            spread = tuple(
                CutAfterBytes("to_client", table_bytes * k // (cuts + 1)) for k in range(1, cuts + 1)
            )
            plans.append(("run", spread))
            for number, (name, plan) in enumerate(plans, start=1):
                config = LinkConfig(link.to_server, link.to_client, plan, link.cut_mode, link.handshake)
                with LinkProcess(config, ("127.0.0.1", port)) as emulator:
                    out[name] = _session_run(g_parent, e_parent, number, emulator.port, True)
                    out[name]["link"] = emulator.counters()
        for parent in (g_parent, e_parent):
            parent.send({"stop": True})
    finally:
        for proc in (evaluator, garbler):
            proc.join(timeout=30)
            if proc.is_alive():
                proc.kill()
                proc.join()
    return out


def _round(value: float | None) -> float | None:
    return None if value is None else round(value, 1)


def _figures(sides: dict[str, Any]) -> dict[str, Any]:
    """Today's keys from one run's figures of both sides."""
    g, e = sides["garbler"], sides["evaluator"]
    wall = max(g["end"], e["end"]) - e["start"]
    n_and = g["and_gates"]
    on_wire = g["bytes_sent"] + g["bytes_received"]
    return {
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
        "garbler_cpu_s": round(g["cpu_s"], 3),
        "evaluator_cpu_s": round(e["cpu_s"], 3),
        "outputs_correct": bool(g.get("outputs_correct") and e.get("outputs_correct")),
    }


def run(
    and_gates: int, as_json: bool, *, link: str | None = None, rtt: str | None = None, cuts: int = 0
) -> int:
    from jointstat.harness.link import LinkConfig, LinkSettingsError
    from jointstat.problems import UserError

    if and_gates < 1:
        raise UserError(f"bench session: --and-gates must be at least 1, got {and_gates}")
    if (link is None) != (rtt is None):
        raise UserError(
            "bench session: --link and --rtt go together (for example --link 100Mbit/s --rtt 40ms)"
        )
    if cuts < 0 or (cuts and link is None):
        raise UserError("bench session: --cuts N needs --link and --rtt, and N must be 0 or more")
    if link is None:
        out = measure(and_gates)
        figures = _figures(out["run"])
        rate = PUMP_BYTES / out["pump_s"]
        figures["link_bytes_per_s"] = round(rate, 1)
        figures["link_utilisation"] = round((figures["bytes_on_wire"] / figures["wall_s"]) / rate, 3)
        figures["link_s"] = round(out["pump_s"], 3)
        figures["link_garbler_cpu_s"] = round(out["pump_cpu_s"][0], 3)
        figures["link_evaluator_cpu_s"] = round(out["pump_cpu_s"][1], 3)
        emit("session benchmark (two node processes on loopback, mutual TLS)", figures, as_json)
        return 0 if figures["outputs_correct"] else 1
    assert rtt is not None
    try:
        config = LinkConfig.from_words(link, rtt)
    except LinkSettingsError as exc:
        raise UserError(f"bench session: {exc}") from None
    out = measure(and_gates, link=config, cuts=cuts)
    main = out["run"]
    figures = _figures(main)
    rate = config.to_client.rate_bytes_per_s
    counters = main["link"]
    g, e = main["garbler"], main["evaluator"]
    flow = g["flow"] or {}
    figures.update(
        {
            "link_rate": link,
            "link_rtt": rtt,
            "link_bytes_per_s": round(rate, 1),
            "link_utilisation": round(figures["garbler_to_evaluator_bytes"] / figures["wall_s"] / rate, 3),
            "link_carried_utilisation": round(counters.to_client_bytes / figures["wall_s"] / rate, 3),
            "link_mean_late_us": round(counters.mean_late_us, 1),
            "link_max_late_us": counters.max_late_us,
            "link_cuts": counters.cuts,
            "cuts": cuts,
            "resumed": e["resumed"],
            "restarted": e["restarted"],
            "flow_rtt_min_ms": None if flow.get("rtt_min_s") is None else round(1000 * flow["rtt_min_s"], 2),
            "flow_rate_mbit_per_s": round(8 * flow.get("rate_bytes_per_s", 0.0) / 1e6, 1),
            "flow_window_bytes": flow.get("window_bytes"),
            "events": e["events"],
        }
    )
    if cuts:
        base = _figures(out["baseline"])
        figures["baseline_wall_s"] = base["wall_s"]
        figures["baseline_link_utilisation"] = round(
            base["garbler_to_evaluator_bytes"] / base["wall_s"] / rate, 3
        )
        figures["slowdown"] = round(figures["wall_s"] / base["wall_s"], 3)
        # bytes sent again after the cuts (frames in flight or unacknowledged when the link went down)
        figures["resent_bytes"] = figures["garbler_to_evaluator_bytes"] - base["garbler_to_evaluator_bytes"]
        figures["outputs_correct"] = figures["outputs_correct"] and base["outputs_correct"]
    title = f"session benchmark (two node processes through the link emulator: {link}, {rtt} RTT"
    emit(title + (f", {cuts} cuts)" if cuts else ")"), figures, as_json)
    return 0 if figures["outputs_correct"] else 1
