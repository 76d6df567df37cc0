"""Whether this node accepts a peer's run proposal: a pure decision, like ``schedule.Planner``.

Theory of operation
-------------------
``decide(proposal, situation)`` is told everything it needs as plain values — the proposal as the peer sent it, the
name of the authenticated peer, the node's jobs, the time the proposal arrived, whether the node is stopping,
whether the session id was used before, how many sessions run and the limit, and what preparing the job has found
so far — and answers one of three things; it reads no clock, no file and no socket, so tests ask it anything.

- ``Refuse(code, message, terms)``: refuse with a reason (the wire's refusal reasons in snake case). With ``terms``
  the refusal is recorded before the answer goes out — logged (``session_started`` then ``session_aborted``) and
  stored (``refused``) as a run of ``terms.job`` at ``terms.scheduled_for``, this node playing ``terms.party``,
  with the manifest digest ``terms.digest``; without, it is only answered (nothing of it is trustworthy enough to
  record: the node is stopping, the protocol version differs, the fields are malformed, the session id was used).
- ``Prepare(step, job)``: the checks so far pass, but the next one needs work: compile the job's manifest
  (``step == "manifest"``) or read and encode this node's input (``"input"``); ask again with what was found.
- ``Accept(terms)``: run the session.

The checks, in order (the first that fails decides): the node is stopping (``shutting_down``); the protocol
version differs (``protocol_version``); a field is malformed, or the session id was used before (``malformed``);
no job of that name is configured for that peer (``job_not_configured``); both nodes name the same manifest party
(``role_mismatch``); this node initiates the job itself (``both_initiate``: with both nodes initiating, every
scheduled time would run twice); this node's clock is outside the job's window ``[T, T + window)`` for its latest
scheduled time T (``outside_window``). Then, once the manifest is compiled: it cannot be (``input_unavailable``), or
its digest differs from the proposed one (``digest_mismatch``). Then, once the input is read: it cannot be
(``input_unavailable``, with a fixed message: the operator of this node has the details, the peer does not). Last,
the node already runs ``max_sessions`` sessions (``busy``). Asked again after preparing, ``decide`` checks again from
the top with the same arrival time, so a node that began stopping meanwhile refuses as ``shutting_down``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from typing import Literal

from jointstat.circuit.model import Party
from jointstat.node.config import JOB_NAME, JobConfig
from jointstat.transport.proposals import PROTOCOL_VERSION, Proposal

TRIGGERS = ("schedule", "operator")  # what may start a run on the proposing node
SESSION_ID_BYTES = (1, 64)
USED_BEFORE = "this session id has been used before"


@dataclass(frozen=True)
class Situation:
    """What the node knows when it decides (see the module docstring)."""

    node: str  # this node's name
    peer: str  # the authenticated peer's name
    jobs: Sequence[JobConfig]
    now: datetime  # when the proposal arrived, by this node's clock
    stopping: bool = False
    session_used: bool = False  # the session id has been used (or is in use) on this node
    running: int = 0
    max_sessions: int = 4
    own_digest: bytes | None = None  # the compiled manifest's digest, once compiled
    manifest_problem: str | None = None  # why the job's manifest cannot be compiled here
    input_ready: bool = False  # this node's input is read and encoded
    input_problem: str | None = None  # why it cannot be


@dataclass(frozen=True)
class Terms:
    """What a run of the proposal is on this node, as it is recorded."""

    job: JobConfig | None  # None: this node has no such job for that peer
    party: Party  # the manifest party this node plays
    scheduled_for: datetime
    digest: bytes  # the manifest digest this node records: its own once compiled, else the proposed one


@dataclass(frozen=True)
class Refuse:
    code: str
    message: str
    terms: Terms | None = None  # None: answered only, neither logged nor stored


@dataclass(frozen=True)
class Prepare:
    step: Literal["manifest", "input"]
    job: JobConfig


@dataclass(frozen=True)
class Accept:
    terms: Terms


Decision = Refuse | Prepare | Accept


def decide(proposal: Proposal, here: Situation) -> Decision:
    """This node's answer to ``proposal`` in ``here`` (see the module docstring)."""
    if here.stopping:
        return Refuse("shutting_down", "this node is stopping; try again later")
    if proposal.protocol_version != PROTOCOL_VERSION:
        return Refuse(
            "protocol_version",
            f"this node speaks protocol version {PROTOCOL_VERSION}, not {proposal.protocol_version}",
        )
    problem = malformed(proposal)
    if problem is not None:
        return Refuse("malformed", problem)
    if here.session_used:
        return Refuse("malformed", USED_BEFORE)
    assert proposal.role is not None  # checked by malformed
    job = next((j for j in here.jobs if j.name == proposal.job and j.peer == here.peer), None)
    if job is None:
        scheduled = datetime.fromtimestamp(proposal.scheduled_for_us / 1e6, UTC)
        terms = Terms(None, proposal.role.other, scheduled, proposal.manifest_digest)
        message = f"node {here.node} has no job {proposal.job!r} with peer {here.peer}"
        return Refuse("job_not_configured", message, terms)
    timing = job.timing()
    latest = timing.latest_fire(here.now)
    terms = Terms(job, job.party, latest, proposal.manifest_digest)
    if job.party == proposal.role:
        message = (
            f"both nodes are configured as the {proposal.role.role_name} of job {job.name}; the role of one of "
            "them must be the manifest's other party"
        )
        return Refuse("role_mismatch", message, terms)
    if job.initiate:
        message = (
            f"node {here.node} initiates job {job.name} itself; exactly one of the two nodes may"
            " (set initiate: false on one of them)"
        )
        return Refuse("both_initiate", message, terms)
    if not timing.in_window(latest, here.now):
        message = (
            f"outside the run window here: the latest scheduled time {latest.isoformat()} plus "
            f"{job.schedule.window_minutes} min has passed (now {here.now.isoformat()})"
        )
        return Refuse("outside_window", message, terms)
    if here.manifest_problem is not None:
        message = f"the job's manifest cannot be used here: {here.manifest_problem}"
        return Refuse("input_unavailable", message, terms)
    if here.own_digest is None:
        return Prepare("manifest", job)
    terms = replace(terms, digest=here.own_digest)
    if here.own_digest != proposal.manifest_digest:
        message = (
            f"manifest digests differ (here {here.own_digest.hex()[:16]}…, "
            f"proposed {proposal.manifest_digest.hex()[:16]}…)"
        )
        return Refuse("digest_mismatch", message, terms)
    if here.input_problem is not None:
        message = "this node cannot read or encode its input for the job (its operator has the details)"
        return Refuse("input_unavailable", message, terms)
    if not here.input_ready:
        return Prepare("input", job)
    if here.running >= here.max_sessions:
        return Refuse("busy", f"this node already runs {here.max_sessions} sessions", terms)
    return Accept(terms)


def malformed(proposal: Proposal) -> str | None:
    """What is wrong with the proposal's fields, or None."""
    low, high = SESSION_ID_BYTES
    if not JOB_NAME.fullmatch(proposal.job):
        return "the job name is not a valid job name"
    if not low <= len(proposal.session_id) <= high:
        return f"the session id must be {low} to {high} bytes"
    if len(proposal.manifest_digest) != 32:
        return "the manifest digest must be 32 bytes (SHA-256)"
    if proposal.role is None:
        return "the proposing node's role is not given"
    if proposal.attempt < 1:
        return "the attempt number must be at least 1"
    if proposal.trigger not in TRIGGERS:
        return "the trigger must be 'schedule' or 'operator'"
    if not -(2**62) < proposal.scheduled_for_us < 2**62:
        return "the scheduled time is out of range"
    return None
