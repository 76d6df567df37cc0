"""The pydantic pieces every file a person writes is validated with (the manifest, the node configuration).

Theory of operation: each section of such a file is a ``StrictModel`` — an unknown key is an error (a typo would
otherwise be silently ignored), values are not coerced from other types (``"3"`` is not the number 3) and a
validated section cannot be changed afterwards. Bounds and patterns are ``AfterValidator``s that raise a short
message in plain words (``must be between 1 and 64``); ``jointstat.problems`` turns it into a field-path problem.
"""

from __future__ import annotations

import re

from pydantic import AfterValidator, BaseModel, ConfigDict


class StrictModel(BaseModel):
    """A section of a file a person writes: no unknown keys, no type coercion, frozen once validated."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


def between(lo: float, hi: float) -> AfterValidator:
    """A number from ``lo`` to ``hi`` inclusive, else "must be between lo and hi"."""

    def check(v: float) -> float:
        if not lo <= v <= hi:
            raise ValueError(f"must be between {lo} and {hi}")
        return v

    return AfterValidator(check)


def matches(pattern: str, what: str) -> AfterValidator:
    """A string the whole of which matches ``pattern``, else "must be <what>"."""
    rx = re.compile(pattern)

    def check(v: str) -> str:
        if not rx.fullmatch(v):
            raise ValueError(f"must be {what}")
        return v

    return AfterValidator(check)
