"""The ``jointstat`` command line: one entry point, subcommands grouped by what an operator or developer does.

Each subcommand imports its module lazily so that ``jointstat --help`` stays fast.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

Handler = Callable[[argparse.Namespace], int]


def _bench_garble(args: argparse.Namespace) -> int:
    from jointstat.bench.garble import run

    return run(and_gates=args.and_gates, width=args.width, as_json=args.json)


def _bench_ot(args: argparse.Namespace) -> int:
    from jointstat.bench.ot import run

    return run(count=args.count, as_json=args.json)


def _demo(args: argparse.Namespace) -> int:
    from jointstat.demo import run

    return run()


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="jointstat", description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="command", required=True)

    demo = sub.add_parser("demo", help="run the demonstration on invented data")
    demo.set_defaults(handler=_demo)

    bench = sub.add_parser("bench", help="measure this machine").add_subparsers(dest="what", required=True)
    garble = bench.add_parser("garble", help="garbling and evaluation speed of a wide circuit")
    garble.add_argument("--and-gates", type=int, default=1 << 20, help="AND gates in the circuit (default 2^20)")
    garble.add_argument("--width", type=int, default=8192, help="AND gates per layer (default 8192)")
    garble.add_argument("--json", action="store_true", help="print one JSON object")
    garble.set_defaults(handler=_bench_garble)

    ot = bench.add_parser("ot", help="base OT and OT extension speed")
    ot.add_argument("--count", type=int, default=1 << 20, help="correlated OTs to extend (default 2^20)")
    ot.add_argument("--json", action="store_true", help="print one JSON object")
    ot.set_defaults(handler=_bench_ot)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    handler: Handler = args.handler
    return handler(args)


if __name__ == "__main__":
    sys.exit(main())
