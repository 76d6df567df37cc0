"""An in-memory pipe that runs a garbler session and an evaluator session against each other in one thread.

Theory of operation: both sessions' ``start()`` frames go into one first-in-first-out queue tagged with their
destination; the pipe delivers the oldest frame and queues the replies for the other side. When the garbler is
ready to stream, its ``produce()`` frames are queued one at a time, alternating with deliveries, so the evaluator
evaluates while the garbler garbles and at most a few frames are ever queued. Each direction stays in order, as on
a gRPC stream. A ``ProtocolError`` on one side delivers its abort frame to the other. ``intercept`` sees every
frame before delivery and returns the frames to deliver instead (to drop, alter or inject frames in tests).
This is what the transport does over gRPC, minus the network, the threads and the clocks.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass

from jointstat.circuit.model import Party
from jointstat.protocol.frames import ProtocolError
from jointstat.protocol.session import EvaluatorSession, GarblerSession, Session

Intercept = Callable[[Party, bytes], list[bytes]]


@dataclass
class PipeStats:
    frames: int = 0
    bytes: int = 0
    most_queued: int = 0


def run_in_memory(
    garbler: GarblerSession, evaluator: EvaluatorSession, *, intercept: Intercept | None = None
) -> PipeStats:
    """Run both sessions until neither has anything to send; returns counts of what crossed the pipe."""
    sessions: dict[Party, Session] = {Party.GARBLER: garbler, Party.EVALUATOR: evaluator}
    other = {Party.GARBLER: Party.EVALUATOR, Party.EVALUATOR: Party.GARBLER}
    queue: deque[tuple[Party, bytes]] = deque()
    stats = PipeStats()
    stream: Iterator[bytes] | None = None

    def post(to: Party, frames: list[bytes]) -> None:
        for data in frames:
            for delivered in intercept(to, data) if intercept is not None else [data]:
                queue.append((to, delivered))

    post(Party.EVALUATOR, garbler.start())
    post(Party.GARBLER, evaluator.start())
    while True:
        if stream is None and garbler.ready_to_stream:
            stream = garbler.produce()
        if stream is not None:
            try:
                data = next(stream, None)
            except ProtocolError as exc:
                data = None
                if exc.frame is not None:
                    post(Party.EVALUATOR, [exc.frame])
            if data is None:
                stream = None
            else:
                post(Party.EVALUATOR, [data])
        if not queue:
            if stream is None:
                return stats
            continue
        stats.most_queued = max(stats.most_queued, len(queue))
        to, data = queue.popleft()
        stats.frames += 1
        stats.bytes += len(data)
        target = sessions[to]
        if target.ended:
            continue
        try:
            post(other[to], target.receive(data))
        except ProtocolError as exc:
            if exc.frame is not None:
                post(other[to], [exc.frame])
