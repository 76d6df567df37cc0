"""What a statistic's parameters are made of: the base model, column references and shared bounds.

Theory of operation: the ``statistic`` section of a manifest is validated by the parameter model of the statistic
it names (``library.registry``). Every such model derives from ``StatisticParameters`` and fixes ``name`` to a
``Literal`` of its statistic's name, so pydantic picks the model by that tag. The types here are the vocabulary
the models share: a column named the same in both tables or per party (``ColumnPair``), a column of one party's
table (``PartyColumn``), the parameters of a statistic over one column (``ColumnParameters``) and the extra
fraction bits of a division (``PrecisionBits``). They depend on nothing but ``jointstat.fields``, so both the
manifest's model (``circuit.agreement``) and every statistic can use them.
"""

from __future__ import annotations

from typing import Annotated, Literal

from jointstat.fields import StrictModel, between, matches

Identifier = Annotated[
    str, matches(r"[A-Za-z_][A-Za-z0-9_]{0,63}", "a name of letters, digits and _ (not a digit first)")
]

PrecisionBits = Annotated[int, between(0, 32)]  # more fraction bits of a mean, variance or interpolation


class StatisticParameters(StrictModel):
    """Base of every statistic's parameter model; subclasses fix ``name`` to a ``Literal``."""

    name: str


class SideColumns(StrictModel):
    """A column named per party, when the two tables call it differently."""

    garbler: Identifier
    evaluator: Identifier


ColumnPair = Identifier | SideColumns


class ColumnParameters(StatisticParameters):
    """Parameters of a statistic over one number column of both tables."""

    column: ColumnPair


class PartyColumn(StrictModel):
    """A column of one party's table."""

    party: Literal["garbler", "evaluator"]
    column: Identifier
