"""Garbling: the half-gates AND scheme, output decoding, and the garbler's and evaluator's backends."""

from jointstat.garble.backends import EvaluatorBackend, GarblerBackend
from jointstat.garble.halfgates import GarbleError, HalfGates
from jointstat.garble.outputs import OutputDecoding

__all__ = ["EvaluatorBackend", "GarbleError", "GarblerBackend", "HalfGates", "OutputDecoding"]
