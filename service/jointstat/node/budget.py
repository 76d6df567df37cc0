"""A job's privacy budget: at most a total ε released in any rolling period, kept in exact fractions.

Theory of operation
-------------------
Releasing a value with ε-differential privacy spends ε; k releases about the same people are together (Σ ε)-DP
(basic composition: Dwork–Roth, "The Algorithmic Foundations of Differential Privacy", 2014, theorem 3.16, number
from memory; with δ's the δ's add too). A job's budget caps the ε of the results it releases in any window of one ``period`` (for example
30 days) at ``total``. All amounts are ``fractions.Fraction``s taken from the decimals written (``jointstat.exact``),
so ten spends of 0.1 are exactly 1 and no rounding ever lets one more run through.

A run goes through the ledger in two steps, **reserve before release, confirm or cancel after**:

* ``reserve(now, ε, run)`` before the session starts. It is refused (``BudgetExhausted``, code ``budget_exhausted``)
  when ``spent(now) + ε > total``. From then on the reservation counts as spent, with no end.
* ``cancel(run)`` when the run failed or was aborted before any result was released: nothing is spent.
* ``confirm(run, now)`` once the result was released: the spend is dated ``now`` (at or after the release) and
  counts while the time is before ``now + period``; then it frees.
* If neither comes — the result was released and then the log write failed, or the node died — the reservation
  keeps counting. A released output is never forgotten, so the node records the reservation durably *before* the
  result leaves it, and an unresolved reservation found at start-up is confirmed at that time (or cancelled if the
  store shows the run ended before any release).

Why no window of one period holds more than ``total``: take the releases in a window [a, a + period) and the one of
them reserved last, at time s ≤ its release < a + period. Every other one was reserved earlier: at s it was either
still reserved (counted) or confirmed at c ≥ its release ≥ a > s − period, so still counted (s < c + period). The
check at s therefore saw all of them, plus the new ε, within ``total``. This needs only that a reservation precedes
its release and a confirmation follows it, not that the times passed in never go back.

``spent``, ``remaining``, ``can_spend`` and ``frees_at`` answer for a given time. The ledger is pure: it reads no
clock (``jointstat.node.clock`` gives the node its time) and writes no file; ``spends`` is what a store persists and
the constructor restores.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, replace
from datetime import UTC, datetime, timedelta
from fractions import Fraction

from jointstat.exact import ExactNumberError, decimal_text, positive_number

BUDGET_EXHAUSTED = "budget_exhausted"


class BudgetError(ValueError):
    """A budget or a spend that cannot be used; the message names the field."""


class BudgetExhausted(Exception):
    """A run refused because its ε does not fit in what is left of the budget (a refusal, not a mistake)."""

    code = BUDGET_EXHAUSTED

    def __init__(
        self,
        message: str,
        *,
        run_id: str,
        epsilon: Fraction,
        spent: Fraction,
        total: Fraction,
        frees_at: datetime | None,
    ) -> None:
        super().__init__(message)
        self.run_id = run_id
        self.epsilon = epsilon
        self.spent = spent
        self.total = total
        self.frees_at = frees_at


@dataclass(frozen=True)
class Spend:
    """One run's ε: reserved at ``reserved_at``; ``released_at`` once confirmed (None while only reserved)."""

    run_id: str
    epsilon: Fraction
    reserved_at: datetime
    released_at: datetime | None = None

    @property
    def confirmed(self) -> bool:
        return self.released_at is not None


def _aware(t: object, field: str) -> datetime:
    if not isinstance(t, datetime):
        raise BudgetError(f"{field}: expected a datetime, got {type(t).__name__}")
    if t.tzinfo is None or t.utcoffset() is None:
        raise BudgetError(f"{field}: times must carry a time zone")
    return t.astimezone(UTC)


def _period_text(period: timedelta) -> str:
    if period % timedelta(days=1) == timedelta(0):
        days = period // timedelta(days=1)
        return f"{days} day" if days == 1 else f"{days} days"
    return str(period)


class PrivacyBudget:
    """The ledger of one job's budget: ``total`` ε per rolling ``period``.

    ``field`` is where the budget is configured (errors about the total or the period name ``field``.epsilon and
    ``field``.period); ``run_epsilon``, if given, is checked to fit in the budget at all.
    """

    def __init__(
        self,
        total: object,
        period: timedelta,
        *,
        spends: Iterable[Spend] = (),
        run_epsilon: object | None = None,
        field: str = "budget",
    ) -> None:
        self.field = field
        try:
            self.total = positive_number(total, f"{field}.epsilon")
        except ExactNumberError as exc:
            raise BudgetError(str(exc)) from None
        if not isinstance(period, timedelta) or period <= timedelta(0):
            raise BudgetError(f"{field}.period: must be a positive duration, got {period!r}")
        self.period = period
        self._spends: dict[str, Spend] = {}
        for i, spend in enumerate(spends):
            where = f"{field}.spends[{i}]"
            if spend.run_id in self._spends:
                raise BudgetError(f"{where}.run_id: run {spend.run_id!r} appears twice")
            eps = self._epsilon(spend.epsilon, f"{where}.epsilon")
            reserved = _aware(spend.reserved_at, f"{where}.reserved_at")
            released = (
                None if spend.released_at is None else _aware(spend.released_at, f"{where}.released_at")
            )
            self._spends[spend.run_id] = Spend(spend.run_id, eps, reserved, released)
        if run_epsilon is not None:
            self.check_run_epsilon(run_epsilon)

    # -- validation ----------------------------------------------------------------------------------------------
    def _epsilon(self, value: object, field: str) -> Fraction:
        try:
            return positive_number(value, field)
        except ExactNumberError as exc:
            raise BudgetError(str(exc)) from None

    def check_run_epsilon(self, epsilon: object, field: str = "epsilon") -> Fraction:
        """A run's ε as an exact fraction, refused if not positive or if it exceeds the whole budget."""
        eps = self._epsilon(epsilon, field)
        if eps > self.total:
            raise BudgetError(
                f"{self.field}.epsilon: the budget of {decimal_text(self.total)} per "
                f"{_period_text(self.period)} is smaller than one run's ε = {decimal_text(eps)} ({field})"
            )
        return eps

    # -- questions -----------------------------------------------------------------------------------------------
    @property
    def spends(self) -> tuple[Spend, ...]:
        """Every spend the ledger holds (reserved and confirmed), oldest reservation first."""
        return tuple(sorted(self._spends.values(), key=lambda s: (s.reserved_at, s.run_id)))

    def _counts(self, spend: Spend, now: datetime) -> bool:
        return spend.released_at is None or now < spend.released_at + self.period

    def spent(self, now: datetime) -> Fraction:
        """ε counted at ``now``: every reservation not yet confirmed or cancelled, and every confirmed spend whose
        release was less than one period before ``now``."""
        at = _aware(now, "now")
        return sum((s.epsilon for s in self._spends.values() if self._counts(s, at)), Fraction(0))

    def remaining(self, now: datetime) -> Fraction:
        return self.total - self.spent(now)

    def can_spend(self, now: datetime, epsilon: object) -> bool:
        eps = self.check_run_epsilon(epsilon)
        return self.spent(now) + eps <= self.total

    def frees_at(self, now: datetime, epsilon: object) -> datetime | None:
        """The earliest time at or after ``now`` when ``epsilon`` fits, given the spends held now; None when
        unconfirmed reservations alone leave too little (the time depends on when those runs end)."""
        eps = self.check_run_epsilon(epsilon)
        at = _aware(now, "now")
        held = [s for s in self._spends.values() if self._counts(s, at)]
        spent = sum((s.epsilon for s in held), Fraction(0))
        if spent + eps <= self.total:
            return at
        expiring = sorted((s.released_at + self.period, s.epsilon) for s in held if s.released_at is not None)
        for expires, amount in expiring:
            spent -= amount
            if spent + eps <= self.total:
                return expires
        return None

    # -- changes -------------------------------------------------------------------------------------------------
    def reserve(self, now: datetime, epsilon: object, run_id: str) -> Spend:
        """Hold ``epsilon`` for run ``run_id`` before it releases anything; ``BudgetExhausted`` if it does not fit."""
        eps = self.check_run_epsilon(epsilon)
        at = _aware(now, "now")
        if not isinstance(run_id, str) or not run_id:
            raise BudgetError("run_id: expected a non-empty run name")
        if run_id in self._spends:
            raise BudgetError(f"run_id: run {run_id!r} already holds a spend of this budget")
        spent = self.spent(at)
        if spent + eps > self.total:
            frees = self.frees_at(at, eps)
            when = (
                f"enough frees at {frees.isoformat()}"
                if frees is not None
                else "runs still in progress hold the rest of it"
            )
            raise BudgetExhausted(
                f"{BUDGET_EXHAUSTED}: run {run_id!r} needs ε = {decimal_text(eps)} but "
                f"{decimal_text(spent)} of {decimal_text(self.total)} is spent in the "
                f"{_period_text(self.period)} to {at.isoformat()}; {when}",
                run_id=run_id,
                epsilon=eps,
                spent=spent,
                total=self.total,
                frees_at=frees,
            )
        spend = Spend(run_id, eps, at)
        self._spends[run_id] = spend
        return spend

    def confirm(self, run_id: str, now: datetime) -> Spend:
        """Run ``run_id`` released its result: its ε counts until one period after ``now`` (never before the
        reservation)."""
        spend = self._reserved(run_id)
        at = max(_aware(now, "now"), spend.reserved_at)
        done = replace(spend, released_at=at)
        self._spends[run_id] = done
        return done

    def cancel(self, run_id: str) -> Spend:
        """Run ``run_id`` ended without releasing anything: its reservation is returned in full."""
        spend = self._reserved(run_id)
        del self._spends[run_id]
        return spend

    def spend(self, now: datetime, epsilon: object, run_id: str) -> Spend:
        """Reserve and confirm at once (a release that is recorded at the moment it happens)."""
        self.reserve(now, epsilon, run_id)
        return self.confirm(run_id, now)

    def forget_expired(self, now: datetime) -> list[Spend]:
        """Drop confirmed spends that no longer count at ``now`` and return them (a store may archive them)."""
        at = _aware(now, "now")
        gone = [s for s in self._spends.values() if not self._counts(s, at)]
        for s in gone:
            del self._spends[s.run_id]
        return sorted(gone, key=lambda s: (s.reserved_at, s.run_id))

    def _reserved(self, run_id: str) -> Spend:
        spend = self._spends.get(run_id)
        if spend is None:
            raise BudgetError(f"run_id: run {run_id!r} holds no reservation of this budget")
        if spend.confirmed:
            raise BudgetError(f"run_id: run {run_id!r} is already confirmed as released")
        return spend
