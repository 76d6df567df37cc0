"""A wide-area link in user space: a loopback TCP proxy with a rate, a delay and a queue in each direction.

Theory of operation
-------------------
A client connects to the emulator; the emulator connects to the target (the server) and carries bytes both ways.
Each direction — ``to_server`` (client to server) and ``to_client`` (server to client) — is a *lane* with its own
rate, one-way delay and buffer, modelled as a real link: a serialising queue followed by a delay line. The
round-trip time is the sum of the two lanes' delays. Connections cost a round trip to open, as TCP's handshake
does, and the link can cut every connection through it after a byte count, at a time, or on demand.

One module per job:

- ``settings``: ``LinkConfig``, ``OneWay``, the cuts, ``LinkCounters``, and rates, times and sizes in words;
- ``lanes``: the one-way link model (serialiser, delay line, bounded buffer and back-pressure);
- ``proxy``: ``Link``, the emulator in the caller's event loop (tests): connections, handshake, cuts, counters;
- ``command``: the emulator's own process (``python -m jointstat.harness.link``), commands on standard input;
- ``process``: ``LinkProcess``, that process driven from a benchmark.

    config = LinkConfig.from_words("100Mbit/s", "40ms")
    async with Link(config, ("127.0.0.1", server_port)) as link:   # in this event loop (tests)
        ...connect to link.address...; await link.cut(); link.counters()
    with LinkProcess(config, ("127.0.0.1", server_port)) as link:  # in a process of its own (benchmarks)
        ...; link.cut(); link.counters()
"""

from __future__ import annotations

from jointstat.harness.link.command import COMMANDS, build_parser, config_from_arguments, main, serve
from jointstat.harness.link.process import LinkProcess
from jointstat.harness.link.proxy import STOP_TIMEOUT_S, Link
from jointstat.harness.link.settings import (
    CUT_MODES,
    DEFAULT_MIN_QUEUE_BYTES,
    DEFAULT_QUEUE_SECONDS,
    DIRECTIONS,
    MAX_DELAY_SECONDS,
    MIN_QUEUE_BYTES,
    Cut,
    CutAfterBytes,
    CutAtTime,
    CutMode,
    Direction,
    LinkConfig,
    LinkCounters,
    LinkSettingsError,
    OneWay,
    check_rate,
    format_duration,
    format_rate,
    parse_address,
    parse_duration,
    parse_rate,
    parse_size,
)

__all__ = [
    "COMMANDS",
    "CUT_MODES",
    "DEFAULT_MIN_QUEUE_BYTES",
    "DEFAULT_QUEUE_SECONDS",
    "DIRECTIONS",
    "MAX_DELAY_SECONDS",
    "MIN_QUEUE_BYTES",
    "STOP_TIMEOUT_S",
    "Cut",
    "CutAfterBytes",
    "CutAtTime",
    "CutMode",
    "Direction",
    "Link",
    "LinkConfig",
    "LinkCounters",
    "LinkProcess",
    "LinkSettingsError",
    "OneWay",
    "build_parser",
    "check_rate",
    "config_from_arguments",
    "format_duration",
    "format_rate",
    "main",
    "parse_address",
    "parse_duration",
    "parse_rate",
    "parse_size",
    "serve",
]
