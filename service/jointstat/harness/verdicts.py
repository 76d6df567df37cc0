"""Judging a fault campaign: every session's verdict, from both sides' outcomes and both verified signed logs.

Theory of operation
-------------------
A faulted session *aborted cleanly* when both sides ended without output, each with a reason a fault of its kind
explains (``NODE_REASONS``, ``PEER_REASONS``), within the bound (the node: its session deadline plus the abort grace
and an allowance for a loaded machine; the peer: its own bound plus the node's, since a killed peer's log is closed
only when it comes back), the node's job store has the attempt ``aborted``, the abort is the session's last record
in both verified logs, and the logs agree. A retry *completed* when both sides completed with the correct count and
sum (the node's result file, the peer's decoded outputs), both logs say so with the same transcript digest, and
the garbler's Δ and every label differ from the faulted attempt's (``freshness_problems``). ``hung``: a side had not
ended by its bound; ``released_wrongly``: a side released an output from a faulted session, or a wrong one from a
retry; anything else amiss makes the session ``unclean``, with its problems listed.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from jointstat.audit import compare_logs, verify_log
from jointstat.harness.faultpoint import CUT, KILL, STALL
from jointstat.harness.outcome import end_bound
from jointstat.harness.scanner import Secrets
from jointstat.harness.scenario import expected_result

if TYPE_CHECKING:
    from jointstat.harness.campaign import NodeCampaign, SessionRecord

NODE_REASONS = {
    CUT: {"connection_lost", "deadline", "peer_never_connected"},
    KILL: {"connection_lost", "deadline", "peer_never_connected"},
    STALL: {"deadline", "connection_lost", "peer_never_connected"},
}
PEER_REASONS = {
    CUT: {"connection_lost", "deadline", "not_opened"},
    KILL: {"node_restarted"},
    STALL: {"deadline", "connection_lost", "not_opened"},
}


def judge(campaign: NodeCampaign) -> list[str]:
    """Give every record its verdict and problems; returns the problems that belong to no single session."""
    node_key = campaign.keys.node_key
    peer_key = campaign.keys.signing_key.public_key()
    reports = {
        "node": verify_log(campaign.node_log, node_key),
        "peer": verify_log(campaign.peer_log, peer_key),
    }
    general = [f"{name} log does not verify: {r.problem}" for name, r in reports.items() if not r.ok]
    compared = compare_logs(campaign.node_log, campaign.peer_log, mine_key=node_key, theirs_key=peer_key)
    by_id = {r.session_id: r for r in campaign.records}
    expected = expected_result()
    for record in campaign.records:
        sid, problems = record.session_id, record.problems
        problems += [p for p in compared.problems if f"session {sid}:" in p]
        sides = {"node": record.node, "peer": record.peer}
        states = {name: reports[name].sessions.get(sid) for name in sides}
        bounds = {"node": campaign.node_bound, "peer": end_bound(campaign.limits) + campaign.node_bound}
        if record.node.hung or record.peer.hung:
            record.verdict = "hung"
            problems += [f"{n} did not end ({s.message})" for n, s in sides.items() if s.hung]
            continue
        if record.attempt == "fault":
            plan = record.plan
            assert plan is not None
            if record.node.released or record.peer.released:
                record.verdict = "released_wrongly"
                continue
            if record.fired is None:
                problems.append("the planned fault never fired")
            allowed = {"node": NODE_REASONS[plan.kind], "peer": PEER_REASONS[plan.kind]}
            for name, side in sides.items():
                state = states[name]
                if side.reason is None:
                    problems.append(f"{name} ended without an abort reason")
                elif side.reason not in allowed[name]:
                    problems.append(
                        f"{name} aborted for {side.reason!r}, which a {plan.kind} does not explain"
                    )
                if side.ended_after_s is None or side.ended_after_s > bounds[name]:
                    problems.append(f"{name} ended after {side.ended_after_s} s, beyond {bounds[name]:g} s")
                if state is None or state.outcome != "aborted":
                    problems.append(f"{name} log: {'no such session' if state is None else state.outcome}")
            if record.node.store_status != "aborted":
                problems.append(f"node job store: {record.node.store_status}, not aborted")
            record.verdict = "unclean" if problems else "aborted_cleanly"
            continue
        wrong = False
        node_out = record.node.outputs
        if node_out is None:
            problems.append(f"node did not complete ({record.node.reason}: {record.node.message[:160]})")
        elif node_out != expected:
            wrong = True
            problems.append("node released a wrong result")
        if record.peer.outputs is None:
            problems.append(f"peer did not complete ({record.peer.reason}: {record.peer.message[:160]})")
        else:
            decoded = campaign.job.compiled.decode(record.peer.party, record.peer.outputs)
            record.peer.decoded = {k: decoded.get(k) for k in expected}
            if record.peer.decoded != expected:
                wrong = True
                problems.append("peer released a wrong result")
        for name, state in states.items():
            if state is None or state.outcome != "completed":
                problems.append(f"{name} log: {'no such session' if state is None else state.outcome}")
        node_state, peer_state = states["node"], states["peer"]
        if node_state is not None and peer_state is not None and node_state.digest != peer_state.digest:
            problems.append("the two logs hold different transcript digests")
        problems += freshness_problems(campaign.secrets, by_id.get(record.retry_of or ""), record)
        record.verdict = "released_wrongly" if wrong else ("unclean" if problems else "completed")
    return general


def freshness_problems(secrets: Secrets, before: SessionRecord | None, retry: SessionRecord) -> list[str]:
    """What is not fresh in the retry: its Δ equal to the faulted attempt's, or any label shared with it."""
    problems = []
    delta = secrets.deltas.get(retry.session_id)
    if delta is None:
        problems.append("no Δ was recorded for the retry")
    if not secrets.labels.get(retry.session_id):
        problems.append("no labels were recorded for the retry")
    if before is None:
        return problems
    if delta is not None and delta == secrets.deltas.get(before.session_id):
        problems.append("the retry garbled with the faulted attempt's Δ")
    shared = secrets.labels.get(retry.session_id, set()) & secrets.labels.get(before.session_id, set())
    if shared:
        problems.append(f"the retry used {len(shared)} labels of the faulted attempt")
    return problems
