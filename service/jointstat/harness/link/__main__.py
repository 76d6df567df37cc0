"""``python -m jointstat.harness.link``: the link emulator in a process of its own (see ``command``)."""

from __future__ import annotations

import sys

from jointstat.harness.link.command import main

if __name__ == "__main__":
    sys.exit(main())
