"""Oblivious transfer: Chou–Orlandi base OT over edwards25519 and IKNP extension to correlated OT (ALSZ).

Theory of operation: the evaluator must obtain the wire labels of its own input bits without the garbler
learning those bits. 128 public-key base OTs (``base``) seed the IKNP extension (``extension``), which
then produces any number of correlated OTs — the garbler ends with K_j, the evaluator with K_j ⊕ r_j·Δ —
at the cost of a few AES calls and 32 bytes of traffic per OT. Everything is sans-I/O: parties take
``OTMessage`` values (their kinds in ``messages``) in and give them out; ``pipe.run_pipe`` connects two
parties in memory.
"""

from jointstat.ot.base import BASE_OT_COUNT, BaseOTReceiver, BaseOTSender
from jointstat.ot.extension import (
    DEFAULT_BATCH,
    DEFAULT_WINDOW,
    MAX_BATCH,
    CorrelatedOTReceiver,
    CorrelatedOTSender,
    ExtensionReceiver,
    ExtensionSender,
)
from jointstat.ot.messages import MAX_PAYLOAD_BYTES, OTError, OTMessage
from jointstat.ot.pipe import PipeStats, run_pipe

__all__ = [
    "BASE_OT_COUNT",
    "DEFAULT_BATCH",
    "DEFAULT_WINDOW",
    "MAX_BATCH",
    "MAX_PAYLOAD_BYTES",
    "BaseOTReceiver",
    "BaseOTSender",
    "CorrelatedOTReceiver",
    "CorrelatedOTSender",
    "ExtensionReceiver",
    "ExtensionSender",
    "OTError",
    "OTMessage",
    "PipeStats",
    "run_pipe",
]
