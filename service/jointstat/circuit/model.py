"""The two parties and the error every program-building mistake raises.

A statistic is a program over bits (``jointstat.circuit.builder``) that runs against a backend
(``jointstat.circuit.backend``); no gate list is ever written down. What remains of a "circuit model" is who is
who: the garbler encrypts, the evaluator evaluates, and each has its own inputs and outputs.
"""

from __future__ import annotations

from enum import IntEnum
from typing import Literal


class CircuitError(ValueError):
    """A malformed program: bits of the wrong shape or kind, inputs that do not match; the message says where."""


class Party(IntEnum):
    """The two roles of Yao's protocol. The garbler encrypts the circuit; the evaluator evaluates it."""

    GARBLER = 0
    EVALUATOR = 1

    @property
    def other(self) -> Party:
        """The other party of the protocol."""
        return Party.EVALUATOR if self is Party.GARBLER else Party.GARBLER

    @property
    def role_name(self) -> Literal["garbler", "evaluator"]:
        """``garbler`` or ``evaluator``: the word node configs, session logs, result files and the job store use."""
        return "garbler" if self is Party.GARBLER else "evaluator"
