"""The link emulator in a process of its own, for benchmarks: ``with LinkProcess(config, target) as link``.

Theory of operation: a benchmark's nodes are busy processes; a link running in one of them (a thread, say) would
wait up to the interpreter's 5 ms switch interval for the interpreter lock, and its timers would fire late. In a
process of its own (``python -m jointstat.harness.link``, see ``command``) the emulator has its own interpreter
lock and an event loop over ``select(2)`` (timers fired 0.5 ms late on average on this machine with ``epoll``,
against 0.2 ms with ``select``), and it sleeps until the kernel wakes it for a timer or a socket, whatever the node
processes are doing. ``select`` handles file descriptors below 1024: a few hundred connections.

``LinkProcess`` starts that process with the configuration as options (``LinkConfig.to_arguments``), reads its
JSON lines on two reader threads (standard output and standard error), and sends it ``cut``, ``counters`` and
``stop`` on its standard input. The process stops when this object stops it, or when its standard input closes.
"""

from __future__ import annotations

import contextlib
import json
import queue
import subprocess
import sys
import threading
from types import TracebackType

from jointstat.harness.link.settings import LinkConfig, LinkCounters


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
