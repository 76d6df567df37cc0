"""What a statistic's parameters are made of: the base model, column references, conditions, clamping bounds,
noise settings and the exact decimals a person writes in them.

Theory of operation: a statistic section of a manifest is validated by the parameter model of the statistic it
names (``library.registry``). Every such model derives from ``StatisticParameters`` and fixes ``name`` to a
``Literal`` of its statistic's name, so pydantic picks the model by that tag. The types here are the vocabulary
the models share: a column named the same in both tables or per party (``ColumnPair``), a column of one party's
table (``PartyColumn``), the parameters of a statistic over one column (``ColumnParameters``), the extra fraction
bits of a division (``PrecisionBits``), a comparison of a column with a value (``Condition``, its ``Operator`` and
the output name each operator gives, ``OPERATOR_WORDS``), clamping bounds (``Clamp``) and the noise of an output
(``NoiseSetting``).

Exact decimals (``ExactDecimal``): a comparison value, a clamping bound or a privacy parameter ε is taken as the
decimal that was written, never as a binary float: the manifest reader keeps the text of every YAML number
(``problems.WrittenFloat``), and text such as ``"0.5"`` or ``"1e-3"`` is read with ``fractions.Fraction``. The
validated value is the decimal's plain text (``"41.26"``, ``"25000"``, ``"0.001"``), so ``25000``, ``"25000"``
and ``25000.0`` are the same value and give the same manifest digest.

Fields added after manifest digests v2 was defined carry ``exclude_if`` (``unless_set``): they are left out of the
canonical form while they hold their default, so a manifest that uses none of them keeps the digest it had. They
depend on nothing but ``jointstat.fields``, ``jointstat.exact`` and ``jointstat.problems``, so both the manifest's
model (``circuit.agreement``) and every statistic can use them.
"""

from __future__ import annotations

from collections.abc import Callable
from fractions import Fraction
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BeforeValidator, Discriminator, Field, Tag, model_validator

from jointstat.exact import ExactNumberError, decimal_text, exact_number
from jointstat.fields import StrictModel, between, matches
from jointstat.problems import WrittenFloat

Identifier = Annotated[
    str, matches(r"[A-Za-z_][A-Za-z0-9_]{0,63}", "a name of letters, digits and _ (not a digit first)")
]

PrecisionBits = Annotated[
    int,
    between(0, 32),
    Field(
        description="extra fraction bits of a division (a mean, a variance, an interpolated quantile, a ratio): "
        "the result is rounded toward zero to a multiple of 2^-(the column's fraction bits + precision_bits)"
    ),
]


def unless_set(default: Any = None) -> Callable[[Any], bool]:
    """``exclude_if`` for a field added after manifest digests v2: left out of the canonical form at its default."""
    return lambda value: value == default


def later_field(default: Any, description: str) -> Any:
    """A field added after manifest digests v2 (see the module docstring)."""
    return Field(default, exclude_if=unless_set(default), description=description)


# -- exact decimals --------------------------------------------------------------------------------------------------


def _decimal_text(value: Any) -> Any:
    """A written number → the plain text of its exact decimal (see the module docstring)."""
    if isinstance(value, bool):
        raise ValueError("must be a number, not true or false")
    if isinstance(value, WrittenFloat):
        value = value.text
    elif isinstance(value, float):
        value = repr(value)
    if not isinstance(value, int | str):
        return value  # the str type check reports it
    try:
        number = exact_number(value, "value")
    except ExactNumberError:
        raise ValueError('must be a decimal number, e.g. 25000, 41.26 or "0.5"') from None
    text = decimal_text(number)
    if "/" in text:
        raise ValueError('must be a decimal number, e.g. 25000, 41.26 or "0.5"')
    return text


ExactDecimal = Annotated[str, BeforeValidator(_decimal_text)]


def exact(value: str) -> Fraction:
    """An ``ExactDecimal`` as a fraction."""
    return Fraction(value)


def _positive(value: str) -> str:
    if Fraction(value) <= 0:
        raise ValueError("must be greater than 0")
    return value


# -- statistics' parameters ----------------------------------------------------------------------------------------


class NoiseSetting(StrictModel):
    """Random noise added to one output inside the circuit before it is released (docs/privacy-noise.md)."""

    mechanism: Literal["discrete_laplace"] = Field(
        description="the noise law: discrete_laplace (the two-sided geometric law, Ghosh–Roughgarden–Sundararajan "
        "2009), drawn from both parties' random bits so that neither knows it"
    )
    epsilon: Annotated[ExactDecimal, AfterValidator(_positive)] = Field(
        description="the privacy parameter ε of this output, an exact decimal greater than 0 (write it in "
        'quotes, e.g. "0.5"; a plain number is read as the decimal written). Smaller is more private and '
        "noisier; the ε of a run is the sum over its noisy outputs"
    )


NoiseSettings = Annotated[
    dict[Annotated[str, matches(r"[A-Za-z_][A-Za-z0-9_]{0,63}", "an output name")], NoiseSetting],
    Field(min_length=1),
]


class StatisticParameters(StrictModel):
    """Base of every statistic's parameter model; subclasses fix ``name`` to a ``Literal``."""

    name: str = Field(description="which statistic (the single `statistic:` form)")
    noise: NoiseSettings | None = later_field(
        None,
        "noise added to outputs before release, by output name, e.g. {sum: {mechanism: discrete_laplace, "
        'epsilon: "0.5"}}; a noisy output replaces the exact one, and a statistic with noise must noise every '
        "output it releases",
    )


class SideColumns(StrictModel):
    """A column named per party, when the two tables call it differently."""

    garbler: Identifier = Field(description="the column's name in the garbler's table")
    evaluator: Identifier = Field(description="the column's name in the evaluator's table")


ColumnPair = Identifier | SideColumns


class ColumnParameters(StatisticParameters):
    """Parameters of a statistic over one number column of both tables."""

    column: ColumnPair = Field(
        description="the column, named the same in both tables or per party as {garbler: …, evaluator: …}"
    )


class PartyColumn(StrictModel):
    """A column of one party's table."""

    party: Literal["garbler", "evaluator"] = Field(description="whose table holds the column")
    column: Identifier = Field(description="the column's name in that table")


# -- comparisons -----------------------------------------------------------------------------------------------------

OPERATORS = (">", ">=", "<", "<=", "==", "!=")
OPERATOR_WORDS = {
    ">": "more_than",
    ">=": "at_least",
    "<": "less_than",
    "<=": "at_most",
    "==": "equal_to",
    "!=": "not_equal_to",
}


def _operator(value: str) -> str:
    if value not in OPERATORS:
        raise ValueError(
            f'must be one of {", ".join(OPERATORS)}, written in quotes (op: ">="): YAML reads a bare > as the '
            "start of folded text"
        )
    return value


Operator = Annotated[
    str,
    AfterValidator(_operator),
    Field(
        description='a comparison: ">", ">=", "<", "<=", "==" or "!=" (in quotes: YAML reads a bare > '
        "as folded text)",
        json_schema_extra={"enum": list(OPERATORS)},
    ),
]


class Condition(StrictModel):
    """A row's column compared with a value: numbers with any operator, booleans with == or != only."""

    column: ColumnPair = Field(description="the column compared, in both tables (or per party)")
    op: Operator
    value: Annotated[
        Annotated[bool, Tag("flag")] | Annotated[ExactDecimal, Tag("number")],
        Discriminator(lambda v: "flag" if isinstance(v, bool) else "number"),
    ] = Field(
        description="what the column is compared with: a decimal number, compared exactly with the values the "
        "column holds (see the rule for fixed-point columns), or true/false for a boolean column"
    )


def _where_kind(value: Any) -> str:
    """Which form of ``where`` a value is, for validation (YAML data) and serialisation (validated models)."""
    if isinstance(value, Condition):
        return "condition"
    if isinstance(value, SideColumns):
        return "sides"
    if isinstance(value, list):
        return "all"
    if isinstance(value, dict):
        return "sides" if {"garbler", "evaluator"} & set(value) else "condition"
    return "column"


Where = Annotated[
    Annotated[Identifier, Tag("column")]
    | Annotated[SideColumns, Tag("sides")]
    | Annotated[Condition, Tag("condition")]
    | Annotated[list[Condition], Tag("all"), Field(min_length=1)],
    Discriminator(_where_kind),
    Field(
        description="which rows count: a boolean column's name (rows where it is true), a condition {column, op, "
        "value}, or a list of conditions that must all hold"
    ),
]


class Threshold(StrictModel):
    """A comparison of the value column with a public value; the output counting the rows it holds for is named
    after the operator (``OPERATOR_WORDS``: ">" gives more_than, ">=" at_least, …)."""

    op: Operator
    value: ExactDecimal = Field(description="the public value compared with, an exact decimal")


class Clamp(StrictModel):
    """Public bounds every value is clamped to inside the circuit before it is summed: min ≤ value ≤ max."""

    min: ExactDecimal = Field(description="values below it count as it")
    max: ExactDecimal = Field(description="values above it count as it")

    @model_validator(mode="after")
    def _ordered(self) -> Clamp:
        if exact(self.min) > exact(self.max):
            raise ValueError(f"min ({self.min}) must not be more than max ({self.max})")
        return self

    def bounds(self) -> tuple[Fraction, Fraction]:
        return exact(self.min), exact(self.max)
