"""``jointstat node check`` validates a node config and the files it names, then dry-runs every job (``jobs check``:
manifest, secret, input; no peer is contacted); ``jointstat node run`` runs the node.

``node run`` performs the same checks first and refuses to start on any problem (exit code 1); it then runs the
daemon (``jointstat.node.daemon``) until SIGTERM or SIGINT, aborts and logs running sessions, and exits 0. gRPC's
own log lines are kept out of the node's log unless ``--grpc-logs`` is given.
"""

from __future__ import annotations

import argparse
import os
import sys


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def _check(args: argparse.Namespace) -> int:
    from jointstat.node.config import ConfigError, load_node_config

    try:
        config = load_node_config(args.config)
    except ConfigError as exc:
        print(exc, file=sys.stderr)
        return 1
    problems = config.file_problems() + config.secret_problems()
    if problems:
        for problem in problems:
            print(f"{config.source}: {problem}", file=sys.stderr)
        return 1
    from datetime import UTC, datetime

    from jointstat.node.dryrun import check_job

    failed = 0
    now = datetime.now(UTC)
    for job in config.jobs:
        check = check_job(config, job, now)
        for line in check.lines():
            print(line)
        failed += not check.ok
    if failed:
        print(f"{config.source}: {_plural(failed, 'job')} would not run", file=sys.stderr)
        return 1
    peers = ", ".join(p.name for p in config.peers)
    jobs = ", ".join(f"{j.name} as {j.role}" + (", initiates" if j.initiate else "") for j in config.jobs)
    print(
        f"ok: {config.source}: node {config.node.name} listens on {config.node.listen}, admin {config.node.admin}; "
        f"{_plural(len(config.peers), 'peer')} ({peers}); {_plural(len(config.jobs), 'job')}"
        + (f" ({jobs})" if jobs else "")
        + "; certificates current, secret files owner-only, every job's input read"
    )
    return 0


def _run(args: argparse.Namespace) -> int:
    if not args.grpc_logs and "grpc" not in sys.modules:
        # gRPC's C core reads its log level once, when gRPC is first imported; an operator's own setting is kept.
        os.environ.setdefault("GRPC_VERBOSITY", "NONE")
    from jointstat.node.config import ConfigError, load_node_config
    from jointstat.node.daemon import run_node

    try:
        config = load_node_config(args.config)
    except ConfigError as exc:
        print(exc, file=sys.stderr)
        return 1
    return run_node(config, grpc_logs=args.grpc_logs)


def add_commands(sub: argparse._SubParsersAction) -> None:
    node = sub.add_parser("node", help="check a node's configuration, or run the node")
    which = node.add_subparsers(dest="what", required=True, metavar="WHAT")
    check = which.add_parser(
        "check",
        help="validate a node config: fields, certificates, pinned keys, manifests and owner-only secret files",
    )
    check.add_argument("--config", required=True, metavar="FILE", help="the node config (YAML)")
    check.set_defaults(handler=_check)
    run = which.add_parser(
        "run",
        help="run the node: peer service (mutual TLS), health, metrics, admin API and the job scheduler",
    )
    run.add_argument("--config", required=True, metavar="FILE", help="the node config (YAML)")
    run.add_argument(
        "--grpc-logs",
        action="store_true",
        help="let gRPC's own log lines through to the node's log (left out by default; GRPC_VERBOSITY applies)",
    )
    run.set_defaults(handler=_run)
