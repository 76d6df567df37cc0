"""How one side of one session ended, as the harness observed it, and how long a side may take to end.

A ``Side`` is filled from a session and its transport result (``side_of``), from the node's own account (its
tracker, job store and result files; ``campaign``) or from a peer process's report (``peer_process``). ``end_bound``
is how long after its start a faulted session may take on a side before it counts as hung: the session deadline,
twice the abort grace, and an allowance for a loaded two-core machine.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from jointstat.circuit.model import Party
from jointstat.protocol.session import NoOutputError
from jointstat.protocol.sides import Session
from jointstat.transport.driver import Limits, SessionResult

SCHEDULING_ALLOWANCE_S = 3.0  # beyond deadline + grace, for a loaded two-core machine


def end_bound(limits: Limits) -> float:
    """How long after its start a faulted session may take, on either side, before it counts as hung."""
    return limits.deadline_s + 2 * limits.abort_grace_s + SCHEDULING_ALLOWANCE_S


@dataclass
class Side:
    """How one side of one session ended."""

    party: Party
    opened: bool = True  # False: the node never saw the session's stream (withdrawn after its deadline)
    hung: bool = False
    killed: bool = False
    released: bool = False  # an output was available: from the session, its result, or a result file
    outputs: Any = None  # the peer's output bits; the node's result file outputs
    decoded: dict[str, Any] | None = (
        None  # the peer's outputs decoded by its compiled job (a retry, once judged)
    )
    store_status: str | None = None  # the node's job-store status of the attempt
    reason: str | None = (
        None  # abort reason (snake case), "not_opened", or "node_restarted" for a killed peer
    )
    message: str = ""
    by_peer: bool = False
    ended_after_s: float | None = None
    transcript: bytes | None = None


def released(session: Session) -> bool:
    """True if the session would hand out an output (it must not, unless it completed)."""
    try:
        session.outputs  # noqa: B018 - the property raises unless the session is done
    except NoOutputError:
        return False
    return True


def side_of(session: Session, result: SessionResult | None, ended_after_s: float | None) -> Side:
    side = Side(party=session.party, ended_after_s=ended_after_s)
    side.released = released(session) or (result is not None and result.outputs is not None)
    if result is not None:
        side.outputs = result.outputs
        side.transcript = result.transcript_digest
        if result.abort is not None:
            side.reason = result.abort.reason.name.lower()
            side.message = result.abort.message
            side.by_peer = result.abort.by_peer
    return side
