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

from tests.test_node_daemon import BATHS, DEMO, JOB, LIBRARY, make_pair, operator_run, running


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


# -- dry runs, stopped nodes, reasons (issue 13) -------------------------------------------------------------------


def broken_csv(root: Path, line: int, value: str) -> Path:
    """The demo's evaluator input with the visits of data row ``line`` replaced by ``value``."""
    rows = (DEMO / "evaluator.csv").read_text(encoding="utf-8").splitlines()
    email = rows[line].split(",")[0]
    rows[line] = f"{email},{value}"
    path = root / "evaluator-broken.csv"
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return path


def test_jobs_check_reads_the_input_and_prints_digest_rows_secret_and_window(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from jointstat.circuit.compile import compile_manifest
    from jointstat.circuit.manifest import load_manifest

    pair = make_pair(tmp_path)
    outputs = {}
    for name in (LIBRARY, BATHS):
        assert main(["jobs", "check", JOB, "--config", str(pair.configs[name])]) == 0
        outputs[name] = capsys.readouterr().out
    digest = compile_manifest(load_manifest(DEMO / "manifest.yaml")).digest
    rows = len((DEMO / "evaluator.csv").read_text(encoding="utf-8").strip().splitlines()) - 1
    baths = outputs[BATHS]
    assert f"digest {digest}" in baths and f"digest {digest}" in outputs[LIBRARY]
    assert f"{rows} rows of a capacity of 32" in baths
    assert "window    open until" in baths  # the demo job's weekly window of 10,080 minutes
    assert "ok: the job would run" in baths
    fingerprints = {
        name: next(line for line in out.splitlines() if "key-hashing secret fingerprint" in line)
        for name, out in outputs.items()
    }
    assert fingerprints[LIBRARY] == fingerprints[BATHS]  # the trial's shared secret, the same on both sides


def test_jobs_check_names_file_row_and_column_of_bad_data_and_exits_non_zero(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = broken_csv(tmp_path, 2, "many")
    pair = make_pair(tmp_path, baths_job={"csv": bad})
    assert main(["jobs", "check", JOB, "--config", str(pair.configs[BATHS])]) == 1
    out = capsys.readouterr().out
    assert f"problem   input_invalid: {bad}" in out
    assert "line 3" in out and "'visits'" in out and "not an integer" in out  # data row 2 is file line 3
    assert "many" not in out  # the value itself is never shown
    assert "the job would not run" in out
    # node check dry-runs every job the same way
    assert main(["node", "check", "--config", str(pair.configs[BATHS])]) == 1
    captured = capsys.readouterr()
    assert "input_invalid" in captured.out and "1 job would not run" in captured.err


def test_jobs_check_tells_a_missing_input_file_from_bad_data(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path, baths_job={"csv": tmp_path / "not-there.csv"})
    assert main(["jobs", "check", JOB, "--config", str(pair.configs[BATHS])]) == 1
    assert "input_unavailable: " in capsys.readouterr().out


async def test_bad_data_fails_as_input_invalid_on_the_initiator_and_is_not_retried(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rows = (DEMO / "garbler.csv").read_text(encoding="utf-8").splitlines()
    rows[3] = "   ," + rows[3].split(",")[1]  # an empty identifier
    bad = tmp_path / "garbler-broken.csv"
    bad.write_text("\n".join(rows) + "\n", encoding="utf-8")
    pair = make_pair(tmp_path, library_job={"csv": bad, "attempts": 3, "backoff_seconds": 0})
    async with running(pair):
        assert await cli("jobs", "run", JOB, "--config", str(pair.configs[LIBRARY])) == 1
        capsys.readouterr()
    (run,) = pair.store_rows(LIBRARY)  # one attempt only: retrying cannot cure bad data
    assert run.status == "failed" and run.reason is not None
    assert run.reason.startswith(f"input_invalid: {bad}, line 4, column 'email'")


async def test_the_acceptor_refuses_bad_data_as_input_invalid_and_keeps_the_details_to_itself(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = broken_csv(tmp_path, 2, "-4")
    pair = make_pair(tmp_path, baths_job={"csv": bad}, library_job={"attempts": 3, "backoff_seconds": 0})
    async with running(pair):
        assert await cli("jobs", "run", JOB, "--config", str(pair.configs[LIBRARY])) == 1
        capsys.readouterr()
    (mine,) = pair.store_rows(LIBRARY)
    (theirs,) = pair.store_rows(BATHS)
    assert (mine.status, theirs.status) == ("refused", "refused")
    assert mine.reason is not None and theirs.reason is not None
    assert mine.reason.startswith(f"input_invalid: node {BATHS} refused the run: node {BATHS} cannot run job")
    assert "line 3" not in mine.reason  # the peer is not told where this node's data is wrong
    assert theirs.reason.startswith(f"input_invalid: this node's input: {bad}, line 3, column 'visits'")
    assert mine.scheduled_for == theirs.scheduled_for  # both sides record the same scheduled time


async def test_history_and_sessions_read_a_stopped_nodes_store_and_log_and_show_takes_a_prefix(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path)
    async with running(pair):
        assert await cli("jobs", "run", JOB, "--config", str(pair.configs[LIBRARY])) == 0
        ran = capsys.readouterr().out
    # both nodes are stopped now
    assert "  matches = " in ran.split("completed;")[1]  # the values, not only the result file's path
    config = str(pair.configs[BATHS])
    assert await cli("jobs", "history", "--config", config) == 0
    captured = capsys.readouterr()
    assert "is not running: read from" in captured.err
    assert "ATTEMPT" in captured.out.splitlines()[0] and "completed" in captured.out
    assert " UTC" in captured.out and "peer_operator" in captured.out
    assert await cli("sessions", "list", "--config", config) == 0
    listing = capsys.readouterr().out
    prefix = listing.splitlines()[1].split()[0]
    assert len(prefix) == 12
    assert await cli("sessions", "show", prefix, "--config", config) == 0
    shown = capsys.readouterr().out
    assert f"session {prefix}" in shown and "completed" in shown
    for phase in ("handshake", "oblivious_transfer", "evaluation", "finish"):
        assert phase in shown  # from the session log's phase records
    assert await cli("sessions", "show", "ffffffffffff", "--config", config) == 2
    assert "no session ffffffffffff" in capsys.readouterr().err


async def test_a_running_node_lists_a_session_of_an_earlier_start_with_its_peer(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path)
    async with running(pair):
        assert await cli("jobs", "run", JOB, "--config", str(pair.configs[LIBRARY])) == 0
    capsys.readouterr()
    async with running(pair):  # started again: the session is in the job store only, no longer live
        assert await cli("sessions", "list", "--config", str(pair.configs[BATHS])) == 0
        listing = capsys.readouterr().out.splitlines()
    assert "PEER" in listing[0] and len(listing) == 2
    assert LIBRARY in listing[1].split() and "completed" in listing[1]


async def test_a_run_whose_window_is_closed_is_refused_locally_with_the_next_opening(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = make_pair(tmp_path, library_job={"cron": "0 3 1 1 *", "window_minutes": 1})
    async with running(pair):
        assert await cli("jobs", "run", JOB, "--config", str(pair.configs[LIBRARY])) == 2
        err = capsys.readouterr().err
    assert "is closed at" in err and "it next opens at" in err
    assert pair.store_rows(LIBRARY) == [] and pair.store_rows(BATHS) == []  # nothing was proposed


def test_the_progress_bar_fits_an_80_column_terminal() -> None:
    from io import StringIO

    from jointstat.commands.ops import bar_label, progress_columns, short_rate
    from rich.console import Console
    from rich.progress import Progress

    out = StringIO()
    console = Console(file=out, width=80, force_terminal=True, color_system=None)
    with Progress(*progress_columns(), console=console, transient=False, auto_refresh=False) as bar:
        task = bar.add_task(bar_label("ab" * 32, "oblivious_transfer"), total=123_456_789, rate="")
        bar.update(task, completed=61_000_000, rate=short_rate(12_345_678.9))
        bar.refresh()
    import re

    plain = re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", out.getvalue())
    line = [ln for ln in plain.replace("\r", "\n").splitlines() if "AND/s" in ln][-1]
    assert "abababababab oblivious_tr" in line and "12.3M AND/s" in line and "49%" in line
    assert len(line.rstrip()) <= 80
