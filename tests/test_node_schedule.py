"""Job timing: cron in a time zone, run windows, one catch-up run after downtime, retries with backoff; and the
job store that remembers runs. Times are given explicitly: no test reads the clock."""

from __future__ import annotations

import calendar
import stat
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from jointstat.node.schedule import DueRun, JobTiming, Planner, ScheduleError
from jointstat.node.store import SCHEMA, JobStore, StoreError


def utc(*args: int) -> datetime:
    return datetime(*args, tzinfo=UTC)


NIGHTLY = JobTiming(job="nightly", cron="30 1 * * *", timezone="Europe/Berlin", window=timedelta(hours=2))


def eu_offset(standard_hours: int, when: datetime) -> timedelta:
    """The UTC offset of a European zone at ``when`` by the EU summer-time rule (Directive 2000/84/EC, articles 2
    and 3, from memory): summer time, one hour ahead of standard time, runs from 01:00 UTC on the last Sunday of
    March to 01:00 UTC on the last Sunday of October."""

    def last_sunday(month: int) -> datetime:
        day = max(d for d in range(25, 32) if calendar.weekday(when.year, month, d) == calendar.SUNDAY)
        return datetime(when.year, month, day, 1, tzinfo=UTC)

    summer = last_sunday(3) <= when < last_sunday(10)
    return timedelta(hours=standard_hours + summer)


# Standard time of each zone the tests use, in hours east of UTC: CET = UTC+1, GMT = UTC+0 (from memory).
ZONES = {"Europe/Berlin": 1, "Europe/Paris": 1, "Europe/London": 0}


@pytest.mark.parametrize("zone", sorted(ZONES))
def test_the_zone_offsets_these_tests_rely_on_follow_the_eu_summer_time_rule(zone: str) -> None:
    # The time-zone database the schedule and the console read (zoneinfo with the tzdata package) against the rule,
    # on the dates the schedule and console tests use and around each change of 2025 and 2026.
    moments = [
        utc(2026, 12, 2, 0, 30),
        utc(2026, 7, 1, 23, 30),
        utc(2025, 3, 3, 2, 15),
        utc(2025, 3, 10, 1, 15),
    ]
    moments += [utc(2025, 7, 1, 1, 0)]
    for year, march, october in ((2025, 30, 26), (2026, 29, 25)):
        for day, month in ((march, 3), (october, 10)):
            change = utc(year, month, day, 1)
            moments += [change - timedelta(minutes=1), change, change + timedelta(hours=1)]
    for when in moments:
        assert when.astimezone(ZoneInfo(zone)).utcoffset() == eu_offset(ZONES[zone], when), (zone, when)


def test_cron_times_are_read_in_the_jobs_time_zone() -> None:
    # 01:30 in Berlin is 23:30 UTC the day before in winter (UTC+1) and 23:30 → 22:30 UTC in summer (UTC+2): the
    # EU summer-time rule, checked against the time-zone database above.
    winter = NIGHTLY.fire_times(utc(2026, 12, 1, 12), utc(2026, 12, 3, 12))
    assert winter == [utc(2026, 12, 2, 0, 30), utc(2026, 12, 3, 0, 30)]
    summer = NIGHTLY.fire_times(utc(2026, 7, 1, 12), utc(2026, 7, 2, 12))
    assert summer == [utc(2026, 7, 1, 23, 30)]


def test_a_run_is_due_once_when_its_time_passes_and_only_inside_its_window() -> None:
    planner = Planner([NIGHTLY], started_at=utc(2026, 12, 1, 12))
    assert planner.due(utc(2026, 12, 2, 0, 29)) == []
    assert planner.due(utc(2026, 12, 2, 0, 31)) == [DueRun("nightly", utc(2026, 12, 2, 0, 30))]
    assert planner.due(utc(2026, 12, 2, 0, 45)) == []  # not twice
    # A look that comes after the window closed starts nothing.
    assert planner.due(utc(2026, 12, 3, 2, 31)) == []


def test_a_run_missed_while_the_node_was_down_runs_once_at_start_up_if_its_window_is_open() -> None:
    planner = Planner([NIGHTLY], started_at=utc(2026, 12, 2, 1, 0))
    assert planner.missed(utc(2026, 12, 2, 1, 0), done=set()) == [DueRun("nightly", utc(2026, 12, 2, 0, 30))]
    done = {("nightly", utc(2026, 12, 2, 0, 30))}
    assert planner.missed(utc(2026, 12, 2, 1, 0), done=done) == []
    assert planner.missed(utc(2026, 12, 2, 3, 0), done=set()) == []  # window (2 h) closed at 02:30


def test_retries_back_off_and_stop_at_the_attempt_limit_or_the_window() -> None:
    timing = JobTiming(
        job="j", cron="0 2 * * *", window=timedelta(minutes=30), attempts=3, backoff=timedelta(minutes=4)
    )
    planner = Planner([timing], started_at=utc(2026, 12, 1))
    t0 = utc(2026, 12, 2, 2, 0)
    assert planner.retry_at("j", t0, 1, failed_at=t0 + timedelta(minutes=1)) == t0 + timedelta(minutes=5)
    assert planner.retry_at("j", t0, 2, failed_at=t0 + timedelta(minutes=6)) == t0 + timedelta(minutes=14)
    assert planner.retry_at("j", t0, 3, failed_at=t0 + timedelta(minutes=15)) is None
    assert (
        planner.retry_at("j", t0, 2, failed_at=t0 + timedelta(minutes=25)) is None
    )  # would leave the window


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"cron": "61 * * * *"}, "not a five-field cron expression"),
        ({"cron": "* * * *"}, "not a five-field cron expression"),
        ({"cron": "0 1 * * *", "timezone": "Mars/Olympus"}, "unknown time zone"),
        ({"cron": "0 1 * * *", "window": timedelta(0)}, "window must be positive"),
        ({"cron": "0 1 * * *", "attempts": 0}, "attempts must be at least 1"),
    ],
)
def test_bad_schedules_are_refused_naming_the_job(kwargs: dict, message: str) -> None:
    with pytest.raises(ScheduleError, match=f"job 'x': .*{message}"):
        JobTiming(job="x", **kwargs)


def test_times_without_a_zone_are_refused() -> None:
    with pytest.raises(ScheduleError, match="must carry a time zone"):
        NIGHTLY.fire_times(datetime(2026, 1, 1), utc(2026, 1, 2))


def test_the_store_records_runs_and_their_outcomes(tmp_path: Path) -> None:
    store = JobStore(tmp_path / "state" / "jobs.sqlite3")
    assert stat.S_IMODE((tmp_path / "state" / "jobs.sqlite3").stat().st_mode) == 0o600
    t = utc(2026, 12, 2, 0, 30)
    run = store.start("nightly", t, 1, started_at=t, session_id="s-1")
    assert store.runs()[0].status == "running"
    store.finish(run, "aborted", finished_at=t + timedelta(minutes=1), reason="peer vanished")
    again = store.start("nightly", t, 2, started_at=t + timedelta(minutes=2))
    store.finish(again, "completed", finished_at=t + timedelta(minutes=3), result_path="/r/1.json")
    history = store.runs("nightly")
    assert [(r.attempt, r.status, r.reason) for r in history] == [
        (2, "completed", None),
        (1, "aborted", "peer vanished"),
    ]
    assert store.last_success("nightly").attempt == 2  # type: ignore[union-attr]
    assert store.scheduled_done() == {("nightly", t)}
    with pytest.raises(StoreError, match="run status must be one of"):
        store.finish(run, "great", finished_at=t)


def test_the_store_records_which_manifest_party_this_node_played_in_each_run(tmp_path: Path) -> None:
    store = JobStore(tmp_path / "jobs.sqlite3")
    t = utc(2026, 12, 2, 0, 30)
    store.start("nightly", t, 1, started_at=t, role="evaluator")
    store.start("nightly", t, 2, started_at=t, role="garbler")
    store.start("nightly", t, 3, started_at=t)
    assert [(r.attempt, r.role) for r in store.runs()] == [(3, None), (2, "garbler"), (1, "evaluator")]
    with pytest.raises(StoreError, match="role must be 'garbler' or 'evaluator'"):
        store.start("nightly", t, 4, started_at=t, role="initiator")


def test_the_store_finds_the_latest_run_of_a_session_id(tmp_path: Path) -> None:
    store = JobStore(tmp_path / "jobs.sqlite3")
    t = utc(2026, 12, 2, 0, 30)
    first = store.start("nightly", t, 1, started_at=t, session_id="5e55")
    store.finish(first, "refused", finished_at=t, reason="busy: 16 sessions running")
    store.start("weekly", t, 1, started_at=t, session_id="0ther")
    again = store.start("nightly", t, 2, started_at=t, session_id="5e55")
    store.finish(again, "completed", finished_at=t, result_path="/r/2.json")
    found = store.run_of_session("5e55")
    assert found is not None and (found.id, found.status, found.result_path) == (
        again,
        "completed",
        "/r/2.json",
    )
    assert store.run_of_session("0ther").job == "weekly"  # type: ignore[union-attr]
    assert store.run_of_session("nobody") is None


def test_a_store_written_before_runs_had_a_role_gains_the_column_and_keeps_its_rows(tmp_path: Path) -> None:
    import sqlite3

    path = tmp_path / "jobs.sqlite3"
    old_schema = SCHEMA.replace(",\n    role TEXT\n", "\n")
    assert "role" not in old_schema
    with sqlite3.connect(path) as db:
        db.executescript(old_schema)
        db.execute(
            "INSERT INTO runs (job, scheduled_for, attempt, trigger, status, started_at)"
            " VALUES ('nightly', '2026-12-02T00:30:00+00:00', 1, 'schedule', 'completed', '2026-12-02T00:30:00+00:00')"
        )
    path.chmod(0o600)
    store = JobStore(path)
    t = utc(2026, 12, 3, 0, 30)
    store.start("nightly", t, 1, started_at=t, role="garbler")
    assert [(r.scheduled_for, r.status, r.role) for r in store.runs()] == [
        (t, "running", "garbler"),
        (utc(2026, 12, 2, 0, 30), "completed", None),
    ]


def test_runs_left_running_by_a_stopped_node_are_closed_as_aborted(tmp_path: Path) -> None:
    path = tmp_path / "jobs.sqlite3"
    t = utc(2026, 12, 2, 0, 30)
    JobStore(path).start("nightly", t, 1, started_at=t)
    reopened = JobStore(path)
    assert reopened.close_interrupted(t + timedelta(hours=1)) == 1
    assert reopened.runs()[0].status == "aborted"
    assert reopened.runs()[0].reason == "node stopped during the run"


def test_a_store_file_others_can_read_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "jobs.sqlite3"
    path.write_bytes(b"")
    path.chmod(0o644)
    with pytest.raises(StoreError, match="lets others read it"):
        JobStore(path)
