"""``jointstat bench join``: the keyed-join sum at a given size — its program measured, or a real session.

The job: each party holds ``rows`` rows with a 32-bit hashed key; the evaluator's rows also carry a 32-bit
unsigned value; the evaluator receives the sum of the values over the keys both hold (``library.join``). The
manifest is made in memory and compiled exactly as a node compiles it.

Without ``--session`` the program is measured on the count backend (no labels at all):

* ``and_gates`` — AND gates of the program;
* ``expected_and_gates`` — comparators of the bitonic merge × AND gates of one compare-and-swap on the 33-bit
  elements (the key and the invalid bit), the latter counted on a fresh count backend;
* ``ratio`` — their quotient; ``count_s`` — wall time of the count; ``peak_rss_mib`` — the process's peak.

With ``--session`` two node processes run the session over loopback with mutual TLS (the machinery of
``bench session``) on generated data with a known overlap: the garbler's keys are ``rows`` distinct random 32-bit
integers, the evaluator's are the first ``rows // 2`` of them plus ``rows - rows // 2`` others, each with a random
value below 2^24. Both processes generate the whole data set from one seed (invented data; each uses only its
own side) and the evaluator checks its result against the sum computed with numpy (``np.isin`` over the keys):
``outputs_correct``. Figures: ``rows``, ``and_gates``, ``wall_s`` (first connection to the later side's end),
``and_per_s``, ``peak_rss_mib_garbler``, ``peak_rss_mib_evaluator`` (each process's whole peak resident set),
``encode_s`` (encoding the inputs), ``bytes_on_wire``.
"""

from __future__ import annotations

import asyncio
import multiprocessing as mp
import sys
import time
from multiprocessing.connection import Connection
from typing import Any

import numpy as np
import yaml

from jointstat.bench.report import emit, peak_rss_mib, session_outcome

SEED = 20261202
VALUE_BITS = 24


def join_manifest(rows: int) -> str:
    data = {
        "job": {"name": "bench-join", "version": 1},
        "parties": {"garbler": {"name": "bench garbler"}, "evaluator": {"name": "bench evaluator"}},
        "tables": {
            "garbler": {"capacity": rows, "columns": [{"name": "key", "type": "key", "width": 32}]},
            "evaluator": {
                "capacity": rows,
                "columns": [
                    {"name": "key", "type": "key", "width": 32},
                    {"name": "value", "type": "unsigned", "width": 32},
                ],
            },
        },
        "statistic": {"name": "keyed_join", "key": "key", "value": {"party": "evaluator", "column": "value"}},
        "outputs": {"evaluator": ["sum"]},
        # A circuit built to be measured, never run: 32-bit keys at up to 2^20 rows expect up to 256 false
        # matches, far above the default bound a job must meet, so the bound is lifted for it.
        "matching": {"max_false_matches": 1000.0},
    }
    return yaml.safe_dump(data)


def generated_data(rows: int) -> dict[str, np.ndarray]:
    """Invented keys and values with a known overlap (see the module docstring)."""
    rng = np.random.default_rng(SEED)
    pool = rng.choice(1 << 32, size=2 * rows - rows // 2, replace=False).astype(np.int64)
    garbler = pool[:rows]
    evaluator = np.concatenate([pool[: rows // 2], pool[rows:]])
    values = rng.integers(0, 1 << VALUE_BITS, size=rows, dtype=np.int64)
    return {"garbler_keys": garbler, "evaluator_keys": evaluator, "evaluator_values": values}


def expected_sum(data: dict[str, np.ndarray]) -> int:
    """The plain answer, by numpy: the values of the evaluator's rows whose key the garbler also holds."""
    shared = np.isin(data["evaluator_keys"], data["garbler_keys"])
    return int(data["evaluator_values"][shared].sum())


def _count(rows: int, as_json: bool) -> int:
    from jointstat.circuit.compile import compile_manifest
    from jointstat.circuit.library.blocks import and_per_compare_swap
    from jointstat.circuit.manifest import parse_manifest

    manifest = parse_manifest(join_manifest(rows), "<bench join>")
    started = time.perf_counter()
    compiled = compile_manifest(manifest)
    size = compiled.size()
    count_s = time.perf_counter() - started
    expected = compiled.extra["comparators"] * and_per_compare_swap(compiled.extra["key_bits"])
    emit(
        "keyed-join sum program (32-bit keys and values), counted",
        {
            "rows": rows,
            "and_gates": size.and_gates,
            "expected_and_gates": expected,
            "ratio": round(size.and_gates / expected, 4),
            "count_s": round(count_s, 2),
            "peak_rss_mib": round(peak_rss_mib(), 1),
            "comparators": compiled.extra["comparators"],
            "label_mib_estimate": round(size.label_bytes() / 2**20, 1),
        },
        as_json,
    )
    return 0


def node_process(spec: dict[str, Any], conn: Connection) -> None:
    try:
        conn.send(asyncio.run(_node_async(spec, conn)))
    except BaseException as exc:
        conn.send({"error": f"{spec['role']}: {type(exc).__name__}: {exc}"})
    finally:
        conn.close()


async def _node_async(spec: dict[str, Any], conn: Connection) -> dict[str, Any]:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

    from jointstat.bench.session import CHILD_TIMEOUT_S, SESSION_ID, _peak_rss_mib
    from jointstat.circuit.compile import compile_manifest
    from jointstat.circuit.inputs import Records, encode_inputs
    from jointstat.circuit.manifest import parse_manifest
    from jointstat.circuit.model import Party
    from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
    from jointstat.transport import Limits, SessionServer, run_client
    from jointstat.transport.tls import NodeTLS

    rows = spec["rows"]
    compiled = compile_manifest(parse_manifest(join_manifest(rows), "<bench join>"))
    program = compiled.as_program()
    data = generated_data(rows)
    t0 = time.monotonic()
    if spec["role"] == "garbler":
        party = Party.GARBLER
        keys = data["garbler_keys"].tolist()
        records = Records("generated", {"key": keys}, list(range(1, rows + 1)))
    else:
        party = Party.EVALUATOR
        cols = {"key": data["evaluator_keys"].tolist(), "value": data["evaluator_values"].tolist()}
        records = Records("generated", cols, list(range(1, rows + 1)))
    bits = encode_inputs(compiled, party, records)
    del records
    encode_s = time.monotonic() - t0
    tls = NodeTLS(spec["certificate"], spec["private_key"], (spec["peer_certificate"],))
    key = Ed25519PrivateKey.from_private_bytes(spec["signing_key"])
    peer = Ed25519PublicKey.from_public_bytes(spec["peer_public_key"])
    common: dict[str, Any] = {
        "session_id": SESSION_ID,
        "program": program,
        "manifest_digest": bytes.fromhex(compiled.digest),
        "sign": signer(key),
        "verify": verifier(peer),
    }
    limits = Limits(deadline_s=CHILD_TIMEOUT_S, idle_timeout_s=300.0)
    session: GarblerSession | EvaluatorSession
    if party == Party.GARBLER:
        session = GarblerSession(inputs=bits, **common)
        server = SessionServer(tls, address="127.0.0.1:0", limits=limits)
        port = await server.start()
        expected = server.expect(session)
        conn.send({"port": port})
        result = await expected
        start, end = float("nan"), time.monotonic()
        await server.stop(1.0)
    else:
        session = EvaluatorSession(inputs=bits, **common)
        start = time.monotonic()
        result = await run_client(session, f"127.0.0.1:{spec['port']}", tls, limits=limits)
        end = time.monotonic()
    figures: dict[str, Any] = {
        **session_outcome(spec["role"], result, start, end),
        "encode_s": encode_s,
        "peak_rss_mib": _peak_rss_mib(),
        "and_gates": program.size.and_gates,
        "bytes": result.counters.bytes_sent + result.counters.bytes_received,
    }
    if result.completed and party == Party.EVALUATOR:
        got = compiled.decode(party, result.outputs)
        figures["outputs_correct"] = got == {"withheld": False, "sum": expected_sum(data)}
    return figures


def _session(rows: int, as_json: bool) -> int:
    from jointstat.bench.session import _receive, node_specs

    g_spec, e_spec = node_specs(1)
    for spec in (g_spec, e_spec):
        spec["rows"] = rows
    ctx = mp.get_context("spawn")
    g_parent, g_child = ctx.Pipe()
    e_parent, e_child = ctx.Pipe()
    garbler = ctx.Process(target=node_process, args=(g_spec, g_child), name="jointstat-bench-join-garbler")
    evaluator: mp.process.BaseProcess | None = None
    garbler.start()
    try:
        e_spec["port"] = _receive(g_parent, "garbler")["port"]
        evaluator = ctx.Process(
            target=node_process, args=(e_spec, e_child), name="jointstat-bench-join-evaluator"
        )
        evaluator.start()
        e = _receive(e_parent, "evaluator")
        g = _receive(g_parent, "garbler")
    finally:
        for proc in (evaluator, garbler):
            if proc is not None:
                proc.join(timeout=60)
                if proc.is_alive():
                    proc.kill()
                    proc.join()
    if not (g["completed"] and e["completed"]):
        raise RuntimeError(f"session did not complete: garbler {g['abort']}; evaluator {e['abort']}")
    wall = max(g["end"], e["end"]) - e["start"]
    emit(
        "keyed-join sum session (two node processes on loopback, mutual TLS, generated data)",
        {
            "rows": rows,
            "and_gates": g["and_gates"],
            "wall_s": round(wall, 2),
            "and_per_s": round(g["and_gates"] / wall, 1),
            "peak_rss_mib_garbler": round(g["peak_rss_mib"], 1),
            "peak_rss_mib_evaluator": round(e["peak_rss_mib"], 1),
            "outputs_correct": bool(e.get("outputs_correct")),
            "encode_s": round(max(g["encode_s"], e["encode_s"]), 2),
            "bytes_on_wire": g["bytes"],
        },
        as_json,
    )
    return 0 if e.get("outputs_correct") else 1


def run(rows: int, as_json: bool, session: bool = False) -> int:
    from jointstat.circuit.agreement import MAX_CAPACITY

    if not 1 <= rows <= MAX_CAPACITY:
        print(f"jointstat bench join: --rows must be between 1 and {MAX_CAPACITY}", file=sys.stderr)
        return 2
    return _session(rows, as_json) if session else _count(rows, as_json)
