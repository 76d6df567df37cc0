"""Two nodes on one machine for a trial: fresh keys and certificates, a shared key-hashing secret, two node configs.

Theory of operation: ``make_trial_keys`` runs the same key set-up as ``jointstat keys init --trial-ca`` (a private
CA, per node an Ed25519 signing key and a TLS key and certificate, all owner-only) and adds one key-hashing
secret, copied owner-only for each node as the two organisations would each hold it. ``node_config`` builds one
node's config as a mapping with absolute paths (every key as ``configs/nodes/README.md`` documents it; each job
entry from ``job_entry`` names its manifest ``role`` and, separately, whether the node ``initiate``s), and
``write_config`` writes it as YAML. ``free_port`` finds an unused loopback port outside the kernel's ephemeral
range, so the demo and the tests do not collide with other listeners nor with the source ports of outgoing
connections (another listener could in principle take it before the node binds it; that is rare even on a busy
machine). The demo (``jointstat demo``) and the node tests build their nodes this way.
"""

from __future__ import annotations

import os
import secrets
import socket
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import yaml

from jointstat.node.keys import (
    init_trial,
    signing_key_file,
    signing_public_file,
    tls_cert_file,
    tls_key_file,
)
from jointstat.node.secrets import ensure_private_dir, write_private_file

KEY_SECRET_BYTES = 32


EPHEMERAL_RANGE_FILE = Path("/proc/sys/net/ipv4/ip_local_port_range")
LOWEST_TRIAL_PORT = 10000
PORT_TRIES = 64


def _ephemeral_range() -> tuple[int, int]:
    """The ports the kernel hands out for outgoing connections: Linux's setting, or its default if unreadable."""
    try:
        low, high = (int(v) for v in EPHEMERAL_RANGE_FILE.read_text(encoding="ascii").split())
        return low, high
    except (OSError, ValueError):
        return 32768, 60999  # Linux's default range (from memory)


_HANDED_OUT: set[int] = (
    set()
)  # never hand the same port out twice in one process (two random picks can agree)


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port on ``host`` that nothing listens on at this moment, chosen outside the ephemeral range.

    A port the kernel picked for us (bind to 0) is an ephemeral port, which any outgoing connection on the machine
    may take as its source port before the node binds it; a random free port outside that range can only be
    taken by another listener. If none is found, the kernel's choice is returned.
    """
    low, high = _ephemeral_range()
    candidates = [p for p in range(LOWEST_TRIAL_PORT, 65536) if not low <= p <= high and p not in _HANDED_OUT]
    rng = secrets.SystemRandom()
    for port in rng.sample(candidates, min(PORT_TRIES, len(candidates))):
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            try:
                s.bind((host, port))
            except OSError:
                continue
            _HANDED_OUT.add(port)
            return port
    while True:
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.bind((host, 0))
            port = int(s.getsockname()[1])
        if port not in _HANDED_OUT:
            _HANDED_OUT.add(port)
            return port


@dataclass(frozen=True)
class TrialKeys:
    directory: Path
    nodes: tuple[str, ...]

    def key_secret(self, node: str) -> Path:
        return self.directory / f"{node}.key-hashing.secret"


def make_trial_keys(directory: str | os.PathLike[str], nodes: tuple[str, ...]) -> TrialKeys:
    """Trial CA, node keys and certificates, and one key-hashing secret copied for each node."""
    out = ensure_private_dir(directory)
    init_trial(out, list(nodes), now=datetime.now(UTC), days=30)
    secret = secrets.token_bytes(KEY_SECRET_BYTES)
    keys = TrialKeys(out, tuple(nodes))
    for node in nodes:
        write_private_file(keys.key_secret(node), secret)
    return keys


def job_entry(
    *,
    name: str,
    manifest: Path,
    peer: str,
    csv: Path,
    initiate: bool,
    cron: str = "0 0 * * 1",
    timezone: str = "UTC",
    window_minutes: int = 7 * 24 * 60,
    attempts: int = 1,
    backoff_seconds: float = 5.0,
    results: Path | None = None,
    role: str | None = None,
) -> dict[str, Any]:
    """One entry of a node config's ``jobs`` list.

    ``role`` is the manifest party this node is for the job (``garbler`` or ``evaluator``); it is written out
    always, as a node config must say it. Left as None it is the garbler when ``initiate`` is true and the
    evaluator otherwise — the pairing of the demo and of callers written before the config had the key — so
    give it explicitly whenever the evaluator's node initiates.
    """
    if role is None:
        role = "garbler" if initiate else "evaluator"
    entry: dict[str, Any] = {
        "name": name,
        "manifest": str(manifest),
        "peer": peer,
        "role": role,
        "initiate": initiate,
        "input": {"csv": {"path": str(csv)}},
        "schedule": {"cron": cron, "timezone": timezone, "window_minutes": window_minutes},
        "retries": {"attempts": attempts, "backoff_seconds": backoff_seconds, "backoff_factor": 2.0},
    }
    if results is not None:
        entry["results"] = str(results)
    return entry


def node_config(
    *,
    name: str,
    peer: str,
    keys: TrialKeys,
    data_dir: Path,
    listen_port: int,
    peer_port: int,
    metrics_port: int,
    jobs: list[dict[str, Any]],
    health_port: int | None = None,
    admin: str | None = None,
    max_sessions: int = 2,
    session_deadline_seconds: int = 600,
    resume: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """A node config mapping for one trial node on loopback (absolute paths); ``resume`` is its ``node.resume``
    section (the defaults when None)."""
    d = keys.directory
    node: dict[str, Any] = {
        "name": name,
        "listen": f"127.0.0.1:{listen_port}",
        "metrics": f"127.0.0.1:{metrics_port}",
        "data_dir": str(data_dir),
        "max_sessions": max_sessions,
        "session_deadline_seconds": session_deadline_seconds,
    }
    if health_port is not None:
        node["health"] = f"127.0.0.1:{health_port}"
    if admin is not None:
        node["admin"] = admin
    if resume is not None:
        node["resume"] = resume
    return {
        "node": node,
        "tls": {"certificate": str(d / tls_cert_file(name)), "private_key": str(d / tls_key_file(name))},
        "signing_key": str(d / signing_key_file(name)),
        "key_hashing_secret": str(keys.key_secret(name)),
        "peers": [
            {
                "name": peer,
                "address": f"127.0.0.1:{peer_port}",
                "certificate": str(d / tls_cert_file(peer)),
                "signing_public_key": str(d / signing_public_file(peer)),
            }
        ],
        "jobs": jobs,
    }


def write_config(path: str | os.PathLike[str], config: dict[str, Any], comment: str = "") -> Path:
    """Write a node config as YAML (mode 0600: it names where the node's secrets are)."""
    header = "".join(f"# {line}\n" for line in comment.splitlines())
    text = header + yaml.safe_dump(config, sort_keys=False, default_flow_style=False)
    return write_private_file(path, text.encode("utf-8"), overwrite=True)
