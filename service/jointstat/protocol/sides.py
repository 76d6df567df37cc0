"""Either side of a session: ``Session`` (a garbler or an evaluator session) and ``new_session``.

Theory of operation: the node makes the session of the role its job plays with ``new_session``; everything else
about a session is in ``protocol.session`` (flow, transition table, resume), ``protocol.garbler`` and
``protocol.evaluator``.
"""

from __future__ import annotations

import os

from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.garble.backends import DEFAULT_CHUNK_BYTES
from jointstat.protocol.evaluator import EvaluatorSession
from jointstat.protocol.garbler import GarblerSession
from jointstat.protocol.session import DEFAULT_REPLAY_LIMIT_BYTES, RandomBytes, Sign, Verify

Session = GarblerSession | EvaluatorSession


def new_session(
    party: Party,
    *,
    session_id: bytes,
    program: Program,
    manifest_digest: bytes,
    inputs: object,
    sign: Sign,
    verify: Verify,
    random_bytes: RandomBytes = os.urandom,
    chunk_bytes: int = DEFAULT_CHUNK_BYTES,
    replay_limit_bytes: int = DEFAULT_REPLAY_LIMIT_BYTES,
) -> Session:
    """A session for ``party`` with the given program, digest and own inputs (``chunk_bytes`` and
    ``replay_limit_bytes``: garbler only)."""
    common = {
        "session_id": session_id,
        "program": program,
        "manifest_digest": manifest_digest,
        "inputs": inputs,
        "sign": sign,
        "verify": verify,
        "random_bytes": random_bytes,
    }
    if Party(party) == Party.GARBLER:
        return GarblerSession(chunk_bytes=chunk_bytes, replay_limit_bytes=replay_limit_bytes, **common)  # type: ignore[arg-type]
    return EvaluatorSession(**common)  # type: ignore[arg-type]
