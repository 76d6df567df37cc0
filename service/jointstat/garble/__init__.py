"""Half-gates garbling and evaluation over the layer schedule (see ``halfgates``)."""

from jointstat.garble.halfgates import Evaluator, GarbleError, Garbler, OutputDecoding

__all__ = ["Evaluator", "GarbleError", "Garbler", "OutputDecoding"]
