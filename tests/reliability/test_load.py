"""Load on one node: 16 concurrent sessions complete with correct results; one beyond the limit is refused "busy".

Specification: a node configured for ``max_sessions: 16`` accepts 16 proposals, and while all 16 sessions hold
their slots — none of them opened yet — a 17th proposal is answered at once with the ``busy`` refusal (it did not
wait for a slot), logged on both sides; the 16 sessions then run at the same time and every one completes on both
sides with the right answer; afterwards the node accepts and completes a new run. No log line holds a secret.
"""

from __future__ import annotations

import asyncio
import os
from pathlib import Path

from jointstat.circuit.model import Party
from jointstat.harness.campaign import NodeCampaign
from jointstat.harness.peer import play_initiated, propose_run
from jointstat.harness.scenario import expected_result
from jointstat.transport.driver import Limits
from jointstat.wire.jointstat.v1 import session_pb2 as pb

CONCURRENT = 16
ROOMY = Limits(deadline_s=120.0, idle_timeout_s=60.0, abort_grace_s=1.0)  # liveness bounds, not speed claims


async def test_sixteen_concurrent_sessions_complete_and_one_more_is_refused_busy_at_once(
    tmp_path: Path,
) -> None:
    async with NodeCampaign(tmp_path, limits=ROOMY, max_sessions=CONCURRENT, node_deadline_s=120) as c:

        async def propose(attempt: int) -> tuple[object, pb.RunAnswer]:
            return await propose_run(
                c.keys, c.job, c.logged, node_port=c.node_port, session_id=os.urandom(16), attempt=attempt
            )

        proposed = await asyncio.gather(*(propose(1) for _ in range(CONCURRENT)))
        assert all(answer.accepted for _, answer in proposed)
        assert c.node.state.running_sessions() == CONCURRENT

        # The 17th, while all 16 slots are held by sessions not yet opened: refused at once, not queued.
        extra, answer = await propose(1)
        assert not answer.accepted and answer.reason == pb.REFUSAL_REASON_BUSY
        assert "16 sessions" in answer.message
        assert c.node.state.running_sessions() == CONCURRENT
        assert all(t.counters.frames_received == 0 for t in c.node.state.sessions.values() if not t.ended)

        played = await asyncio.gather(
            *(
                play_initiated(
                    session,
                    c.keys,
                    c.logged,
                    c.secrets,
                    target_port=c.node_port,
                    plan=None,
                    fire=None,
                    limits=ROOMY,
                )
                for session, _ in proposed
            )
        )
        expected = expected_result()
        for (session, _), (peer, _fired) in zip(proposed, played, strict=True):
            assert peer.outputs is not None, peer.message
            decoded = c.job.compiled.decode(peer.party, peer.outputs)
            assert {k: decoded[k] for k in expected} == expected
            node = await c.node_side(
                session.session_id.hex(), Party.EVALUATOR, asyncio.get_running_loop().time()
            )
            assert node.store_status == "completed" and node.outputs == expected

        # The refused one is in both logs as refused; the node's slots are free again and a new run completes.
        busy = c.run_of(extra.session_id.hex())  # type: ignore[attr-defined]
        assert busy is not None and busy.status == "refused"
        assert busy.reason is not None and busy.reason.startswith("busy")
        assert c.node.state.running_sessions() == 0
        after = await c.run_accepted(None)
        assert after.node.outputs == expected
        findings, _ = c.scan()
    assert findings == []


def test_the_job_store_takes_writes_and_reads_from_many_threads_at_once(tmp_path: Path) -> None:
    """A regression: the node writes its store from worker threads, and two sessions may end together."""
    import threading
    from datetime import UTC, datetime

    from jointstat.node.store import JobStore

    store = JobStore(tmp_path / "jobs.sqlite3")
    now = datetime(2026, 3, 2, 1, 30, tzinfo=UTC)
    errors: list[BaseException] = []
    go = threading.Barrier(CONCURRENT)

    def many_runs(worker: int) -> None:
        try:
            go.wait()
            for k in range(25):
                run = store.start(f"job-{worker}", now, k + 1, started_at=now, session_id=f"s{worker}-{k}")
                store.runs(f"job-{worker}", limit=5)
                store.finish(run, "completed", finished_at=now)
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=many_runs, args=(w,)) for w in range(CONCURRENT)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    try:
        assert errors == []
        rows = store.runs(limit=10_000)
        assert len(rows) == CONCURRENT * 25 and {r.status for r in rows} == {"completed"}
    finally:
        store.close()
