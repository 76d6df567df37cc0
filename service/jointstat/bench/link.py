"""``jointstat bench link``: how closely the link emulator keeps its rate and delay on this machine, and its ceiling.

Theory of operation: the emulator runs in a process of its own (``harness.link.LinkProcess``, as the session
benchmark will run it) between a client and a server socket of this process; plain blocking sockets, one thread
per direction, move the bytes (loopback without the emulator moves ~15 Gbit/s this way on this machine, so they
are not what limits it). Figures, all measured in this run:

- ``first_exchange_ms``: a new connection's first 64-byte request and answer (TCP's handshake round trip, then
  the exchange: twice the RTT on a real link);
- ``rtt_median_ms``, ``rtt_p90_ms``, ``one_way_to_server_median_ms``, ``one_way_to_client_median_ms``: 50
  exchanges of 64-byte messages on one connection (one clock on both ends, so one-way times are exact);
- ``to_server_utilisation``, ``to_client_utilisation``: a bulk transfer of ``bulk_bytes`` one way at a time, as a
  share of the set rate: the bytes over the time from the first send to the last byte's arrival, less the one-way
  delay (at most 1 by construction; below 1 by what the emulator or this machine lost); ``duplex_*``: both ways
  at once; ``*_mbit_per_s``: the same as rates;
- ``emulator_cpu``: the emulator process's CPU time over the wall time of the bulk transfers (1.0 = one core);
  ``emulator_mean_late_us`` / ``emulator_max_late_us``: how late its delivery timers fired after their deadlines
  (its own counters); ``emulator_peak_rss_mib``: its resident set size high-water mark.

A rate above what the emulator can carry shows its ceiling: ``jointstat bench link --rate 20Gbit/s --rtt 1ms``
gives the highest rate it reached as ``to_server_mbit_per_s``.
"""

from __future__ import annotations

import os
import socket
import statistics
import threading
import time
from typing import Any

from jointstat.bench.report import emit
from jointstat.harness.link import LinkConfig, LinkProcess, LinkSettingsError, OneWay, parse_size

PINGS = 50
BULK_SECONDS = 2.0  # default transfer: two seconds at the set rate, at least 1 MiB, at most 2 GB
TIMEOUT_S = 120.0


def _cpu_seconds(pid: int) -> float:
    """User and system CPU time of a process so far (/proc/PID/stat, fields 14 and 15)."""
    with open(f"/proc/{pid}/stat") as stat:
        fields = stat.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _peak_rss_mib(pid: int) -> float | None:
    try:
        with open(f"/proc/{pid}/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return None


def _receive_exactly(sock: socket.socket, n: int) -> None:
    while n:
        part = sock.recv(n)
        if not part:
            raise RuntimeError("bench link: the connection closed early")
        n -= len(part)


def _exchange(client: socket.socket, far: socket.socket) -> tuple[float, float]:
    """One 64-byte request and answer: (time to the server, time back)."""
    t0 = time.monotonic()
    client.sendall(b"q" * 64)
    _receive_exactly(far, 64)
    t1 = time.monotonic()
    far.sendall(b"a" * 64)
    _receive_exactly(client, 64)
    return t1 - t0, time.monotonic() - t1


class _Transfer:
    """``nbytes`` from one socket to another, sender and receiver on threads of their own."""

    def __init__(self, sender: socket.socket, receiver: socket.socket, nbytes: int) -> None:
        self.nbytes = nbytes
        self.started = 0.0
        self.done = 0.0
        self._threads = [
            threading.Thread(target=self._send, args=(sender,), daemon=True),
            threading.Thread(target=self._receive, args=(receiver,), daemon=True),
        ]

    def _send(self, sock: socket.socket) -> None:
        chunk = memoryview(bytes(1 << 20))
        self.started = time.monotonic()
        sent = 0
        while sent < self.nbytes:
            n = min(len(chunk), self.nbytes - sent)
            sock.sendall(chunk[:n])
            sent += n

    def _receive(self, sock: socket.socket) -> None:
        buffer = bytearray(1 << 20)
        got = 0
        while got < self.nbytes:
            n = sock.recv_into(buffer)
            if not n:
                return
            got += n
        self.done = time.monotonic()

    def start(self) -> _Transfer:
        for thread in self._threads:
            thread.start()
        return self

    def utilisation(self, way: OneWay) -> float:
        for thread in self._threads:
            thread.join(TIMEOUT_S)
        if not self.done:
            raise RuntimeError("bench link: a bulk transfer did not finish")
        return self.nbytes / (self.done - self.started - way.delay_s) / way.rate_bytes_per_s


def measure(config: LinkConfig, bulk_bytes: int) -> dict[str, Any]:
    """Run the measurements through an emulator process; returns the figures."""
    up, down = config.to_server, config.to_client
    with socket.create_server(("127.0.0.1", 0)) as server, LinkProcess(config, server.getsockname()) as link:
        server.settimeout(TIMEOUT_S)

        def connect() -> tuple[socket.socket, socket.socket]:
            client = socket.create_connection(link.address, timeout=TIMEOUT_S)
            far, _ = server.accept()
            far.settimeout(TIMEOUT_S)
            for sock in (client, far):
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            return client, far

        started = time.monotonic()
        client, far = connect()
        _exchange(client, far)
        first_exchange = time.monotonic() - started
        times = [_exchange(client, far) for _ in range(PINGS)]
        ups = [u for u, _ in times]
        downs = [d for _, d in times]
        rtts = sorted(u + d for u, d in times)

        cpu_before, wall_before = _cpu_seconds(link.pid), time.monotonic()
        to_server = _Transfer(client, far, bulk_bytes).start().utilisation(up)
        to_client = _Transfer(far, client, bulk_bytes).start().utilisation(down)
        duplex_up = _Transfer(client, far, bulk_bytes).start()
        duplex_down = _Transfer(far, client, bulk_bytes).start()
        duplex_to_server, duplex_to_client = duplex_up.utilisation(up), duplex_down.utilisation(down)
        cpu = (_cpu_seconds(link.pid) - cpu_before) / (time.monotonic() - wall_before)
        counters = link.counters()
        rss = _peak_rss_mib(link.pid)
        client.close()
        far.close()

    def mbit(share: float, way: OneWay) -> float:
        return round(share * way.rate_bytes_per_s * 8 / 1e6, 1)

    return {
        "to_server_rate_mbit_per_s": round(up.rate_bytes_per_s * 8 / 1e6, 3),
        "to_client_rate_mbit_per_s": round(down.rate_bytes_per_s * 8 / 1e6, 3),
        "rtt_setting_ms": round(config.rtt_s * 1e3, 3),
        "first_exchange_ms": round(first_exchange * 1e3, 3),
        "rtt_median_ms": round(statistics.median(rtts) * 1e3, 3),
        "rtt_p90_ms": round(rtts[int(0.9 * len(rtts))] * 1e3, 3),
        "one_way_to_server_median_ms": round(statistics.median(ups) * 1e3, 3),
        "one_way_to_client_median_ms": round(statistics.median(downs) * 1e3, 3),
        "bulk_bytes": bulk_bytes,
        "to_server_utilisation": round(to_server, 4),
        "to_client_utilisation": round(to_client, 4),
        "duplex_to_server_utilisation": round(duplex_to_server, 4),
        "duplex_to_client_utilisation": round(duplex_to_client, 4),
        "to_server_mbit_per_s": mbit(to_server, up),
        "to_client_mbit_per_s": mbit(to_client, down),
        "duplex_to_server_mbit_per_s": mbit(duplex_to_server, up),
        "duplex_to_client_mbit_per_s": mbit(duplex_to_client, down),
        "emulator_cpu": round(cpu, 3),
        "emulator_mean_late_us": round(counters.mean_late_us, 1),
        "emulator_max_late_us": counters.max_late_us,
        "emulator_peak_rss_mib": None if rss is None else round(rss, 1),
    }


def run(rate: str, rtt: str, bulk: str | None, buffer: str | None, as_json: bool) -> int:
    from jointstat.problems import UserError

    try:
        config = LinkConfig.from_words(rate, rtt, buffer=buffer)
        if bulk is not None:
            bulk_bytes = parse_size(bulk, "--bytes")
        else:
            two_seconds = int(config.to_server.rate_bytes_per_s * BULK_SECONDS)
            bulk_bytes = min(2_000_000_000, max(1 << 20, two_seconds))
    except LinkSettingsError as exc:
        raise UserError(f"bench link: {exc}") from None
    emit(
        "link emulator benchmark (loopback, emulator in its own process)",
        measure(config, bulk_bytes),
        as_json,
    )
    return 0
