"""``jointstat jobs …`` and ``jointstat sessions …``: the operator's commands, talking to a running node's admin API.

Each command reads the node config given by ``--config`` (default ``$JOINTSTAT_CONFIG``, else
``/etc/jointstat/node.yaml``, the path of the container image and the systemd unit) to find the node's admin
address, and calls the admin API there (``node.admin``). When no node answers there, ``jobs history``, ``sessions
list`` and ``sessions show`` read the stopped node's job store and session log directly (``node.offline``) and say
so on standard error. ``sessions show`` takes the 12 characters ``sessions list`` prints. Every time is shown with
its zone (UTC, as the node records it). ``jobs run`` prints this node's result values when the run completes. ``jobs run NAME`` asks the node to run an initiated job
now and follows its session; ``sessions show ID`` shows one session and, for a running session on a terminal,
follows it with a progress bar (AND gates done of total, bytes, rate, time left); when the output is not a
terminal it prints plain lines instead. ``--json`` prints the admin API's answer as it is, and nothing else (``jobs
run --json`` waits without progress lines and prints the session's last state).

Exit codes: 0 done (for ``jobs run``: the session completed); 1 the run or session did not complete; 2 a usage,
config or connection problem.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from datetime import UTC, datetime
from typing import Any

from jointstat.problems import UserError
from jointstat.units import human_bytes

DEFAULT_CONFIG = "/etc/jointstat/node.yaml"
POLL_S = 0.25
ENDED = ("completed", "aborted", "refused", "failed")


def _config(args: argparse.Namespace) -> Any:
    """The node config named by ``--config``, ``$JOINTSTAT_CONFIG`` or the default path; a bad one is a UserError."""
    from jointstat.node.config import ConfigError, load_node_config

    try:
        return load_node_config(args.config or os.environ.get("JOINTSTAT_CONFIG") or DEFAULT_CONFIG)
    except ConfigError as exc:
        raise UserError(str(exc)) from None


def _client(args: argparse.Namespace) -> Any:
    from jointstat.node.admin import AdminClient

    config = _config(args)
    return AdminClient(str(config.node.admin))


def _records(args: argparse.Namespace) -> Any:
    """The running node's admin client, or — when no node answers — the stopped node's files (``node.offline``)."""
    from jointstat.node.admin import AdminClient, AdminError
    from jointstat.node.offline import OfflineError, StoppedNode

    config = _config(args)
    client = AdminClient(str(config.node.admin), timeout=5.0)
    try:
        client.status()
        return client
    except AdminError as exc:
        client.close()
        import grpc

        if exc.code not in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED):
            raise UserError(str(exc)) from None
    try:
        stopped = StoppedNode(config)
    except OfflineError as exc:
        raise UserError(f"node {config.node.name} is not running, and {exc}") from None
    print(
        f"(node {config.node.name} is not running: read from {config.node.job_store} and {config.node.session_log})",
        file=sys.stderr,
    )
    return stopped


def _call(fn: Any, *args: Any) -> Any:
    from jointstat.node.admin import AdminError
    from jointstat.node.offline import OfflineError

    try:
        return fn(*args)
    except (AdminError, OfflineError) as exc:
        raise UserError(str(exc)) from None


def _short(text: str | None, width: int) -> str:
    if text is None:
        return "-"
    return text if len(text) <= width else text[: width - 1] + "…"


def _when(text: str | None) -> str:
    """An ISO time as YYYY-MM-DD HH:MM:SS UTC (the node reports times with their offset)."""
    if not text:
        return "-"
    try:
        t = datetime.fromisoformat(text)
    except ValueError:
        return text
    if t.tzinfo is None:
        return text.replace("T", " ")[:19] + " (zone unknown)"
    return t.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S UTC")


def _json_or_nothing(args: argparse.Namespace, answer: Any, items: list[Any], empty: str) -> bool:
    """Print ``answer`` as JSON if ``--json`` was given, or ``empty`` if there are no ``items`` to list; True if
    either was printed (the command is then done)."""
    if args.json:
        print(json.dumps(answer, indent=2))
        return True
    if not items:
        print(empty)
        return True
    return False


def _table(rows: list[list[str]], header: list[str]) -> None:
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    for row in [header, *rows]:
        print("  ".join(str(cell).ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip())


def progress_line(s: dict[str, Any]) -> str:
    """One plain line: status, phase, AND gates done of total, bytes each way, rate, time left."""
    total = s.get("and_gates_total")
    done = s.get("and_gates_done") or 0
    gates = f"{done:,}/{total:,} AND gates ({100 * done / total:.0f}%)" if total else "AND gates -"
    rate = s.get("and_gates_per_s")
    eta = s.get("eta_s")
    parts = [
        f"{s.get('status', '?')}",
        f"phase {s.get('phase') or '-'}",
        gates,
        f"sent {human_bytes(s.get('bytes_sent'))}",
        f"received {human_bytes(s.get('bytes_received'))}",
        f"{rate:,.0f} AND/s" if rate else "rate -",
        f"{eta:.1f} s left" if eta is not None else "",
    ]
    return ", ".join(p for p in parts if p)


BAR_LABEL = 26  # characters: the session's 12, a space and its phase or status (shortened to fit)


def bar_label(session_id: str, phase: str | None) -> str:
    return _short(f"{session_id[:12]} {phase or '-'}", BAR_LABEL).ljust(BAR_LABEL)


def short_rate(rate: float | None) -> str:
    """AND gates per second in at most 11 characters (``12.3M AND/s``)."""
    if not rate:
        return ""
    for factor, unit in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if rate >= factor:
            return f"{rate / factor:.1f}{unit} AND/s"
    return f"{rate:.0f} AND/s"


def progress_columns() -> tuple[Any, ...]:
    """The progress bar's columns: label, bar, per cent, rate, time left — 74 characters, so an 80-column terminal
    shows it whole (bytes and exact gate counts are in ``sessions show`` once it ends)."""
    from rich.progress import BarColumn, TaskProgressColumn, TextColumn, TimeRemainingColumn

    return (
        TextColumn("{task.description}"),
        BarColumn(bar_width=20),
        TaskProgressColumn(),
        TextColumn("{task.fields[rate]:>11}"),
        TimeRemainingColumn(),
    )


def follow(
    client: Any, session_id: str, *, tty: bool, prefix: str = "", quiet: bool = False
) -> dict[str, Any]:
    """Show a session until it ends: a rich progress bar on a terminal, plain lines otherwise, nothing if ``quiet``.

    Returns the session's last snapshot (the admin API's answer).
    """
    snap = _call(client.session, session_id)
    if quiet:
        while snap.get("status") not in ENDED:
            time.sleep(POLL_S)
            snap = _call(client.session, session_id)
        return snap
    if tty:
        from rich.progress import Progress

        columns = progress_columns()
        with Progress(*columns, transient=False) as bar:
            task = bar.add_task(session_id[:12], total=None, rate="")
            while True:
                total = snap.get("and_gates_total")
                rate = snap.get("and_gates_per_s")
                bar.update(
                    task,
                    description=bar_label(session_id, snap.get("phase") or snap.get("status")),
                    total=total,
                    completed=snap.get("and_gates_done") or 0,
                    rate=short_rate(rate),
                )
                if snap.get("status") in ENDED:
                    break
                time.sleep(POLL_S)
                snap = _call(client.session, session_id)
        return snap
    last = ""
    while True:
        line = f"{prefix}{session_id[:12]}: {progress_line(snap)}"
        key = f"{snap.get('status')}/{snap.get('phase')}"
        if key != last:
            print(line, flush=True)
            last = key
        if snap.get("status") in ENDED:
            return snap
        time.sleep(POLL_S)
        snap = _call(client.session, session_id)


def _print_session(s: dict[str, Any]) -> None:
    print(f"session {s.get('session')}")
    for key in ("job", "role", "peer", "trigger", "status", "reason", "started_at", "result_path"):
        if s.get(key) is not None:
            value = _when(s[key]) if key == "started_at" else s[key]
            print(f"  {key.replace('_', ' '):<12} {value}")
    if s.get("and_gates_total") is not None:
        print(f"  {'progress':<12} {progress_line(s)}")
    phases = s.get("phases") or []
    if phases:
        print("  phases")
        for p in phases:
            print(
                f"    {p['phase']:<20} {p['duration_us'] / 1e6:>9.3f} s  sent {human_bytes(p['bytes_sent']):>10}"
                f"  received {human_bytes(p['bytes_received']):>10}"
            )
    if not s.get("live", True):
        print("  (from the job store and the session log; the node holds no live record of this session)")


# -- handlers ----------------------------------------------------------------------------------------------------------


def _jobs_list(args: argparse.Namespace) -> int:
    with _client(args) as client:
        jobs = _call(client.jobs)
    if _json_or_nothing(args, jobs, jobs, "no jobs configured"):
        return 0
    rows = []
    for j in jobs:
        last = j.get("last_run") or {}
        rows.append(
            [
                j["name"],
                j["peer"],
                j["role"] + (" (initiates)" if j["initiate"] else ""),
                f"{j['cron']} {j['timezone']} +{j['window_minutes']}m",
                "open" if j["window_open"] else "closed",
                _when(j.get("next_run")),
                f"{last.get('status', '-')} {_when(last.get('finished_at') or last.get('started_at'))}"
                if last
                else "-",
                _when(j.get("last_success")),
            ]
        )
    _table(rows, ["JOB", "PEER", "ROLE", "SCHEDULE", "WINDOW", "NEXT RUN", "LAST RUN", "LAST SUCCESS"])
    return 0


def _jobs_run(args: argparse.Namespace) -> int:
    with _client(args) as client:
        started = _call(client.run_job, args.name)
        sid = started["session"]
        if args.json and args.detach:
            print(json.dumps(started, indent=2))
            return 0
        if not args.json:
            role = started.get("role") or "?"
            print(f"job {args.name}: run requested, this node the {role}; first session {sid}")
        if args.detach:
            return 0
        snap = follow(client, sid, tty=sys.stdout.isatty(), quiet=args.json)
    if args.json:
        print(json.dumps(snap, indent=2))
    elif snap.get("status") == "completed":
        print(f"job {args.name}: completed; this node's result is in {snap.get('result_path')}")
        for line in result_lines(snap.get("result_path")):
            print(f"  {line}")
    else:
        print(f"job {args.name}: {snap.get('status')} ({snap.get('reason') or 'no reason given'})")
        from jointstat.commands import jointstat_command

        config = f" --config {args.config}" if args.config else ""
        print(
            f"  the reasons in full, and later attempts: {jointstat_command()} jobs history {args.name}{config}"
        )
    return 0 if snap.get("status") == "completed" else 1


def result_lines(path: str | None) -> list[str]:
    """This node's result values, one line each, from its result file (what ``jobs run`` prints at the end)."""
    from jointstat.node.results import ResultFileError, read_result

    if not path:
        return []
    try:
        record = read_result(path)
    except ResultFileError as exc:
        return [f"(cannot read the result file: {exc})"]
    if record.withheld is None:
        return ["this node receives no output of this job (only the peer does)"]
    if record.withheld:
        return ["withheld: the manifest's disclosure rule held the values back (too few contributing rows)"]
    return [f"{name} = {value}" for name, value in record.outputs.items()]


def _jobs_history(args: argparse.Namespace) -> int:
    with _records(args) as client:
        runs = _call(client.history, args.name, args.limit)
    if _json_or_nothing(args, runs, runs, "no runs recorded"):
        return 0
    rows = [
        [
            str(r["id"]),
            r["job"],
            _when(r["scheduled_for"]),
            str(r["attempt"]),
            r.get("role") or "-",
            r["trigger"],
            r["status"],
            _when(r["finished_at"]),
            (r["session"] or "-")[:12],
        ]
        for r in runs
    ]
    header = ["RUN", "JOB", "SCHEDULED", "ATTEMPT", "ROLE", "TRIGGER", "STATUS", "FINISHED", "SESSION"]
    _table(rows, header)
    reasons = [(r["id"], r["reason"]) for r in runs if r.get("reason")]
    if reasons:
        print()
        for run_id, reason in reasons:
            print(f"run {run_id}: {reason}")
    return 0


def _jobs_check(args: argparse.Namespace) -> int:
    from jointstat.node.dryrun import check_job

    config = _config(args)
    try:
        job = config.job(args.name)
    except KeyError:
        known = ", ".join(j.name for j in config.jobs) or "none"
        raise UserError(f"{config.source}: no job named {args.name!r} (jobs: {known})") from None
    check = check_job(config, job, datetime.now(UTC))
    for line in check.lines():
        print(line)
    return 0 if check.ok else 1


def _jobs_budget(args: argparse.Namespace) -> int:
    with _records(args) as client:
        answer = _call(client.budgets, args.name)
    budgets = answer["budgets"]
    if _json_or_nothing(args, answer, budgets, "no job has a privacy budget on this node"):
        return 0
    print(f"privacy budgets at {_when(answer['now'])}")
    for b in budgets:
        print(f"job {b['job']}: ε {b['epsilon']} per {b['period_days']} days (rolling)")
        print(f"  spent      {b['spent']} (of which reserved by runs in progress: {b['reserved']})")
        print(f"  remaining  {b['remaining']}")
        if b.get("run_epsilon") is not None:
            fits = b.get("next_run_fits_at")
            when = "now" if fits == answer["now"] else (_when(fits) if fits and fits[0].isdigit() else fits)
            print(
                f"  a run      spends ε {b['run_epsilon']}; the next one fits: {when or 'when runs in progress end'}"
            )
        for f in b["frees"]:
            print(f"  frees      ε {f['epsilon']} at {_when(f['at'])} (run {f['run'][:12]})")
    return 0


def _sessions_list(args: argparse.Namespace) -> int:
    with _records(args) as client:
        sessions = _call(client.sessions, args.limit)
    if _json_or_nothing(args, sessions, sessions, "no sessions"):
        return 0
    rows = [
        [
            s["session"][:12],
            s["job"],
            s.get("role") or "-",
            s.get("peer") or "-",
            s["status"],
            s.get("phase") or "-",
            _when(s["started_at"]),
            _short(s.get("reason"), 50),
        ]
        for s in sessions
    ]
    _table(rows, ["SESSION", "JOB", "ROLE", "PEER", "STATUS", "PHASE", "STARTED", "REASON"])
    return 0


def _sessions_show(args: argparse.Namespace) -> int:
    with _records(args) as client:
        snap = _call(client.session, args.id)
        running = snap.get("status") not in ENDED and snap.get("live", True)
        tty = sys.stdout.isatty()
        if running and not args.json and (tty or args.follow):
            snap = follow(client, snap["session"], tty=tty)
    if args.json:
        print(json.dumps(snap, indent=2))
    else:
        _print_session(snap)
    return 0


def _config_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--config",
        metavar="FILE",
        help=f"the node's config, for its admin address (default $JOINTSTAT_CONFIG, else {DEFAULT_CONFIG})",
    )
    parser.add_argument("--json", action="store_true", help="print the admin API's answer as JSON")


def add_commands(sub: argparse._SubParsersAction) -> None:
    jobs = sub.add_parser("jobs", help="list, run and review a running node's jobs")
    which = jobs.add_subparsers(dest="what", required=True, metavar="WHAT")
    p = which.add_parser("list", help="the node's jobs: role, schedule, window, next and last runs")
    _config_option(p)
    p.set_defaults(handler=_jobs_list)
    p = which.add_parser("run", help="run an initiated job now (inside the peer's window) and follow it")
    p.add_argument("name", metavar="NAME", help="the job's name")
    p.add_argument("--detach", action="store_true", help="return once the run is requested")
    _config_option(p)
    p.set_defaults(handler=_jobs_run)
    p = which.add_parser(
        "check",
        help="dry run, without the peer: read and encode the job's input against its manifest, check the secret,"
        " print the manifest digest, rows against capacity and the window; exit 0 if the job would run",
    )
    p.add_argument("name", metavar="NAME", help="the job's name")
    p.add_argument(
        "--config",
        metavar="FILE",
        help=f"the node's config (default $JOINTSTAT_CONFIG, else {DEFAULT_CONFIG})",
    )
    p.set_defaults(handler=_jobs_check)
    p = which.add_parser(
        "budget",
        help="each job's privacy budget: ε spent and remaining in its rolling period, and when spends free up"
        " (also of a stopped node)",
    )
    p.add_argument("name", metavar="NAME", nargs="?", help="only this job")
    _config_option(p)
    p.set_defaults(handler=_jobs_budget)
    p = which.add_parser(
        "history", help="recorded runs, most recent first, with each reason in full (also of a stopped node)"
    )
    p.add_argument("name", metavar="NAME", nargs="?", help="only this job")
    p.add_argument("--limit", type=int, default=20, help="how many runs (default 20)")
    _config_option(p)
    p.set_defaults(handler=_jobs_history)

    sessions = sub.add_parser("sessions", help="list and show a running node's sessions")
    which = sessions.add_subparsers(dest="what", required=True, metavar="WHAT")
    p = which.add_parser("list", help="live and recent sessions")
    p.add_argument("--limit", type=int, default=20, help="how many sessions (default 20)")
    _config_option(p)
    p.set_defaults(handler=_sessions_list)
    p = which.add_parser("show", help="one session; follows a running one with a progress bar on a terminal")
    p.add_argument(
        "id", metavar="ID", help="the session id, or its first characters (12 as sessions list shows)"
    )
    p.add_argument(
        "--follow", action="store_true", help="follow a running session also when not on a terminal"
    )
    _config_option(p)
    p.set_defaults(handler=_sessions_show)
