"""A job's privacy budget: exact ε per rolling period, reserve before release, confirm or cancel after; refusals
say why and when the budget frees. Times come from a ``ManualClock`` or are given explicitly: no test reads the
clock."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from decimal import Decimal
from fractions import Fraction

import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.node.budget import BUDGET_EXHAUSTED, BudgetError, BudgetExhausted, PrivacyBudget, Spend
from jointstat.node.clock import ManualClock

START = datetime(2026, 3, 1, 1, 30, tzinfo=UTC)
MONTH = timedelta(days=30)


def test_runs_spend_until_the_budget_is_used_then_are_refused_with_the_reason() -> None:
    clock = ManualClock(START)
    budget = PrivacyBudget("1", MONTH)
    for night in range(2):
        budget.spend(clock.now(), "0.5", f"run-{night}")
        clock.advance(timedelta(days=1))
    assert budget.spent(clock.now()) == 1 and budget.remaining(clock.now()) == 0
    assert not budget.can_spend(clock.now(), "0.5")
    with pytest.raises(BudgetExhausted) as refused:
        budget.reserve(clock.now(), "0.5", "run-2")
    err = refused.value
    assert err.code == BUDGET_EXHAUSTED == "budget_exhausted"
    assert (err.run_id, err.epsilon, err.spent, err.total) == ("run-2", Fraction(1, 2), 1, 1)
    assert err.frees_at == START + MONTH  # when the first night's spend leaves the window
    assert str(err).startswith(
        "budget_exhausted: run 'run-2' needs ε = 0.5 but 1 of 1 is spent in the 30 days"
    )
    assert "enough frees at 2026-03-31T01:30:00+00:00" in str(err)
    assert [s.run_id for s in budget.spends] == ["run-0", "run-1"]  # the refused run holds nothing


def test_a_spend_counts_for_exactly_one_period_after_its_release() -> None:
    budget = PrivacyBudget("0.5", MONTH)
    budget.spend(START, "0.5", "r")
    assert budget.spent(START + MONTH - timedelta(microseconds=1)) == Fraction(1, 2)
    assert budget.spent(START + MONTH) == 0
    assert budget.can_spend(START + MONTH, "0.5")


def test_ten_spends_of_a_tenth_use_a_budget_of_one_exactly() -> None:
    # As binary floats ten 0.1s add up to 0.9999999999999999: exact fractions leave no sliver for an extra run.
    budget = PrivacyBudget("1", MONTH)
    for i in range(10):
        budget.spend(START + timedelta(hours=i), "0.1", f"r{i}")
    assert budget.spent(START + timedelta(hours=10)) == 1
    assert budget.remaining(START + timedelta(hours=10)) == 0
    assert not budget.can_spend(START + timedelta(hours=10), "1e-30")


def test_a_run_that_released_nothing_spends_nothing() -> None:
    budget = PrivacyBudget("1", MONTH)
    budget.reserve(START, "0.75", "aborted")
    assert budget.spent(START) == Fraction(3, 4)  # held while the session runs
    assert not budget.can_spend(START, "0.5")
    budget.cancel("aborted")
    assert budget.spent(START) == 0 and budget.spends == ()
    budget.reserve(START, "0.75", "aborted")  # its retry may reserve again under the same name
    assert budget.spent(START) == Fraction(3, 4)


def test_a_released_run_whose_confirmation_never_comes_keeps_counting() -> None:
    # The result left the node, then the log write failed: the reservation is never confirmed nor cancelled.
    budget = PrivacyBudget("1", MONTH)
    budget.reserve(START, "0.75", "released")
    far = START + 10 * MONTH
    assert budget.spent(far) == Fraction(3, 4)
    assert budget.frees_at(far, "0.5") is None  # only the end of that run can free it
    assert budget.forget_expired(far) == []
    with pytest.raises(BudgetExhausted, match="runs still in progress hold the rest of it"):
        budget.reserve(far, "0.5", "next")
    # found at start-up, it is confirmed at that time and frees one period later
    budget.confirm("released", far)
    assert budget.frees_at(far, "0.5") == far + MONTH


def test_a_confirmed_spend_is_dated_at_its_confirmation_not_its_reservation() -> None:
    budget = PrivacyBudget("1", MONTH)
    budget.reserve(START, "1", "long")
    released = START + timedelta(hours=5)
    assert budget.confirm("long", released).released_at == released
    assert budget.spent(START + MONTH + timedelta(hours=4)) == 1
    assert budget.spent(START + MONTH + timedelta(hours=5)) == 0
    # a confirmation time before the reservation (a clock set back) is taken as the reservation time
    budget.reserve(START + 2 * MONTH, "1", "skewed")
    assert budget.confirm("skewed", START).released_at == START + 2 * MONTH


def test_frees_at_is_the_first_expiry_after_which_the_run_fits() -> None:
    budget = PrivacyBudget("1", MONTH)
    budget.spend(START, "0.25", "a")
    budget.spend(START + timedelta(days=1), "0.5", "b")
    budget.spend(START + timedelta(days=2), "0.25", "c")
    now = START + timedelta(days=3)
    assert budget.frees_at(now, "0.25") == START + MONTH  # a's 0.25 is enough
    assert budget.frees_at(now, "0.5") == START + timedelta(days=1) + MONTH  # needs a and b gone
    assert budget.frees_at(now, "1") == START + timedelta(days=2) + MONTH
    assert budget.frees_at(START + timedelta(days=40), "0.5") == START + timedelta(days=40)  # fits now


def test_a_restored_ledger_answers_as_the_one_that_wrote_the_spends() -> None:
    first = PrivacyBudget("2", MONTH)
    first.spend(START, "0.5", "a")
    first.reserve(START + timedelta(days=1), "1", "b")
    second = PrivacyBudget("2", MONTH, spends=first.spends)
    for days in (0, 1, 29, 30, 31, 90):
        at = START + timedelta(days=days)
        assert second.spent(at) == first.spent(at)
        assert second.frees_at(at, "1") == first.frees_at(at, "1")
    assert second.forget_expired(START + timedelta(days=31)) == [first.spends[0]]
    assert [s.run_id for s in second.spends] == ["b"]


def test_decimals_fractions_and_integers_are_taken_exactly() -> None:
    budget = PrivacyBudget(Decimal("1.5"), MONTH)
    budget.spend(START, Fraction(1, 3), "a")
    budget.spend(START, 1, "b")
    assert budget.remaining(START) == Fraction(1, 6)
    assert budget.check_run_epsilon("1/6") == Fraction(1, 6)


# -- the rolling guarantee, as a property ------------------------------------------------------------------------------

operation = st.tuples(
    st.sampled_from(["reserve", "confirm", "cancel"]),
    st.integers(0, 20 * 24),  # hours since the previous operation
    st.sampled_from(["0.1", "0.25", "0.3", "0.5", "1"]),
    st.integers(0, 5),  # which run
)


@given(st.lists(operation, max_size=60))
def test_no_window_of_one_period_holds_more_than_the_budget(ops: list[tuple[str, int, str, int]]) -> None:
    budget = PrivacyBudget("1", MONTH)
    now = START
    serial = 0
    open_runs: list[str] = []
    released: list[tuple[datetime, Fraction]] = []  # when each confirmed run released, as the runs saw it
    for kind, hours, eps, pick in ops:
        now += timedelta(hours=hours)
        if kind == "reserve":
            serial += 1
            allowed = budget.can_spend(now, eps)
            try:
                budget.reserve(now, eps, f"r{serial}")
                open_runs.append(f"r{serial}")
                assert allowed
            except BudgetExhausted as refused:
                assert not allowed
                assert refused.frees_at is None or refused.frees_at > now
        elif open_runs:
            run = open_runs.pop(pick % len(open_runs))
            if kind == "confirm":
                released.append((now, budget.confirm(run, now).epsilon))
            else:
                budget.cancel(run)
        assert 0 <= budget.spent(now) <= budget.total
        assert budget.spent(now) + budget.remaining(now) == budget.total
    for start, _ in released:
        window = [eps for at, eps in released if start <= at < start + MONTH]
        assert sum(window, Fraction(0)) <= budget.total


@given(
    st.lists(st.tuples(st.integers(0, 40 * 24), st.sampled_from(["0.2", "0.3", "0.5"])), max_size=12),
    st.sampled_from(["0.2", "0.5", "1"]),
)
def test_frees_at_is_exactly_when_the_run_first_fits(spends: list[tuple[int, str]], eps: str) -> None:
    budget = PrivacyBudget("1", MONTH)
    now = START
    for i, (hours, amount) in enumerate(spends):
        now += timedelta(hours=hours)
        if budget.can_spend(now, amount):
            budget.spend(now, amount, f"r{i}")
    frees = budget.frees_at(now, eps)
    assert frees is not None and frees >= now  # nothing is left unconfirmed here
    assert budget.can_spend(frees, eps)
    if frees > now:
        assert not budget.can_spend(frees - timedelta(microseconds=1), eps)


# -- bad input ---------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("total", "period", "run_epsilon", "message"),
    [
        ("0", MONTH, None, "jobs.nightly.budget.epsilon: must be greater than 0, got 0"),
        ("-1", MONTH, None, "jobs.nightly.budget.epsilon: must be greater than 0"),
        (1.0, MONTH, None, "jobs.nightly.budget.epsilon: give the number as text"),
        ("lots", MONTH, None, "jobs.nightly.budget.epsilon: 'lots' is not a decimal number"),
        ("1", timedelta(0), None, "jobs.nightly.budget.period: must be a positive duration"),
        ("1", timedelta(days=-1), None, "jobs.nightly.budget.period: must be a positive duration"),
        (
            "0.3",
            MONTH,
            "0.5",
            "jobs.nightly.budget.epsilon: the budget of 0.3 per 30 days is smaller than one run's ε = 0.5",
        ),
        ("1", MONTH, "0", "epsilon: must be greater than 0, got 0"),
    ],
)
def test_a_bad_budget_is_refused_naming_the_field(
    total: object, period: timedelta, run_epsilon: object, message: str
) -> None:
    with pytest.raises(BudgetError) as err:
        PrivacyBudget(total, period, run_epsilon=run_epsilon, field="jobs.nightly.budget")
    assert str(err.value).startswith(message)


def test_bad_spends_are_refused_naming_the_field() -> None:
    budget = PrivacyBudget("1", MONTH)
    with pytest.raises(BudgetError, match=r"^epsilon: must be greater than 0"):
        budget.reserve(START, "-0.1", "r")
    with pytest.raises(
        BudgetError, match=r"^budget.epsilon: the budget of 1 per 30 days is smaller than one run's"
    ):
        budget.can_spend(START, "1.5")
    with pytest.raises(BudgetError, match=r"^now: times must carry a time zone"):
        budget.spent(datetime(2026, 3, 1))  # a naive time
    budget.reserve(START, "0.5", "r")
    with pytest.raises(BudgetError, match=r"^run_id: run 'r' already holds a spend"):
        budget.reserve(START, "0.1", "r")
    with pytest.raises(BudgetError, match=r"^run_id: run 'nobody' holds no reservation"):
        budget.cancel("nobody")
    budget.confirm("r", START)
    with pytest.raises(BudgetError, match=r"^run_id: run 'r' is already confirmed"):
        budget.cancel("r")
    with pytest.raises(BudgetError, match=r"^budget.spends\[1\].run_id: run 'a' appears twice"):
        PrivacyBudget("1", MONTH, spends=[Spend("a", Fraction(1, 2), START)] * 2)
