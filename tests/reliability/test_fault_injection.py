"""Faults injected into sessions with a real node: the connection cut, the peer process killed, a frame held.

Specification: in every phase (hello, base OT, OT extension, tables, output labels, finish) and for every fault
kind, with the node accepting the peer's proposal or initiating the run itself, both sides end the session as
aborted within the deadline, with a reason a fault of that kind explains; neither releases an output (no result
file, no decoded bits); the abort is the session's last record in both signed logs, which verify and agree, and
the node's job store has the attempt aborted; the node then serves the retry of the job, which completes with the
right answer on both sides and a fresh Δ and fresh labels.
"""

from __future__ import annotations

import itertools

from jointstat.audit import compare_logs, verify_log
from jointstat.circuit.model import Party
from jointstat.harness.campaign import CampaignReport, SessionRecord
from jointstat.harness.faultpoint import FAULT_KINDS, KILL
from jointstat.harness.scenario import PHASES, expected_result, phase_of
from jointstat.harness.verdicts import NODE_REASONS, PEER_REASONS

from tests.reliability.conftest import CAMPAIGN_SESSIONS


def faulted(report: CampaignReport) -> list[SessionRecord]:
    return [r for r in report.records if r.attempt == "fault"]


def retries(report: CampaignReport) -> list[SessionRecord]:
    return [r for r in report.records if r.attempt == "retry"]


def test_the_campaign_meets_the_targets(campaign: CampaignReport) -> None:
    f = campaign.figures
    assert f["sessions"] == CAMPAIGN_SESSIONS >= 30
    assert (f["hung"], f["outputs_released_wrongly"], f["crashes"]) == (0, 0, 0), campaign.problems
    assert f["completed"] + f["aborted_cleanly"] == f["sessions"], campaign.problems
    assert f["completed"] == f["aborted_cleanly"] == CAMPAIGN_SESSIONS // 2


def test_every_fault_kind_is_injected_in_every_phase_with_the_node_in_both_roles(
    campaign: CampaignReport,
) -> None:
    plans = [r.plan for r in faulted(campaign)]
    assert all(p is not None for p in plans)
    covered = {(p.kind, p.phase) for p in plans if p is not None}
    assert covered == set(itertools.product(FAULT_KINDS, PHASES))
    assert {p.node_role for p in plans if p is not None} == set(Party)
    # Each fault fired at a frame of its phase.
    for r in faulted(campaign):
        assert r.plan is not None and r.fired is not None, r.session_id
        kind = r.fired.split(",")[0]
        assert phase_of(kind) == r.plan.phase, (r.plan.describe(), r.fired)


def test_both_sides_of_every_faulted_session_abort_within_the_deadline_with_a_reason(
    campaign: CampaignReport,
) -> None:
    for r in faulted(campaign):
        assert r.plan is not None
        for name, side, allowed in (
            ("node", r.node, NODE_REASONS[r.plan.kind]),
            ("peer", r.peer, PEER_REASONS[r.plan.kind]),
        ):
            assert not side.hung and side.ended_after_s is not None, (name, r.plan.describe())
            assert side.reason in allowed, (name, r.plan.describe(), side.reason, side.message)
            assert side.message, (name, r.plan.describe())
        # The node gives up by its own session deadline (or its wait for a peer that never opened the session).
        assert r.node.ended_after_s is not None and r.node.ended_after_s <= campaign.node_bound_s


def test_no_side_releases_an_output_from_a_faulted_session(campaign: CampaignReport) -> None:
    for r in faulted(campaign):
        assert r.verdict == "aborted_cleanly", (r.plan, r.problems)
        assert not r.node.released and r.node.outputs is None  # no result file for the session
        assert not r.peer.released and r.peer.outputs is None
        assert r.node.store_status == "aborted"


def test_every_abort_is_the_last_record_of_the_session_in_both_signed_logs(
    campaign: CampaignReport,
) -> None:
    node_log, peer_log = campaign.logs
    node, peer = verify_log(node_log), verify_log(peer_log)
    assert node.ok and peer.ok
    for r in faulted(campaign):
        assert node.sessions[r.session_id].outcome == "aborted"
        assert peer.sessions[r.session_id].outcome == "aborted"
    compared = compare_logs(node_log, peer_log)
    assert compared.problems == []
    assert {r.session_id for r in campaign.records} <= set(compared.matched)


def test_a_killed_peer_closes_its_open_session_when_it_comes_back(campaign: CampaignReport) -> None:
    peer = verify_log(campaign.logs[1])
    killed = [r for r in faulted(campaign) if r.plan is not None and r.plan.kind == KILL]
    assert len(killed) == len(PHASES)
    for r in killed:
        assert r.peer.killed
        assert peer.sessions[r.session_id].reason == "node_restarted"


def test_the_node_serves_the_retry_after_every_fault_with_the_right_answer(
    campaign: CampaignReport,
) -> None:
    expected = expected_result()
    assert len(retries(campaign)) == CAMPAIGN_SESSIONS // 2
    for r in retries(campaign):
        assert r.verdict == "completed", r.problems
        assert r.node.outputs == expected  # the node's result file
        assert r.peer.decoded == expected  # the peer's outputs, decoded


def test_a_retried_job_uses_a_fresh_delta_and_fresh_labels(campaign: CampaignReport) -> None:
    by_id = {r.session_id: r for r in campaign.records}
    secrets = campaign.secrets
    compared = 0
    for r in retries(campaign):
        before = by_id[r.retry_of or ""]
        assert secrets.deltas[r.session_id] != secrets.deltas.get(before.session_id)
        assert secrets.labels[r.session_id].isdisjoint(secrets.labels.get(before.session_id, set()))
        if before.session_id in secrets.deltas:
            compared += 1
    # The node's own retries (it garbles when it initiates) are among them, and most faulted attempts had a Δ.
    assert any(r.plan is not None and r.plan.node_role == Party.GARBLER for r in faulted(campaign))
    assert compared >= len(retries(campaign)) // 2
