"""A dry run of a job on this node: everything a run would do before it contacts the peer, and nothing after.

Theory of operation
-------------------
``check_job(config, job, now)`` compiles the job's manifest (its digest, for the two operators to compare), checks
the program fits ``node.session_memory_mib``, reads the key-hashing secret when one is configured (its fingerprint,
``keys.key_secret_fingerprint``, for the two operators to compare), opens the input source and reads and encodes
this node's records against the manifest party the job's ``role`` names (CSV or SQL, exactly as a run does, through
``prepare.Preparer``), and reports the row count against the table's capacity and the state of the job's run window
at ``now``, and the run's ε against the job's privacy budget (a budget smaller than one run's ε, or one with too
little left now: ``budget_exhausted``, the job store read but not written). Nothing is sent anywhere and nothing is
written: no peer, no log, no job store.

Each problem found is one ``Finding`` with the reason code a run would end with (``input_unavailable``,
``input_invalid``, ``manifest_unusable``; ``prepare.failure_code``) and the message of the error, which names the
file, the row and the column (never a value). ``JobCheck.ok`` is true when a run started now would get as far as
proposing; a closed window is reported with its next opening but is not a problem (the job waits for it).
``JobCheck.lines()`` is what ``jointstat jobs check`` and ``jointstat node check`` print.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from zoneinfo import ZoneInfo

from jointstat.exact import decimal_text
from jointstat.node.config import JobConfig, NodeConfig
from jointstat.node.prepare import MANIFEST_UNUSABLE, Preparer, describe_failure, failure_code
from jointstat.node.spending import run_epsilon_problem


@dataclass(frozen=True)
class Finding:
    code: str  # the reason code a run would end with
    message: str


@dataclass
class JobCheck:
    """What a dry run of one job found (see the module docstring)."""

    job: str
    role: str
    peer: str
    initiate: bool
    manifest: str
    source: str
    digest: str | None = None
    rows: int | None = None
    capacity: int | None = None
    secret_fingerprint: str | None = None
    epsilon: str | None = None  # the run's ε (its manifest's noisy outputs)
    budget: str = "no privacy budget configured"
    window: str = ""
    findings: list[Finding] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.findings

    def lines(self) -> list[str]:
        starts = "this node starts it" if self.initiate else f"node {self.peer} starts it"
        out = [f"job {self.job}: this node the {self.role}, with node {self.peer} ({starts})"]
        digest = (
            f"digest {self.digest} (the peer's operator must see the same for this job)"
            if self.digest
            else "not compiled"
        )
        out.append(f"  manifest  {self.manifest}: {digest}")
        if self.rows is not None:
            out.append(f"  input     {self.source}: {self.rows} rows of a capacity of {self.capacity}")
        else:
            out.append(f"  input     {self.source}: not read")
        if self.secret_fingerprint is not None:
            out.append(
                f"  key-hashing secret fingerprint {self.secret_fingerprint} (the peer's must be the same)"
            )
        if self.epsilon is not None and self.epsilon != "0":
            out.append(f"  privacy   a run spends ε = {self.epsilon} ({self.budget})")
        out.append(f"  window    {self.window}")
        for f in self.findings:
            out.append(f"  problem   {f.code}: {f.message}")
        out.append("  ok: the job would run" if self.ok else "  the job would not run")
        return out


def zoned(t: datetime, timezone: str) -> str:
    """A time in the job's zone, with its offset and the zone's name."""
    return f"{t.astimezone(ZoneInfo(timezone)).isoformat(timespec='minutes')} {timezone}"


def window_state(job: JobConfig, now: datetime) -> str:
    timing = job.timing()
    latest = timing.latest_fire(now)
    tz = job.schedule.timezone
    if timing.in_window(latest, now):
        return f"open until {zoned(latest + timing.window, tz)}; scheduled {zoned(latest, tz)}"
    return f"closed; it next opens at {zoned(timing.next_fire(now), tz)}"


def check_job(config: NodeConfig, job: JobConfig, now: datetime) -> JobCheck:
    """A dry run of ``job`` on this node at ``now`` (blocking: it reads files and may query a database)."""
    from jointstat.circuit.inputs import encode_inputs
    from jointstat.circuit.plan import check_limits
    from jointstat.node.keys import key_secret_fingerprint, read_key_secret
    from jointstat.node.secrets import SecretFileError

    source = str(job.input.csv.path) if job.input.csv is not None else "the SQL query"
    if job.input.sql is not None:
        from jointstat.circuit.inputs import describe_query

        source = describe_query(job.input.sql.url, job.input.sql.query)
    check = JobCheck(
        job=job.name,
        role=job.party.role_name,
        peer=job.peer,
        initiate=job.initiate,
        manifest=str(job.manifest),
        source=source,
        window=window_state(job, now),
    )
    if job.privacy_budget is not None:
        days = job.privacy_budget.period_days
        check.budget = f"budget {job.privacy_budget.epsilon} per {days} day{'s' if days != 1 else ''}"
    secret = None
    if config.key_hashing_secret is not None:
        try:
            secret = read_key_secret(config.key_hashing_secret)
            check.secret_fingerprint = key_secret_fingerprint(secret)
        except SecretFileError as exc:
            check.findings.append(Finding("input_unavailable", f"key_hashing_secret: {exc}"))
    preparer = Preparer(secret)
    try:
        compiled = preparer.compiled(job)
        check.digest = compiled.digest
        check_limits(compiled, memory_limit=config.node.session_memory_bytes)
    except Exception as exc:
        check.findings.append(Finding(MANIFEST_UNUSABLE, describe_failure(exc)))
        return check
    epsilon = compiled.epsilon()
    check.epsilon = decimal_text(epsilon)
    index = next(i for i, j in enumerate(config.jobs) if j.name == job.name)
    problem = run_epsilon_problem(job, index, epsilon)
    if problem is not None:
        check.findings.append(Finding("budget_exhausted", f"{problem.path}: {problem.message}"))
    elif job.privacy_budget is not None and epsilon > 0:
        from jointstat.node.spending import Budgets
        from jointstat.node.store import JobStore, StoreError

        try:
            store = JobStore(config.node.job_store, create=False)
        except StoreError:
            store = None  # the node has not run yet: nothing spent
        if store is not None:
            try:
                reason = Budgets(config.jobs, store).problem(job, epsilon, now)
            finally:
                store.close()
            if reason is not None:
                check.findings.append(Finding("budget_exhausted", reason))
    check.capacity = compiled.inputs[job.party].capacity
    try:
        records = preparer.records(job, compiled)
        check.rows = len(records)
        encode_inputs(compiled, job.party, records)
    except Exception as exc:
        check.findings.append(Finding(failure_code(exc), describe_failure(exc)))
    return check
