"""``jointstat demo``: two nodes on this machine run a keyed-join job; ``jointstat demo --local``: AES in one process.

Theory of operation — the two-node demonstration (``run_nodes``, what ``make demo`` runs)
-------------------------------------------------------------------------------------------
An invented scenario of ``configs/demo/``: the Millbrook Lending Library and the Riverside Swimming Baths learn how
many library members also hold a swim pass, and (the baths only) how often those shared members swam last quarter
— the keyed-join statistic over e-mail addresses hashed under a secret both hold. In a fresh directory
(``var/demo/`` of the repository, replaced on every run) the demo makes a trial CA, TLS certificates, signing keys
and a key-hashing secret for the two nodes (``node.trial``, as ``jointstat keys init --trial-ca`` does), writes
both node configs on free loopback ports, starts both nodes as separate processes (``jointstat node run``), asks
the library's node through its admin API to run the job now — exactly what ``jointstat jobs run`` does — and
follows the session. It then prints each node's own result, read from that node's result file; checks the
results against the plain answer computed from the two invented CSV files (which only a demo can see side by
side); verifies both signed session logs and cross-checks them (``jointstat audit verify`` / ``audit compare``);
and stops both nodes with SIGTERM. The exit code is 0 only if every step checked out.

Theory of operation — the one-process demonstration (``run``, ``jointstat demo --local``)
-----------------------------------------------------------------------------------------
An invented scenario: a library (the garbler) keeps a secret AES-128 key with which it turns member
numbers into pseudonyms; a research partner (the evaluator) holds one 16-byte member record and wants its
pseudonym without learning the key, while the library learns nothing about the record. The demo runs the
AES-128 program (``aes128``) on the garbling backend (half-gates), streams the garbled tables to the evaluator in small
chunks as they are made, evaluates, decodes, and prints the result beside AES-128 from the ``cryptography``
package on the same inputs. Both roles run in this one process and the evaluator's input labels are handed over
directly (a stand-in for oblivious transfer). The exit code is 0 only if the garbled result equals
``cryptography``'s.
"""

from __future__ import annotations

import argparse
import csv
import math
import os
import shutil
import signal
import subprocess
import sys
import time
from fractions import Fraction
from pathlib import Path
from typing import Any

from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from jointstat.bench.garble import timed_run
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.circuit.reference.aes128 import aes128_program, bits_to_block, block_bits, key_bits

CHUNK_BYTES = 16 * 1024

# Invented demo data (not secret, not from anywhere).
LIBRARY_KEY = bytes.fromhex("3f8a1c52e7094bd6a1057e2c98d3b614")
MEMBER_RECORD = b"member-no 004217"


def reference_aes128(key: bytes, block: bytes) -> bytes:
    """AES-128 of one block by the ``cryptography`` package (ECB on a single block is the bare cipher)."""
    encryptor = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
    return encryptor.update(block) + encryptor.finalize()


def run() -> int:
    """Run the demonstration and print its report; 0 if the garbled result matches ``cryptography``'s, else 1."""
    t0 = time.perf_counter()
    program = Program.of(aes128_program, name="AES-128")
    t_build = time.perf_counter() - t0

    timed = timed_run(
        program,
        {Party.GARBLER: key_bits(LIBRARY_KEY), Party.EVALUATOR: block_bits(MEMBER_RECORD)},
        chunk_bytes=CHUNK_BYTES,
    )
    run = timed.run
    garbled = bits_to_block(run.outputs[Party.EVALUATOR])
    table_bytes, chunks, t_garble, t_eval = run.table_bytes, run.chunks, timed.garble_s, timed.evaluate_s
    expected = reference_aes128(LIBRARY_KEY, MEMBER_RECORD)
    match = garbled == expected

    print("jointstat demo: AES-128 as a garbled circuit, both parties in one process, invented data")
    print()
    print("  A library keeps a secret AES-128 key that turns member records into pseudonyms. A research")
    print("  partner holds one record and wants its pseudonym without learning the key; the library must")
    print("  learn nothing about the record. The library garbles; the partner evaluates.")
    print("  (Here the partner's input labels are handed over directly, standing in for oblivious transfer.)")
    print()
    size = program.size
    print(
        f"  circuit         {size.and_gates:,} AND   {size.xor_gates:,} XOR   {size.not_gates:,} NOT"
        f"   AND depth {size.and_depth:,}"
    )
    print(
        f"  garbled tables  {table_bytes:,} bytes, streamed in {chunks} chunks of at most {CHUNK_BYTES:,} bytes"
    )
    print(f"  time            count {t_build:.3f} s   garble {t_garble:.3f} s   evaluate {t_eval:.3f} s")
    print(f"  record          {MEMBER_RECORD.decode('ascii')!r}")
    print(f"  pseudonym       garbled circuit  {garbled.hex()}")
    print(f"                  cryptography     {expected.hex()}")
    print(f"  match           {'yes' if match else 'NO'}")
    return 0 if match else 1


# -- the two-node demonstration ------------------------------------------------------------------------------------

REPO = Path(__file__).resolve().parents[3]
SCENARIO = REPO / "configs" / "demo"
JOB = "shared-members"
LIBRARY, BATHS = "millbrook-library", "riverside-baths"
START_TIMEOUT_S = 90.0
RUN_TIMEOUT_S = 120.0
STOP_TIMEOUT_S = 30.0


class DemoError(Exception):
    """A step of the demonstration failed; the message says which and why."""


def _say(text: str = "") -> None:
    print(text, flush=True)


def _write_configs(work: Path) -> dict[str, Path]:
    from jointstat.node.trial import free_port, job_entry, make_trial_keys, node_config, write_config

    keys = make_trial_keys(work / "keys", (LIBRARY, BATHS))
    ports = {name: free_port() for name in (LIBRARY, BATHS)}
    configs = {}
    for name, peer, csv_name, initiate in (
        (LIBRARY, BATHS, "garbler.csv", True),
        (BATHS, LIBRARY, "evaluator.csv", False),
    ):
        job = job_entry(
            name=JOB,
            manifest=SCENARIO / "manifest.yaml",
            peer=peer,
            csv=SCENARIO / csv_name,
            initiate=initiate,
            cron="0 0 * * 1",  # Mondays 00:00 UTC, with a week-long window: runs may start any time
            window_minutes=7 * 24 * 60,
            attempts=2,
            backoff_seconds=5.0,
        )
        config = node_config(
            name=name,
            peer=peer,
            keys=keys,
            data_dir=work / name,
            listen_port=ports[name],
            peer_port=ports[peer],
            metrics_port=free_port(),
            jobs=[job],
        )
        comment = f"Demo node {name}, written by `jointstat demo` (configs/demo/ is the scenario)."
        configs[name] = write_config(work / f"{name}.yaml", config, comment)
    return configs


def _start(name: str, config: Path, work: Path) -> subprocess.Popen[bytes]:
    log = open(work / f"{name}.log", "wb")  # noqa: SIM115 - the child writes it until it exits
    try:
        return subprocess.Popen(
            [sys.executable, "-m", "jointstat.cli", "node", "run", "--config", str(config)],
            stdout=log,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
            env={**os.environ, "PYTHONUNBUFFERED": "1"},
        )
    finally:
        log.close()


def _wait_ready(name: str, proc: subprocess.Popen[bytes], client: Any) -> dict[str, Any]:
    from jointstat.node.admin import AdminError

    deadline = time.monotonic() + START_TIMEOUT_S
    while True:
        if proc.poll() is not None:
            raise DemoError(f"node {name} exited with code {proc.returncode} while starting")
        try:
            return dict(client.status())
        except AdminError:
            if time.monotonic() > deadline:
                raise DemoError(
                    f"node {name} did not answer on its admin API within {START_TIMEOUT_S:g} s"
                ) from None
            time.sleep(0.1)


def _wait_session(client: Any, sid: str, timeout: float) -> dict[str, Any]:
    from jointstat.node.admin import AdminError

    deadline = time.monotonic() + timeout
    while True:
        try:
            snap = dict(client.session(sid))
            if snap.get("status") in ("completed", "aborted", "refused", "failed") and (
                snap.get("status") != "completed" or snap.get("result_path")
            ):
                return snap
        except AdminError:
            pass  # the accepting node has not recorded the session yet
        if time.monotonic() > deadline:
            raise DemoError(f"session {sid} did not end within {timeout:g} s")
        time.sleep(0.1)


def _read_result(path: str) -> dict[str, Any]:
    import json

    return dict(json.loads(Path(path).read_text(encoding="utf-8")))


def _shown(result: dict[str, Any]) -> str:
    if result.get("withheld"):
        return "withheld (fewer matches than the disclosure rule's minimum)"
    parts = []
    for name, value in result["outputs"].items():
        parts.append(f"{name} {value:.4g}" if isinstance(value, float) else f"{name} {value}")
    return ", ".join(parts)


def explain(name: str, got: Any, plain: dict[str, Any]) -> str:
    """What one output of the demo's keyed join means, and how it compares with the plain answer."""
    step = plain["mean_step"]
    exponent = round(-math.log2(step)) if step else 0
    if name == "matches":
        return f"matches = {got}: members on both lists (e-mail addresses equal after case folding); exact"
    if name == "sum":
        return f"sum = {got}: visits to the baths by those shared members last quarter; exact"
    if name == "mean":
        exact = plain["mean_fraction"]
        return (
            f"mean = {got}: visits per shared member, {exact.numerator}/{exact.denominator} = {float(exact):.6g}"
            f" exactly, computed in fixed point and rounded toward zero to a step of 2^-{exponent}"
        )
    if name == "at_least":
        return (
            f"at_least = {got}: shared members with at least {float(plain['threshold']):g} visits (the manifest's"
            ' threshold, op ">=": a value equal to it counts); exact'
        )
    return f"{name} = {got}"


def plain_answer(manifest_path: Path, garbler_csv: Path, evaluator_csv: Path) -> dict[str, Any]:
    """The keyed join computed in the clear from both invented files (what neither node could ever do)."""
    from jointstat.circuit.library.join import JoinParameters
    from jointstat.circuit.manifest import load_manifest
    from jointstat.circuit.parameters import Threshold
    from jointstat.problems import UserError

    manifest = load_manifest(manifest_path)
    stat = manifest.statistic
    if not (
        isinstance(stat, JoinParameters)
        and isinstance(stat.key, str)
        and stat.value is not None
        and isinstance(stat.threshold, Threshold)
    ):
        raise UserError(
            f"{manifest_path}: the demo answers a keyed_join with one key column for both tables, a value column"
            " and a threshold {op, value}"
        )
    key, value_col = stat.key, stat.value.column
    fold = {c.name: getattr(c, "fold_case", False) for c in manifest.tables.garbler.columns}

    def norm(text: str) -> str:
        text = text.strip()
        return text.casefold() if fold.get(key) else text

    with open(garbler_csv, newline="", encoding="utf-8") as fh:
        garbler = {norm(row[key]) for row in csv.DictReader(fh)}
    with open(evaluator_csv, newline="", encoding="utf-8") as fh:
        evaluator = {norm(row[key]): float(row[value_col]) for row in csv.DictReader(fh)}
    shared = [evaluator[k] for k in evaluator if k in garbler]
    total = sum(Fraction(str(v)) for v in shared)
    threshold = Fraction(stat.threshold.value)
    column = manifest.tables.evaluator.columns[
        [c.name for c in manifest.tables.evaluator.columns].index(value_col)
    ]
    step = 2.0 ** -(getattr(column, "fraction_bits", 0) + stat.precision_bits)
    return {
        "mean_step": step,
        "matches": len(shared),
        "sum": sum(shared),
        "mean": sum(shared) / len(shared) if shared else None,
        "mean_fraction": total / len(shared) if shared else None,
        "threshold": threshold,
        "at_least": sum(1 for v in shared if Fraction(str(v)) >= threshold),
        "withheld": len(shared) < manifest.disclosure.min_count,
    }


def _agrees(result: dict[str, Any], plain: dict[str, Any]) -> list[str]:
    """Differences between a node's result and the plain answer; the circuit's mean is the exact mean rounded
    toward zero to its fixed-point step."""
    problems = []
    if bool(result.get("withheld")) != plain["withheld"]:
        problems.append(f"withheld is {result.get('withheld')}, expected {plain['withheld']}")
    if result.get("withheld"):
        return problems
    for name, got in result["outputs"].items():
        want = plain[name]
        close = 0 <= want - got < plain["mean_step"] if name == "mean" else got == want
        if not close:
            problems.append(f"{name} is {got}, the plain answer is {want}")
    return problems


def _stop(procs: dict[str, subprocess.Popen[bytes]]) -> dict[str, int | None]:
    for proc in procs.values():
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
    codes: dict[str, int | None] = {}
    for name, proc in procs.items():
        try:
            codes[name] = proc.wait(timeout=STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
            codes[name] = None
    return codes


def run_nodes(work: Path | None = None) -> int:
    """The two-node demonstration (module docstring); 0 only if every check passed."""
    from jointstat.audit.verify import compare_logs, verify_log
    from jointstat.commands.ops import follow
    from jointstat.node.admin import AdminClient
    from jointstat.node.config import load_node_config

    t_start = time.monotonic()
    if not (SCENARIO / "manifest.yaml").is_file():
        print(
            f"jointstat demo: {SCENARIO} is missing; run the demo from a clone of the repository",
            file=sys.stderr,
        )
        return 2
    work = work or REPO / "var" / "demo"
    if work.exists():
        shutil.rmtree(work)
    from jointstat.node.secrets import ensure_private_dir

    ensure_private_dir(work)
    _say("jointstat demo: two nodes on this machine compute a keyed-join statistic over invented records")
    _say()
    _say(
        "  The Millbrook Lending Library and the Riverside Swimming Baths (configs/demo/) learn how many library"
    )
    _say("  members also hold a swim pass, and the baths how often those shared members swam last quarter —")
    _say("  without either seeing the other's list. The library's node garbles and starts the session.")
    _say()
    procs: dict[str, subprocess.Popen[bytes]] = {}
    clients: dict[str, Any] = {}
    ok = True
    try:
        t0 = time.monotonic()
        configs = _write_configs(work)
        _say(
            f"  1. keys and configs   trial CA, TLS certificates, signing keys, key-hashing secret in {work}"
        )
        _say(
            f"                        node configs {configs[LIBRARY].name}, {configs[BATHS].name} ({time.monotonic() - t0:.1f} s)"
        )
        t0 = time.monotonic()
        for name in (BATHS, LIBRARY):
            procs[name] = _start(name, configs[name], work)
            clients[name] = AdminClient(str(load_node_config(configs[name]).node.admin))
        for i, name in enumerate((BATHS, LIBRARY)):
            status = _wait_ready(name, procs[name], clients[name])
            _say(
                f"  {'2. nodes' if i == 0 else '':<21} {name} (pid {procs[name].pid}): peers on "
                f"{status['listen'].rsplit(':', 1)[0]}:{status['peer_port']}, metrics on port {status['metrics_port']}"
            )
        _say(
            f"                        both nodes up ({time.monotonic() - t0:.1f} s); logs in {work}/<node>.log"
        )
        t0 = time.monotonic()
        started = clients[LIBRARY].run_job(JOB)
        sid = started["session"]
        _say(f"  3. run                jobs run {JOB} on {LIBRARY}: session {sid}")
        snap = follow(clients[LIBRARY], sid, tty=False, prefix="                        ")
        other = _wait_session(clients[BATHS], sid, RUN_TIMEOUT_S)
        snap = _wait_session(clients[LIBRARY], sid, RUN_TIMEOUT_S)
        _say(f"                        ({time.monotonic() - t0:.1f} s)")
        if snap["status"] != "completed" or other["status"] != "completed":
            raise DemoError(
                f"the session did not complete: {LIBRARY} {snap['status']} ({snap.get('reason')}), "
                f"{BATHS} {other['status']} ({other.get('reason')})"
            )
        plain = plain_answer(SCENARIO / "manifest.yaml", SCENARIO / "garbler.csv", SCENARIO / "evaluator.csv")
        _say("  4. results            each node's own result file:")
        for name, s in ((LIBRARY, snap), (BATHS, other)):
            result = _read_result(s["result_path"])
            problems = _agrees(result, plain)
            ok = ok and not problems
            _say(f"       {name} ({result['role']}), in {Path(s['result_path']).relative_to(work)}:")
            if result.get("withheld"):
                _say("         withheld: fewer matches than the disclosure rule's minimum")
            for output, got in (result.get("outputs") or {}).items():
                _say(f"         {explain(output, got, plain)}")
            for p in problems:
                _say(f"         DIFFERS from the plain answer: {p}")
        _say(
            "                        "
            + ("each value equals" if ok else "the values do NOT match")
            + " the plain answer from the two CSV files (only a demo sees both); the mean is the exact mean"
            " rounded toward zero to its step"
        )
    except DemoError as exc:
        _say(f"  FAILED: {exc}")
        ok = False
    finally:
        for client in clients.values():
            client.close()
        codes = _stop(procs)
    if procs:
        stopped = all(code == 0 for code in codes.values())
        ok = ok and stopped
        shown = ", ".join(f"{n} exit code {c}" for n, c in codes.items())
        _say(f"  5. stop               SIGTERM to both nodes: {shown}")
    logs = {name: work / name / "sessions.jsonl" for name in (LIBRARY, BATHS)}
    if all(p.is_file() for p in logs.values()):
        for i, path in enumerate(logs.values()):
            report = verify_log(path.read_bytes())
            ok = ok and report.ok
            state = "verify" if report.ok else f"DO NOT verify: {report.problem}"
            _say(
                f"  {'6. audit verify' if i == 0 else '':<21} {path.relative_to(work)}: {report.records} records, "
                f"chain and signatures {state}"
            )
        comparison = compare_logs(logs[LIBRARY].read_bytes(), logs[BATHS].read_bytes())
        ok = ok and comparison.ok and bool(comparison.matched)
        verdict = "both attest to the same transcript" if comparison.ok else "; ".join(comparison.problems)
        n = len(comparison.matched)
        _say(f"  {'7. audit compare':<21} {n} {'session' if n == 1 else 'sessions'} in both logs; {verdict}")
    if not ok:
        for name in procs:
            log = work / f"{name}.log"
            if log.is_file():
                _say(f"  --- last lines of {log}")
                for line in log.read_text(encoding="utf-8", errors="replace").splitlines()[-15:]:
                    _say(f"  {line}")
    _say()
    _say(f"  {'all checks passed' if ok else 'SOMETHING FAILED'} in {time.monotonic() - t_start:.1f} s.")
    if ok:
        from jointstat.commands import jointstat_command

        js = jointstat_command()
        here = _relative(work)
        _say("  The files stay in place; commands to try next, as written here:")
        _say(f"    {js} audit compare {here / LIBRARY / 'sessions.jsonl'} {here / BATHS / 'sessions.jsonl'}")
        _say(f"    {js} jobs history --config {here / (BATHS + '.yaml')}      (works on a stopped node)")
        _say(f"    {js} jobs check {JOB} --config {here / (BATHS + '.yaml')}  (a dry run; no peer contacted)")
        _say(f"    {js} node run --config {here / (LIBRARY + '.yaml')}       (the node, until Ctrl-C)")
    return 0 if ok else 1


def _relative(path: Path) -> Path:
    try:
        return path.resolve().relative_to(Path.cwd().resolve())
    except ValueError:
        return path


def _run(args: argparse.Namespace) -> int:
    if args.local:
        return run()
    return run_nodes(Path(args.dir) if args.dir else None)


def add_commands(sub: argparse._SubParsersAction) -> None:
    demo = sub.add_parser("demo", help="run the demonstration on invented data (two nodes on this machine)")
    demo.add_argument(
        "--local", action="store_true", help="instead: AES-128 garbled and evaluated in one process"
    )
    demo.add_argument("--dir", metavar="DIR", help="working directory (default var/demo/ in the repository)")
    demo.set_defaults(handler=_run)
