"""Signed, hash-chained session logs (RFC 8785 canonical JSON, SHA-256 chain, Ed25519 signatures) and their checks.

``SessionLog`` writes a node's log; ``verify_log`` checks one log and names the first bad record; ``compare_logs``
checks that two nodes' logs attest to the same sessions. ``sign_transcript``/``transcript_signature_ok`` (from
``jointstat.statements``, their one definition) sign and check the transcript statement both nodes sign.
"""

from jointstat.audit.log import Clock, SessionLog, system_clock
from jointstat.audit.records import AuditError
from jointstat.audit.verify import CompareReport, LogVerifier, Problem, VerifyReport, compare_logs, verify_log
from jointstat.statements import sign_transcript, transcript_signature_ok

__all__ = [
    "AuditError",
    "Clock",
    "CompareReport",
    "LogVerifier",
    "Problem",
    "SessionLog",
    "VerifyReport",
    "compare_logs",
    "sign_transcript",
    "system_clock",
    "transcript_signature_ok",
    "verify_log",
]
