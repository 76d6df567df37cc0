"""Two nodes in one process whose connection goes through the link emulator, cut during a session.

Specification: a session cut in the middle of its table stream is resumed by the initiating node and completes on
both nodes as one session: one session id, one job-store row each, one transcript both logs hold, and in each log
a ``link_event`` for the cut and one for the resume inside that session; both logs verify and cross-check; the
metrics count the cut and the resume. A session cut while the initiating evaluator's OT is still running cannot be
resumed: both nodes end it ``aborted`` (``connection_lost``) with no result file, and the initiator starts a fresh
session at once (a new session id, counted as a restart, not waiting for the retry backoff) that completes.
"""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any

import yaml
from jointstat.audit.verify import compare_logs, verify_log
from jointstat.harness.link import Link, LinkConfig
from jointstat.node.daemon import Node
from jointstat.node.trial import write_config

from tests.test_node_daemon import BATHS, JOB, LIBRARY, Pair, make_pair, running, until

RESUME = {"grace_seconds": 10, "reconnect_first_seconds": 0.05, "reconnect_max_seconds": 0.5}


def through_link(pair: Pair, link: Link) -> None:
    """The baths' node (the evaluator; it initiates) reaches the library's node through ``link``."""
    for name in (LIBRARY, BATHS):
        data = yaml.safe_load(pair.configs[name].read_text(encoding="utf-8"))
        data["node"]["resume"] = RESUME
        if name == BATHS:
            data["peers"][0]["address"] = f"127.0.0.1:{link.address[1]}"
        write_config(pair.configs[name], data)


def library_port(pair: Pair) -> int:
    data = yaml.safe_load(pair.configs[LIBRARY].read_text(encoding="utf-8"))
    return int(data["node"]["listen"].rsplit(":", 1)[1])


def evaluator_state(node: Node) -> str | None:
    """The state of the evaluator's running session on ``node`` (None when none runs)."""
    assert node.state is not None
    for tracker in node.state.sessions.values():
        if tracker.session is not None and not tracker.ended:
            return str(tracker.session.state)
    return None


def counted(node: Node, name: str, **labels: str) -> float:
    assert node.state is not None
    value = node.state.metrics.registry.get_sample_value(name, labels)
    return value or 0.0


def rows(pair: Pair, name: str) -> list[Any]:
    return sorted(pair.store_rows(name), key=lambda r: r.attempt)


async def test_a_session_cut_mid_stream_is_resumed_and_logged_as_one_session_on_both_nodes(
    tmp_path: Path,
) -> None:
    pair = make_pair(tmp_path, library_initiates=False, baths_initiates=True)
    async with Link(LinkConfig.from_words("20Mbit/s", "10ms"), ("127.0.0.1", library_port(pair))) as link:
        through_link(pair, link)
        async with running(pair) as nodes:
            assert nodes[BATHS].admin is not None
            started = await nodes[BATHS].admin.run_job({"job": JOB})
            sid = started["session"]
            # The tables (about 0.8 MB) take about 0.3 s on this link: cut while they are on their way.
            await until(
                lambda: evaluator_state(nodes[BATHS]) in ("awaiting input labels", "evaluating"), "the tables"
            )
            await link.cut()
            await until(
                lambda: all(r.status != "running" for n in (LIBRARY, BATHS) for r in pair.store_rows(n)),
                "both runs to end",
            )
            for name in (LIBRARY, BATHS):
                labels = {"job": JOB, "role": "evaluator" if name == BATHS else "garbler"}
                assert counted(nodes[name], "jointstat_link_cuts_total", **labels) == 1.0
                assert counted(nodes[name], "jointstat_link_resumes_total", **labels) == 1.0
    for name in (LIBRARY, BATHS):
        (row,) = rows(pair, name)
        assert (row.session_id, row.status) == (sid, "completed"), row.reason
        report = verify_log(pair.log(name))
        assert report.ok, report.problem
        (session,) = report.sessions.values()
        assert (session.outcome, session.cuts, session.resumes) == ("completed", 1, 1)
    assert compare_logs(pair.log(LIBRARY), pair.log(BATHS)).ok


async def test_a_session_cut_during_ot_ends_on_both_nodes_and_the_initiator_restarts_it_at_once(
    tmp_path: Path,
) -> None:
    pair = make_pair(tmp_path, library_initiates=False, baths_initiates=True)
    # A slow, distant link: the OT takes several round trips of 80 ms.
    async with Link(LinkConfig.from_words("4Mbit/s", "80ms"), ("127.0.0.1", library_port(pair))) as link:
        through_link(pair, link)
        async with running(pair) as nodes:
            assert nodes[BATHS].admin is not None
            await nodes[BATHS].admin.run_job({"job": JOB})
            await until(lambda: evaluator_state(nodes[BATHS]) in ("base OT", "OT extension"), "the OT")
            await link.cut()
            await until(
                lambda: (
                    [r.status for r in rows(pair, BATHS)] == ["aborted", "completed"]
                    and all(r.status != "running" for r in pair.store_rows(LIBRARY))
                ),
                "the restarted session to complete",
            )
            assert counted(nodes[BATHS], "jointstat_session_restarts_total", job=JOB) == 1.0
            assert counted(nodes[LIBRARY], "jointstat_session_restarts_total", job=JOB) == 0.0
        await asyncio.sleep(0)
    first, second = rows(pair, BATHS)
    assert first.reason is not None and first.reason.startswith("connection_lost")
    assert first.session_id != second.session_id and first.result_path is None
    library = {r.session_id: r for r in pair.store_rows(LIBRARY)}
    assert library[second.session_id].status == "completed"
    if first.session_id in library:  # the library's node had accepted the first session: it ended it too
        assert library[first.session_id].status == "aborted"
    for name in (LIBRARY, BATHS):
        report = verify_log(pair.log(name))
        assert report.ok, report.problem
    assert compare_logs(pair.log(LIBRARY), pair.log(BATHS)).ok
