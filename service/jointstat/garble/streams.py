"""The table stream as frames in and frames out, while a program garbles or evaluates in between.

Theory of operation
-------------------
A program is ordinary Python code that calls the builder; it cannot ``yield`` from deep inside an AND call. Yet a
session must hand the garbler's tables out chunk by chunk as they are made, and feed the evaluator's program the
tables as frames arrive — without threads in the protocol core. The program therefore runs in a *greenlet* (a
coroutine with its own stack, from the ``greenlet`` package): when the garbler's backend has filled a chunk, its
sink switches back to the caller with the chunk; when the evaluator's backend needs more table bytes than have
arrived, its source switches back and waits for the next ``feed``. Control moves only at those points, in one
thread, deterministically; an exception in the program surfaces in the caller of ``next_chunk``/``feed``.

A greenlet belongs to the thread that first runs it: call ``next_chunk``/``start``/``feed`` from one thread (the
transport gives each session one worker thread).

``TableProducer(run)`` — ``run(sink)`` runs the garbling program with a backend writing into ``sink`` and returns
its result; ``next_chunk()`` returns the next chunk (bytes) or None once the program has finished (``result``).

``TableConsumer(run, total)`` — ``run(source)`` runs the evaluating program with a backend reading ``source`` and
returns its result; ``start()`` runs it as far as it gets without tables, ``feed(data)`` gives it the next bytes
of the stream (split anywhere). It refuses bytes beyond ``total`` (the program's declared table bytes) or beyond
what the program takes, and ``close()`` fails a program that still waits for tables.
"""

from __future__ import annotations

import contextlib
from collections import deque
from collections.abc import Callable
from typing import Any

from greenlet import GreenletExit, getcurrent, greenlet

from jointstat.garble.halfgates import GarbleError

Sink = Callable[[memoryview], None]
Source = Callable[[int], memoryview]


class _Resumable:
    """A program run in a greenlet that switches back to whoever resumed it (module docstring)."""

    def __init__(self, program: Callable[[], Any]) -> None:
        self._program = program
        self._glet: greenlet | None = None
        self.finished = False
        self.result: Any = None

    def _body(self) -> None:
        self.result = self._program()

    def _step(self) -> Any:
        """Run the program until it switches back (returns what it passed) or ends (None, ``finished`` set)."""
        if self.finished:
            return None
        if self._glet is None:
            self._glet = greenlet(self._body)
        self._glet.parent = getcurrent()  # the program switches back to its parent: this caller
        try:
            out = self._glet.switch()
        except BaseException:
            self.finished = True  # a failed program is not run again
            self._glet = None
            raise
        if self._glet.dead:
            self.finished = True
            self._glet = None
            return None
        return out


class TableProducer(_Resumable):
    """Runs a garbling program and hands out its tables chunk by chunk (module docstring)."""

    def __init__(self, run: Callable[[Sink], Any]) -> None:
        super().__init__(lambda: run(self._sink))
        self.bytes_out = 0

    def _sink(self, chunk: memoryview) -> None:
        data = bytes(chunk)  # the backend reuses its chunk buffer once this returns
        self.bytes_out += len(data)
        getcurrent().parent.switch(data)  # back to the caller of next_chunk

    def close(self) -> None:
        """Stop a program paused mid-way (its stack unwinds now, freeing its labels); call on the owning thread."""
        glet, self._glet = self._glet, None
        self.finished = True
        if glet is not None and not glet.dead:
            glet.parent = getcurrent()
            with contextlib.suppress(Exception):
                glet.throw(GreenletExit)

    def next_chunk(self) -> bytes | None:
        """The next chunk of tables, garbling as far as needed; None once the program has finished."""
        out: bytes | None = self._step()
        return out


class TableConsumer(_Resumable):
    """Runs an evaluating program, feeding it the table stream as it arrives (module docstring)."""

    def __init__(self, run: Callable[[Source], Any], total: int | None = None) -> None:
        super().__init__(lambda: run(self._source))
        self._total = total
        self._pieces: deque[memoryview] = deque()
        self._offset = 0  # bytes of the first piece already taken
        self._available = 0
        self._closed = False
        self.bytes_in = 0
        self.bytes_taken = 0

    # -- the program's side ----------------------------------------------------------------------------------
    def _source(self, n: int) -> memoryview:
        while self._available < n:
            if self._closed:
                raise GarbleError(
                    f"table stream ended early: the program needs {n - self._available} more bytes of tables"
                    f" after {self.bytes_taken}"
                )
            getcurrent().parent.switch()  # back to the caller of start/feed/close until more arrive
        self._available -= n
        self.bytes_taken += n
        head = self._pieces[0]
        if head.nbytes - self._offset >= n:
            out = head[self._offset : self._offset + n]
            self._offset += n
            if self._offset == head.nbytes:
                self._pieces.popleft()
                self._offset = 0
            return out
        joined = bytearray(n)
        at = 0
        while at < n:
            head = self._pieces[0]
            take = min(n - at, head.nbytes - self._offset)
            joined[at : at + take] = head[self._offset : self._offset + take]
            at += take
            self._offset += take
            if self._offset == head.nbytes:
                self._pieces.popleft()
                self._offset = 0
        return memoryview(joined)

    # -- the caller's side ----------------------------------------------------------------------------------
    def _resume(self) -> None:
        if self.finished:
            return
        self._step()
        if self.finished and self._available:
            raise GarbleError(
                f"received {self._available} table bytes more than the program's AND gates need"
            )

    def start(self) -> None:
        """Run the program as far as it goes before it needs tables (to the end if it needs none)."""
        self._resume()

    def feed(self, data: bytes | bytearray | memoryview) -> None:
        """The next bytes of the table stream; the program evaluates as far as they reach."""
        view = memoryview(data).cast("B")
        if not view.nbytes:
            return
        if self.finished:
            raise GarbleError(f"received {view.nbytes} table bytes after the program's last AND gate")
        if self._total is not None and self.bytes_in + view.nbytes > self._total:
            raise GarbleError(
                f"table bytes exceed the {self._total} the program declares: {self.bytes_in} received before"
                f" {view.nbytes} more"
            )
        self.bytes_in += view.nbytes
        self._pieces.append(view)
        self._available += view.nbytes
        self._resume()

    def close_quietly(self) -> None:
        """Stop a program paused mid-way without an error (the session has ended); call on the owning thread."""
        glet, self._glet = self._glet, None
        self.finished = True
        self._pieces.clear()
        self._available = 0
        if glet is not None and not glet.dead:
            glet.parent = getcurrent()
            with contextlib.suppress(Exception):
                glet.throw(GreenletExit)

    def close(self) -> None:
        """No more tables will come: a program still waiting for them fails with a clear error."""
        self._closed = True
        if not self.finished and self._glet is not None:
            self._resume()
