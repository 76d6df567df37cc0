"""The ``jointstat`` command line: one entry point; each area of the code adds its own subcommands.

Every module in ``COMMAND_MODULES`` has ``add_commands(subparsers)``, which adds subcommands whose handlers take the
parsed arguments and return an exit code. Handlers import their heavy modules lazily so ``--help`` stays fast.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Callable, Sequence

Handler = Callable[[argparse.Namespace], int]

COMMAND_MODULES = [
    "jointstat.demo",
    "jointstat.bench.commands",
    "jointstat.audit.commands",
    "jointstat.node.keycommands",
    "jointstat.node.commands",
    "jointstat.node.opscommands",
    "jointstat.circuit.commands",
]


class UserError(Exception):
    """A problem the user can fix (bad file, bad option); printed without a traceback, exit code 2."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="jointstat", description="Two-party secure computation of agreed statistics (garbled circuits)."
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(name).add_commands(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    handler: Handler = args.handler
    try:
        return handler(args)
    except UserError as exc:
        print(f"jointstat: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
