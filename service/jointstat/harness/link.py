"""A wide-area link in user space: a loopback TCP proxy with a rate, a delay and a queue in each direction.

Theory of operation
-------------------
A client connects to the emulator; the emulator connects to the target (the server) and carries bytes both ways.
Each direction — ``to_server`` (client to server) and ``to_client`` (server to client) — is a *lane* with its own
rate, one-way delay and buffer, modelled as a real link: a serialising queue followed by a delay line.

*Serialiser.* When the emulator reads ``n`` bytes from an endpoint at time ``t`` they start to leave at
``s = max(t, free_at)`` — after every byte admitted to the lane before them, over all connections through the
link — and leave at the link rate: ``free_at`` becomes ``s + n / rate``. *Delay line.* The read is cut into slices
of at most 1 ms of link time; a slice ending at byte ``k`` of the read has left at ``s + k / rate`` and arrives
``delay`` later, when the emulator writes it to the other endpoint. The round-trip time is the sum of the two
lanes' delays. Every time is an absolute deadline on the event loop's monotonic clock, computed from the previous
deadline and never from the moment a timer happened to fire: a late wake-up delivers late, but moves no later
byte, so the rate does not drift.

*Buffer.* A lane holds at most ``buffer`` bytes that it has read and not yet handed to the receiving endpoint's
socket: queued for the serialiser, on the wire, or arrived for a receiver that is not reading. Reads are sized to
the room left (``asyncio.BufferedProtocol``), so the bound is exact (plus one fixed read buffer per socket). When a
lane is full the emulator stops reading its senders' sockets, their kernel buffers fill and the senders block —
TCP and HTTP/2 back-pressure as behind a router queue. Reading resumes once a quarter of the buffer (at most
1 MiB, at most half the queue) is free again. The default buffer is the bytes in flight (rate × delay) plus
20 ms of queue at the rate, at least 64 KiB (common practice for a router queue; a busy machine may keep the
emulator from its timers for several milliseconds, and the queue keeps the serialiser busy meanwhile). A buffer
smaller than the bytes in flight plus 16 KiB is refused: such a link could never carry its rate.

*Opening a connection* costs a round trip, as TCP's handshake does: the emulator connects to the target one
``to_server`` delay after accepting the client (when the client's SYN would reach the server) and takes the
client's first bytes one round trip after accepting (when the client would hold the server's SYN-ACK).
``handshake=False`` skips this. A half-close (EOF) travels like a byte, after the bytes before it.

*Cuts* close every connection through the link at once; new connections are accepted as before (a reconnect goes
through the same link). A cut comes after the N-th byte in a given direction has been delivered (counted over the
link's life, all connections, bytes lost in earlier cuts not counted), at a time after the first connection
(``CutAtTime``), or on demand (``await link.cut()``). Bytes still queued or on the wire are lost. How the
endpoints learn of it (``cut_mode``): ``reset`` (default) sends both a TCP reset; ``close`` an orderly close;
``silent`` tells them nothing — their bytes are read and dropped, nothing arrives, until they give up by their own
timeouts (what a real cut looks like); the emulator then closes each side as its endpoint closes.

*Where it runs.* ``Link`` runs in the caller's event loop (tests). For benchmarks, ``LinkProcess`` runs it in a
process of its own (``python -m jointstat.harness.link``): its own interpreter lock (a thread in a busy process can
wait up to the interpreter's 5 ms switch interval for it), an event loop over ``select(2)``, whose timeout has
microsecond resolution (``epoll``'s is rounded up to whole milliseconds: timers fired 0.5 ms late on average on
this machine, against 0.2 ms with ``select``), and a mostly sleeping process that the kernel wakes promptly when a
timer or socket is due, whatever the node processes are doing. ``select`` handles file descriptors below 1024: a
few hundred connections.

Counters: bytes delivered each way, bytes dropped each way (lost in a cut, or sent into a silently cut
connection), connections accepted, open and failed (target refused), cuts, the most each lane held at once, and
how late the delivery timers fired after their deadlines (the emulator's own error on the delay).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import math
import queue
import re
import selectors
import signal
import socket
import struct
import subprocess
import sys
import threading
from collections import deque
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from types import TracebackType
from typing import Literal, TypeAlias

Direction: TypeAlias = Literal["to_server", "to_client"]
DIRECTIONS: tuple[Direction, ...] = ("to_server", "to_client")
CutMode: TypeAlias = Literal["reset", "close", "silent"]
CUT_MODES: tuple[CutMode, ...] = ("reset", "close", "silent")

SLICE_SECONDS = 0.001  # a read is delivered in slices of at most this much link time
MIN_SLICE_BYTES = 256  # ... and at least this many bytes (at low rates)
MAX_READ_BYTES = 1024 * 1024  # the largest read from one socket
DEFAULT_QUEUE_SECONDS = 0.02  # default queue, in time at the lane's rate (common practice, see above)
DEFAULT_MIN_QUEUE_BYTES = 64 * 1024
MIN_QUEUE_BYTES = 16 * 1024  # a buffer must hold the bytes in flight plus at least this much
MAX_DELAY_SECONDS = 60.0  # a one-way delay above a minute is a mistake (a unit left out), not a network
STOP_TIMEOUT_S = 5.0


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


def _is_loopback(host: str) -> bool:
    try:
        infos = socket.getaddrinfo(host, None, type=socket.SOCK_STREAM)
    except OSError:
        return False
    return all(
        (info[0] == socket.AF_INET and info[4][0].startswith("127."))
        or (info[0] == socket.AF_INET6 and info[4][0] == "::1")
        for info in infos
    )


# -- the emulator -------------------------------------------------------------------------------------------------------

_EOF = object()  # a half-close travelling down a delay line
_CUT = object()  # a byte-count cut, due when the byte before it arrives


class _Lane:
    """One direction of the link: the serialiser every connection shares, its buffer and its counters."""

    def __init__(self, direction: Direction, way: OneWay, cut_counts: list[int]) -> None:
        self.direction = direction
        self.rate = way.rate_bytes_per_s
        self.delay = way.delay_s
        self.buffer = way.buffer
        self.slice = max(MIN_SLICE_BYTES, int(self.rate * SLICE_SECONDS))
        queue_bytes = self.buffer - way.in_flight_bytes
        self.resume_room = max(1, min(MAX_READ_BYTES, queue_bytes // 2, self.buffer // 4))
        self.read_size = min(MAX_READ_BYTES, self.buffer)
        self.free_at = 0.0  # when the serialiser has sent every byte admitted so far
        self.held = 0  # read, not yet handed to the receiver's socket
        self.peak_held = 0
        self.admitted = 0
        self.delivered = 0
        self.lost = 0  # admitted, then dropped in a cut
        self.discarded = 0  # read from a silently cut connection
        self.deliveries = 0  # timer firings that delivered
        self.late_total = 0.0  # seconds the firings came after their deadlines, summed
        self.late_max = 0.0
        self.cut_points = deque(sorted(cut_counts))
        self.cut_pending = False  # a byte-count cut is on its way: admit nothing more
        self.full = False
        self.flows: set[_Flow] = set()

    def room(self) -> int:
        """Bytes the next read may take."""
        room = self.buffer - self.held
        if self.cut_points:
            room = min(room, self.cut_points[0] - (self.admitted - self.lost))
        return min(room, self.read_size)

    def accepting(self) -> bool:
        return not self.cut_pending and not self.full

    def refresh(self) -> None:
        """Start or stop reading this lane's senders after the held bytes or the cut state changed."""
        room = self.buffer - self.held
        if not self.full and room <= 0:
            self.full = True
        elif self.full and room >= self.resume_room:
            self.full = False
        for flow in list(self.flows):
            flow.update_reading()

    def count_held(self, change: int) -> None:
        self.held += change
        self.peak_held = max(self.peak_held, self.held)


class _Flow:
    """One direction of one connection: reads its source, queues on the lane, delivers to its destination."""

    def __init__(self, link: Link, conn: _Connection, lane: _Lane) -> None:
        self.link = link
        self.conn = conn
        self.lane = lane
        self.source: _Side | None = None
        self.dest: _Side | None = None
        self.queue: deque[tuple[float, object]] = deque()
        self.queued = 0  # bytes in the queue
        self.unsent = 0  # bytes in the destination transport's write buffer
        self.timer: asyncio.TimerHandle | None = None
        self.blocks: set[str] = set()  # reasons of this flow's own not to read ("handshake", "connecting")
        self.reading = True  # the source transport's state as set by us
        self.read_buffer: memoryview | None = None
        self.eof_delivered = False
        self.stopped = False
        lane.flows.add(self)

    # reading side

    def update_reading(self) -> None:
        src = self.source
        if src is None or src.transport is None or src.lost:
            return
        if self.conn.severed:
            want = not self.stopped  # silently cut: read and drop until the endpoint closes
        else:
            want = not self.stopped and not self.blocks and self.lane.accepting()
        if want != self.reading:
            self.reading = want
            if want:
                src.transport.resume_reading()
            else:
                src.transport.pause_reading()

    def get_buffer(self) -> memoryview:
        if self.read_buffer is None:
            self.read_buffer = memoryview(bytearray(self.lane.read_size))
        if self.conn.severed:
            return self.read_buffer
        # The lane stops this flow's reading as soon as its room is 0; a read is never called with less.
        return self.read_buffer[: max(1, self.lane.room())]

    def admit(self, n: int) -> None:
        lane = self.lane
        if self.conn.severed or self.stopped:
            lane.discarded += n
            return
        assert self.read_buffer is not None
        now = self.link.loop.time()
        start = max(now, lane.free_at)
        rate = lane.rate
        view = self.read_buffer
        step = lane.slice
        arrival = start
        for offset in range(0, n, step):
            end = min(n, offset + step)
            arrival = start + end / rate + lane.delay  # from the read's start: no error accumulates
            self.queue.append((arrival, bytes(view[offset:end])))
        lane.free_at = start + n / rate
        self.queued += n
        lane.admitted += n
        lane.count_held(n)
        if lane.cut_points and lane.admitted - lane.lost >= lane.cut_points[0]:
            lane.cut_points.popleft()
            lane.cut_pending = True
            self.queue.append((arrival, _CUT))
        if lane.cut_pending or lane.buffer - lane.held <= 0:
            lane.refresh()
        self.arm()

    def admit_eof(self) -> None:
        if self.conn.severed or self.stopped:
            return
        lane = self.lane
        arrival = max(self.link.loop.time(), lane.free_at) + lane.delay
        self.queue.append((arrival, _EOF))
        self.arm()

    # delivering side

    def arm(self) -> None:
        dest = self.dest
        if self.stopped:
            return
        if self.timer is None and self.queue and dest is not None and dest.transport is not None:
            self.timer = self.link.loop.call_at(self.queue[0][0], self.deliver)

    def deliver(self) -> None:
        self.timer = None
        if self.stopped:
            return
        now = self.link.loop.time()
        if self.queue and self.queue[0][0] <= now:
            late = now - self.queue[0][0]
            lane = self.lane
            lane.deliveries += 1
            lane.late_total += late
            lane.late_max = max(lane.late_max, late)
        while self.queue and self.queue[0][0] <= now:
            item = self.queue.popleft()[1]
            if isinstance(item, bytes):
                self.write(item)  # slice by slice: joining them would hold their bytes twice
            elif item is _CUT:
                self.link.cut_now()
                return
            else:
                self.deliver_eof()
        self.arm()

    def write(self, data: bytes) -> None:
        assert self.dest is not None and self.dest.transport is not None
        n = len(data)
        transport = self.dest.transport
        lane = self.lane
        self.queued -= n
        if transport.is_closing():  # the receiver's socket failed; its connection is being torn down
            lane.lost += n
            lane.count_held(-n)
            return
        transport.write(data)
        unsent = transport.get_write_buffer_size()
        lane.delivered += n
        lane.count_held(unsent - self.unsent - n)
        self.unsent = unsent
        lane.refresh()

    def drained(self) -> None:
        """The destination's transport has handed every byte to the kernel."""
        if self.unsent:
            self.lane.count_held(-self.unsent)
            self.unsent = 0
            self.lane.refresh()

    def deliver_eof(self) -> None:
        dest = self.dest
        assert dest is not None and dest.transport is not None
        self.eof_delivered = True
        if dest.transport.can_write_eof():
            dest.transport.write_eof()
        self.conn.eof_delivered()

    def stop(self) -> None:
        """Forward nothing more: drop what is queued (it is lost), stop the timer, leave the lane."""
        if self.stopped:
            return
        self.stopped = True
        if self.timer is not None:
            self.timer.cancel()
            self.timer = None
        self.queue.clear()
        lane = self.lane
        lane.lost += self.queued
        lane.count_held(-(self.queued + self.unsent))
        self.queued = self.unsent = 0
        lane.flows.discard(self)
        lane.refresh()


class _Side(asyncio.BufferedProtocol):
    """One TCP connection of the emulator: to the client (``client``) or to the target (``server``)."""

    def __init__(
        self, link: Link, role: Literal["client", "server"], conn: _Connection | None = None
    ) -> None:
        self.link = link
        self.role = role
        self.conn = conn
        self.transport: asyncio.Transport | None = None
        self.lost = False

    def flows(self) -> tuple[_Flow, _Flow]:
        """(the flow this side reads for, the flow that writes to this side)."""
        assert self.conn is not None
        if self.role == "client":
            return self.conn.up, self.conn.down
        return self.conn.down, self.conn.up

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        assert isinstance(transport, asyncio.Transport)
        self.transport = transport
        transport.set_write_buffer_limits(high=0)  # told of every byte the kernel has not taken yet
        if self.role == "client":
            self.link.accepted(self)
        else:
            assert self.conn is not None
            self.conn.server_connected(self)

    def get_buffer(self, sizehint: int) -> memoryview:
        return self.flows()[0].get_buffer()

    def buffer_updated(self, nbytes: int) -> None:
        self.flows()[0].admit(nbytes)

    def eof_received(self) -> bool:
        assert self.conn is not None
        if self.conn.severed:
            self.conn.close_side(self)  # the endpoint gave up on a silently cut connection
            return False
        self.flows()[0].admit_eof()
        return True  # keep the other direction open: a half-close travels like a byte

    def resume_writing(self) -> None:
        self.flows()[1].drained()

    def connection_lost(self, exc: Exception | None) -> None:
        self.lost = True
        if self.conn is not None:
            self.conn.side_lost(self, exc)


class _Connection:
    """A client's connection through the link: its two sides and its two flows."""

    def __init__(self, link: Link, client: _Side) -> None:
        self.link = link
        self.client = client
        self.server: _Side | None = None
        self.up = _Flow(link, self, link.lanes["to_server"])
        self.down = _Flow(link, self, link.lanes["to_client"])
        self.up.source = client
        self.down.dest = client
        self.severed = False  # silently cut
        self.closing = False
        self.connect_task: asyncio.Task[None] | None = None
        self.handles: list[asyncio.TimerHandle] = []
        self.done: asyncio.Future[None] = link.loop.create_future()

    def start(self, handshake: bool) -> None:
        loop = self.link.loop
        cfg = self.link.config
        self.down.blocks.add("connecting")
        self.up.update_reading()  # the lane may be full already (other connections)
        if handshake:
            now = loop.time()
            self.up.blocks.add("handshake")
            self.up.update_reading()
            self.handles.append(loop.call_at(now + cfg.rtt_s, self.handshake_done))
            self.handles.append(loop.call_at(now + cfg.to_server.delay_s, self.connect))
        else:
            self.connect()

    def handshake_done(self) -> None:
        self.up.blocks.discard("handshake")
        self.up.update_reading()

    def connect(self) -> None:
        if not self.closing and not self.severed:
            self.connect_task = self.link.loop.create_task(self.open_target())
            self.connect_task.add_done_callback(lambda _: self.check_done())

    async def open_target(self) -> None:
        host, port = self.link.target
        side = _Side(self.link, "server", self)
        try:
            await self.link.loop.create_connection(lambda: side, host, port)
        except OSError:
            self.link.failed_connections += 1
            self.teardown(reset=True)

    def server_connected(self, side: _Side) -> None:
        self.server = side
        self.up.dest = side
        self.down.source = side
        if self.closing:
            self.abort_side(side, reset=True)
            return
        self.down.blocks.discard("connecting")
        self.down.update_reading()
        self.up.arm()

    def eof_delivered(self) -> None:
        if self.up.eof_delivered and self.down.eof_delivered:
            self.teardown(reset=False)  # both ends have closed their sending side

    def side_lost(self, side: _Side, exc: Exception | None) -> None:
        if not self.closing and not self.severed:
            # An endpoint's socket failed: the other endpoint sees the reset it would have seen.
            self.teardown(reset=exc is not None)
        self.check_done()

    def check_done(self) -> None:
        sides = [self.client, self.server]
        if all(s is None or s.lost for s in sides) and (
            self.connect_task is None or self.connect_task.done()
        ):
            self.finish()

    def finish(self) -> None:
        self.up.stop()
        self.down.stop()
        for handle in self.handles:
            handle.cancel()
        self.link.connections.discard(self)
        self.link._severed.discard(self)
        if not self.done.done():
            self.done.set_result(None)

    @staticmethod
    def abort_side(side: _Side | None, reset: bool) -> None:
        if side is None or side.transport is None or side.lost:
            return
        if reset:
            sock = side.transport.get_extra_info("socket")
            if sock is not None:
                with contextlib.suppress(OSError):
                    sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
            side.transport.abort()
        else:
            side.transport.close()

    def close_side(self, side: _Side) -> None:
        if side.transport is not None and not side.lost:
            side.transport.close()

    def teardown(self, reset: bool) -> None:
        """Close both endpoints (with a reset, or an orderly close) and drop what is still queued."""
        self.closing = True
        self.up.stop()
        self.down.stop()
        for handle in self.handles:
            handle.cancel()
        if self.connect_task is not None and not self.connect_task.done():
            self.connect_task.cancel()
        self.abort_side(self.client, reset)
        self.abort_side(self.server, reset)
        self.check_done()

    def sever(self) -> None:
        """A silent cut: drop what is queued; from now on read and drop, deliver nothing."""
        self.severed = True
        self.up.stop()
        self.down.stop()
        for handle in self.handles:
            handle.cancel()
        if self.connect_task is not None and not self.connect_task.done():
            self.connect_task.cancel()
        for flow in (self.up, self.down):
            flow.stopped = False  # stopped forwarding, but still reading (and dropping)
            flow.blocks.clear()
            flow.update_reading()
        self.check_done()


class Link:
    """The link emulator in the current event loop: ``async with Link(config, ("127.0.0.1", port)) as link``.

    Clients connect to ``link.address``; each connection is carried to ``target`` (which may be changed between
    connections). ``await link.cut()`` cuts every connection now; ``link.counters()`` tells what was carried.
    """

    def __init__(
        self,
        config: LinkConfig,
        target: tuple[str, int],
        listen: tuple[str, int] = ("127.0.0.1", 0),
    ) -> None:
        if not _is_loopback(listen[0]):
            raise LinkSettingsError(f"listen: the link emulator listens on loopback only, got {listen[0]!r}")
        self.config = config
        self.target = target
        self.listen = listen
        self._server: asyncio.Server | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self.lanes: dict[Direction, _Lane] = {}
        self.connections: set[_Connection] = set()
        self.accepted_connections = 0
        self.failed_connections = 0
        self.cuts = 0
        self._first_accept: float | None = None
        self._timed_cuts: list[asyncio.TimerHandle] = []
        self._severed: set[_Connection] = set()  # silently cut, waiting for their endpoints to close
        self.address: tuple[str, int] = ("", 0)

    @property
    def loop(self) -> asyncio.AbstractEventLoop:
        assert self._loop is not None, "the link is not started"
        return self._loop

    async def start(self) -> tuple[str, int]:
        """Listen; returns the (host, port) clients connect to."""
        self._loop = asyncio.get_running_loop()
        for direction in DIRECTIONS:
            counts = [
                c.count for c in self.config.cuts if isinstance(c, CutAfterBytes) and c.direction == direction
            ]
            self.lanes[direction] = _Lane(direction, self.config.way(direction), counts)
        self._server = await self._loop.create_server(
            lambda: _Side(self, "client"), self.listen[0], self.listen[1]
        )
        sockname = self._server.sockets[0].getsockname()
        self.address = (sockname[0], sockname[1])
        return self.address

    @property
    def port(self) -> int:
        return self.address[1]

    def accepted(self, side: _Side) -> None:
        conn = _Connection(self, side)
        side.conn = conn
        self.connections.add(conn)
        self.accepted_connections += 1
        if self._first_accept is None:
            self._first_accept = self.loop.time()
            for cut in self.config.cuts:
                if isinstance(cut, CutAtTime):
                    self._timed_cuts.append(self.loop.call_at(self._first_accept + cut.seconds, self.cut_now))
        conn.start(self.config.handshake)

    def cut_now(self) -> list[_Connection]:
        """Cut every connection through the link now; returns them."""
        self.cuts += 1
        cut = list(self.connections)
        for conn in cut:
            if self.config.cut_mode == "silent":
                self.connections.discard(conn)  # no longer carried; closed when its endpoints close
                self._severed.add(conn)
                conn.sever()
            else:
                conn.teardown(reset=self.config.cut_mode == "reset")
        now = self.loop.time()
        for lane in self.lanes.values():
            lane.cut_pending = False
            lane.free_at = min(lane.free_at, now)  # whatever was queued is gone
            lane.refresh()
        return cut

    async def cut(self) -> None:
        """Cut every connection now (as ``cut_mode`` says); returns once reset or closed connections are gone."""
        cut = self.cut_now()
        if self.config.cut_mode != "silent" and cut:
            await asyncio.wait([c.done for c in cut], timeout=STOP_TIMEOUT_S)

    def counters(self) -> LinkCounters:
        up, down = self.lanes["to_server"], self.lanes["to_client"]
        return LinkCounters(
            to_server_bytes=up.delivered,
            to_client_bytes=down.delivered,
            dropped_to_server_bytes=up.lost + up.discarded,
            dropped_to_client_bytes=down.lost + down.discarded,
            connections=self.accepted_connections,
            open_connections=len(self.connections),
            failed_connections=self.failed_connections,
            cuts=self.cuts,
            peak_held_to_server_bytes=up.peak_held,
            peak_held_to_client_bytes=down.peak_held,
            deliveries=up.deliveries + down.deliveries,
            late_total_us=round(1e6 * (up.late_total + down.late_total)),
            max_late_us=round(1e6 * max(up.late_max, down.late_max)),
        )

    async def close(self) -> None:
        """Stop listening and reset every connection."""
        for handle in self._timed_cuts:
            handle.cancel()
        if self._server is not None:
            self._server.close()
        conns = list(self.connections) + list(self._severed)
        for conn in conns:
            conn.teardown(reset=True)
        if conns:
            await asyncio.wait([c.done for c in conns], timeout=STOP_TIMEOUT_S)
        self._severed.clear()
        if self._server is not None:
            await self._server.wait_closed()
            self._server = None

    async def __aenter__(self) -> Link:
        await self.start()
        return self

    async def __aexit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        await self.close()


# -- in a process of its own ------------------------------------------------------------------------------------------

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
        direction: Direction = "to_server" if where == "to-server" else "to_client"
        cuts.append(CutAfterBytes(direction, parse_size(size, "--cut-after")))
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
        if not _is_loopback(listen[0]):
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


class LinkProcess:
    """The link emulator in a process of its own: ``with LinkProcess(config, ("127.0.0.1", port)) as link``.

    ``start()`` returns the (host, port) clients connect to; ``cut()``, ``counters()`` and ``stop()`` talk to the
    process over its standard input and output (async callers: ``await asyncio.to_thread(link.cut)``). The process
    stops when this object stops it, or when its standard input closes (this process died).
    """

    def __init__(
        self,
        config: LinkConfig,
        target: tuple[str, int],
        listen: tuple[str, int] = ("127.0.0.1", 0),
        *,
        reply_timeout_s: float = 10.0,
    ) -> None:
        self.config = config
        self.target = target
        self.listen = listen
        self.reply_timeout_s = reply_timeout_s
        self.address: tuple[str, int] = ("", 0)
        self._proc: subprocess.Popen[str] | None = None
        self._replies: queue.Queue[dict[str, object] | None] = queue.Queue()
        self._stderr: list[str] = []
        self._threads: list[threading.Thread] = []
        self._stopped = False
        self.final: LinkCounters | None = None

    @property
    def pid(self) -> int:
        assert self._proc is not None, "the link process is not started"
        return self._proc.pid

    @property
    def port(self) -> int:
        return self.address[1]

    def command(self) -> list[str]:
        return [
            sys.executable,
            "-m",
            "jointstat.harness.link",
            "--listen",
            f"{self.listen[0]}:{self.listen[1]}",
            "--target",
            f"{self.target[0]}:{self.target[1]}",
            *self.config.to_arguments(),
        ]

    def start(self) -> tuple[str, int]:
        import os
        from pathlib import Path

        import jointstat

        env = dict(os.environ)
        package_root = str(Path(jointstat.__file__).resolve().parent.parent)
        env["PYTHONPATH"] = os.pathsep.join(p for p in (package_root, env.get("PYTHONPATH")) if p)
        self._proc = subprocess.Popen(
            self.command(),
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            bufsize=1,
            env=env,
        )
        self._threads = [
            threading.Thread(target=self._read_replies, name="link-replies", daemon=True),
            threading.Thread(target=self._read_errors, name="link-errors", daemon=True),
        ]
        for thread in self._threads:
            thread.start()
        first = self._reply("start")
        self.address = (str(first["host"]), int(first["port"]))  # type: ignore[call-overload]
        return self.address

    def _read_replies(self) -> None:
        assert self._proc is not None and self._proc.stdout is not None
        for line in self._proc.stdout:
            with contextlib.suppress(json.JSONDecodeError):
                self._replies.put(json.loads(line))
        self._replies.put(None)

    def _read_errors(self) -> None:
        assert self._proc is not None and self._proc.stderr is not None
        for line in self._proc.stderr:
            self._stderr.append(line.rstrip("\n"))

    def _reply(self, what: str) -> dict[str, object]:
        try:
            reply = self._replies.get(timeout=self.reply_timeout_s)
        except queue.Empty:
            raise RuntimeError(
                f"link emulator: no answer to {what} within {self.reply_timeout_s:g} s"
            ) from None
        if reply is None:
            assert self._proc is not None
            with contextlib.suppress(subprocess.TimeoutExpired):
                self._proc.wait(timeout=self.reply_timeout_s)
            for thread in self._threads[1:]:
                thread.join(timeout=1.0)
            said = "; ".join(self._stderr) or "nothing on stderr"
            raise RuntimeError(f"link emulator ended (exit code {self._proc.returncode}) at {what}: {said}")
        if "error" in reply:
            raise RuntimeError(f"link emulator: {reply['error']}")
        return reply

    def _ask(self, word: str) -> dict[str, object]:
        assert self._proc is not None and self._proc.stdin is not None, "the link process is not started"
        self._proc.stdin.write(word + "\n")
        self._proc.stdin.flush()
        return self._reply(word)

    @staticmethod
    def _counters(reply: dict[str, object], key: str) -> LinkCounters:
        values = reply[key]
        assert isinstance(values, dict)
        return LinkCounters(**values)

    def cut(self) -> LinkCounters:
        """Cut every connection now; returns the counters after the cut."""
        return self._counters(self._ask("cut"), "counters")

    def counters(self) -> LinkCounters:
        return self._counters(self._ask("counters"), "counters")

    def stop(self) -> LinkCounters | None:
        """Stop the process (it resets its connections); returns its last counters (None if it said nothing)."""
        proc = self._proc
        if proc is None or self._stopped:
            return self.final
        self._stopped = True
        with contextlib.suppress(OSError, ValueError):  # it may have stopped already (its stdin closed)
            assert proc.stdin is not None
            proc.stdin.write("stop\n")
            proc.stdin.flush()
        try:
            while (reply := self._replies.get(timeout=self.reply_timeout_s)) is not None:
                if "stopped" in reply:
                    self.final = self._counters(reply, "stopped")
                    break
        except queue.Empty:
            pass
        try:
            proc.wait(timeout=self.reply_timeout_s)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        for stream in (proc.stdin, proc.stdout, proc.stderr):
            if stream is not None:
                with contextlib.suppress(OSError):
                    stream.close()
        return self.final

    def __enter__(self) -> LinkProcess:
        try:
            self.start()
        except BaseException:
            self.stop()
            raise
        return self

    def __exit__(
        self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None
    ) -> None:
        self.stop()


if __name__ == "__main__":
    sys.exit(main())
