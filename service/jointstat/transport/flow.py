"""Flow control sized to the bandwidth-delay product: a window from the measured delivery rate and round-trip time.

Theory of operation
-------------------
The garbler's tables in flight (and the evaluator's OT columns in flight) must fill the link — at least the
bandwidth-delay product (BDP), rate × round-trip time, must be unacknowledged at any moment — without holding more
than the memory cap. Neither the rate nor the round-trip time is configured: both are measured from the session's
own application-level acknowledgements, in the manner of BBR's delivery-rate sampling (Cardwell, Cheng, Gunn,
Hassas Yeganeh, Jacobson, "BBR: Congestion-Based Congestion Control", ACM Queue 14(5), 2016; the delivery-rate
estimate of the IETF draft draft-cheng-iccrg-delivery-rate-estimation):

- each unit sent (a table frame, numbered by the session; an OT batch) is recorded when it was written, with how
  many bytes had been acknowledged by then and when;
- when an acknowledgement covers units up to n, the newest covered unit gives one *round-trip sample* (now − when
  it was written: the link's round trip, the queues, and the peer's work on it) and one *delivery-rate sample*:
  the bytes acknowledged since that unit was written over the time since the acknowledgement that was then the
  latest. Over a whole round trip that is what the link delivered, so bursts of acknowledgements do not inflate it;
- the round-trip time is the least sample seen (queues only add to it), the rate the greatest of the last
  ``RATE_SAMPLES`` samples (a window-limited sender measures less than the link carries, never more);
- the window is ``GAIN`` × rate × round-trip time (twice the BDP: the link stays full while acknowledgements are on
  their way back), at least ``floor_bytes`` and at most ``cap_bytes`` (the node's memory cap). Before the first
  sample it is ``initial_bytes``.

A sender limited by its window measures rate = window / RTT, so the next window is twice as large: the window
doubles every round trip until the link (or the peer's CPU) is the limit, then settles at twice that BDP. At
1 Gbit/s and 40 ms the BDP is 5 MB and the window 10 MB; at 100 Mbit/s it is 1 MB. Nothing here reads a clock:
the caller passes the times.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass

GAIN = 2.0
RATE_SAMPLES = 16


@dataclass
class _Sent:
    number: int
    end: int  # bytes sent up to and including this unit
    at: float
    delivered: int  # bytes acknowledged when it was sent
    delivered_at: float  # when the latest acknowledgement before it came


class FlowWindow:
    """The window of one sender (module docstring); ``sent`` and ``acknowledged`` take the caller's times."""

    def __init__(self, *, cap_bytes: int, floor_bytes: int, initial_bytes: int) -> None:
        if not 0 < floor_bytes <= cap_bytes:
            raise ValueError(
                f"flow window: floor {floor_bytes} must be above 0 and at most the cap {cap_bytes}"
            )
        self.cap_bytes = cap_bytes
        self.floor_bytes = floor_bytes
        self._initial = min(max(initial_bytes, floor_bytes), cap_bytes)
        self._records: deque[_Sent] = deque()
        self._sent = 0
        self._delivered = 0
        self._delivered_at: float | None = None
        self._acked_number = 0
        self.rtt_min_s: float = math.inf
        self._rates: deque[float] = deque(maxlen=RATE_SAMPLES)
        self.samples = 0

    @property
    def rate_bytes_per_s(self) -> float:
        """The delivery rate in force: the greatest recent sample (0 before any)."""
        return max(self._rates, default=0.0)

    @property
    def window_bytes(self) -> int:
        if not self._rates or not math.isfinite(self.rtt_min_s):
            return self._initial
        bdp = self.rate_bytes_per_s * self.rtt_min_s
        return int(min(max(GAIN * bdp, self.floor_bytes), self.cap_bytes))

    def sent(self, number: int, nbytes: int, now: float) -> None:
        """Unit ``number`` (increasing) of ``nbytes`` bytes was written at ``now``."""
        self._sent += nbytes
        delivered_at = now if self._delivered_at is None else self._delivered_at
        self._records.append(_Sent(number, self._sent, now, self._delivered, delivered_at))

    def acknowledged(self, count: int, now: float) -> None:
        """Every unit numbered below ``count`` has been acknowledged, as seen at ``now``."""
        newest: _Sent | None = None
        while self._records and self._records[0].number < count:
            newest = self._records.popleft()
        self._acked_number = max(self._acked_number, count)
        if newest is None:
            return
        self._delivered = max(self._delivered, newest.end)
        self.rtt_min_s = min(self.rtt_min_s, max(now - newest.at, 1e-6))
        interval = now - newest.delivered_at
        if interval > 0:
            self._rates.append((self._delivered - newest.delivered) / interval)
            self.samples += 1
        self._delivered_at = now

    def forget_unacknowledged(self) -> None:
        """After a cut: the units in flight will be resent and recorded again."""
        self._records.clear()
        self._sent = self._delivered
