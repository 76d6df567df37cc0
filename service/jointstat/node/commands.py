"""``jointstat node check``: validate a node config and the files it names, before the node is started with it."""

from __future__ import annotations

import argparse
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
    peers = ", ".join(p.name for p in config.peers)
    jobs = ", ".join(j.name for j in config.jobs)
    print(
        f"ok: {config.source}: node {config.node.name} listens on {config.node.listen}, admin {config.node.admin}; "
        f"{_plural(len(config.peers), 'peer')} ({peers}); {_plural(len(config.jobs), 'job')}"
        + (f" ({jobs})" if jobs else "")
        + "; certificates current, secret files owner-only"
    )
    return 0


def add_commands(sub: argparse._SubParsersAction) -> None:
    node = sub.add_parser("node", help="check a node's configuration")
    which = node.add_subparsers(dest="what", required=True, metavar="WHAT")
    check = which.add_parser(
        "check",
        help="validate a node config: fields, certificates, pinned keys, manifests and owner-only secret files",
    )
    check.add_argument("--config", required=True, metavar="FILE", help="the node config (YAML)")
    check.set_defaults(handler=_check)
