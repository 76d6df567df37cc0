"""Nodes as separate processes (``jointstat node run``): the demo end to end, and SIGTERM in the middle of a session.

Specification: ``jointstat demo`` starts two node processes, runs the keyed-join job, prints both parties' results,
verifies and cross-checks both logs, stops both nodes and exits 0. A node that receives SIGTERM while it serves a
session aborts that session, logs it (``session_aborted``, reason ``cancelled``) and stores the run as ``aborted``,
writes no result file and exits 0; it tells the initiating node, which records the abort with the reason
``peer_shutdown``; both logs still verify, and neither node's log holds gRPC's own log lines.
"""

from __future__ import annotations

import os
import signal
import socket
import ssl
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
from jointstat.audit.verify import verify_log
from jointstat.node.admin import AdminClient, AdminError
from jointstat.node.config import load_node_config
from jointstat.transport.pki import issue, new_ca

from tests.test_node_daemon import BATHS, DEMO, JOB, LIBRARY, Pair, make_pair, session_records

WAIT_S = 120.0  # liveness bound for process start-up and a session; not a speed claim


def start_node(config: Path, log: Path, *options: str) -> subprocess.Popen[bytes]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("GRPC_")}
    with open(log, "wb") as out:
        return subprocess.Popen(
            [sys.executable, "-m", "jointstat.cli", "node", "run", "--config", str(config), *options],
            env=env,
            stdout=out,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
        )


def wait_until(predicate: Any, what: str, poll: float = 0.02) -> Any:
    deadline = time.monotonic() + WAIT_S
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up waiting for {what}")
        time.sleep(poll)


def answering(client: AdminClient) -> bool:
    try:
        client.status()
    except AdminError:
        return False
    return True


def snapshot(client: AdminClient, sid: str) -> dict[str, Any] | None:
    try:
        return client.session(sid)
    except AdminError:
        return None


def test_the_demo_runs_two_node_processes_prints_both_results_and_checks_the_logs(tmp_path: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "jointstat.cli", "demo", "--dir", str(tmp_path / "demo")],
        capture_output=True,
        text=True,
        timeout=WAIT_S,
        stdin=subprocess.DEVNULL,
    )
    out = done.stdout
    assert done.returncode == 0, out + done.stderr
    assert f"{LIBRARY} (garbler), in" in out and f"{BATHS} (evaluator), in" in out
    assert out.count("matches = 6: members on both lists") == 2
    assert "sum = 53: visits" in out
    # 53/6 in fixed point with 8 fraction bits, rounded toward zero: floor(53/6 · 256) / 256 = 2261/256
    assert "mean = 8.83203125: visits per shared member, 53/6 = 8.83333 exactly" in out
    assert "rounded toward zero to a step of 2^-8" in out
    assert "at_least = 3: shared members with at least 10 visits" in out
    assert "each value equals the plain answer" in out
    assert "DIFFERS" not in out
    # the commands it suggests run as written from where it was started
    hints = [line.split("(")[0].split() for line in out.splitlines() if "jobs history --config" in line]
    assert hints and hints[0][0].endswith("jointstat")
    assert "exit code 0" in out and "both attest to the same transcript" in out
    assert out.count("chain and signatures verify") == 2
    assert "all checks passed" in out


def big_pair(root: Path) -> Pair:
    """The demo job with 2,048-row tables, so that a session lasts long enough to be interrupted."""
    manifest = root / "shared-members-2048.yaml"
    manifest.write_text(
        (DEMO / "manifest.yaml").read_text(encoding="utf-8").replace("capacity: 32", "capacity: 2048"),
        encoding="utf-8",
    )
    job = {"attempts": 1}
    pair = make_pair(root, library_job=job, baths_job=job)
    for name in (LIBRARY, BATHS):
        path = pair.configs[name]
        path.write_text(path.read_text(encoding="utf-8").replace(str(DEMO / "manifest.yaml"), str(manifest)))
    return pair


def test_sigterm_during_a_session_aborts_and_logs_it_on_both_nodes_and_leaves_no_result(
    tmp_path: Path,
) -> None:
    pair = big_pair(tmp_path)
    procs = {name: start_node(pair.configs[name], tmp_path / f"{name}.log") for name in (BATHS, LIBRARY)}
    clients = {name: AdminClient(str(load_node_config(pair.configs[name]).node.admin)) for name in procs}
    try:
        for name in procs:
            wait_until(lambda n=name: answering(clients[n]), f"node {name} to start")
        sid = clients[LIBRARY].run_job(JOB)["session"]
        wait_until(
            lambda: (s := snapshot(clients[BATHS], sid)) is not None and (s["and_gates_done"] or 0) > 0,
            "the garbled tables to flow",
        )
        procs[BATHS].send_signal(signal.SIGTERM)
        assert procs[BATHS].wait(timeout=WAIT_S) == 0
        mine = wait_until(
            lambda: (s := snapshot(clients[LIBRARY], sid)) is not None and s["status"] != "running" and s,
            "the initiating node to end the session",
        )
    finally:
        for proc in procs.values():
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        codes = {name: proc.wait(timeout=WAIT_S) for name, proc in procs.items()}
        for client in clients.values():
            client.close()
    logs = {name: (tmp_path / f"{name}.log").read_text() for name in procs}
    assert codes == {BATHS: 0, LIBRARY: 0}, logs
    assert mine["status"] == "aborted", mine
    for name, by in ((BATHS, "self"), (LIBRARY, "peer")):
        report = verify_log(pair.log(name).read_bytes())
        assert report.ok, (name, report.problem)
        records = session_records(pair.log(name), sid)
        assert records[-1]["kind"] == "session_aborted", name
        if name == BATHS:
            assert (records[-1]["body"]["reason"], records[-1]["body"]["by"]) == ("cancelled", by)
        else:  # the stopping node told its peer why before it closed the stream
            assert (records[-1]["body"]["reason"], records[-1]["body"]["by"]) == ("peer_shutdown", by), (
                records[-1]
            )
        assert not any(r["kind"] == "session_completed" for r in records)
        (row,) = [r for r in pair.store_rows(name) if r.session_id == sid]
        assert row.status == "aborted" and row.result_path is None, name
        results = pair.data(name) / "results"
        assert not results.exists() or not any(results.rglob("*")), name
    assert "stopped (1 session was running and has been aborted)" in (tmp_path / f"{BATHS}.log").read_text()
    for name in procs:  # the nodes' own lines only: gRPC's internal log lines stay out unless asked for
        lines = (tmp_path / f"{name}.log").read_text().splitlines()
        assert lines and all(" jointstat." in line or line.startswith("node ") for line in lines), lines
        stamped = [line for line in lines if " jointstat." in line]  # "2026-03-04 10:00:00,123 UTC INFO …"
        assert stamped and all(line[23:28] == " UTC " for line in stamped), lines
    assert os.path.exists(pair.log(LIBRARY))


def present_an_unpinned_certificate(port: int, root: Path) -> None:
    """A TLS client with a certificate from a CA of its own: the node refuses it in the handshake."""
    stranger = issue(new_ca("a stranger's CA"), "stranger.test")
    cert, key = root / "stranger.pem", root / "stranger.key"
    cert.write_bytes(stranger.certificate)
    key.write_bytes(stranger.private_key)
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    ctx.check_hostname = False
    ctx.verify_mode = ssl.CERT_NONE
    ctx.load_cert_chain(cert, key)
    ctx.set_alpn_protocols(["h2"])
    with socket.create_connection(("127.0.0.1", port), timeout=10) as raw:
        try:
            with ctx.wrap_socket(raw) as tls:
                tls.recv(
                    1
                )  # TLS 1.3: the server's refusal of the client certificate arrives after the handshake
        except (ssl.SSLError, OSError):
            pass


@pytest.mark.parametrize("asked", [False, True])
def test_grpcs_own_log_lines_stay_out_of_the_node_log_unless_asked_for(tmp_path: Path, asked: bool) -> None:
    pair = make_pair(tmp_path)
    config = load_node_config(pair.configs[BATHS])
    log = tmp_path / "node.log"
    proc = start_node(pair.configs[BATHS], log, *(["--grpc-logs"] if asked else []))
    client = AdminClient(str(config.node.admin))
    try:
        wait_until(lambda: answering(client), "the node to start")
        present_an_unpinned_certificate(config.node.listen.port, tmp_path)
        assert answering(client)
    finally:
        client.close()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=WAIT_S) == 0
    lines = log.read_text().splitlines()
    grpc_lines = [line for line in lines if "ssl_transport_security" in line]
    assert any(" jointstat.node: node riverside-baths: stopped" in line for line in lines)
    if asked:
        assert grpc_lines, lines  # the refused handshake, in gRPC's words
    else:
        assert grpc_lines == [] and all(
            " jointstat." in line or line.startswith("node ") for line in lines
        ), lines
