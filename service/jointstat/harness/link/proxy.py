"""The link emulator in an event loop: a loopback TCP proxy whose two directions are lanes of ``lanes``.

Theory of operation: a client connects to the emulator (``Link``); the emulator connects to the target (the
server) and carries bytes both ways, each direction through its lane (``lanes``). *Opening a connection* costs a
round trip, as TCP's handshake does: the emulator connects to the target one ``to_server`` delay after accepting
the client (when the client's SYN would reach the server) and takes the client's first bytes one round trip after
accepting (when the client would hold the server's SYN-ACK). ``handshake=False`` skips this.

*Cuts* close every connection through the link at once; new connections are accepted as before (a reconnect goes
through the same link). A cut comes after the N-th byte in a given direction has been delivered (counted over the
link's life, all connections, bytes lost in earlier cuts not counted), at a time after the first connection
(``CutAtTime``), or on demand (``await link.cut()``). Bytes still queued or on the wire are lost. How the
endpoints learn of it (``cut_mode``): ``reset`` (default) sends both a TCP reset; ``close`` an orderly close;
``silent`` tells them nothing — their bytes are read and dropped, nothing arrives, until they give up by their own
timeouts (what a real cut looks like); the emulator then closes each side as its endpoint closes.

Counters: bytes delivered each way, bytes dropped each way (lost in a cut, or sent into a silently cut
connection), connections accepted, open and failed (target refused), cuts, the most each lane held at once, and
how late the delivery timers fired after their deadlines (the emulator's own error on the delay).
"""

from __future__ import annotations

import asyncio
import contextlib
import socket
import struct
from types import TracebackType
from typing import Literal

from jointstat.harness.link.lanes import Flow, Lane
from jointstat.harness.link.settings import (
    DIRECTIONS,
    CutAfterBytes,
    CutAtTime,
    Direction,
    LinkConfig,
    LinkCounters,
    LinkSettingsError,
    is_loopback,
)

STOP_TIMEOUT_S = 5.0


class Side(asyncio.BufferedProtocol):
    """One TCP connection of the emulator: to the client (``client``) or to the target (``server``)."""

    def __init__(self, link: Link, role: Literal["client", "server"], conn: Connection | None = None) -> None:
        self.link = link
        self.role = role
        self.conn = conn
        self.transport: asyncio.Transport | None = None
        self.lost = False

    def flows(self) -> tuple[Flow, Flow]:
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


class Connection:
    """A client's connection through the link: its two sides and its two flows."""

    def __init__(self, link: Link, client: Side) -> None:
        self.link = link
        self.client = client
        self.server: Side | None = None
        self.up = Flow(link, self, link.lanes["to_server"])
        self.down = Flow(link, self, link.lanes["to_client"])
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
        side = Side(self.link, "server", self)
        try:
            await self.link.loop.create_connection(lambda: side, host, port)
        except OSError:
            self.link.failed_connections += 1
            self.teardown(reset=True)

    def server_connected(self, side: Side) -> None:
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

    def side_lost(self, side: Side, exc: Exception | None) -> None:
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
    def abort_side(side: Side | None, reset: bool) -> None:
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

    def close_side(self, side: Side) -> None:
        if side.transport is not None and not side.lost:
            side.transport.close()

    def stop_forwarding(self) -> None:
        """Stop both directions, cancel the deliveries scheduled and the connection to the server if still
        being made."""
        self.up.stop()
        self.down.stop()
        for handle in self.handles:
            handle.cancel()
        if self.connect_task is not None and not self.connect_task.done():
            self.connect_task.cancel()

    def teardown(self, reset: bool) -> None:
        """Close both endpoints (with a reset, or an orderly close) and drop what is still queued."""
        self.closing = True
        self.stop_forwarding()
        self.abort_side(self.client, reset)
        self.abort_side(self.server, reset)
        self.check_done()

    def sever(self) -> None:
        """A silent cut: drop what is queued; from now on read and drop, deliver nothing."""
        self.severed = True
        self.stop_forwarding()
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
        if not is_loopback(listen[0]):
            raise LinkSettingsError(f"listen: the link emulator listens on loopback only, got {listen[0]!r}")
        self.config = config
        self.target = target
        self.listen = listen
        self._server: asyncio.Server | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self.lanes: dict[Direction, Lane] = {}
        self.connections: set[Connection] = set()
        self.accepted_connections = 0
        self.failed_connections = 0
        self.cuts = 0
        self._first_accept: float | None = None
        self._timed_cuts: list[asyncio.TimerHandle] = []
        self._severed: set[Connection] = set()  # silently cut, waiting for their endpoints to close
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
            self.lanes[direction] = Lane(direction, self.config.way(direction), counts)
        self._server = await self._loop.create_server(
            lambda: Side(self, "client"), self.listen[0], self.listen[1]
        )
        sockname = self._server.sockets[0].getsockname()
        self.address = (sockname[0], sockname[1])
        return self.address

    @property
    def port(self) -> int:
        return self.address[1]

    def accepted(self, side: Side) -> None:
        conn = Connection(self, side)
        side.conn = conn
        self.connections.add(conn)
        self.accepted_connections += 1
        if self._first_accept is None:
            self._first_accept = self.loop.time()
            for cut in self.config.cuts:
                if isinstance(cut, CutAtTime):
                    self._timed_cuts.append(self.loop.call_at(self._first_accept + cut.seconds, self.cut_now))
        conn.start(self.config.handshake)

    def cut_now(self) -> list[Connection]:
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
