"""The ``jointstat`` command line: one entry point; the command groups live in ``jointstat.commands``.

Every module in ``COMMAND_MODULES`` has ``add_commands(subparsers)``, which adds subcommands whose handlers take the
parsed arguments and return an exit code. Handlers import their heavy modules lazily so ``--help`` stays fast. A
``UserError`` (``jointstat.problems``) is printed without a traceback and exits with code 2. Nothing but this module
and ``__main__`` imports ``jointstat.cli``.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Callable, Sequence

from jointstat.problems import UserError

Handler = Callable[[argparse.Namespace], int]

COMMAND_MODULES = [
    "jointstat.commands.demo",
    "jointstat.commands.bench",
    "jointstat.commands.audit",
    "jointstat.commands.keys",
    "jointstat.commands.node",
    "jointstat.commands.ops",
    "jointstat.commands.manifest",
]

__all__ = ["COMMAND_MODULES", "UserError", "build_parser", "main"]


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
