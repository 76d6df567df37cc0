"""Boolean circuits: the model (numpy arrays), the layer schedule, the lane-parallel builder, plain evaluation.

The statistic library, the manifest and input encoding live here too (see their modules).
"""

from jointstat.circuit.model import Circuit, CircuitError, GateKind, Party

__all__ = ["Circuit", "CircuitError", "GateKind", "Party"]
