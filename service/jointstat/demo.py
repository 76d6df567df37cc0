"""``jointstat demo``: the README's first command (replaced by the two-node demo when the node lands)."""

from __future__ import annotations

import argparse


def _run(args: argparse.Namespace) -> int:
    from jointstat.circuit.reference.demo import run

    return run()


def add_commands(sub: argparse._SubParsersAction) -> None:
    demo = sub.add_parser("demo", help="run the demonstration on invented data")
    demo.set_defaults(handler=_run)
