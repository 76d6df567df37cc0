"""The node's privacy budgets: one ``budget.PrivacyBudget`` ledger per job that has ``privacy_budget`` in its
config, kept in the job store, and what the operator sees of them.

Theory of operation
-------------------
A run's ε is its compiled manifest's (``CompiledStatistic.epsilon()``: the sum of the ε of its noisy outputs); a
run of a job without noisy outputs spends nothing, and a job without ``privacy_budget`` is not limited. Each node
keeps its own budget for the job and enforces it on its own: the initiating node before it proposes a run, the
accepting node before it accepts one (``acceptance.decide``: ``budget_exhausted``), so a run goes ahead only when it
fits on both sides.

``Budgets`` holds the ledgers in memory, restored from the job store's ``budget_spends`` at start-up (returned
spends left out). The pipeline (``node.jobs``, through ``runs.BudgetRecorder``) follows the ledger's rule,
**reserve before release, spend or return after**:

1. ``reserve`` takes the run's ε in memory at once (so two runs at the same moment cannot both fit in what is
   left); it is then written to the store and to the session log (``privacy_budget reserved``) before the session
   can release anything;
2. when the result is released — the session completed, before the result file is written — ``settle(spent=True)``
   dates the spend (it counts for one period from then), in memory, the store and the log (``spent``);
3. when the run ended without releasing anything, ``settle(spent=False)`` returns it (``returned``). A session that
   ended in its ``output`` or ``finish`` phase may have let the peer learn its outputs, so it spends too
   (``RELEASING_PHASES``).

A budget smaller than one run's ε is a configuration problem (``run_epsilon_problem``, with its field path): ``node
check`` reports it and the node refuses to start with it.

A reservation still open when the node starts again (the node stopped or failed between reserving and settling)
is spent at start-up (``recover``): whether anything was released is not known, so the budget assumes it was.

``report`` gives what ``jointstat jobs budget`` and the console show: the total and period, what is spent at a time,
what remains, what is only reserved (runs in progress) and when each spend frees up.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from fractions import Fraction
from typing import Any

from jointstat.exact import decimal_text
from jointstat.node.budget import BudgetError, BudgetExhausted, PrivacyBudget, Spend
from jointstat.node.config import JobConfig
from jointstat.node.store import JobStore
from jointstat.problems import Problem

RELEASING_PHASES = frozenset({"output", "finish"})  # a session ended here may have released its outputs


def epsilon_text(value: Fraction) -> str:
    return decimal_text(value)


def period_text(days: int) -> str:
    return "1 day" if days == 1 else f"{days} days"


@dataclass(frozen=True)
class Held:
    """A run's hold on its job's budget, as the pipeline carries it."""

    job: str
    run_id: str
    epsilon: Fraction


class Budgets:
    """The privacy budget of each budgeted job on this node (see the module docstring)."""

    def __init__(self, jobs: Sequence[JobConfig], store: JobStore) -> None:
        self._store = store
        self._ledgers: dict[str, PrivacyBudget] = {}
        self._fields: dict[str, str] = {}
        for i, job in enumerate(jobs):
            if job.privacy_budget is None:
                continue
            where = f"jobs[{i}].privacy_budget"
            spends = [
                Spend(r.run_id, r.epsilon, r.reserved_at, r.spent_at)
                for r in store.budget_spends(job.name)
                if r.returned_at is None
            ]
            budget = job.privacy_budget
            self._ledgers[job.name] = PrivacyBudget(budget.total, budget.period, spends=spends, field=where)
            self._fields[job.name] = where

    def ledger(self, job: str) -> PrivacyBudget | None:
        return self._ledgers.get(job)

    def field(self, job: str) -> str:
        return self._fields[job]

    def problem(self, job: JobConfig, epsilon: Fraction, now: datetime) -> str | None:
        """Why a run of ``job`` spending ``epsilon`` may not start at ``now``, or None when it may."""
        ledger = self._ledgers.get(job.name)
        if ledger is None or epsilon == 0:
            return None
        try:
            ledger.check_run_epsilon(epsilon, field="the run's ε (its manifest's noisy outputs)")
        except BudgetError as exc:
            return str(exc)
        if ledger.can_spend(now, epsilon):
            return None
        return exhausted_message(ledger, epsilon, now)

    def reserve(self, job: JobConfig, run_id: str, epsilon: Fraction, now: datetime) -> Held | None:
        """Hold ``epsilon`` of the job's budget for the run (in memory; the caller records it); None when the job
        has no budget or the run spends nothing. Raises ``BudgetExhausted`` when it does not fit, ``BudgetError``
        when one run's ε is larger than the whole budget."""
        ledger = self._ledgers.get(job.name)
        if ledger is None or epsilon == 0:
            return None
        try:
            ledger.reserve(now, epsilon, run_id)
        except BudgetExhausted:
            raise BudgetExhausted(
                exhausted_message(ledger, epsilon, now),
                run_id=run_id,
                epsilon=epsilon,
                spent=ledger.spent(now),
                total=ledger.total,
                frees_at=ledger.frees_at(now, epsilon),
            ) from None
        return Held(job.name, run_id, epsilon)

    def settle(self, held: Held, *, spent: bool, now: datetime) -> None:
        """The run released its result (``spent``) or nothing (returned), in memory; the caller records it."""
        ledger = self._ledgers[held.job]
        if spent:
            ledger.confirm(held.run_id, now)
        else:
            ledger.cancel(held.run_id)

    def recover(self, now: datetime) -> list[Held]:
        """Spend, at ``now``, every reservation left open by an earlier process (store and memory); returns them."""
        settled = []
        for job, ledger in self._ledgers.items():
            for spend in ledger.spends:
                if not spend.confirmed:
                    ledger.confirm(spend.run_id, now)
                    self._store.budget_settle(job, spend.run_id, spent=True, at=now)
                    settled.append(Held(job, spend.run_id, spend.epsilon))
        return settled

    def report(
        self, job: JobConfig, now: datetime, run_epsilon: Fraction | None = None
    ) -> dict[str, Any] | None:
        """The job's budget at ``now`` as the admin API, ``jobs budget`` and the console show it (None: no budget)."""
        ledger = self._ledgers.get(job.name)
        if ledger is None:
            return None
        return budget_report(job, ledger, now, run_epsilon)


def run_epsilon_problem(job: JobConfig, index: int, epsilon: Fraction) -> Problem | None:
    """A budget smaller than one run's ε, as a config problem with its field path (a node refuses to start)."""
    budget = job.privacy_budget
    if budget is None or epsilon <= budget.total:
        return None
    return Problem(
        f"jobs[{index}].privacy_budget.epsilon",
        f"the budget of {epsilon_text(budget.total)} per {period_text(budget.period_days)} is smaller than one run's"
        f" ε = {epsilon_text(epsilon)} (the sum over the noisy outputs of {job.manifest}); no run could ever start",
    )


def exhausted_message(ledger: PrivacyBudget, epsilon: Fraction, now: datetime) -> str:
    spent = ledger.spent(now)
    frees = ledger.frees_at(now, epsilon)
    when = (
        f"enough frees up at {frees.isoformat()}"
        if frees is not None
        else "runs still in progress hold the rest of it"
    )
    return (
        f"a run needs ε = {epsilon_text(epsilon)}, but {epsilon_text(spent)} of the budget of "
        f"{epsilon_text(ledger.total)} per {period_text(ledger.period.days)} is spent or reserved; {when}"
    )


def budget_report(
    job: JobConfig, ledger: PrivacyBudget, now: datetime, run_epsilon: Fraction | None
) -> dict[str, Any]:
    spent = ledger.spent(now)
    held = [s for s in ledger.spends if s.released_at is None]
    counted = [s for s in ledger.spends if s.released_at is not None and now < s.released_at + ledger.period]
    out: dict[str, Any] = {
        "job": job.name,
        "epsilon": epsilon_text(ledger.total),
        "period_days": ledger.period.days,
        "spent": epsilon_text(spent),
        "remaining": epsilon_text(ledger.total - spent),
        "reserved": epsilon_text(sum((s.epsilon for s in held), Fraction(0))),
        "frees": [
            {
                "at": (s.released_at + ledger.period).isoformat(),
                "epsilon": epsilon_text(s.epsilon),
                "run": s.run_id,
            }
            for s in sorted(counted, key=lambda s: s.released_at or now)
            if s.released_at is not None
        ],
        "run_epsilon": None if run_epsilon is None else epsilon_text(run_epsilon),
        "next_run_fits_at": None,
    }
    if run_epsilon:
        try:
            fits = ledger.frees_at(now, run_epsilon)
        except BudgetError:
            out["next_run_fits_at"] = "never: one run's ε is larger than the whole budget"
        else:
            out["next_run_fits_at"] = None if fits is None else fits.isoformat()
    return out
