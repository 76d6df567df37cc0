"""Whether this node accepts a peer's run proposal: a pure decision, like ``schedule.Planner``.

Theory of operation
-------------------
``decide(proposal, situation)`` is told everything it needs as plain values — the proposal as the peer sent it, the
name of the authenticated peer, the node's jobs, the time the proposal arrived, whether the node is stopping,
whether the session id was used before, how many sessions run and the limit, and what preparing the job has found
so far — and answers one of three things; it reads no clock, no file and no socket, so tests ask it anything.

- ``Refuse(code, message, terms)``: refuse with a reason (the wire's refusal reasons in snake case). With ``terms``
  the refusal is recorded before the answer goes out — logged (``session_started`` then ``session_aborted``) and
  stored (``refused``) as a run of ``terms.job`` at ``terms.scheduled_for`` (the proposal's scheduled time, so
  both nodes record the same one), this node playing ``terms.party``,
  with the manifest digest ``terms.digest``; ``message`` is what the peer's operator reads (it names this node),
  ``local_message`` what this node's own store keeps (worded from this node's side, with the details); without, it is only answered (nothing of it is trustworthy enough to
  record: the node is stopping, the protocol version differs, the fields are malformed, the session id was used).
- ``Prepare(step, job)``: the checks so far pass, but the next one needs work: compile the job's manifest
  (``step == "manifest"``) or read and encode this node's input (``"input"``); ask again with what was found.
- ``Accept(terms)``: run the session.

The checks, in order (the first that fails decides): the node is stopping (``shutting_down``); the protocol
version differs (``protocol_version``); a field is malformed, or the session id was used before (``malformed``);
no job of that name is configured for that peer (``job_not_configured``); both nodes name the same manifest party
(``role_mismatch``); this node initiates the job itself (``both_initiate``: with both nodes initiating, every
scheduled time would run twice); this node's clock is outside the job's window ``[T, T + window)`` for its latest
scheduled time T (``outside_window``, with the next opening). Then, once the manifest is compiled: it cannot be
(``input_unavailable``), or its digest differs from the proposed one (``digest_mismatch``), or the run's ε (the
compiled manifest's) does not fit in what is left of the job's privacy budget (``budget_exhausted``, with when enough
frees up). Then, once the input is
read: it cannot be (``input_unavailable``: the source cannot be opened; ``input_invalid``: the records break the
manifest; the answer says only which, the details stay with this node's operator). Last,
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
from jointstat.units import plural

TRIGGERS = (
    "schedule",
    "operator",
)  # what may start a run on the proposing node (the acceptor records peer_<trigger>)
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
    input_code: str | None = None  # input_invalid (the records break the manifest) or input_unavailable
    budget_problem: str | None = (
        None  # why the run's ε does not fit in the job's privacy budget now, if it does not
    )


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
    message: str  # the answer's words, for the peer's operator: this node is named, never "here"
    terms: Terms | None = None  # None: answered only, neither logged nor stored
    local: str | None = None  # this node's own words for its job store, where they differ

    @property
    def local_message(self) -> str:
        return self.local or self.message


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
    proposed = datetime.fromtimestamp(proposal.scheduled_for_us / 1e6, UTC)
    terms = Terms(job, job.party, proposed, proposal.manifest_digest)
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
        reopens = timing.next_fire(here.now).isoformat()
        window = (
            f"run window of job {job.name} ({job.schedule.cron} {job.schedule.timezone}, "
            f"{job.schedule.window_minutes} min) is closed at {here.now.isoformat()}; it next opens at {reopens}"
        )
        return Refuse("outside_window", f"node {here.node}'s {window}", terms, local=f"this node's {window}")
    if here.manifest_problem is not None:
        message = f"node {here.node} cannot use its manifest of job {job.name}: {here.manifest_problem}"
        local = f"this node cannot use its manifest of job {job.name}: {here.manifest_problem}"
        return Refuse("input_unavailable", message, terms, local=local)
    if here.own_digest is None:
        return Prepare("manifest", job)
    terms = replace(terms, digest=here.own_digest)
    if here.own_digest != proposal.manifest_digest:
        own, theirs = here.own_digest.hex()[:16], proposal.manifest_digest.hex()[:16]
        compare = "the two manifests differ; with both files at hand, jointstat manifest diff MINE THEIRS lists the fields"
        message = f"node {here.node}'s manifest of job {job.name} has digest {own}…, the proposal {theirs}…; {compare}"
        local = f"the peer proposed manifest digest {theirs}…, this node's manifest of job {job.name} has {own}…; {compare}"
        return Refuse("digest_mismatch", message, terms, local=local)
    if here.budget_problem is not None:
        message = f"node {here.node} refuses job {job.name}: {here.budget_problem}"
        return Refuse(
            "budget_exhausted", message, terms, local=f"this node's privacy budget: {here.budget_problem}"
        )
    if here.input_problem is not None:
        code = here.input_code or "input_unavailable"
        what = "its input breaks the manifest" if code == "input_invalid" else "it cannot read its input"
        message = f"node {here.node} cannot run job {job.name}: {what} (its operator has the details)"
        return Refuse(code, message, terms, local=f"this node's input: {here.input_problem}")
    if not here.input_ready:
        return Prepare("input", job)
    if here.running >= here.max_sessions:
        return Refuse(
            "busy",
            f"node {here.node} already runs {plural(here.max_sessions, 'session')}; try again later",
            terms,
        )
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
