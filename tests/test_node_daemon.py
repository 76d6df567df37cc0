"""Two nodes in one process (asyncio, loopback, trial keys made in the test) running the demo's keyed-join job.

Specification: an operator's run completes on both nodes, each with its own result only, in an owner-only file;
each node plays the manifest party its config's ``role`` names, whichever node initiates (the evaluator's node
may initiate: it connects, the garbler's node serves, and each still receives exactly its manifest outputs);
both session logs verify and cross-check and hold no input value; the job store, the metrics endpoint and the
health service report the run. A scheduled job fires when the (manual) clock reaches its cron time and is recorded
on both nodes; a run missed while the initiating node was down is run once at start-up, and a node that did not
exist yet at a scheduled time does not run it. A node refuses to start on a group-readable key, and closes what a
previous process left open.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import stat
import urllib.request
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import grpc
import pytest
from grpc_health.v1 import health_pb2, health_pb2_grpc
from jointstat.audit.verify import compare_logs, verify_log
from jointstat.commands.demo import plain_answer
from jointstat.node.clock import Clock, ManualClock
from jointstat.node.config import ConfigError, load_node_config
from jointstat.node.daemon import Node
from jointstat.node.store import JobStore
from jointstat.node.trial import TrialKeys, free_port, job_entry, make_trial_keys, node_config, write_config

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "configs" / "demo"
LIBRARY, BATHS = "millbrook-library", "riverside-baths"
JOB = "shared-members"
WAIT_S = 60.0  # a liveness bound for a run that normally takes well under a second, not a speed claim


# -- building two nodes --------------------------------------------------------------------------------------------


@dataclass
class Pair:
    root: Path
    keys: TrialKeys
    configs: dict[str, Path]

    def data(self, name: str) -> Path:
        return self.root / name

    def log(self, name: str) -> Path:
        return self.root / name / "sessions.jsonl"

    def store_rows(self, name: str) -> list[Any]:
        store = JobStore(self.root / name / "jobs.sqlite3")
        try:
            return store.runs()
        finally:
            store.close()


def make_pair(
    root: Path,
    *,
    library_job: dict[str, Any] | None = None,
    baths_job: dict[str, Any] | None = None,
    baths_jobs: list[dict[str, Any]] | None = None,
    baths_node: dict[str, Any] | None = None,
    library_initiates: bool = True,
    baths_initiates: bool = False,
    health: bool = False,
) -> Pair:
    """Trial keys and the two demo node configs on free loopback ports (admin on loopback TCP).

    The library is the manifest's garbler and the baths its evaluator (``role`` and ``csv`` of each job;
    ``library_job`` or ``baths_job`` may override them); by default the library's node initiates.
    """
    keys = make_trial_keys(root / "keys", (LIBRARY, BATHS))
    ports = {LIBRARY: free_port(), BATHS: free_port()}
    jobs = {
        LIBRARY: [
            job_entry(
                name=JOB,
                manifest=DEMO / "manifest.yaml",
                peer=BATHS,
                **{
                    "csv": DEMO / "garbler.csv",
                    "role": "garbler",
                    "initiate": library_initiates,
                    **(library_job or {}),
                },
            )
        ],
        BATHS: baths_jobs
        if baths_jobs is not None
        else [
            job_entry(
                name=JOB,
                manifest=DEMO / "manifest.yaml",
                peer=LIBRARY,
                **{
                    "csv": DEMO / "evaluator.csv",
                    "role": "evaluator",
                    "initiate": baths_initiates,
                    **(baths_job or {}),
                },
            )
        ],
    }
    configs = {}
    for name, peer in ((LIBRARY, BATHS), (BATHS, LIBRARY)):
        extra = baths_node if name == BATHS and baths_node else {}
        config = node_config(
            name=name,
            peer=peer,
            keys=keys,
            data_dir=root / name,
            listen_port=ports[name],
            peer_port=ports[peer],
            metrics_port=0,
            health_port=free_port() if health else None,
            admin=f"127.0.0.1:{free_port()}",
            jobs=jobs[name],
            **extra,
        )
        configs[name] = write_config(root / f"{name}.yaml", config)
    return Pair(root, keys, configs)


@contextlib.asynccontextmanager
async def running(
    pair: Pair, clock: Clock | None = None, names: tuple[str, ...] = (BATHS, LIBRARY)
) -> AsyncIterator[dict[str, Node]]:
    nodes: dict[str, Node] = {}
    try:
        for name in names:
            node = Node(load_node_config(pair.configs[name]), clock=clock)
            await node.start()
            nodes[name] = node
        yield nodes
    finally:
        for node in nodes.values():
            await node.stop()


async def until(predicate: Callable[[], Any], what: str) -> Any:
    loop = asyncio.get_running_loop()
    deadline = loop.time() + WAIT_S
    while True:
        value = predicate()
        if value:
            return value
        if loop.time() > deadline:
            raise AssertionError(f"gave up waiting for {what}")
        await asyncio.sleep(0.05)


def tracker_ended(node: Node, sid: str) -> bool:
    assert node.state is not None
    t = node.state.sessions.get(sid)
    return t is not None and t.ended and (t.status != "completed" or t.result_path is not None)


async def operator_run(nodes: dict[str, Node], initiator: str = LIBRARY) -> str:
    """Run the job now on the initiator's node and wait until both nodes have ended the session; its id."""
    started = await nodes[initiator].admin.run_job({"job": JOB})
    sid = started["session"]
    await until(
        lambda: tracker_ended(nodes[LIBRARY], sid) and tracker_ended(nodes[BATHS], sid), "the session"
    )
    return str(sid)


def log_records(path: Path) -> list[dict[str, Any]]:
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def session_records(path: Path, sid: str) -> list[dict[str, Any]]:
    return [r for r in log_records(path) if r["session"] == sid]


def csv_secrets() -> list[str]:
    """Every identifier and value of both invented input files (none may appear in a log or a store)."""
    out = []
    for name in ("garbler.csv", "evaluator.csv"):
        for line in (DEMO / name).read_text(encoding="utf-8").splitlines()[1:]:
            email = line.split(",")[0]
            out += [email, email.casefold()]
    return out


def short_tmp() -> Path:
    """A short directory under /tmp (a Unix socket path must fit in 107 bytes: unix(7), checked against the kernel in
    tests/test_node_config.py)."""
    import tempfile

    return Path(tempfile.mkdtemp(prefix="jsn-", dir="/tmp"))


def test_a_trial_port_is_free_and_outside_the_range_outgoing_connections_draw_from(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import socket

    from jointstat.node import trial

    setting = tmp_path / "ip_local_port_range"
    setting.write_text("20000\t60999\n", encoding="ascii")
    monkeypatch.setattr(trial, "EPHEMERAL_RANGE_FILE", setting)
    for _ in range(20):
        port = free_port()
        assert 10000 <= port < 20000 or 60999 < port <= 65535
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.bind(("127.0.0.1", port))
    setting.write_text("10000 65535\n", encoding="ascii")  # no port outside it: the kernel's choice
    assert 10000 <= free_port() <= 65535


# -- an operator's run ---------------------------------------------------------------------------------------------


async def test_an_operator_run_completes_on_both_nodes_each_with_only_its_own_result(tmp_path: Path) -> None:
    pair = make_pair(tmp_path)
    async with running(pair) as nodes:
        sid = await operator_run(nodes)
        snaps = {n: (await nodes[n].admin.show_session({"session": sid}))["session"] for n in nodes}
    plain = plain_answer(DEMO / "manifest.yaml", DEMO / "garbler.csv", DEMO / "evaluator.csv")
    results = {}
    for name, snap in snaps.items():
        assert snap["status"] == "completed"
        path = Path(snap["result_path"])
        assert stat.S_IMODE(path.stat().st_mode) == 0o600
        assert path.parent == pair.data(name) / "results" / JOB
        results[name] = json.loads(path.read_text(encoding="utf-8"))
    assert results[LIBRARY]["role"] == "garbler" and results[BATHS]["role"] == "evaluator"
    assert results[LIBRARY]["outputs"] == {"matches": plain["matches"]}
    baths = results[BATHS]["outputs"]
    assert list(baths) == ["matches", "sum", "mean", "above"]
    assert (baths["matches"], baths["sum"], baths["above"]) == (
        plain["matches"],
        plain["sum"],
        plain["above"],
    )
    assert 0 <= plain["mean"] - baths["mean"] < plain["mean_step"]
    assert results[LIBRARY]["withheld"] is results[BATHS]["withheld"] is False
    assert results[LIBRARY]["session"] == results[BATHS]["session"] == sid


async def test_the_evaluators_node_may_initiate_and_each_side_still_gets_exactly_its_manifest_outputs(
    tmp_path: Path,
) -> None:
    pair = make_pair(tmp_path, library_initiates=False, baths_initiates=True)
    async with running(pair) as nodes:
        listed = {n: (await nodes[n].admin.list_jobs({}))["jobs"][0] for n in nodes}
        sid = await operator_run(nodes, initiator=BATHS)
        snaps = {n: (await nodes[n].admin.show_session({"session": sid}))["session"] for n in nodes}
    assert {n: (j["role"], j["initiate"]) for n, j in listed.items()} == {
        LIBRARY: ("garbler", False),
        BATHS: ("evaluator", True),
    }
    assert listed[LIBRARY]["next_run"] is None and listed[BATHS]["next_run"] is not None
    # The baths' node proposed and connected; the library's node accepted and served — and garbled.
    assert (snaps[BATHS]["trigger"], snaps[LIBRARY]["trigger"]) == ("operator", "peer")
    assert (snaps[LIBRARY]["role"], snaps[BATHS]["role"]) == ("garbler", "evaluator")
    assert snaps[LIBRARY]["bytes_sent"] > snaps[LIBRARY]["bytes_received"]  # the garbler sends the tables
    assert "garbling" in [p["phase"] for p in snaps[LIBRARY]["phases"]]
    assert "evaluation" in [p["phase"] for p in snaps[BATHS]["phases"]]
    plain = plain_answer(DEMO / "manifest.yaml", DEMO / "garbler.csv", DEMO / "evaluator.csv")
    results = {n: json.loads(Path(snaps[n]["result_path"]).read_text(encoding="utf-8")) for n in snaps}
    assert (results[LIBRARY]["role"], results[BATHS]["role"]) == ("garbler", "evaluator")
    assert results[LIBRARY]["outputs"] == {"matches": plain["matches"]}  # outputs.garbler: [matches]
    baths = results[BATHS]["outputs"]
    assert list(baths) == ["matches", "sum", "mean", "above"]  # outputs.evaluator
    assert (baths["matches"], baths["sum"], baths["above"]) == (
        plain["matches"],
        plain["sum"],
        plain["above"],
    )
    for name, role in ((LIBRARY, "garbler"), (BATHS, "evaluator")):
        (started,) = [r for r in session_records(pair.log(name), sid) if r["kind"] == "session_started"]
        assert started["body"]["role"] == role, name
        assert [(r.session_id, r.role, r.status) for r in pair.store_rows(name)] == [(sid, role, "completed")]
    comparison = compare_logs(pair.log(LIBRARY).read_bytes(), pair.log(BATHS).read_bytes())
    assert comparison.ok, comparison.problems
    assert comparison.matched == [sid]


async def test_both_session_logs_verify_cross_check_and_hold_no_input_value(tmp_path: Path) -> None:
    pair = make_pair(tmp_path)
    async with running(pair) as nodes:
        sid = await operator_run(nodes)
    for name in (LIBRARY, BATHS):
        report = verify_log(pair.log(name).read_bytes())
        assert report.ok, report.problem
        assert report.sessions[sid].outcome == "completed"
    comparison = compare_logs(pair.log(LIBRARY).read_bytes(), pair.log(BATHS).read_bytes())
    assert comparison.ok, comparison.problems
    assert comparison.matched == [sid]
    kinds = [r["kind"] for r in session_records(pair.log(LIBRARY), sid)]
    assert kinds[0] == "session_started" and kinds[-2:] == ["peer_attestation", "session_completed"]
    assert "transcript" in kinds and kinds.count("phase_finished") >= 5
    phases = [
        r["body"]["phase"] for r in session_records(pair.log(BATHS), sid) if r["kind"] == "phase_finished"
    ]
    assert phases[:3] == ["prepare", "handshake", "oblivious_transfer"] and "evaluation" in phases
    for name in (LIBRARY, BATHS):
        stored = pair.log(name).read_text(encoding="utf-8") + (
            pair.data(name) / "jobs.sqlite3"
        ).read_bytes().decode("latin-1")
        for secret in csv_secrets():
            assert secret not in stored


async def test_the_job_store_records_the_run_on_both_sides_with_its_trigger(tmp_path: Path) -> None:
    pair = make_pair(tmp_path)
    async with running(pair) as nodes:
        sid = await operator_run(nodes)
        history = (await nodes[LIBRARY].admin.history({"job": JOB}))["runs"]
    assert [(r["session"], r["status"], r["trigger"]) for r in history] == [(sid, "completed", "operator")]
    (theirs,) = pair.store_rows(BATHS)
    assert (theirs.session_id, theirs.status, theirs.trigger, theirs.job) == (sid, "completed", "peer", JOB)
    assert theirs.result_path is not None and Path(theirs.result_path).is_file()


async def test_metrics_count_the_session_and_health_reports_serving(tmp_path: Path) -> None:
    pair = make_pair(tmp_path, health=True)
    async with running(pair) as nodes:
        await operator_run(nodes)
        port = nodes[BATHS].metrics_port
        text = await asyncio.to_thread(
            lambda: urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10).read().decode()
        )
        health_port = nodes[BATHS].health_port
        async with grpc.aio.insecure_channel(f"127.0.0.1:{health_port}") as channel:
            reply = await health_pb2_grpc.HealthStub(channel).Check(
                health_pb2.HealthCheckRequest(), timeout=10
            )
        assert nodes[LIBRARY].state is not None
        tls = (
            nodes[LIBRARY].state.keys.peers[BATHS].tls
        )  # the peer port: mutual TLS with the pinned certificate
        options = [("grpc.ssl_target_name_override", tls.server_name())]
        target = f"127.0.0.1:{nodes[BATHS].peer_port}"
        async with grpc.aio.secure_channel(target, tls.channel_credentials(), options=options) as channel:
            peer_reply = await health_pb2_grpc.HealthStub(channel).Check(
                health_pb2.HealthCheckRequest(), timeout=10
            )
    assert f'jointstat_sessions_started_total{{job="{JOB}",role="evaluator"}} 1.0' in text
    assert f'jointstat_sessions_completed_total{{job="{JOB}",role="evaluator"}} 1.0' in text
    assert f'jointstat_last_success_timestamp_seconds{{job="{JOB}"}}' in text
    assert f'jointstat_session_bytes_received_total{{job="{JOB}"}}' in text
    assert "jointstat_sessions_running 0.0" in text
    assert reply.status == peer_reply.status == health_pb2.HealthCheckResponse.SERVING


async def test_the_admin_api_lists_jobs_and_refuses_unknown_or_accept_only_jobs(tmp_path: Path) -> None:
    from jointstat.node.admin import RequestError

    pair = make_pair(tmp_path)
    async with running(pair) as nodes:
        (job,) = (await nodes[LIBRARY].admin.list_jobs({}))["jobs"]
        with pytest.raises(RequestError) as unknown:
            await nodes[LIBRARY].admin.run_job({"job": "no-such-job"})
        with pytest.raises(RequestError) as accept_only:
            await nodes[BATHS].admin.run_job({"job": JOB})
        with pytest.raises(RequestError) as no_session:
            await nodes[BATHS].admin.show_session({"session": "00ff"})
    assert (job["name"], job["peer"], job["role"], job["initiate"], job["window_open"]) == (
        JOB,
        BATHS,
        "garbler",
        True,
        True,
    )
    assert unknown.value.code == grpc.StatusCode.NOT_FOUND and "shared-members" in str(unknown.value)
    assert accept_only.value.code == grpc.StatusCode.FAILED_PRECONDITION
    assert "does not initiate" in str(accept_only.value)
    assert no_session.value.code == grpc.StatusCode.NOT_FOUND


async def test_the_admin_unix_socket_is_owner_only_and_removed_at_stop() -> None:
    root = short_tmp()
    pair = make_pair(root)
    config = load_node_config(pair.configs[BATHS])
    text = pair.configs[BATHS].read_text(encoding="utf-8")
    admin = str(config.node.admin)
    socket_path = root / "b.sock"
    pair.configs[BATHS].write_text(text.replace(admin, f"unix:{socket_path}"), encoding="utf-8")
    node = Node(load_node_config(pair.configs[BATHS]))
    await node.start()
    try:
        assert stat.S_ISSOCK(socket_path.lstat().st_mode)
        assert stat.S_IMODE(socket_path.lstat().st_mode) == 0o600
        from jointstat.node.admin import AdminClient

        status = await asyncio.to_thread(lambda: AdminClient(f"unix:{socket_path}").status())
        assert status["node"] == BATHS
    finally:
        await node.stop()
    assert not socket_path.exists()


# -- the schedule ----------------------------------------------------------------------------------------------------

DAY = datetime(2026, 3, 2, tzinfo=UTC)  # an invented Monday


async def test_a_scheduled_job_fires_when_the_clock_reaches_its_time_and_both_nodes_record_it(
    tmp_path: Path,
) -> None:
    timing = {"cron": "0 3 * * *", "window_minutes": 60}
    pair = make_pair(tmp_path, library_job=timing, baths_job=timing)
    clock = ManualClock(DAY + timedelta(hours=2, minutes=59))
    async with running(pair, clock) as nodes:
        await until(lambda: clock.sleepers > 0, "the scheduler to sleep")
        assert pair.store_rows(LIBRARY) == []
        clock.set(DAY + timedelta(hours=3, seconds=5))
        mine = await until(
            lambda: [r for r in pair.store_rows(LIBRARY) if r.status != "running"], "the scheduled run"
        )
        assert nodes[LIBRARY].state is not None
        sid = mine[0].session_id
        await until(lambda: tracker_ended(nodes[BATHS], sid), "the accepting node")
    (theirs,) = pair.store_rows(BATHS)
    assert (mine[0].status, mine[0].trigger, mine[0].scheduled_for) == (
        "completed",
        "schedule",
        DAY + timedelta(hours=3),
    )
    assert (theirs.status, theirs.trigger, theirs.scheduled_for) == (
        "completed",
        "peer",
        DAY + timedelta(hours=3),
    )
    assert theirs.session_id == sid
    assert compare_logs(pair.log(LIBRARY).read_bytes(), pair.log(BATHS).read_bytes()).matched == [sid]


async def test_a_run_missed_while_the_initiating_node_was_down_runs_once_at_start_up(tmp_path: Path) -> None:
    timing = {"cron": "0 3 * * *", "window_minutes": 120}
    pair = make_pair(tmp_path, library_job=timing, baths_job=timing)
    clock = ManualClock(DAY + timedelta(hours=2))
    async with running(pair, clock, names=(BATHS,)) as baths:
        async with running(pair, clock, names=(LIBRARY,)):
            pass  # the library's node runs once before the scheduled time, then is down
        clock.set(DAY + timedelta(hours=3, minutes=30))
        async with running(pair, clock, names=(LIBRARY,)) as library:
            (row,) = await until(
                lambda: [r for r in pair.store_rows(LIBRARY) if r.status != "running"], "the catch-up run"
            )
            await until(lambda: tracker_ended(baths[BATHS], row.session_id), "the accepting node")
        async with running(pair, clock, names=(LIBRARY,)) as library:
            await until(lambda: clock.sleepers > 0, "the scheduler to sleep")
            assert library[LIBRARY].state is not None and library[LIBRARY].state.running_sessions() == 0
    assert (row.status, row.trigger, row.scheduled_for) == ("completed", "schedule", DAY + timedelta(hours=3))
    assert len(pair.store_rows(LIBRARY)) == 1  # the second restart did not run it again


async def test_a_node_that_did_not_exist_at_a_scheduled_time_does_not_catch_it_up(tmp_path: Path) -> None:
    timing = {"cron": "0 3 * * *", "window_minutes": 120}
    pair = make_pair(tmp_path, library_job=timing, baths_job=timing)
    clock = ManualClock(DAY + timedelta(hours=3, minutes=30))
    async with running(pair, clock) as nodes:
        await until(lambda: clock.sleepers > 0, "the scheduler to sleep")
        assert nodes[LIBRARY].state is not None and nodes[LIBRARY].state.running_sessions() == 0
    assert pair.store_rows(LIBRARY) == []


# -- starting and restarting ---------------------------------------------------------------------------------------


async def test_a_node_refuses_to_start_with_a_group_readable_tls_key(tmp_path: Path) -> None:
    pair = make_pair(tmp_path)
    key = pair.keys.directory / f"{BATHS}.tls.key.pem"
    os.chmod(key, 0o640)
    node = Node(load_node_config(pair.configs[BATHS]))
    with pytest.raises(ConfigError) as refused:
        await node.start()
    assert "tls.private_key" in str(refused.value) and "0640" in str(refused.value)
    assert not (pair.data(BATHS) / "sessions.jsonl").exists()


async def test_a_restarted_node_closes_sessions_and_runs_a_previous_process_left_open(tmp_path: Path) -> None:
    from datetime import datetime as dt

    from jointstat.node.keys import load_signing_key

    pair = make_pair(tmp_path)
    config = load_node_config(pair.configs[BATHS])
    pair.data(BATHS).mkdir(mode=0o700)
    from jointstat.audit.log import SessionLog

    with SessionLog(config.node.session_log, load_signing_key(config.signing_key), BATHS) as session_log:
        session_log.session_started(
            "left-open-1", job=JOB, manifest_digest=bytes(32), role="evaluator", peer=LIBRARY
        )
    store = JobStore(config.node.job_store)
    store.start(JOB, dt.now(UTC), 1, started_at=dt.now(UTC), trigger="peer", session_id="left-open-1")
    store.close()
    async with running(pair, names=(BATHS,)):
        pass
    report = verify_log(pair.log(BATHS).read_bytes())
    assert report.ok and report.sessions["left-open-1"].outcome == "aborted"
    assert report.sessions["left-open-1"].reason == "node_restarted"
    (row,) = pair.store_rows(BATHS)
    assert (row.status, row.reason) == ("aborted", "node stopped during the run")


async def test_a_job_reads_its_input_from_a_sql_query_as_well_as_from_csv(tmp_path: Path) -> None:
    import csv
    import sqlite3

    database = tmp_path / "baths.sqlite3"
    with sqlite3.connect(database) as db, open(DEMO / "evaluator.csv", newline="", encoding="utf-8") as fh:
        db.execute("CREATE TABLE passes (email TEXT, visits INTEGER, branch TEXT)")
        db.executemany(
            "INSERT INTO passes VALUES (?, ?, 'riverside')",
            [(r["email"], int(r["visits"])) for r in csv.DictReader(fh)],
        )
    sql = {
        "url": f"sqlite:///{database}",
        "query": "SELECT email, visits FROM passes WHERE branch = 'riverside'",
    }
    job = job_entry(
        name=JOB,
        manifest=DEMO / "manifest.yaml",
        peer=LIBRARY,
        csv=DEMO / "evaluator.csv",
        role="evaluator",
        initiate=False,
    )
    job["input"] = {"sql": sql}
    pair = make_pair(tmp_path, baths_jobs=[job])
    async with running(pair) as nodes:
        sid = await operator_run(nodes)
        snap = (await nodes[BATHS].admin.show_session({"session": sid}))["session"]
    plain = plain_answer(DEMO / "manifest.yaml", DEMO / "garbler.csv", DEMO / "evaluator.csv")
    outputs = json.loads(Path(snap["result_path"]).read_text(encoding="utf-8"))["outputs"]
    assert (outputs["matches"], outputs["sum"], outputs["above"]) == (
        plain["matches"],
        plain["sum"],
        plain["above"],
    )
