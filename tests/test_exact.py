"""Exact numbers a person wrote: decimals become fractions without rounding, and print back as written."""

from __future__ import annotations

from decimal import Decimal
from fractions import Fraction

import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.exact import ExactNumberError, decimal_text, exact_number, positive_number


@given(st.fractions())
def test_the_text_of_a_fraction_reads_back_as_the_same_fraction(value: Fraction) -> None:
    assert Fraction(decimal_text(value)) == value


@given(st.decimals(allow_nan=False, allow_infinity=False, places=6))
def test_a_decimal_is_taken_exactly_and_printed_without_exponent(value: Decimal) -> None:
    assert exact_number(value, "x") == Fraction(value)
    assert exact_number(str(value), "x") == Fraction(value)
    text = decimal_text(Fraction(value))
    assert "e" not in text.lower() and "/" not in text and Decimal(text) == value


def test_known_values() -> None:
    assert exact_number("0.1", "x") == Fraction(
        1, 10
    )  # not 0.1000000000000000055… as a binary float would be
    assert exact_number("1e-3", "x") == Fraction(1, 1000)
    assert exact_number(" 3/8 ", "x") == Fraction(3, 8)
    assert [
        decimal_text(Fraction(n, d)) for n, d in [(1, 2), (-1, 8), (3, 1), (1, 3), (7, 40), (-5, 10**7)]
    ] == [
        "0.5",
        "-0.125",
        "3",
        "1/3",
        "0.175",
        "-0.0000005",
    ]


@pytest.mark.parametrize(
    ("value", "words"),
    [
        (0.1, "not a binary float"),
        (True, "boolean"),
        ("", "not a decimal number"),
        ("0.1.2", "not a decimal number"),
        (Decimal("NaN"), "finite"),
        (None, "got NoneType"),
    ],
)
def test_what_cannot_be_taken_exactly_is_refused_naming_the_field(value: object, words: str) -> None:
    with pytest.raises(ExactNumberError) as err:
        exact_number(value, "jobs.nightly.budget.epsilon")
    assert str(err.value).startswith("jobs.nightly.budget.epsilon: ") and words in str(err.value)


def test_positive_numbers_refuse_zero_and_below() -> None:
    assert positive_number("1e-30", "e") == Fraction(1, 10**30)
    for value in ("0", "-0.5", 0):
        with pytest.raises(ExactNumberError, match=r"^e: must be greater than 0"):
            positive_number(value, "e")
