"""The operator's commands against running nodes, the clock the scheduler sleeps on, and session progress.

Specification: ``jointstat jobs run NAME`` runs an initiated job now, follows it in plain lines when the output is
not a terminal and exits 0 once it completed, naming this node's result file; ``jobs list``, ``jobs history``,
``sessions list`` and ``sessions show ID`` report what the admin API knows (``--json`` as it is); a job the node
only accepts, an unknown session and an unreachable node are user errors (exit 2) with a clear message; ``node
run`` refuses a config with problems (exit 1). The manual clock wakes sleepers in time order and never runs
backwards. A session's progress shows AND gates done of total and phases whose bytes add up to its traffic.
"""

from __future__ import annotations

import asyncio
import json
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from jointstat.cli import main
from jointstat.commands.ops import progress_line
from jointstat.node.clock import ManualClock, SystemClock
from jointstat.units import human_bytes

from tests.test_node_daemon import BATHS, JOB, LIBRARY, make_pair, operator_run, running


async def cli(*argv: str) -> int:
    return await asyncio.to_thread(main, list(argv))


async def test_jobs_run_follows_the_session_and_names_the_result_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path)
    async with running(pair):
        code = await cli("jobs", "run", JOB, "--config", str(pair.configs[LIBRARY]))
        out = capsys.readouterr().out
        assert code == 0, out
        assert f"job {JOB}: run requested, this node the garbler; first session" in out
        assert "completed, phase -, 23,293/23,293 AND gates (100%)" in out
        assert f"this node's result is in {pair.data(LIBRARY) / 'results' / JOB}" in out

        assert await cli("jobs", "history", "--config", str(pair.configs[BATHS])) == 0
        history = capsys.readouterr().out
        assert "completed" in history and "peer" in history and JOB in history
        assert "ROLE" in history.splitlines()[0] and "evaluator" in history

        assert await cli("jobs", "list", "--config", str(pair.configs[LIBRARY])) == 0
        listing = capsys.readouterr().out
        assert "garbler (initiates)" in listing and "0 0 * * 1 UTC +10080m" in listing and "open" in listing

        assert await cli("sessions", "list", "--json", "--config", str(pair.configs[BATHS])) == 0
        (session,) = json.loads(capsys.readouterr().out)
        assert (session["job"], session["role"], session["status"]) == (JOB, "evaluator", "completed")

        assert await cli("sessions", "show", session["session"], "--config", str(pair.configs[BATHS])) == 0
        shown = capsys.readouterr().out
    assert f"session {session['session']}" in shown
    assert "23,293/23,293 AND gates" in shown
    for phase in ("prepare", "handshake", "oblivious_transfer", "evaluation", "output", "finish"):
        assert phase in shown


async def test_jobs_run_with_json_prints_only_the_json_document(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path)
    async with running(pair):
        code = await cli("jobs", "run", JOB, "--json", "--config", str(pair.configs[LIBRARY]))
        out = capsys.readouterr().out
    assert code == 0, out
    session = json.loads(out)  # the whole output is one JSON document: no progress lines before it
    assert (session["job"], session["status"], session["role"]) == (JOB, "completed", "garbler")
    assert session["and_gates_done"] == session["and_gates_total"] > 0


async def test_operator_mistakes_are_user_errors_with_a_clear_message(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path)
    async with running(pair):
        assert await cli("jobs", "run", JOB, "--config", str(pair.configs[BATHS])) == 2
        assert "does not initiate job 'shared-members'" in capsys.readouterr().err
        assert await cli("sessions", "show", "0123abcd", "--config", str(pair.configs[BATHS])) == 2
        assert "no session 0123abcd on node riverside-baths" in capsys.readouterr().err
        assert await cli("jobs", "history", "--limit", "0", "--config", str(pair.configs[BATHS])) == 2
        assert "'limit' must be an integer from 1 to 10000" in capsys.readouterr().err
    assert await cli("jobs", "list", "--config", str(pair.configs[LIBRARY])) == 2
    assert "no node answers on 127.0.0.1:" in capsys.readouterr().err


def test_node_run_refuses_a_config_with_problems_naming_the_field(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path)
    path = pair.configs[BATHS]
    path.write_text(path.read_text(encoding="utf-8").replace("max_sessions: 2", "max_sessions: 0"))
    assert main(["node", "run", "--config", str(path)]) == 1
    assert "node.max_sessions: must be between 1 and 64" in capsys.readouterr().err


def test_node_run_and_node_check_refuse_a_config_whose_job_has_no_role(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path)
    path = pair.configs[BATHS]
    text = path.read_text(encoding="utf-8")
    assert text.count("  role: evaluator\n") == 1
    path.write_text(text.replace("  role: evaluator\n", ""), encoding="utf-8")
    for command in ("run", "check"):
        assert main(["node", command, "--config", str(path)]) == 1
        assert f"{path}: jobs[0].role: required field is missing" in capsys.readouterr().err


def test_node_check_names_each_jobs_role_and_whether_it_initiates(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path, library_initiates=False, baths_initiates=True)
    assert main(["node", "check", "--config", str(pair.configs[BATHS])]) == 0
    assert f"1 job ({JOB} as evaluator, initiates)" in capsys.readouterr().out
    assert main(["node", "check", "--config", str(pair.configs[LIBRARY])]) == 0
    assert f"1 job ({JOB} as garbler);" in capsys.readouterr().out


async def test_progress_phases_add_up_to_the_sessions_traffic(tmp_path: Path) -> None:
    pair = make_pair(tmp_path)
    async with running(pair) as nodes:
        sid = await operator_run(nodes)
        snaps = {n: (await nodes[n].admin.show_session({"session": sid}))["session"] for n in nodes}
    for snap in snaps.values():
        wire = [p for p in snap["phases"] if p["phase"] not in ("prepare", "proposal")]
        assert sum(p["bytes_sent"] for p in wire) == snap["bytes_sent"]
        assert sum(p["bytes_received"] for p in wire) == snap["bytes_received"]
        assert snap["and_gates_done"] == snap["and_gates_total"] > 0
        assert snap["and_gates_per_s"] is not None and snap["eta_s"] is None
    assert snaps[LIBRARY]["bytes_sent"] > snaps[LIBRARY]["bytes_received"]  # the garbler sends the tables
    assert [p["phase"] for p in snaps[LIBRARY]["phases"]] == [
        "prepare",
        "proposal",
        "handshake",
        "oblivious_transfer",
        "garbling",
        "output",
        "finish",
    ]


def test_a_frame_written_after_the_session_ended_counts_in_the_phase_that_sent_it() -> None:
    from types import SimpleNamespace

    from jointstat.circuit.model import Party
    from jointstat.node.progress import SessionTracker

    ticks = iter(range(100))
    tracker = SessionTracker(
        session_id="s-1",
        job=JOB,
        role=Party.EVALUATOR,
        peer=LIBRARY,
        trigger="peer",
        started_at=datetime(2026, 3, 2, tzinfo=UTC),
        monotonic=lambda: float(next(ticks)),
    )
    # The session's own view: only its state and AND gate counts are read.
    session = SimpleNamespace(state="awaiting finish", and_gates_done=0, and_gates_total=0)
    tracker.attach(session)  # type: ignore[arg-type]
    tracker.counters.bytes_received += 120  # the peer's finish arrives: the session is done ...
    session.state = "done"
    tracker.on_progress()
    tracker.counters.bytes_sent += 107  # ... and only then is this node's own finish frame written
    tracker.on_progress()
    tracker.close_phases()  # the transport has returned
    assert [(p.name, p.bytes_sent, p.bytes_received) for p in tracker.phases] == [("finish", 107, 120)]
    assert tracker.phase is None


def test_a_progress_line_shows_gates_done_of_total_bytes_rate_and_time_left() -> None:
    line = progress_line(
        {
            "status": "running",
            "phase": "garbling",
            "and_gates_done": 250_000,
            "and_gates_total": 1_000_000,
            "bytes_sent": 8 * 1024 * 1024,
            "bytes_received": 2048,
            "and_gates_per_s": 500_000.0,
            "eta_s": 1.5,
        }
    )
    assert line == (
        "running, phase garbling, 250,000/1,000,000 AND gates (25%), sent 8.0 MiB, received 2.0 KiB, "
        "500,000 AND/s, 1.5 s left"
    )
    assert human_bytes(512) == "512 B"


# -- the clock ---------------------------------------------------------------------------------------------------


async def test_a_manual_clock_wakes_sleepers_in_time_order_when_moved() -> None:
    start = datetime(2026, 3, 2, tzinfo=UTC)
    clock = ManualClock(start)
    woke: list[str] = []

    async def sleeper(name: str, minutes: int) -> None:
        await clock.sleep_until(start + timedelta(minutes=minutes))
        woke.append(name)

    tasks = [asyncio.create_task(sleeper(n, m)) for n, m in (("late", 30), ("early", 10), ("later", 60))]
    await asyncio.sleep(0)
    assert clock.sleepers == 3
    clock.advance(timedelta(minutes=30))
    await asyncio.sleep(0)
    assert woke == ["early", "late"]
    clock.set(start + timedelta(hours=2))
    await asyncio.gather(*tasks)
    assert woke == ["early", "late", "later"]
    await clock.sleep_until(start)  # a time already passed returns at once


def test_a_manual_clock_never_runs_backwards_and_wants_time_zones() -> None:
    clock = ManualClock(datetime(2026, 3, 2, tzinfo=UTC))
    with pytest.raises(ValueError, match="does not run backwards"):
        clock.set(datetime(2026, 3, 1, tzinfo=UTC))
    with pytest.raises(ValueError, match="time zone"):
        ManualClock(datetime(2026, 3, 2))


async def test_the_system_clock_gives_aware_utc_times_and_returns_for_past_times() -> None:
    clock = SystemClock()
    now = clock.now()
    assert now.tzinfo is not None and now.utcoffset() == timedelta(0)
    await clock.sleep_until(now - timedelta(seconds=1))


def test_node_run_takes_the_config_option_the_image_and_the_unit_pass() -> None:
    from jointstat.cli import build_parser

    args = build_parser().parse_args(["node", "run", "--config", "/etc/jointstat/node.yaml"])
    assert args.config == "/etc/jointstat/node.yaml" and args.handler.__module__ == "jointstat.commands.node"
