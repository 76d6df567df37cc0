"""The accepting node's decision on a run proposal (``node.acceptance.decide``), with no network, clock or file.

Specification: a proposal is refused with the first reason that applies, in this order — the node is stopping
(``shutting_down``), another protocol version (``protocol_version``), a malformed field or a session id used
before (``malformed``), no such job for that peer (``job_not_configured``), both nodes the same manifest party
(``role_mismatch``), this node initiating the job too (``both_initiate``), outside this node's run window
(``outside_window``), a manifest that cannot be compiled (``input_unavailable``), another manifest digest
(``digest_mismatch``), an input that cannot be read (``input_unavailable``), every session slot taken (``busy``).
The first four kinds are only answered; the others are recorded as a run of the job at its latest scheduled time
(for an unknown job: at the proposed time), this node playing its configured party (for an unknown job: the
proposer's other party), with its own manifest digest once it has compiled one. Before reading anything the
decision asks for the manifest, then for the input; with both in hand and a slot free it accepts.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from jointstat.circuit.model import Party
from jointstat.node.acceptance import Accept, Prepare, Refuse, Situation, decide
from jointstat.node.config import NodeConfig, parse_node_config
from jointstat.transport.proposals import PROTOCOL_VERSION, REFUSAL_CODES, Answer, Proposal

# Invented: the Saltmarsh Gauge Network's node accepts the monthly rainfall totals the Teal Valley co-op proposes.
JOB = """
  - name: {name}
    manifest: manifest.yaml
    peer: teal-valley-weather
    role: evaluator
    initiate: {initiate}
    input: {{csv: {{path: gauges.csv}}}}
    schedule: {{cron: "0 3 1 * *", window_minutes: 120}}"""
CONFIG = (
    """
node: {name: saltmarsh-gauges, listen: "127.0.0.1:0", data_dir: data, max_sessions: 2}
tls: {certificate: tls.crt, private_key: tls.key}
signing_key: signing.key
peers:
  - {name: teal-valley-weather, address: "127.0.0.1:7300", certificate: peer.crt, signing_public_key: peer.pub}
jobs:"""
    + JOB.format(name="rainfall-totals", initiate="false")  # the node accepts it
    + JOB.format(name="gauge-count", initiate="true")  # the node initiates it itself
)
PEER = "teal-valley-weather"
SCHEDULED = datetime(2026, 4, 1, 3, 0, tzinfo=UTC)  # the jobs' cron time in April (invented)
ARRIVED = SCHEDULED + timedelta(minutes=5)
DIGEST = bytes(range(32))
OTHER_DIGEST = bytes(range(1, 33))
SESSION = bytes.fromhex("5a" * 16)


def config() -> NodeConfig:
    return parse_node_config(CONFIG, base=Path("/nodes/saltmarsh"))


def proposal(**changes: Any) -> Proposal:
    """A well-formed proposal of ``rainfall-totals`` by the garbler's node, scheduled for April's time."""
    base = Proposal(
        protocol_version=PROTOCOL_VERSION,
        job="rainfall-totals",
        manifest_digest=DIGEST,
        session_id=SESSION,
        scheduled_for_us=round(SCHEDULED.timestamp() * 1_000_000),
        role=Party.GARBLER,
        attempt=1,
        trigger="schedule",
    )
    return replace(base, **changes)


def ready(**changes: Any) -> Situation:
    """The node when everything has gone well so far: manifest compiled to the same digest, input read."""
    base = Situation(
        node="saltmarsh-gauges",
        peer=PEER,
        jobs=config().jobs,
        now=ARRIVED,
        running=0,
        max_sessions=2,
        own_digest=DIGEST,
        input_ready=True,
    )
    return replace(base, **changes)


# (reason, what differs in the proposal, what differs at the node, recorded?, a phrase the message holds)
REFUSALS: list[tuple[str, dict[str, Any], dict[str, Any], bool, str]] = [
    ("shutting_down", {}, {"stopping": True}, False, "stopping"),
    ("protocol_version", {"protocol_version": PROTOCOL_VERSION + 1}, {}, False, "protocol version"),
    ("malformed", {"job": "Rainfall Totals"}, {}, False, "job name"),
    ("malformed", {"session_id": b""}, {}, False, "session id"),
    ("malformed", {"session_id": bytes(65)}, {}, False, "session id"),
    ("malformed", {"manifest_digest": bytes(31)}, {}, False, "32 bytes"),
    ("malformed", {"role": None}, {}, False, "role"),
    ("malformed", {"attempt": 0}, {}, False, "attempt"),
    ("malformed", {"trigger": "peer"}, {}, False, "trigger"),
    ("malformed", {"scheduled_for_us": 2**62}, {}, False, "scheduled time"),
    ("malformed", {}, {"session_used": True}, False, "used before"),
    ("job_not_configured", {"job": "snow-depths"}, {}, True, "no job 'snow-depths'"),
    ("job_not_configured", {}, {"peer": "harbour-tides"}, True, "with peer harbour-tides"),
    ("role_mismatch", {"role": Party.EVALUATOR}, {}, True, "both nodes are configured as the evaluator"),
    ("both_initiate", {"job": "gauge-count"}, {}, True, "initiates job gauge-count itself"),
    ("outside_window", {}, {"now": SCHEDULED + timedelta(minutes=120)}, True, "outside the run window"),
    ("input_unavailable", {}, {"own_digest": None, "manifest_problem": "no such file"}, True, "no such file"),
    ("digest_mismatch", {"manifest_digest": OTHER_DIGEST}, {}, True, "manifest digests differ"),
    (
        "input_unavailable",
        {},
        {"input_ready": False, "input_problem": "row 3: not a number"},
        True,
        "operator",
    ),
    ("busy", {}, {"running": 2}, True, "already runs 2 sessions"),
]


@pytest.mark.parametrize(
    ("reason", "proposed", "situation", "recorded", "phrase"),
    REFUSALS,
    ids=[f"{r[0]}-{i}" for i, r in enumerate(REFUSALS)],
)
def test_each_refusal_has_its_reason_and_says_why(
    reason: str, proposed: dict[str, Any], situation: dict[str, Any], recorded: bool, phrase: str
) -> None:
    decision = decide(proposal(**proposed), ready(**situation))
    assert isinstance(decision, Refuse)
    assert decision.code == reason
    assert phrase in decision.message
    assert (decision.terms is not None) == recorded
    assert Answer.refused(decision.code, decision.message).to_wire().reason in REFUSAL_CODES


def test_the_table_covers_every_refusal_reason_on_the_wire() -> None:
    assert {reason for reason, *_ in REFUSALS} == set(REFUSAL_CODES.values())


def test_a_well_formed_proposal_inside_the_window_with_a_free_slot_is_accepted_on_the_jobs_terms() -> None:
    decision = decide(proposal(), ready(running=1))
    assert isinstance(decision, Accept)
    terms = decision.terms
    assert terms.job is not None and terms.job.name == "rainfall-totals"
    assert (terms.party, terms.scheduled_for, terms.digest) == (Party.EVALUATOR, SCHEDULED, DIGEST)


def test_the_manifest_is_asked_for_first_and_the_input_only_once_the_digests_agree() -> None:
    first = decide(proposal(), ready(own_digest=None, input_ready=False))
    assert isinstance(first, Prepare) and first.step == "manifest" and first.job.name == "rainfall-totals"
    second = decide(proposal(), ready(input_ready=False))
    assert isinstance(second, Prepare) and second.step == "input"
    mismatched = decide(proposal(manifest_digest=OTHER_DIGEST), ready(input_ready=False))
    assert isinstance(mismatched, Refuse) and mismatched.code == "digest_mismatch"  # no input is read for it


def code(decision: Refuse | Prepare | Accept) -> str:
    assert isinstance(decision, Refuse), decision
    return decision.code


def test_nothing_is_prepared_for_a_proposal_the_checks_before_preparing_refuse() -> None:
    unprepared = ready(own_digest=None, input_ready=False)
    after_preparing = {"input_unavailable", "digest_mismatch", "busy"}
    rows = [row for row in REFUSALS if row[0] not in after_preparing]
    assert len(rows) == 16
    for reason, proposed, situation, _, _ in rows:
        assert code(decide(proposal(**proposed), replace(unprepared, **situation))) == reason


def test_the_first_failing_check_decides() -> None:
    everything_wrong = proposal(
        protocol_version=9, job="Bad", role=Party.EVALUATOR, manifest_digest=OTHER_DIGEST
    )
    assert code(decide(everything_wrong, ready(stopping=True, running=2))) == "shutting_down"
    assert code(decide(everything_wrong, ready(running=2))) == "protocol_version"
    late = ready(now=SCHEDULED + timedelta(hours=3), running=2)
    assert code(decide(proposal(role=Party.EVALUATOR, manifest_digest=OTHER_DIGEST), late)) == "role_mismatch"
    assert code(decide(proposal(manifest_digest=OTHER_DIGEST), late)) == "outside_window"
    assert code(decide(proposal(manifest_digest=OTHER_DIGEST), ready(running=2))) == "digest_mismatch"
    assert (
        code(decide(proposal(), ready(input_problem="row 3: not a number", running=2))) == "input_unavailable"
    )


def test_a_node_that_began_stopping_while_it_prepared_refuses_without_recording() -> None:
    assert isinstance(decide(proposal(), ready(own_digest=None, input_ready=False)), Prepare)
    after = decide(proposal(), ready(stopping=True))
    assert isinstance(after, Refuse) and after.code == "shutting_down" and after.terms is None


def test_a_refusal_is_recorded_at_the_latest_scheduled_time_with_this_nodes_party() -> None:
    month_ago = round((SCHEDULED - timedelta(days=31)).timestamp() * 1e6)  # the proposer's time is not used
    refused = decide(proposal(scheduled_for_us=month_ago, attempt=2, role=Party.EVALUATOR), ready())
    assert isinstance(refused, Refuse) and refused.terms is not None
    assert refused.terms.job is not None and refused.terms.job.name == "rainfall-totals"
    assert (refused.terms.party, refused.terms.scheduled_for) == (Party.EVALUATOR, SCHEDULED)


def test_a_refusal_records_the_proposed_digest_until_this_node_has_compiled_its_own() -> None:
    before = decide(proposal(role=Party.EVALUATOR, manifest_digest=OTHER_DIGEST), ready(own_digest=None))
    assert isinstance(before, Refuse) and before.terms is not None and before.terms.digest == OTHER_DIGEST
    after = decide(proposal(manifest_digest=OTHER_DIGEST), ready())
    assert isinstance(after, Refuse) and after.terms is not None and after.terms.digest == DIGEST


def test_an_unknown_job_is_recorded_at_the_proposed_time_as_the_proposers_other_party() -> None:
    proposed_at = SCHEDULED + timedelta(minutes=1, microseconds=250)
    at_us = round(proposed_at.timestamp() * 1e6)
    for proposer, own in ((Party.GARBLER, Party.EVALUATOR), (Party.EVALUATOR, Party.GARBLER)):
        unknown = proposal(
            job="snow-depths", role=proposer, manifest_digest=OTHER_DIGEST, scheduled_for_us=at_us
        )
        decision = decide(unknown, ready())
        assert isinstance(decision, Refuse) and decision.terms is not None
        assert decision.terms.job is None
        assert (decision.terms.party, decision.terms.scheduled_for, decision.terms.digest) == (
            own,
            proposed_at,
            OTHER_DIGEST,
        )


def test_the_window_is_half_open_at_this_nodes_clock() -> None:
    window = timedelta(minutes=120)
    assert isinstance(decide(proposal(), ready(now=SCHEDULED)), Accept)
    assert isinstance(decide(proposal(), ready(now=SCHEDULED + window - timedelta(microseconds=1))), Accept)
    assert code(decide(proposal(), ready(now=SCHEDULED + window))) == "outside_window"


def test_a_proposal_carries_its_fields_across_the_wire_unchanged() -> None:
    for role in (Party.GARBLER, Party.EVALUATOR, None):
        sent = proposal(role=role, attempt=3, trigger="operator")
        assert Proposal.from_wire(sent.to_wire()) == sent
