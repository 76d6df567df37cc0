"""An in-memory pipe that runs two sans-I/O OT parties against each other in one process.

Theory of operation: both parties' ``start()`` messages go into one first-in-first-out queue, each tagged
with its destination; the pipe delivers the oldest message, queues the replies for the other side, and
repeats until the queue is empty. Each direction stays in order, as on a gRPC stream. The queue never
holds more than what the parties themselves have in flight (the receiver's window of column batches and
their corrections), so memory stays bounded for any count. Used by the tests and the benchmark; the
session layer does the same over gRPC.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Protocol

from jointstat.ot.messages import OTError, OTMessage


class OTParty(Protocol):
    """What the pipe needs of a party: the sans-I/O interface of every OT class."""

    @property
    def done(self) -> bool: ...

    def start(self) -> list[OTMessage]: ...

    def receive(self, message: OTMessage) -> list[OTMessage]: ...


@dataclass
class PipeStats:
    """Counts of what crossed the pipe: messages and payload bytes per kind (both directions together)."""

    messages: dict[str, int] = field(default_factory=dict)
    payload_bytes: dict[str, int] = field(default_factory=dict)
    largest_payload: int = 0
    most_queued: int = 0

    def bytes_of(self, *kinds: str) -> int:
        return sum(self.payload_bytes.get(kind, 0) for kind in kinds)


Observer = Callable[[str, OTMessage], None]


def run_pipe(first: OTParty, second: OTParty, *, observe: Observer | None = None) -> PipeStats:
    """Run ``first`` and ``second`` to completion; ``observe(to, message)`` sees every message in order.

    ``to`` is ``"first"`` or ``"second"``. Raises ``OTError`` if the pipe runs dry before both are done;
    any error raised by a party propagates unchanged.
    """
    stats = PipeStats()
    parties = {"first": first, "second": second}
    other = {"first": "second", "second": "first"}
    queue: deque[tuple[str, OTMessage]] = deque()
    for name in ("first", "second"):
        queue.extend((other[name], m) for m in parties[name].start())
    while queue:
        stats.most_queued = max(stats.most_queued, len(queue))
        to, message = queue.popleft()
        stats.messages[message.kind] = stats.messages.get(message.kind, 0) + 1
        stats.payload_bytes[message.kind] = stats.payload_bytes.get(message.kind, 0) + len(message.payload)
        stats.largest_payload = max(stats.largest_payload, len(message.payload))
        if observe is not None:
            observe(to, message)
        queue.extend((other[to], m) for m in parties[to].receive(message))
    if not (first.done and second.done):
        raise OTError("in-memory pipe ran dry before both parties were done")
    return stats
