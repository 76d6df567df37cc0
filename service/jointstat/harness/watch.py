"""What escaped while a harness ran: exceptions in event-loop callbacks, tasks and threads, and errors logged.

Theory of operation: ``CrashWatch`` is a context manager. While it is open it is the running event loop's exception
handler and ``threading.excepthook``, and a handler on the root logger (which it lowers to INFO, the level a node
logs at, ``node.daemon.run_node``). Every unhandled exception it sees, and every record at ERROR or above from
``grpc``, ``asyncio`` or ``jointstat``, is a crash (named, without the exception's text for the first two kinds);
every record at INFO and above is kept as a line (``name LEVEL message``) for the secret scan.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import threading
from typing import Any


class CrashWatch:
    """Counts what escaped and keeps every log line at INFO and above (module docstring)."""

    def __init__(self) -> None:
        self.crashes: list[str] = []
        self.lines: list[str] = []
        self._handler = _ListHandler(self)
        self._old_hook = threading.excepthook
        self._old_level = logging.getLogger().level

    def loop_exception(self, _loop: asyncio.AbstractEventLoop, context: dict[str, Any]) -> None:
        exc = context.get("exception")
        self.crashes.append(
            f"event loop: {context.get('message')} ({type(exc).__name__ if exc else 'no exception'})"
        )

    def _thread_exception(self, args: threading.ExceptHookArgs) -> None:
        self.crashes.append(f"thread {args.thread.name if args.thread else '?'}: {args.exc_type.__name__}")

    def __enter__(self) -> CrashWatch:
        root = logging.getLogger()
        self._old_level = root.level
        root.addHandler(self._handler)
        root.setLevel(min(root.level or logging.WARNING, logging.INFO))
        self._old_hook = threading.excepthook
        threading.excepthook = self._thread_exception
        with contextlib.suppress(RuntimeError):
            asyncio.get_running_loop().set_exception_handler(self.loop_exception)
        return self

    def __exit__(self, *_exc: object) -> None:
        root = logging.getLogger()
        root.removeHandler(self._handler)
        root.setLevel(self._old_level)
        threading.excepthook = self._old_hook
        with contextlib.suppress(RuntimeError):
            asyncio.get_running_loop().set_exception_handler(None)


class _ListHandler(logging.Handler):
    def __init__(self, watch: CrashWatch) -> None:
        super().__init__(logging.INFO)
        self._watch = watch

    def emit(self, record: logging.LogRecord) -> None:
        try:
            text = record.getMessage()
        except Exception:
            text = str(record.msg)
        if record.exc_info and record.exc_info[1] is not None:
            text += f" [{type(record.exc_info[1]).__name__}: {record.exc_info[1]}]"
        self._watch.lines.append(f"{record.name} {record.levelname} {text}")
        if record.levelno >= logging.ERROR and record.name.startswith(("grpc", "asyncio", "jointstat")):
            self._watch.crashes.append(f"logged by {record.name}: {text[:200]}")
