"""The node's sense of time: a ``Clock`` the scheduler, the job store and the session log all read.

Theory of operation
-------------------
Everything in the node that asks "what time is it?" or "wake me at T" goes through one ``Clock``: ``now()`` gives
an aware UTC datetime and ``sleep_until(t)`` returns once ``now() ≥ t``. ``SystemClock`` is the wall clock; it
sleeps in steps of at most ``MAX_STEP_S`` seconds and looks at the wall clock again after each, so a clock
corrected by NTP (or a suspended machine) delays a scheduled run by at most one step. ``ManualClock`` stands
still until a test moves it with ``advance`` or ``set``; every sleeper whose time has come then wakes, in the
order of their wake-up times. Deadlines inside a session (idle time, the session deadline) are not scheduling
and use the event loop's monotonic clock in ``jointstat.transport``, whatever clock the node is given.
"""

from __future__ import annotations

import asyncio
import heapq
import itertools
from datetime import UTC, datetime, timedelta
from typing import Protocol

MAX_STEP_S = 30.0


def _aware(t: datetime, what: str) -> datetime:
    if t.tzinfo is None or t.utcoffset() is None:
        raise ValueError(f"{what}: times must carry a time zone")
    return t.astimezone(UTC)


class Clock(Protocol):
    """What the node needs of a clock."""

    def now(self) -> datetime:
        """The current time, aware, in UTC."""
        ...

    async def sleep_until(self, when: datetime) -> None:
        """Return once ``now() >= when`` (at once if it already is)."""
        ...


class SystemClock:
    """The wall clock (UTC)."""

    def now(self) -> datetime:
        return datetime.now(UTC)

    async def sleep_until(self, when: datetime) -> None:
        when = _aware(when, "sleep_until")
        while True:
            left = (when - self.now()).total_seconds()
            if left <= 0:
                return
            await asyncio.sleep(min(left, MAX_STEP_S))


class ManualClock:
    """A clock that moves only when told to (tests); sleepers wake when it passes their time."""

    def __init__(self, start: datetime) -> None:
        self._now = _aware(start, "start")
        self._sleepers: list[tuple[datetime, int, asyncio.Future[None]]] = []
        self._order = itertools.count()

    def now(self) -> datetime:
        return self._now

    async def sleep_until(self, when: datetime) -> None:
        when = _aware(when, "sleep_until")
        if when <= self._now:
            return
        future: asyncio.Future[None] = asyncio.get_running_loop().create_future()
        heapq.heappush(self._sleepers, (when, next(self._order), future))
        await future

    def set(self, when: datetime) -> None:
        """Move to ``when`` (never backwards) and wake every sleeper whose time has come."""
        when = _aware(when, "set")
        if when < self._now:
            raise ValueError(f"a manual clock does not run backwards ({when} is before {self._now})")
        self._now = when
        while self._sleepers and self._sleepers[0][0] <= when:
            _, _, future = heapq.heappop(self._sleepers)
            if not future.done():
                future.set_result(None)

    def advance(self, delta: timedelta) -> None:
        """Move forward by ``delta``."""
        self.set(self._now + delta)

    @property
    def sleepers(self) -> int:
        """How many sleepers are still waiting (cancelled ones included until the clock passes them)."""
        return sum(1 for _, _, f in self._sleepers if not f.done())
