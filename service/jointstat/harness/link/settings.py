"""The link's settings: each direction's rate, one-way delay and buffer, its cuts, and the words people write them in.

Theory of operation: a ``LinkConfig`` holds one ``OneWay`` per direction — ``to_server`` (client to server) and
``to_client`` (server to client) — the cuts (``CutAfterBytes``, ``CutAtTime``), how the endpoints learn of a cut
(``cut_mode``) and whether opening a connection costs TCP's round trip (``handshake``). Every setting is checked
when it is made, and a ``LinkSettingsError`` names the setting and the forms it accepts.

*Buffer.* The default buffer is the bytes in flight (rate × delay) plus 20 ms of queue at the rate, at least
64 KiB (common practice for a router queue; a busy machine may keep the emulator from its timers for several
milliseconds, and the queue keeps the serialiser busy meanwhile). A buffer smaller than the bytes in flight plus
16 KiB is refused: such a link could never carry its rate.

*Words.* Rates are written ``100Mbit/s``, ``1Gbit/s``, ``12.5MB/s``, ``1MiB/s``; times ``40ms``, ``0.5s``,
``250us``; sizes ``65536``, ``64KiB``, ``1.5MB``. ``format_rate`` and ``format_duration`` write exact words that
read back to the same float (how ``LinkConfig.to_arguments`` hands a configuration to the emulator's process).

``LinkCounters`` is what a link reports it has carried.
"""

from __future__ import annotations

import math
import re
import socket
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from typing import Literal, TypeAlias

Direction: TypeAlias = Literal["to_server", "to_client"]
DIRECTIONS: tuple[Direction, ...] = ("to_server", "to_client")
CutMode: TypeAlias = Literal["reset", "close", "silent"]
CUT_MODES: tuple[CutMode, ...] = ("reset", "close", "silent")

DEFAULT_QUEUE_SECONDS = 0.02  # default queue, in time at the lane's rate (common practice, see above)
DEFAULT_MIN_QUEUE_BYTES = 64 * 1024
MIN_QUEUE_BYTES = 16 * 1024  # a buffer must hold the bytes in flight plus at least this much
MAX_DELAY_SECONDS = 60.0  # a one-way delay above a minute is a mistake (a unit left out), not a network


class LinkSettingsError(ValueError):
    """A link setting that cannot be used; the message names the setting and the accepted forms."""


# -- human words for rates, times and sizes ---------------------------------------------------------------------------

_NUMBER = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_QUANTITY = re.compile(rf"^\s*({_NUMBER})\s*([^\s\d.+-][^\s]*)?\s*$")

# Decimal prefixes as in the SI (BIPM, The International System of Units, 9th edition, 2019, table 7); binary ones
# as in IEC 80000-13:2008 (Ki = 2^10, Mi = 2^20, Gi = 2^30). Rates in bytes per second.
RATE_UNITS: dict[str, float] = {
    "bit/s": 1 / 8,
    "kbit/s": 1e3 / 8,
    "Mbit/s": 1e6 / 8,
    "Gbit/s": 1e9 / 8,
    "B/s": 1.0,
    "kB/s": 1e3,
    "MB/s": 1e6,
    "GB/s": 1e9,
    "KiB/s": 2.0**10,
    "MiB/s": 2.0**20,
    "GiB/s": 2.0**30,
}
TIME_UNITS: dict[str, float] = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6}
SIZE_UNITS: dict[str, int] = {
    "B": 1,
    "kB": 10**3,
    "MB": 10**6,
    "GB": 10**9,
    "KiB": 2**10,
    "MiB": 2**20,
    "GiB": 2**30,
}
RATE_FORMS = "a number and one of " + ", ".join(RATE_UNITS) + " (for example 100Mbit/s, 1Gbit/s, 12.5MB/s)"
TIME_FORMS = "a number and one of s, ms, us (for example 40ms, 0.5s, 250us)"
SIZE_FORMS = (
    "a whole number of bytes, or a number and one of "
    + ", ".join(SIZE_UNITS)
    + " (for example 65536, 64KiB, 1.5MB)"
)


def _quantity(text: str, units: dict[str, float] | dict[str, int], what: str, forms: str) -> tuple[str, str]:
    match = _QUANTITY.match(text)
    if match is None or (match.group(2) is not None and match.group(2) not in units):
        raise LinkSettingsError(f"{what}: {text!r} is not understood; write {forms}")
    return match.group(1), match.group(2) or ""


def parse_rate(text: str, what: str = "rate") -> float:
    """A rate in words ("100Mbit/s", "1Gbit/s", "12.5MB/s") in bytes per second; above 0 and finite."""
    number, unit = _quantity(text, RATE_UNITS, what, RATE_FORMS)
    if not unit:
        raise LinkSettingsError(f"{what}: {text!r} has no unit; write {RATE_FORMS}")
    return check_rate(float(number) * RATE_UNITS[unit], what)


def parse_duration(text: str, what: str = "time") -> float:
    """A time in words ("40ms", "0.5s", "250us") in seconds; 0 or more and finite."""
    number, unit = _quantity(text, TIME_UNITS, what, TIME_FORMS)
    if not unit:
        raise LinkSettingsError(f"{what}: {text!r} has no unit; write {TIME_FORMS}")
    seconds = float(number) * TIME_UNITS[unit]
    if not math.isfinite(seconds) or seconds < 0:
        raise LinkSettingsError(f"{what}: must be 0 or more, got {text!r}")
    return seconds


def parse_size(text: str, what: str = "size") -> int:
    """A size in words ("65536", "64KiB", "1.5MB") in bytes; a whole number, 1 or more."""
    number, unit = _quantity(text, SIZE_UNITS, what, SIZE_FORMS)
    value = float(number) * SIZE_UNITS[unit] if unit else float(number)
    if not math.isfinite(value) or value != int(value):
        raise LinkSettingsError(f"{what}: {text!r} is not a whole number of bytes; write {SIZE_FORMS}")
    if value < 1:
        raise LinkSettingsError(f"{what}: must be at least 1 byte, got {text!r}")
    return int(value)


def check_rate(rate: float, what: str = "rate") -> float:
    if not math.isfinite(rate) or rate <= 0:
        raise LinkSettingsError(f"{what}: must be above 0 bytes/s and finite, got {rate!r}")
    return rate


def format_rate(bytes_per_s: float) -> str:
    """Exact words for a rate, that ``parse_rate`` reads back to the same float."""
    return f"{bytes_per_s!r}B/s"


def format_duration(seconds: float) -> str:
    """Exact words for a time, that ``parse_duration`` reads back to the same float."""
    return f"{seconds!r}s"


# -- settings -----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class OneWay:
    """One direction of the link: its rate, its one-way delay and its buffer (None: the default)."""

    rate_bytes_per_s: float
    delay_s: float
    buffer_bytes: int | None = None

    def __post_init__(self) -> None:
        check_rate(self.rate_bytes_per_s)
        if not math.isfinite(self.delay_s) or self.delay_s < 0:
            raise LinkSettingsError(f"delay: must be 0 s or more and finite, got {self.delay_s!r}")
        if self.delay_s > MAX_DELAY_SECONDS:
            raise LinkSettingsError(
                f"delay: {self.delay_s!r} s is over {MAX_DELAY_SECONDS:g} s; give delays with a unit, e.g. 20ms"
            )
        if self.buffer_bytes is not None:
            least = self.in_flight_bytes + MIN_QUEUE_BYTES
            if isinstance(self.buffer_bytes, bool) or not isinstance(self.buffer_bytes, int):
                raise LinkSettingsError(f"buffer: must be a whole number of bytes, got {self.buffer_bytes!r}")
            if self.buffer_bytes < least:
                raise LinkSettingsError(
                    f"buffer: {self.buffer_bytes} bytes cannot keep this direction busy: it must hold the "
                    f"{self.in_flight_bytes} bytes in flight (rate × delay) plus {MIN_QUEUE_BYTES} bytes of "
                    f"queue, so at least {least} bytes"
                )

    @property
    def in_flight_bytes(self) -> int:
        """Bytes on the wire when this direction is busy: rate × delay."""
        return math.ceil(self.rate_bytes_per_s * self.delay_s)

    @property
    def buffer(self) -> int:
        """The buffer in force: the setting, or the bytes in flight plus 20 ms of queue (at least 64 KiB)."""
        if self.buffer_bytes is not None:
            return self.buffer_bytes
        queue_bytes = max(DEFAULT_MIN_QUEUE_BYTES, math.ceil(self.rate_bytes_per_s * DEFAULT_QUEUE_SECONDS))
        return self.in_flight_bytes + queue_bytes


@dataclass(frozen=True)
class CutAfterBytes:
    """Cut once the ``count``-th byte in ``direction`` (over the link's life, all connections) is delivered."""

    direction: Direction
    count: int

    def __post_init__(self) -> None:
        if self.direction not in DIRECTIONS:
            raise LinkSettingsError(
                f"cut: direction must be one of {', '.join(DIRECTIONS)}, got {self.direction!r}"
            )
        if isinstance(self.count, bool) or not isinstance(self.count, int) or self.count < 1:
            raise LinkSettingsError(
                f"cut: the byte count must be a whole number, 1 or more, got {self.count!r}"
            )


@dataclass(frozen=True)
class CutAtTime:
    """Cut ``seconds`` after the link accepted its first connection."""

    seconds: float

    def __post_init__(self) -> None:
        if not math.isfinite(self.seconds) or self.seconds <= 0:
            raise LinkSettingsError(f"cut: the time must be above 0 s and finite, got {self.seconds!r}")


Cut: TypeAlias = CutAfterBytes | CutAtTime


@dataclass(frozen=True)
class LinkConfig:
    """Both directions of the link, when to cut it, and how the endpoints learn of a cut."""

    to_server: OneWay
    to_client: OneWay
    cuts: tuple[Cut, ...] = ()
    cut_mode: CutMode = "reset"
    handshake: bool = True

    def __post_init__(self) -> None:
        for name in DIRECTIONS:
            if not isinstance(getattr(self, name), OneWay):
                raise LinkSettingsError(f"{name}: must be a OneWay, got {getattr(self, name)!r}")
        if self.cut_mode not in CUT_MODES:
            raise LinkSettingsError(f"cut mode: must be one of {', '.join(CUT_MODES)}, got {self.cut_mode!r}")
        seen: set[Cut] = set()
        for cut in self.cuts:
            if not isinstance(cut, CutAfterBytes | CutAtTime):
                raise LinkSettingsError(f"cuts: each must be a CutAfterBytes or a CutAtTime, got {cut!r}")
            if cut in seen:
                raise LinkSettingsError(f"cuts: {cut!r} is given twice")
            seen.add(cut)

    @classmethod
    def symmetric(
        cls,
        rate_bytes_per_s: float,
        rtt_s: float,
        *,
        buffer_bytes: int | None = None,
        cuts: Sequence[Cut] = (),
        cut_mode: CutMode = "reset",
        handshake: bool = True,
    ) -> LinkConfig:
        """The same rate and buffer both ways, and half the round-trip time as each one-way delay."""
        if not math.isfinite(rtt_s) or rtt_s < 0:
            raise LinkSettingsError(f"round-trip time: must be 0 s or more and finite, got {rtt_s!r}")
        way = OneWay(rate_bytes_per_s, rtt_s / 2, buffer_bytes)
        return cls(way, way, tuple(cuts), cut_mode, handshake)

    @classmethod
    def from_words(
        cls, rate: str, rtt: str, *, buffer: str | None = None, cut_mode: CutMode = "reset"
    ) -> LinkConfig:
        """``LinkConfig.from_words("100Mbit/s", "40ms")``: a symmetric link from human words."""
        return cls.symmetric(
            parse_rate(rate, "rate"),
            parse_duration(rtt, "round-trip time"),
            buffer_bytes=None if buffer is None else parse_size(buffer, "buffer"),
            cut_mode=cut_mode,
        )

    def way(self, direction: Direction) -> OneWay:
        return self.to_server if direction == "to_server" else self.to_client

    @property
    def rtt_s(self) -> float:
        return self.to_server.delay_s + self.to_client.delay_s

    def to_arguments(self) -> list[str]:
        """Command-line options of ``python -m jointstat.harness.link`` that give exactly this configuration."""
        args: list[str] = []
        for direction in DIRECTIONS:
            way = self.way(direction)
            dashed = direction.replace("_", "-")
            args += [f"--rate-{dashed}", format_rate(way.rate_bytes_per_s)]
            args += [f"--delay-{dashed}", format_duration(way.delay_s)]
            if way.buffer_bytes is not None:
                args += [f"--buffer-{dashed}", str(way.buffer_bytes)]
        for cut in self.cuts:
            if isinstance(cut, CutAfterBytes):
                args += ["--cut-after", f"{cut.direction.replace('_', '-')}:{cut.count}"]
            else:
                args += ["--cut-at", format_duration(cut.seconds)]
        args += ["--cut-mode", self.cut_mode]
        if not self.handshake:
            args.append("--no-handshake")
        return args


@dataclass(frozen=True)
class LinkCounters:
    """What the link has carried so far."""

    to_server_bytes: int  # delivered to the server
    to_client_bytes: int  # delivered to the client
    dropped_to_server_bytes: int  # lost in cuts, or sent into a silently cut connection
    dropped_to_client_bytes: int
    connections: int  # accepted from clients
    open_connections: int
    failed_connections: int  # the target refused or could not be reached
    cuts: int
    peak_held_to_server_bytes: int  # the most the lane held at once (never above its buffer)
    peak_held_to_client_bytes: int
    deliveries: int  # timer firings that delivered bytes, both ways
    late_total_us: int  # how late those firings came after their deadlines, summed (the event loop's lag)
    max_late_us: int

    @property
    def mean_late_us(self) -> float:
        return self.late_total_us / self.deliveries if self.deliveries else 0.0

    def as_dict(self) -> dict[str, int]:
        return asdict(self)


def parse_address(text: str, what: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[::1]:PORT`` for IPv6) as (host, port)."""
    host, sep, port = text.rpartition(":")
    if not sep or not host or not port.isdigit() or int(port) > 65535:
        raise LinkSettingsError(f"{what}: {text!r} is not HOST:PORT (for example 127.0.0.1:50051)")
    return host.strip("[]"), int(port)


def is_loopback(host: str) -> bool:
    try:
        infos = socket.getaddrinfo(host, None, type=socket.SOCK_STREAM)
    except OSError:
        return False
    return all(
        (info[0] == socket.AF_INET and info[4][0].startswith("127."))
        or (info[0] == socket.AF_INET6 and info[4][0] == "::1")
        for info in infos
    )
