"""The one-way link model: a serialising queue every connection shares, then a delay line, in each direction.

Theory of operation
-------------------
*Serialiser.* When the emulator reads ``n`` bytes from an endpoint at time ``t`` they start to leave at
``s = max(t, free_at)`` — after every byte admitted to the lane before them, over all connections through the
link — and leave at the link rate: ``free_at`` becomes ``s + n / rate``. *Delay line.* The read is cut into slices
of at most 1 ms of link time; a slice ending at byte ``k`` of the read has left at ``s + k / rate`` and arrives
``delay`` later, when the emulator writes it to the other endpoint. Every time is an absolute deadline on the event
loop's monotonic clock, computed from the previous deadline and never from the moment a timer happened to fire: a
late wake-up delivers late, but moves no later byte, so the rate does not drift.

*Buffer.* A lane holds at most ``buffer`` bytes that it has read and not yet handed to the receiving endpoint's
socket: queued for the serialiser, on the wire, or arrived for a receiver that is not reading. Reads are sized to
the room left (``asyncio.BufferedProtocol``), so the bound is exact (plus one fixed read buffer per socket). When a
lane is full the emulator stops reading its senders' sockets, their kernel buffers fill and the senders block —
TCP and HTTP/2 back-pressure as behind a router queue. Reading resumes once a quarter of the buffer (at most
1 MiB, at most half the queue) is free again.

A ``Lane`` is one direction of the link (its serialiser, buffer and counters); a ``Flow`` is one direction of one
connection (reads its source into the lane, delivers from its delay line to its destination). A half-close (EOF)
travels down the delay line like a byte, after the bytes before it; a byte-count cut travels as a marker and fires
when the byte before it arrives. The connections and the listening link are in ``proxy``.
"""

from __future__ import annotations

import asyncio
from collections import deque
from typing import TYPE_CHECKING

from jointstat.harness.link.settings import Direction, OneWay

if TYPE_CHECKING:
    from jointstat.harness.link.proxy import Connection, Link, Side

SLICE_SECONDS = 0.001  # a read is delivered in slices of at most this much link time
MIN_SLICE_BYTES = 256  # ... and at least this many bytes (at low rates)
MAX_READ_BYTES = 1024 * 1024  # the largest read from one socket

_EOF = object()  # a half-close travelling down a delay line
_CUT = object()  # a byte-count cut, due when the byte before it arrives


class Lane:
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
        self.flows: set[Flow] = set()

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


class Flow:
    """One direction of one connection: reads its source, queues on the lane, delivers to its destination."""

    def __init__(self, link: Link, conn: Connection, lane: Lane) -> None:
        self.link = link
        self.conn = conn
        self.lane = lane
        self.source: Side | None = None
        self.dest: Side | None = None
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
            try:
                dest.transport.write_eof()
            except OSError:  # the receiver's socket has failed: the other endpoint sees a reset, as over TCP
                self.conn.teardown(reset=True)
                return
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
