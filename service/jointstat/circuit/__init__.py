"""Programs over bits: the value type, the backends, the lane-parallel builder, and the statistics built with it.

The statistic library, the manifest and input encoding live here too (see their modules). Nothing here knows
about labels or keys; the garbler's and evaluator's backends live in ``jointstat.garble``.
"""

from jointstat.circuit.model import CircuitError, Party

__all__ = ["CircuitError", "Party"]
