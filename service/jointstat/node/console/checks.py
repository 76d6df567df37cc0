"""The Audit page's checks: this node's session log verified on the server, and the cross-check with the peer's.

Theory of operation
-------------------
``LogChecks.own()`` takes the log's bytes from the node (whole records, ``NodeView.session_log``) and verifies
them with ``audit.verify.verify_log`` (a running node's log may end mid-session, so open sessions are allowed and
the last signed checkpoint is shown) under this node's own public key, pinned (so a log re-signed under another
key fails at its first record). Verification runs in a worker thread and its report is kept until the log's
bytes change (same SHA-256), so reloading the page does not verify again. Each session then gets a verdict:

- *attested by both nodes*: completed, and the peer's signature over the transcript digest verifies — under the
  key the log recorded for the peer (checked by the verifier's session rules) or, if the log recorded none, under
  the peer's key from this node's config (checked here with ``audit.records.transcript_signature_ok``);
- *aborted* (with the reason and which side aborted) or *refused*: the session's records verify and say so;
- *not finished*: started, neither completed nor aborted yet (running now, or cut short and not yet closed);
- a problem: the peer's signature does not verify under the configured key.

When the log breaks at some record, the page says where (line, sequence number, the check that failed, why) and
the sessions shown are what the records before it say.

``LogChecks.compare(theirs)`` is ``audit compare``: it reads the node name from the uploaded log's first record,
refuses a log by a node that is not a configured peer, and runs ``audit.verify.compare_logs`` with both public
keys pinned — this node's own and the configured peer's — listing every disagreement by session.
"""

from __future__ import annotations

import asyncio
import functools
import hashlib
from dataclasses import dataclass
from typing import Any

from jointstat.audit.records import SessionState, decode_b64, transcript_signature_ok
from jointstat.audit.verify import CompareReport, VerifyReport, compare_logs, verify_log
from jointstat.node.console.view import LogKeys, NodeView
from jointstat.transport.proposals import REFUSAL_CODES

REFUSAL_REASONS = frozenset(REFUSAL_CODES.values())  # the reasons a proposal is refused with (the wire enum)


@dataclass(frozen=True)
class SessionVerdict:
    """One session of a verified log, as the Audit page shows it."""

    session: str
    job: str
    role: str
    peer: str
    outcome: str  # completed, aborted or open
    reason: str | None
    aborted_by: str | None
    verdict: str  # attested, aborted, refused, open or problem
    detail: str
    phases: list[dict[str, Any]]


@dataclass(frozen=True)
class OwnLogCheck:
    report: VerifyReport
    sessions: list[SessionVerdict]  # newest first
    size: int


@dataclass(frozen=True)
class CompareCheck:
    """A cross-check; ``refused`` says why none was made (the log is by a node that is not a peer)."""

    report: CompareReport | None
    refused: str | None = None
    size: int = 0


def _verdict(state: SessionState, keys: LogKeys) -> tuple[str, str]:
    if state.outcome == "completed":
        if state.peer_key is not None:
            return "attested", "both nodes signed the same transcript digest; both signatures verify"
        key = keys.peers.get(state.peer)
        signature = None if state.peer_signature is None else decode_b64(state.peer_signature, 64)
        if key is None or signature is None or state.digest is None:
            return "problem", f"the peer's signature cannot be checked: {state.peer} is not a configured peer"
        if transcript_signature_ok(key, state.session_id, bytes.fromhex(state.digest), signature):
            return "attested", "both nodes signed the same transcript digest; both signatures verify"
        return "problem", f"the peer's signature does not verify under {state.peer}'s configured key"
    if state.outcome == "aborted":
        side = "this node" if state.aborted_by == "self" else "the peer"
        if state.reason in REFUSAL_REASONS:
            return "refused", f"refused ({state.reason}) by {side}"
        return "aborted", f"aborted ({state.reason}) by {side}"
    return "open", "started; not completed or aborted yet"


def session_verdicts(report: VerifyReport, keys: LogKeys) -> list[SessionVerdict]:
    out = []
    for state in report.sessions.values():
        verdict, detail = _verdict(state, keys)
        out.append(
            SessionVerdict(
                session=state.session_id,
                job=state.job,
                role=state.role,
                peer=state.peer,
                outcome=state.outcome,
                reason=state.reason,
                aborted_by=state.aborted_by,
                verdict=verdict,
                detail=detail,
                phases=list(state.phases),
            )
        )
    return out[::-1]


class LogChecks:
    """Verifies this node's log (cached by content) and cross-checks uploaded peer logs."""

    def __init__(self, view: NodeView) -> None:
        self._view = view
        self._cached: tuple[bytes, OwnLogCheck] | None = None
        self._lock = asyncio.Lock()

    async def own(self) -> OwnLogCheck:
        async with self._lock:
            data = await self._view.session_log()
            digest = hashlib.sha256(data).digest()
            if self._cached is not None and self._cached[0] == digest:
                return self._cached[1]
            keys = self._view.log_keys()
            report = await asyncio.to_thread(functools.partial(verify_log, data, keys.own, allow_open=True))
            check = OwnLogCheck(report, session_verdicts(report, keys), len(data))
            self._cached = (digest, check)
            return check

    async def phases_of(self, session_id: str) -> list[dict[str, Any]]:
        """A session's phases as this node's log recorded them (for sessions the node no longer follows)."""
        check = await self.own()
        state = check.report.sessions.get(session_id)
        return [] if state is None else list(state.phases)

    async def compare(self, theirs: bytes) -> CompareCheck:
        mine = await self._view.session_log()
        keys = self._view.log_keys()

        def work() -> CompareCheck:
            node = verify_log(theirs, allow_open=True).node
            key = None if node is None else keys.peers.get(node)
            if node is not None and key is None:
                known = ", ".join(sorted(keys.peers)) or "none"
                return CompareCheck(
                    None,
                    f"this log was written by node {node}, which is not a peer of this node (peers: {known})",
                    len(theirs),
                )
            return CompareCheck(
                compare_logs(mine, theirs, mine_key=keys.own, theirs_key=key, allow_open=True),
                None,
                len(theirs),
            )

        return await asyncio.to_thread(work)
