"""The console served by running nodes (two in this process on loopback, and one as a process for SIGTERM).

Specification: a node with ``node.console`` serves the console on its own event loop; runs started there with
"run now" complete, and every page of both nodes' consoles then reflects them (jobs, sessions with their
phases, results, the verified logs, the cross-check of each node's log with the other's) while no page or
progress answer holds a secret: no Δ or wire label of those sessions (captured from the sessions themselves), no
input value or identifier of either side, no private key, key-hashing secret or login token, and no run of 32
hex digits but a session id. The login token file is made owner-only at the console's first start and kept
across restarts. A console port that is taken fails the node's start naming ``node.console`` and leaves nothing
listening. A node process with a console stops on SIGTERM with exit code 0 and its console stops listening.
"""

from __future__ import annotations

import asyncio
import base64
import contextlib
import signal
import socket
import stat
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from cryptography.hazmat.primitives import serialization
from jointstat.audit.records import public_key_text
from jointstat.harness import scenario
from jointstat.harness.recording import recording_session
from jointstat.harness.scanner import Secrets, scan_for_secrets
from jointstat.node.config import load_node_config
from jointstat.node.daemon import Node
from jointstat.node.keys import load_signing_key, signing_key_file, tls_key_file
from jointstat.node.trial import job_entry

from tests.consoletools import (
    SMALL_JOB,
    ConsolePair,
    console_pair,
    csrf_of,
    log_in,
    unexplained_hex,
)
from tests.test_node_daemon import BATHS, LIBRARY, csv_secrets
from tests.test_node_process import start_node, wait_until

FLEET_JOB = "fleet-metres"
WAIT_S = 60.0  # a liveness bound for runs that take well under a second each; not a speed claim


def fleet_jobs(root: Path) -> dict[str, list[dict[str, object]]]:
    """The bicycle-share job of ``bench faults`` (invented 12-digit figures), the library garbling and starting."""
    files = scenario.write_job_files(root / "fleet")
    common = {"name": FLEET_JOB, "manifest": files.manifest, "timezone": "UTC"}
    return {
        LIBRARY: [job_entry(**common, peer=BATHS, csv=files.node_csv, initiate=True, role="garbler")],  # type: ignore[arg-type]
        BATHS: [job_entry(**common, peer=LIBRARY, csv=files.peer_csv, initiate=False, role="evaluator")],  # type: ignore[arg-type]
    }


@contextlib.asynccontextmanager
async def running(pair: ConsolePair, session_factory: Any = None) -> AsyncIterator[dict[str, Node]]:
    nodes: dict[str, Node] = {}
    try:
        for name in (BATHS, LIBRARY):
            node = Node(load_node_config(pair.configs[name]), session_factory=session_factory)
            await node.start()
            nodes[name] = node
        yield nodes
    finally:
        for node in nodes.values():
            await node.stop()


async def until_ended(client: httpx.AsyncClient, session: str) -> dict[str, object]:
    loop = asyncio.get_running_loop()
    deadline = loop.time() + WAIT_S
    while True:
        progress = (await client.get(f"/sessions/{session}/progress")).json()
        if progress["ended"] and (progress["status"] != "completed" or progress["has_result"]):
            return dict(progress)
        if loop.time() > deadline:
            raise AssertionError(f"gave up waiting for session {session}: {progress}")
        await asyncio.sleep(0.05)


def key_material(pair: ConsolePair) -> dict[str, str]:
    """Every secret of both nodes in the text forms a page could hold, by a name that does not show it."""
    out: dict[str, str] = {}
    d = pair.keys.directory
    for node in (LIBRARY, BATHS):
        signing = load_signing_key(d / signing_key_file(node))
        raw = signing.private_bytes(
            serialization.Encoding.Raw, serialization.PrivateFormat.Raw, serialization.NoEncryption()
        )
        out[f"{node} signing key (hex)"] = raw.hex()
        out[f"{node} signing key (base64)"] = base64.b64encode(raw).decode()[:40]
        for i, line in enumerate((d / signing_key_file(node)).read_text().splitlines()[1:-1]):
            out[f"{node} signing key PEM line {i}"] = line
        for i, line in enumerate((d / tls_key_file(node)).read_text().splitlines()[1:-1]):
            out[f"{node} TLS key PEM line {i}"] = line[:40]
        secret = pair.keys.key_secret(node).read_bytes()
        out[f"{node} key-hashing secret (hex)"] = secret.hex()
        out[f"{node} key-hashing secret (base64)"] = base64.b64encode(secret).decode()[:40]
        out[f"{node} console token"] = pair.token(node)
    return out


async def every_page(client: httpx.AsyncClient, sessions: list[str], peer_log: Path) -> list[tuple[str, str]]:
    pages = []
    for path in ("/jobs", "/sessions", "/results", "/audit", "/sessions/live"):
        pages.append((path, (await client.get(path)).text))
    for sid in sessions:
        for path in (f"/sessions/{sid}", f"/sessions/{sid}/progress"):
            pages.append((path, (await client.get(path)).text))
    token = csrf_of((await client.get("/jobs")).text)
    compared = await client.post(
        "/audit/compare", data={"csrf": token}, files={"log": (peer_log.name, peer_log.read_bytes())}
    )
    pages.append(("/audit/compare", compared.text))
    assert all(text for _, text in pages)
    return pages


async def test_runs_started_from_the_console_complete_and_no_page_of_either_node_holds_a_secret(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    secrets = Secrets()
    for value in scenario.NODE_METRES + scenario.PEER_METRES:
        secrets.add_value(value)
    pair = console_pair(tmp_path, consoles=(LIBRARY, BATHS), extra_jobs=fleet_jobs(tmp_path))
    async with running(pair, session_factory=recording_session(secrets)) as nodes:
        clients = {n: httpx.AsyncClient(base_url=pair.url(n), follow_redirects=False) for n in nodes}
        try:
            for name, client in clients.items():
                assert (await log_in(client, pair.token(name))).status_code == 303
            library = clients[LIBRARY]
            sessions = []
            for job in (SMALL_JOB, FLEET_JOB, SMALL_JOB):
                token = csrf_of((await library.get("/jobs")).text)
                started = await library.post(f"/jobs/{job}/run", data={"csrf": token})
                assert started.status_code == 303
                sid = started.headers["location"].rsplit("/", 1)[1]
                assert (await until_ended(library, sid))["status"] == "completed"
                sessions.append(sid)
            refused = await clients[BATHS].post(
                f"/jobs/{SMALL_JOB}/run", data={"csrf": csrf_of((await clients[BATHS].get("/jobs")).text)}
            )
            assert refused.status_code == 409 and "does not initiate" in refused.text
            pages = {
                LIBRARY: await every_page(library, sessions, pair.log(BATHS)),
                BATHS: await every_page(clients[BATHS], sessions, pair.log(LIBRARY)),
            }
            keys = {n: public_key_text(nodes[n].state.session_log.public_key) for n in nodes}  # type: ignore[union-attr]
        finally:
            for client in clients.values():
                await client.aclose()

    # What the pages show of the runs.
    for name in (LIBRARY, BATHS):
        shown = dict(pages[name])
        assert (
            'data-verdict="own-ok"' in shown["/audit"] and shown["/audit"].count('class="pill attested"') == 3
        )
        assert 'data-verdict="logs-agree"' in shown["/audit/compare"]
        assert all(sid[:12] in shown["/sessions"] for sid in sessions)
        assert (
            "garbling" in shown[f"/sessions/{sessions[1]}"]
            or "evaluation" in shown[f"/sessions/{sessions[1]}"]
        )
        assert (
            keys[name] in shown["/audit"] and keys[LIBRARY if name == BATHS else BATHS] not in shown["/audit"]
        )
    expected = scenario.expected_result()
    fleet_results = dict(pages[LIBRARY])["/results"].split(f'id="job-{FLEET_JOB}"')[1]
    assert f"{expected['sum']:,}" in fleet_results and ">6<" in fleet_results.replace(" ", "")
    baths_results = dict(pages[BATHS])["/results"].split(f'id="job-{SMALL_JOB}"')[1].split("</section>")[0]
    assert all(f"<figcaption>{name}</figcaption>" in baths_results for name in ("matches", "sum", "mean"))
    assert "<figcaption>at_least</figcaption>" in baths_results  # members with at least the threshold

    # What they never show.
    assert len(secrets.deltas) == 3 and len(secrets.blocks) > 1000
    texts = [(f"{name} {path}", text) for name in pages for path, text in pages[name]]
    assert scan_for_secrets(secrets, texts=texts) == []
    forbidden = {**key_material(pair), **{f"input identifier #{i}": v for i, v in enumerate(csv_secrets())}}
    for where, text in texts:
        assert [what for what, value in forbidden.items() if value in text] == [], where
        assert unexplained_hex(text, set(sessions)) == [], where


async def test_the_token_file_is_made_owner_only_at_first_start_and_kept_across_restarts(
    tmp_path: Path,
) -> None:
    pair = console_pair(tmp_path)
    tokens = []
    for _ in range(2):
        async with running(pair) as nodes:
            assert nodes[LIBRARY].console_port == pair.consoles[LIBRARY]
            path = tmp_path / LIBRARY / "console.token"
            assert stat.S_IMODE(path.stat().st_mode) == 0o600
            tokens.append(pair.token(LIBRARY))
            async with httpx.AsyncClient(base_url=pair.url(LIBRARY)) as client:
                assert (await log_in(client, tokens[-1])).status_code == 303
        assert not (tmp_path / BATHS / "console.token").exists()  # no console there, no token
    assert tokens[0] == tokens[1] and len(tokens[0]) == 43


async def test_a_taken_console_port_fails_the_start_naming_the_field_and_leaves_nothing_listening(
    tmp_path: Path,
) -> None:
    pair = console_pair(tmp_path)
    config = load_node_config(pair.configs[LIBRARY])
    with socket.socket() as squatter:
        squatter.bind(("127.0.0.1", pair.consoles[LIBRARY]))
        squatter.listen()
        node = Node(config)
        with pytest.raises(OSError, match=r"node\.console: cannot listen on 127\.0\.0\.1:\d+"):
            await node.start()
    for address in (config.node.listen, config.node.admin):
        with socket.socket() as probe:
            probe.bind((address.host, address.port))  # type: ignore[union-attr]


def test_a_node_process_with_a_console_stops_on_sigterm_and_its_console_stops_listening(
    tmp_path: Path,
) -> None:
    pair = console_pair(tmp_path)
    out = tmp_path / "library.out"
    proc = start_node(pair.configs[LIBRARY], out)
    try:

        def login_page() -> bool:
            try:
                return httpx.get(pair.url(LIBRARY) + "/login", timeout=5).status_code == 200
            except httpx.HTTPError:
                return False

        wait_until(login_page, "the console to answer", poll=0.1)
        assert f"console http://127.0.0.1:{pair.consoles[LIBRARY]}/" in out.read_text()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=WAIT_S) == 0, out.read_text()
    finally:
        if proc.poll() is None:
            proc.kill()
    with pytest.raises(httpx.ConnectError):
        httpx.get(pair.url(LIBRARY) + "/login", timeout=5)
    assert pair.token(LIBRARY) not in out.read_text()
