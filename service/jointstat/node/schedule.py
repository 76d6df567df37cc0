"""When jobs run: cron schedules in a time zone, run windows, missed runs at start-up, retries with backoff.

Theory of operation
-------------------
A job's schedule is a cron expression (five fields: minute hour day-of-month month day-of-week, parsed by
``croniter``) interpreted in an IANA time zone, plus a *window*: a run scheduled for time T may start at any moment in
[T, T + window). Outside its window a run is not started (the peer would refuse it too).

``Planner`` is a pure object: it is told the current time and what the job store remembers, and answers which runs
are due. Nothing here reads a clock or sleeps, so tests drive it with any time they like.

- ``due(now)``: every scheduled time in (last look, now] whose window is still open, oldest first; a scheduled time
  is returned once only.
- At start-up ``missed(now, done)`` returns, per job, the latest scheduled time before ``now`` whose window is still
  open and which the store has no run for, so a run missed while the node was down happens once, not once per
  missed tick.
- ``JobTiming.next_fire(now)``: the first scheduled time after ``now`` (the scheduler sleeps until the earliest of
  them; the admin API shows it as a job's next run).
- ``retry_at(job, scheduled_for, attempt, failed_at)``: after a failed attempt k (1-based) the next attempt waits
  ``backoff · factor^(k−1)`` seconds, unless the attempts are used up or the retry would fall outside the window.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from croniter import CroniterBadCronError, croniter


class ScheduleError(ValueError):
    """A schedule that cannot be used; the message names the job and the field."""


@dataclass(frozen=True)
class JobTiming:
    """The timing part of one job's configuration."""

    job: str
    cron: str
    timezone: str = "UTC"
    window: timedelta = timedelta(hours=2)
    attempts: int = 3
    backoff: timedelta = timedelta(minutes=1)
    backoff_factor: float = 2.0

    def __post_init__(self) -> None:
        if len(self.cron.split()) != 5 or not croniter.is_valid(self.cron):
            raise ScheduleError(
                f"job {self.job!r}: schedule {self.cron!r} is not a five-field cron expression"
            )
        try:
            ZoneInfo(self.timezone)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise ScheduleError(f"job {self.job!r}: unknown time zone {self.timezone!r}") from exc
        if self.window <= timedelta(0):
            raise ScheduleError(f"job {self.job!r}: the run window must be positive")
        if self.attempts < 1:
            raise ScheduleError(f"job {self.job!r}: attempts must be at least 1")
        if self.backoff < timedelta(0) or self.backoff_factor < 1:
            raise ScheduleError(f"job {self.job!r}: backoff must be ≥ 0 and its factor ≥ 1")

    @property
    def zone(self) -> ZoneInfo:
        return ZoneInfo(self.timezone)

    def fire_times(self, after: datetime, until: datetime) -> list[datetime]:
        """Scheduled times t with after < t ≤ until (aware datetimes, in UTC)."""
        _require_aware(after, "after")
        _require_aware(until, "until")
        try:
            it = croniter(self.cron, after.astimezone(self.zone))
        except CroniterBadCronError as exc:  # pragma: no cover - validated in __post_init__
            raise ScheduleError(f"job {self.job!r}: {exc}") from exc
        times: list[datetime] = []
        while True:
            t = it.get_next(datetime)
            if t > until:
                return times
            times.append(t.astimezone(ZoneInfo("UTC")))

    def latest_fire(self, now: datetime) -> datetime:
        """The latest scheduled time at or before ``now``."""
        _require_aware(now, "now")
        it = croniter(self.cron, (now + timedelta(seconds=1)).astimezone(self.zone))
        return it.get_prev(datetime).astimezone(ZoneInfo("UTC"))

    def next_fire(self, now: datetime) -> datetime:
        """The first scheduled time strictly after ``now`` (UTC)."""
        _require_aware(now, "now")
        return croniter(self.cron, now.astimezone(self.zone)).get_next(datetime).astimezone(ZoneInfo("UTC"))

    def in_window(self, scheduled_for: datetime, now: datetime) -> bool:
        return scheduled_for <= now < scheduled_for + self.window


def _require_aware(t: datetime, what: str) -> None:
    if t.tzinfo is None:
        raise ScheduleError(f"{what}: times must carry a time zone")


@dataclass(frozen=True)
class DueRun:
    job: str
    scheduled_for: datetime
    attempt: int = 1


class Planner:
    """Decides which runs are due; holds only the time it last looked."""

    def __init__(self, jobs: list[JobTiming], started_at: datetime) -> None:
        _require_aware(started_at, "started_at")
        names = [j.job for j in jobs]
        if len(set(names)) != len(names):
            dup = next(n for n in names if names.count(n) > 1)
            raise ScheduleError(f"job {dup!r} is configured twice")
        self.jobs = {j.job: j for j in jobs}
        self._last_look = started_at

    def missed(self, now: datetime, done: set[tuple[str, datetime]]) -> list[DueRun]:
        """Runs missed while the node was down: per job, the latest scheduled time whose window is still open and
        which ``done`` (pairs of job name and scheduled time the store has a run for) lacks."""
        runs = []
        for timing in self.jobs.values():
            t = timing.latest_fire(now)
            if timing.in_window(t, now) and (timing.job, t) not in done:
                runs.append(DueRun(timing.job, t))
        return sorted(runs, key=lambda r: (r.scheduled_for, r.job))

    def due(self, now: datetime) -> list[DueRun]:
        """Scheduled times passed since the last look whose windows are open, oldest first."""
        _require_aware(now, "now")
        runs = []
        for timing in self.jobs.values():
            for t in timing.fire_times(self._last_look, now):
                if timing.in_window(t, now):
                    runs.append(DueRun(timing.job, t))
        self._last_look = max(self._last_look, now)
        return sorted(runs, key=lambda r: (r.scheduled_for, r.job))

    def retry_at(
        self, job: str, scheduled_for: datetime, attempt: int, failed_at: datetime
    ) -> datetime | None:
        """When attempt ``attempt + 1`` may start after attempt ``attempt`` failed, or None if it may not."""
        timing = self.jobs[job]
        if attempt >= timing.attempts:
            return None
        wait = timing.backoff * (timing.backoff_factor ** (attempt - 1))
        at = failed_at + wait
        return at if timing.in_window(scheduled_for, at) else None
