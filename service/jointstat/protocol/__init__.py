"""The two-party session protocol, sans-I/O: garbler and evaluator state machines exchanging frames.

See ``jointstat.protocol.session`` for the flow, the state tables and resume (``garbler``, ``evaluator``: each side), ``jointstat.protocol.frames`` for the frame
encoding and the transcript, and ``jointstat.protocol.signing`` for the Ed25519 transcript signatures.
"""

from jointstat.protocol.evaluator import EvaluatorSession
from jointstat.protocol.frames import (
    MAX_FRAME_BYTES,
    MAX_PAYLOAD_BYTES,
    PROTOCOL_VERSION,
    AbortInfo,
    AbortReason,
    ProtocolError,
)
from jointstat.protocol.garbler import GarblerSession
from jointstat.protocol.session import (
    EVALUATOR_TABLE,
    GARBLER_TABLE,
    NoOutputError,
    ResumeRefused,
    Sign,
    Verify,
)
from jointstat.protocol.sides import Session, new_session
from jointstat.protocol.signing import signer, verifier

__all__ = [
    "EVALUATOR_TABLE",
    "GARBLER_TABLE",
    "MAX_FRAME_BYTES",
    "MAX_PAYLOAD_BYTES",
    "PROTOCOL_VERSION",
    "AbortInfo",
    "AbortReason",
    "EvaluatorSession",
    "GarblerSession",
    "NoOutputError",
    "ProtocolError",
    "ResumeRefused",
    "Session",
    "Sign",
    "Verify",
    "new_session",
    "signer",
    "verifier",
]
