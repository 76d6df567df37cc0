"""``jointstat bench …``: one subcommand per benchmark module of ``jointstat.bench``."""

from __future__ import annotations

import argparse


def _garble(args: argparse.Namespace) -> int:
    from jointstat.bench.garble import run

    return run(and_gates=args.and_gates, width=args.width, as_json=args.json)


def _ot(args: argparse.Namespace) -> int:
    from jointstat.bench.ot import run

    return run(count=args.count, as_json=args.json)


def _session(args: argparse.Namespace) -> int:
    from jointstat.bench.session import run

    return run(and_gates=args.and_gates, as_json=args.json, link=args.link, rtt=args.rtt, cuts=args.cuts)


def _faults(args: argparse.Namespace) -> int:
    from jointstat.bench.faults import run

    return run(sessions=args.sessions, frames=args.frames, as_json=args.json)


def _link(args: argparse.Namespace) -> int:
    from jointstat.bench.link import run

    return run(rate=args.rate, rtt=args.rtt, bulk=args.bytes, buffer=args.buffer, as_json=args.json)


def _join(args: argparse.Namespace) -> int:
    from jointstat.bench.join import run

    return run(rows=args.rows, as_json=args.json, session=args.session)


def _noise(args: argparse.Namespace) -> int:
    from jointstat.bench.noise import run

    return run(
        epsilon=args.epsilon,
        sensitivity=args.sensitivity,
        samples=args.samples,
        as_json=args.json,
        lanes=args.lanes,
    )


def add_commands(sub: argparse._SubParsersAction) -> None:
    bench = sub.add_parser("bench", help="measure this machine (prints JSON with --json)")
    which = bench.add_subparsers(dest="what", required=True, metavar="WHAT")

    garble = which.add_parser("garble", help="garbling and evaluation speed of a wide program")
    garble.add_argument(
        "--and-gates", type=int, default=1 << 20, help="AND gates in the program (default 2^20)"
    )
    garble.add_argument("--width", type=int, default=1 << 14, help="AND gates per call (default 2^14)")
    garble.add_argument("--json", action="store_true", help="print one JSON object")
    garble.set_defaults(handler=_garble)

    ot = which.add_parser("ot", help="base OT and OT extension speed")
    ot.add_argument("--count", type=int, default=1 << 20, help="correlated OTs to extend (default 2^20)")
    ot.add_argument("--json", action="store_true", help="print one JSON object")
    ot.set_defaults(handler=_ot)

    session = which.add_parser(
        "session", help="a whole session between two node processes over TLS, on loopback or an emulated link"
    )
    session.add_argument(
        "--and-gates", type=int, default=1 << 22, help="AND gates in the program (default 2^22)"
    )
    session.add_argument(
        "--link", metavar="RATE", help="through the link emulator at this rate (e.g. 100Mbit/s)"
    )
    session.add_argument("--rtt", metavar="TIME", help="the emulated link's round-trip time (e.g. 40ms)")
    session.add_argument(
        "--cuts",
        type=int,
        default=0,
        help="cut the link N times in the table stream (runs an uncut session first)",
    )
    session.add_argument("--json", action="store_true", help="print one JSON object")
    session.set_defaults(handler=_session)

    faults = which.add_parser(
        "faults", help="sessions under injected faults, and mutated frames sent to a node"
    )
    faults.add_argument(
        "--sessions", type=int, default=300, help="faulted sessions and their retries (default 300)"
    )
    faults.add_argument("--frames", type=int, default=10_000, help="mutated frames to send (default 10,000)")
    faults.add_argument("--json", action="store_true", help="print one JSON object")
    faults.set_defaults(handler=_faults)

    link = which.add_parser(
        "link", help="the link emulator's rate, delay and ceiling on this machine (harness/link/)"
    )
    link.add_argument("--rate", default="100Mbit/s", help="the rate each way (default 100Mbit/s)")
    link.add_argument("--rtt", default="40ms", help="the round-trip time, half each way (default 40ms)")
    link.add_argument("--bytes", help="bytes per bulk transfer (default: two seconds at the rate)")
    link.add_argument("--buffer", help="each direction's buffer (default: rate × delay + 20 ms of queue)")
    link.add_argument("--json", action="store_true", help="print one JSON object")
    link.set_defaults(handler=_link)
    noise = which.add_parser(
        "noise",
        help="discrete Laplace noise drawn through the garbled circuit, checked against its exact law",
    )
    noise.add_argument("--epsilon", default="0.5", help="privacy parameter ε, a decimal (default 0.5)")
    noise.add_argument(
        "--sensitivity", type=int, default=1, help="sensitivity Δ, a positive integer (default 1)"
    )
    noise.add_argument("--samples", type=int, default=200_000, help="samples to draw (default 200,000)")
    noise.add_argument("--lanes", type=int, default=4096, help="samples per garbled circuit (default 4096)")
    noise.add_argument("--json", action="store_true", help="print one JSON object")
    noise.set_defaults(handler=_noise)

    join = which.add_parser(
        "join", help="the keyed-join sum at a size: counted, or a real session (--session)"
    )
    join.add_argument("--rows", type=int, default=1 << 16, help="rows per party (default 2^16)")
    join.add_argument(
        "--session", action="store_true", help="run two node processes over loopback TLS on generated data"
    )
    join.add_argument("--json", action="store_true", help="print one JSON object")
    join.set_defaults(handler=_join)
