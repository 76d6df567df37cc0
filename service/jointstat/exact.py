"""Exact numbers a person wrote (a privacy parameter ε, a budget): decimals kept as fractions, never as floats.

Theory of operation: a privacy parameter is a policy figure, and sums of them are compared against a budget, so
"0.1" must stay one tenth — as a binary float it is 0.1000000000000000055…, and ten of them do not add up to 1.
Text ("0.5", "1e-3", "3/8"), integers, ``decimal.Decimal`` and ``fractions.Fraction`` are converted exactly with the
standard library's ``fractions.Fraction``; binary floats are refused, because the decimal that was written is no
longer known once a float holds it. Errors name the field they are about.
"""

from __future__ import annotations

from decimal import Decimal
from fractions import Fraction


class ExactNumberError(ValueError):
    """A number that cannot be taken exactly; the message names the field."""


ExactInput = Fraction | Decimal | int | str


def exact_number(value: object, field: str) -> Fraction:
    """``value`` as an exact fraction, or ``ExactNumberError`` naming ``field``."""
    if isinstance(value, bool):
        raise ExactNumberError(f"{field}: expected a number, got a boolean")
    if isinstance(value, float):
        raise ExactNumberError(
            f"{field}: give the number as text or a Decimal, not a binary float "
            "(a float no longer holds the decimal that was written)"
        )
    if isinstance(value, Fraction | int):
        return Fraction(value)
    if isinstance(value, Decimal):
        if not value.is_finite():
            raise ExactNumberError(f"{field}: expected a finite number, got {value}")
        return Fraction(value)
    if isinstance(value, str):
        text = value.strip()
        try:
            return Fraction(text)
        except (ValueError, ZeroDivisionError):
            raise ExactNumberError(
                f"{field}: {value!r} is not a decimal number (write it like 0.5 or 1e-3)"
            ) from None
    raise ExactNumberError(f"{field}: expected a decimal number, got {type(value).__name__}")


def positive_number(value: object, field: str) -> Fraction:
    """``exact_number`` that must be greater than zero."""
    number = exact_number(value, field)
    if number <= 0:
        raise ExactNumberError(f"{field}: must be greater than 0, got {decimal_text(number)}")
    return number


def decimal_text(value: Fraction) -> str:
    """The fraction as a terminating decimal when it has one (0.5, 0.125, 3), else as p/q (1/3)."""
    den = value.denominator
    twos = (den & -den).bit_length() - 1
    rest = den >> twos
    fives = 0
    while rest % 5 == 0:
        rest //= 5
        fives += 1
    if rest != 1:
        return f"{value.numerator}/{den}"
    digits = max(twos, fives)
    scaled = value.numerator * 10**digits // den  # exact: den divides 10^digits
    sign = "-" if scaled < 0 else ""
    text = str(abs(scaled)).rjust(digits + 1, "0")
    if digits == 0:
        return sign + text
    return f"{sign}{text[:-digits]}.{text[-digits:]}"
