"""The emulator's own process: ``python -m jointstat.harness.link --target HOST:PORT --rate RATE --rtt TIME …``.

Theory of operation: ``main`` reads the options into a ``LinkConfig`` (``config_from_arguments``; a bad option is
named and the process exits with code 2), runs a ``Link`` in an event loop over ``select(2)`` — whose timeout has
microsecond resolution, where ``epoll``'s is rounded up to whole milliseconds — prints one JSON line when listening,
then answers commands read one a line on standard input (``cut``, ``counters``, ``stop``) with one JSON line each.
It stops at ``stop``, at the end of standard input (the process that started it died), on SIGTERM or SIGINT, and
says its last counters as it stops. ``LinkProcess`` (``process``) is the other end of this conversation.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import selectors
import signal
import sys
from collections.abc import Sequence

from jointstat.harness.link.proxy import Link
from jointstat.harness.link.settings import (
    CUT_MODES,
    DIRECTIONS,
    Cut,
    CutAfterBytes,
    CutAtTime,
    Direction,
    LinkConfig,
    LinkSettingsError,
    OneWay,
    is_loopback,
    parse_address,
    parse_duration,
    parse_rate,
    parse_size,
)

COMMANDS = ("cut", "counters", "stop")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m jointstat.harness.link",
        description=(
            "A wide-area link on loopback: carries TCP connections from --listen to --target with a rate, a "
            "one-way delay and a bounded queue in each direction. Prints one JSON line when listening, then "
            "reads commands, one a line, on standard input: cut (cut every connection now), counters, stop. "
            "Each is answered with one JSON line; it stops at stop, at the end of standard input, or on SIGTERM."
        ),
    )
    parser.add_argument(
        "--listen",
        default="127.0.0.1:0",
        metavar="HOST:PORT",
        help="where to listen, loopback only (default 127.0.0.1:0: a free port, printed)",
    )
    parser.add_argument(
        "--target", required=True, metavar="HOST:PORT", help="the server the connections go to"
    )
    parser.add_argument("--rate", metavar="RATE", help="the rate each way, e.g. 100Mbit/s, 1Gbit/s, 12.5MB/s")
    parser.add_argument("--rtt", metavar="TIME", help="the round-trip time, half of it each way, e.g. 40ms")
    parser.add_argument(
        "--buffer",
        metavar="SIZE",
        help="each direction's buffer, e.g. 4MiB (default: rate × delay + 20 ms of queue)",
    )
    for dashed in ("to-server", "to-client"):
        towards = f"towards the {dashed.removeprefix('to-')}"
        parser.add_argument(
            f"--rate-{dashed}", metavar="RATE", help=f"the rate {towards} (instead of --rate)"
        )
        parser.add_argument(
            f"--delay-{dashed}", metavar="TIME", help=f"the delay {towards} (instead of --rtt)"
        )
        parser.add_argument(
            f"--buffer-{dashed}", metavar="SIZE", help=f"the buffer {towards} (instead of --buffer)"
        )
    parser.add_argument(
        "--cut-after",
        action="append",
        default=[],
        metavar="DIRECTION:SIZE",
        help="cut once SIZE bytes went that way (to-server or to-client), e.g. to-client:10MB; repeatable",
    )
    parser.add_argument(
        "--cut-at",
        action="append",
        default=[],
        metavar="TIME",
        help="cut TIME after the first connection, e.g. 2.5s; repeatable",
    )
    parser.add_argument(
        "--cut-mode",
        choices=CUT_MODES,
        default="reset",
        help="how endpoints learn of a cut: a TCP reset (default), an orderly close, or nothing (silent)",
    )
    parser.add_argument(
        "--no-handshake", action="store_true", help="open connections at once, without TCP's round trip"
    )
    return parser


def config_from_arguments(args: argparse.Namespace) -> LinkConfig:
    """The ``LinkConfig`` the command-line options give; ``LinkSettingsError`` names the option at fault."""
    ways: dict[Direction, OneWay] = {}
    rtt = None if args.rtt is None else parse_duration(args.rtt, "--rtt")
    for direction in DIRECTIONS:
        dashed = direction.replace("_", "-")
        rate_text = getattr(args, f"rate_{direction}") or args.rate
        rate_option = f"--rate-{dashed}" if getattr(args, f"rate_{direction}") else "--rate"
        if rate_text is None:
            raise LinkSettingsError(f"give --rate RATE (or --rate-{dashed} RATE), e.g. --rate 100Mbit/s")
        rate = parse_rate(rate_text, rate_option)
        delay_text = getattr(args, f"delay_{direction}")
        if delay_text is not None:
            delay = parse_duration(delay_text, f"--delay-{dashed}")
        elif rtt is not None:
            delay = rtt / 2
        else:
            raise LinkSettingsError(f"give --rtt TIME (or --delay-{dashed} TIME), e.g. --rtt 40ms")
        buffer_text = getattr(args, f"buffer_{direction}") or args.buffer
        buffer_option = f"--buffer-{dashed}" if getattr(args, f"buffer_{direction}") else "--buffer"
        buffer = None if buffer_text is None else parse_size(buffer_text, buffer_option)
        try:
            ways[direction] = OneWay(rate, delay, buffer)
        except LinkSettingsError as exc:
            raise LinkSettingsError(f"{direction.replace('_', ' ')}: {exc}") from None
    cuts: list[Cut] = []
    for text in args.cut_after:
        where, sep, size = text.partition(":")
        if not sep or where not in ("to-server", "to-client"):
            raise LinkSettingsError(
                f"--cut-after: {text!r} is not DIRECTION:SIZE with DIRECTION to-server or to-client "
                "(for example to-client:10MB)"
            )
        way: Direction = "to_server" if where == "to-server" else "to_client"
        cuts.append(CutAfterBytes(way, parse_size(size, "--cut-after")))
    for text in args.cut_at:
        seconds = parse_duration(text, "--cut-at")
        if seconds <= 0:
            raise LinkSettingsError(f"--cut-at: must be above 0 s, got {text!r}")
        cuts.append(CutAtTime(seconds))
    return LinkConfig(ways["to_server"], ways["to_client"], tuple(cuts), args.cut_mode, not args.no_handshake)


def _say(message: dict[str, object]) -> None:
    with contextlib.suppress(OSError):  # the parent is gone: nobody to tell
        sys.stdout.write(json.dumps(message) + "\n")
        sys.stdout.flush()


async def serve(config: LinkConfig, target: tuple[str, int], listen: tuple[str, int]) -> int:
    """Run the link until ``stop``, the end of standard input, SIGTERM or SIGINT; answer commands on stdin."""
    loop = asyncio.get_running_loop()
    link = Link(config, target, listen)
    try:
        host, port = await link.start()
    except OSError as exc:
        print(f"link: cannot listen on {listen[0]}:{listen[1]}: {exc}", file=sys.stderr)
        return 1
    stop = asyncio.Event()
    for signum in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(signum, stop.set)
    reader = asyncio.StreamReader()
    await loop.connect_read_pipe(lambda: asyncio.StreamReaderProtocol(reader), sys.stdin)

    async def commands() -> None:
        while line := await reader.readline():
            word = line.decode(errors="replace").strip()
            if word == "stop":
                break
            if word == "cut":
                await link.cut()
                _say({"counters": link.counters().as_dict()})
            elif word == "counters":
                _say({"counters": link.counters().as_dict()})
            elif word:
                _say({"error": f"unknown command {word!r}; the commands are {', '.join(COMMANDS)}"})
        stop.set()

    task = loop.create_task(commands())
    _say({"listening": f"{host}:{port}", "host": host, "port": port})
    await stop.wait()
    task.cancel()
    with contextlib.suppress(asyncio.CancelledError):
        await task
    await link.close()
    _say({"stopped": link.counters().as_dict()})
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        config = config_from_arguments(args)
        listen = parse_address(args.listen, "--listen")
        target = parse_address(args.target, "--target")
        if not is_loopback(listen[0]):
            raise LinkSettingsError(
                f"--listen: the link emulator listens on loopback only, got {listen[0]!r}"
            )
    except LinkSettingsError as exc:
        print(f"link: {exc}", file=sys.stderr)
        return 2
    # select(2): timeouts in microseconds (epoll's are rounded up to whole milliseconds); see the module docstring.
    loop = asyncio.SelectorEventLoop(selectors.SelectSelector())
    try:
        return loop.run_until_complete(serve(config, target, listen))
    finally:
        loop.close()
