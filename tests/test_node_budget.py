"""Privacy budgets on real nodes: two nodes over mutual TLS on loopback, SQLite job stores, signed logs, a manual clock.

Specification: a job's ``privacy_budget`` (ε per rolling period) caps what its runs release on each node, on its
own. A run's ε is its manifest's (``configs/clinic-waits-noisy``: 1.5 per run). Each node reserves the ε before the
run can release anything and spends it when the result is released, recording both in its job store and its
signed session log; a run that ends without releasing anything returns it. The initiating node refuses a run its
budget cannot cover before proposing it, the accepting node refuses the proposal (``budget_exhausted``), and neither
retries. Spends free up one period after their release. A budget smaller than one run's ε is refused with its
field path; a reservation left open by a stopped node counts as spent when it starts again. ``jobs budget`` and the
console show spent, remaining and when spends free up.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from fractions import Fraction
from pathlib import Path
from typing import Any

import pytest
import yaml
from jointstat.audit.verify import verify_log
from jointstat.cli import main
from jointstat.node.clock import ManualClock
from jointstat.node.config import ConfigError, load_node_config
from jointstat.node.daemon import Node
from jointstat.node.nodeview import job_view
from jointstat.node.store import JobStore

from tests.test_node_daemon import BATHS, JOB, LIBRARY, REPO, Pair, make_pair, running, session_records, until

NOISY = REPO / "configs" / "clinic-waits-noisy"
RUN_EPSILON = Fraction(3, 2)  # 0.5 + 0.25 + 0.25 + 0.5, the manifest's noisy outputs
NOW = datetime(2026, 3, 4, 10, 0, tzinfo=UTC)  # a Wednesday: the trial job's weekly window is open


def noisy_pair(root: Path, budgets: dict[str, dict[str, Any] | None], attempts: int = 3) -> Pair:
    """The trial pair running the noisy clinic manifest, each node with the given ``privacy_budget``."""
    pair = make_pair(root, library_job={"attempts": attempts, "backoff_seconds": 0})
    for name, role in ((LIBRARY, "garbler"), (BATHS, "evaluator")):
        path = pair.configs[name]
        config = yaml.safe_load(path.read_text(encoding="utf-8"))
        job = config["jobs"][0]
        job["manifest"] = str(NOISY / "manifest.yaml")
        job["input"] = {"csv": {"path": str(NOISY / f"{role}.csv")}}
        if budgets.get(name) is not None:
            job["privacy_budget"] = budgets[name]
        path.write_text(yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
    return pair


def spends(pair: Pair, name: str) -> list[Any]:
    store = JobStore(pair.data(name) / "jobs.sqlite3")
    try:
        return store.budget_spends(JOB)
    finally:
        store.close()


def budget_records(pair: Pair, name: str, sid: str) -> list[tuple[str, str]]:
    return [
        (r["body"]["action"], r["body"]["epsilon"])
        for r in session_records(pair.log(name), sid)
        if r["kind"] == "privacy_budget"
    ]


async def run_now(nodes: dict[str, Node], clock: ManualClock) -> tuple[str, str]:
    """Run the job now on the library's node; the session id and how it ended there."""
    started = await nodes[LIBRARY].admin.run_job({"job": JOB})
    sid = started["session"]
    library = nodes[LIBRARY].state
    assert library is not None
    await until(lambda: sid in library.sessions and library.sessions[sid].ended, "the run to end")
    baths = nodes[BATHS].state if BATHS in nodes else None
    if baths is not None and sid in baths.sessions:
        await until(lambda: baths.sessions[sid].ended, "the accepting node")
    return sid, library.sessions[sid].status


async def test_a_completed_run_spends_its_epsilon_on_both_nodes_in_store_and_signed_log(
    tmp_path: Path,
) -> None:
    budget = {"epsilon": "3", "period_days": 30}
    pair = noisy_pair(tmp_path, {LIBRARY: budget, BATHS: budget})
    clock = ManualClock(NOW)
    async with running(pair, clock) as nodes:
        sid, status = await run_now(nodes, clock)
        assert status == "completed"
        report = (await nodes[LIBRARY].admin.budget({}))["budgets"][0]
    assert (report["spent"], report["remaining"], report["run_epsilon"]) == ("1.5", "1.5", "1.5")
    assert report["frees"][0]["at"] == (NOW + timedelta(days=30)).isoformat()
    for name in (LIBRARY, BATHS):
        (row,) = spends(pair, name)
        assert (row.run_id, row.epsilon, row.returned_at) == (sid, RUN_EPSILON, None)
        assert row.spent_at is not None and row.reserved_at <= row.spent_at
        assert budget_records(pair, name, sid) == [("reserved", "1.5"), ("spent", "1.5")]
        kinds = [r["kind"] for r in session_records(pair.log(name), sid)]
        assert kinds.index("privacy_budget") < kinds.index(
            "transcript"
        )  # reserved before anything is released
        assert kinds[-1] == "session_completed"
        assert verify_log(pair.log(name).read_bytes()).ok


async def test_the_initiator_refuses_a_run_its_budget_cannot_cover_without_proposing_it(
    tmp_path: Path,
) -> None:
    pair = noisy_pair(tmp_path, {LIBRARY: {"epsilon": "2"}, BATHS: {"epsilon": "10"}})
    clock = ManualClock(NOW)
    async with running(pair, clock) as nodes:
        first, status = await run_now(nodes, clock)
        assert status == "completed"
        second, status = await run_now(nodes, clock)
        assert status == "refused"
    refused = [r for r in pair.store_rows(LIBRARY) if r.session_id == second]
    assert len(refused) == 1  # not retried: waiting inside the window cannot cure it
    assert refused[0].reason.startswith("budget_exhausted: this node's privacy budget of job shared-members")
    assert f"enough frees up at {(NOW + timedelta(days=30)).isoformat()}" in refused[0].reason
    assert [r.session_id for r in pair.store_rows(BATHS)] == [first]  # never proposed to the peer
    assert [s.run_id for s in spends(pair, LIBRARY)] == [first]
    aborted = session_records(pair.log(LIBRARY), second)[-1]
    assert (aborted["kind"], aborted["body"]["reason"]) == ("session_aborted", "budget_exhausted")


async def test_the_acceptor_refuses_as_budget_exhausted_and_the_initiator_spends_nothing(
    tmp_path: Path,
) -> None:
    pair = noisy_pair(tmp_path, {LIBRARY: {"epsilon": "10"}, BATHS: {"epsilon": "2"}})
    clock = ManualClock(NOW)
    async with running(pair, clock) as nodes:
        first, _ = await run_now(nodes, clock)
        second, status = await run_now(nodes, clock)
        assert status == "refused"
        library_report = (await nodes[LIBRARY].admin.budget({"job": JOB}))["budgets"][0]
    (mine,) = [r for r in pair.store_rows(LIBRARY) if r.session_id == second]
    (theirs,) = [r for r in pair.store_rows(BATHS) if r.session_id == second]
    assert mine.reason.startswith(f"budget_exhausted: node {BATHS} refused the run: node {BATHS} refuses job")
    assert theirs.reason.startswith("budget_exhausted: this node's privacy budget: a run needs ε = 1.5")
    assert library_report["spent"] == "1.5"  # the refused run's reservation was returned
    library_spends = {s.run_id: s for s in spends(pair, LIBRARY)}
    assert library_spends[second].returned_at is not None and library_spends[second].spent_at is None
    assert budget_records(pair, LIBRARY, second) == [("reserved", "1.5"), ("returned", "1.5")]
    assert [s.run_id for s in spends(pair, BATHS)] == [first]  # the acceptor reserved nothing for it
    assert session_records(pair.log(BATHS), second)[-1]["body"]["reason"] == "budget_exhausted"
    for name in (LIBRARY, BATHS):
        assert verify_log(pair.log(name).read_bytes()).ok


async def test_a_run_aborted_before_release_spends_nothing(tmp_path: Path) -> None:
    pair = noisy_pair(tmp_path, {LIBRARY: {"epsilon": "2"}, BATHS: None}, attempts=1)
    clock = ManualClock(NOW)
    async with running(pair, clock, names=(LIBRARY,)) as nodes:  # the peer is not running
        sid, status = await run_now(nodes, clock)
        assert status == "aborted"
        report = (await nodes[LIBRARY].admin.budget({}))["budgets"][0]
    assert report["spent"] == "0" and report["remaining"] == "2"
    (row,) = spends(pair, LIBRARY)
    assert row.returned_at is not None and row.spent_at is None
    assert budget_records(pair, LIBRARY, sid) == [("reserved", "1.5"), ("returned", "1.5")]


async def test_spends_free_up_one_period_after_their_release(tmp_path: Path) -> None:
    budget = {"epsilon": "2", "period_days": 1}
    pair = noisy_pair(tmp_path, {LIBRARY: budget, BATHS: budget})
    clock = ManualClock(NOW)
    async with running(pair, clock) as nodes:
        assert (await run_now(nodes, clock))[1] == "completed"
        clock.set(NOW + timedelta(hours=23, minutes=59))
        assert (await run_now(nodes, clock))[1] == "refused"
        clock.set(NOW + timedelta(days=1, seconds=1))
        assert (await run_now(nodes, clock))[1] == "completed"
        report = (await nodes[BATHS].admin.budget({}))["budgets"][0]
    assert report["spent"] == "1.5"  # the first spend no longer counts
    assert len([s for s in spends(pair, BATHS) if s.spent_at is not None]) == 2


async def test_a_budget_smaller_than_one_runs_epsilon_is_refused_with_its_field_path(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pair = noisy_pair(tmp_path, {LIBRARY: {"epsilon": "1", "period_days": 7}, BATHS: None})
    expected = "jobs[0].privacy_budget.epsilon: the budget of 1 per 7 days is smaller than one run's ε = 1.5"
    assert main(["node", "check", "--config", str(pair.configs[LIBRARY])]) == 1
    assert f"budget_exhausted: {expected}" in capsys.readouterr().out
    node = Node(load_node_config(pair.configs[LIBRARY]), clock=ManualClock(NOW))
    with pytest.raises(ConfigError, match=r"jobs\[0\]\.privacy_budget\.epsilon: the budget of 1 per 7 days"):
        await node.start()


@pytest.mark.parametrize(
    ("budget", "message"),
    [
        ({"epsilon": "0"}, "jobs[0].privacy_budget.epsilon: must be greater than 0"),
        ({"epsilon": "-1"}, "jobs[0].privacy_budget.epsilon: must be greater than 0"),
        ({"epsilon": "lots"}, "jobs[0].privacy_budget.epsilon"),
        ({"epsilon": "3", "period_days": 0}, "jobs[0].privacy_budget.period_days"),
        ({"epsilon": "3", "period": 30}, "jobs[0].privacy_budget.period"),
    ],
)
def test_a_bad_budget_in_the_config_is_refused_with_its_field_path(
    tmp_path: Path, budget: dict[str, Any], message: str
) -> None:
    pair = noisy_pair(tmp_path, {LIBRARY: budget, BATHS: None})
    with pytest.raises(ConfigError) as info:
        load_node_config(pair.configs[LIBRARY])
    assert message in str(info.value)


def test_a_decimal_budget_is_taken_exactly() -> None:
    from jointstat.node.config import BudgetConfig

    assert BudgetConfig.model_validate({"epsilon": 0.1}).total == Fraction(1, 10)
    assert BudgetConfig.model_validate({"epsilon": "0.3"}).total * 10 == 3


async def test_a_reservation_left_open_by_a_stopped_node_counts_as_spent_at_its_next_start(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    now = datetime.now(UTC).replace(microsecond=0)  # the stopped node's budget is read at the real time
    pair = noisy_pair(tmp_path, {LIBRARY: {"epsilon": "2"}, BATHS: None})
    store = JobStore(pair.data(LIBRARY) / "jobs.sqlite3")
    store.budget_reserve(
        JOB, "ab" * 16, RUN_EPSILON, now - timedelta(hours=1)
    )  # the node died after reserving
    store.close()
    clock = ManualClock(now)
    async with running(pair, clock, names=(LIBRARY,)) as nodes:
        report = (await nodes[LIBRARY].admin.budget({}))["budgets"][0]
        assert report["spent"] == "1.5" and report["reserved"] == "0"
        assert report["frees"][0]["at"] == (now + timedelta(days=30)).isoformat()
        (listed,) = (await nodes[LIBRARY].admin.list_jobs({}))["jobs"]
        shown = job_view(listed).privacy_budget  # what the console's Jobs page shows
        assert shown is not None and (shown.left, shown.total, shown.unit) == (0.5, 2.0, "ε per 30 days")
    (row,) = spends(pair, LIBRARY)
    assert row.spent_at == now
    # the stopped node's budget, read from its job store
    assert main(["jobs", "budget", JOB, "--config", str(pair.configs[LIBRARY])]) == 0
    captured = capsys.readouterr()
    assert "is not running" in captured.err
    assert "job shared-members: ε 2 per 30 days" in captured.out
    assert "spent      1.5" in captured.out and "remaining  0.5" in captured.out
    frees = (now + timedelta(days=30)).strftime("%Y-%m-%d %H:%M:%S UTC")
    assert f"frees      ε 1.5 at {frees}" in captured.out
    assert f"a run      spends ε 1.5; the next one fits: {frees}" in captured.out
