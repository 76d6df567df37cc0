"""The command-line adapters: one module per command group, each with ``add_commands(subparsers)``.

Theory of operation: ``jointstat.cli`` builds one parser from every module listed in its ``COMMAND_MODULES``; each
module here adds its subcommands, whose handlers take the parsed arguments and return an exit code. A handler reads
options, calls the room that does the work (``circuit``, ``audit``, ``node``, ``bench``…) and prints; it imports
those rooms lazily so ``--help`` stays fast. This is the top of the house: a command module may import any room,
and no room imports a command module. A handler raises ``jointstat.problems.UserError`` for a problem the user can
fix; the CLI prints it without a traceback and exits with code 2.

``manifest`` (manifest schema/check/digest, plan), ``audit`` (audit verify/compare), ``keys`` (keys init),
``node`` (node check/run), ``ops`` (jobs …, sessions …, through a running node's admin API), ``bench`` (every
``jointstat bench …``), ``demo`` (the README's demonstration).
"""

from __future__ import annotations

import shutil
import sys
from pathlib import Path


def jointstat_command() -> str:
    """How the person at this terminal runs ``jointstat``, for hints printed to them: ``jointstat`` when that name
    on their PATH is this installation, else the script's path relative to the working directory (from the
    repository root ``.venv/bin/jointstat``), so every printed command works as written."""
    script = Path(sys.executable).parent / "jointstat"
    found = shutil.which("jointstat")
    if found is not None and Path(found).resolve() == script.resolve():
        return "jointstat"
    try:
        return str(script.relative_to(Path.cwd()))
    except ValueError:
        return str(script)
