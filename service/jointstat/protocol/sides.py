"""Either side of a session: ``Session`` (a garbler or an evaluator session) and ``new_session``.

Theory of operation: the node makes the session of the role its job plays with ``new_session``; everything else
about a session is in ``protocol.session`` (flow, transition table, resume), ``protocol.garbler`` and
``protocol.evaluator``.
"""

from __future__ import annotations

from typing import Unpack

from jointstat.circuit.model import Party
from jointstat.garble.backends import DEFAULT_CHUNK_BYTES
from jointstat.protocol.evaluator import EvaluatorSession
from jointstat.protocol.garbler import GarblerSession
from jointstat.protocol.session import DEFAULT_REPLAY_LIMIT_BYTES, SessionArgs

Session = GarblerSession | EvaluatorSession


def new_session(
    party: Party,
    *,
    chunk_bytes: int = DEFAULT_CHUNK_BYTES,
    replay_limit_bytes: int = DEFAULT_REPLAY_LIMIT_BYTES,
    **args: Unpack[SessionArgs],
) -> Session:
    """A session for ``party`` with the given program, digest and own inputs (``chunk_bytes`` and
    ``replay_limit_bytes``: garbler only)."""
    if Party(party) == Party.GARBLER:
        return GarblerSession(chunk_bytes=chunk_bytes, replay_limit_bytes=replay_limit_bytes, **args)
    return EvaluatorSession(**args)
