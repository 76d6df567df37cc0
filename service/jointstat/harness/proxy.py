"""A loopback TCP proxy between two nodes that can cut or stall every connection through it.

Theory of operation: each accepted connection is paired with a new connection to ``target`` and two pumps copy
bytes both ways. ``cut(reset)`` closes every connection at once — with a TCP reset (``SO_LINGER`` of zero, so the
kernel sends RST; bytes still buffered are lost) or an orderly close — and both gRPC ends see the connection drop.
``stall()`` stops forwarding in both directions while the connections stay open, so both ends must give up by their
own limits. When one end closes, the pump closes the other end too, as a plain TCP path would. ``target`` may be
changed between connections (the peer node coming back on another port).
"""

from __future__ import annotations

import asyncio
import contextlib
import socket
import struct


class FaultProxy:
    """A loopback TCP proxy that can cut or stall every connection through it (module docstring)."""

    def __init__(self, target_port: int) -> None:
        self.target = target_port  # where new connections go
        self._server: asyncio.Server | None = None
        self._links: list[tuple[asyncio.StreamWriter, asyncio.StreamWriter]] = []
        self._tasks: set[asyncio.Task[None]] = set()
        self._stalled = False
        self._never = asyncio.Event()  # never set: what a stalled pump waits for
        self.port = 0

    async def start(self) -> int:
        self._server = await asyncio.start_server(self._accept, "127.0.0.1", 0)
        self.port = self._server.sockets[0].getsockname()[1]
        return self.port

    async def _accept(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            up_reader, up_writer = await asyncio.open_connection("127.0.0.1", self.target)
        except OSError:
            writer.transport.abort()
            return
        self._links.append((writer, up_writer))
        for src, dst in ((reader, up_writer), (up_reader, writer)):
            task = asyncio.create_task(self._pump(src, dst, writer, up_writer))
            self._tasks.add(task)
            task.add_done_callback(self._tasks.discard)

    async def _pump(
        self,
        src: asyncio.StreamReader,
        dst: asyncio.StreamWriter,
        a: asyncio.StreamWriter,
        b: asyncio.StreamWriter,
    ) -> None:
        try:
            while data := await src.read(1 << 16):
                if self._stalled:
                    await self._never.wait()
                dst.write(data)
                await dst.drain()
        except (ConnectionError, OSError):
            pass
        if not self._stalled:  # one end closed: close the other too
            for w in (a, b):
                w.transport.abort()
            with contextlib.suppress(ValueError):
                self._links.remove((a, b))

    def cut(self, reset: bool) -> None:
        """Close every connection now: with a TCP reset (``reset``) or an orderly close; buffered bytes are lost."""
        for a, b in self._links:
            for w in (a, b):
                if reset:
                    sock = w.get_extra_info("socket")
                    if sock is not None:
                        with contextlib.suppress(OSError):
                            sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
                w.transport.abort()

    def stall(self) -> None:
        """Stop forwarding in both directions; the connections stay open."""
        self._stalled = True

    def clear(self) -> None:
        """Drop every connection and forward again (between sessions)."""
        self.cut(reset=True)
        self._links.clear()
        for task in list(self._tasks):
            task.cancel()
        self._stalled = False

    async def close(self) -> None:
        self.cut(reset=False)
        for task in list(self._tasks):
            task.cancel()
        for task in list(self._tasks):
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()
