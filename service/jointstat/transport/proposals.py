"""Run proposals on the wire: ``Session/Propose``, one unary call in which a node asks its peer to run a job now.

Theory of operation
-------------------
The initiating node sends a ``RunProposal`` — the job's name, the manifest digest, a fresh session id, the scheduled
time, its own manifest party, the attempt number and what triggered the run — to the peer's
``jointstat.v1.Session/Propose`` over mutual TLS pinned to that peer's certificate (``propose``), on the same port
as ``Session/Exchange``. The peer answers a ``RunAnswer``: accepted, or refused with a reason and a message.

On the serving side (``proposal_service``, registered through ``SessionServer(services=…)``) the call is checked
once more against the pinned certificates (``tls.check_peer``, TLS 1.3 and a pinned fingerprint) and refused with
PERMISSION_DENIED before the request is read, as is a pinned certificate that belongs to no configured peer. The
node's handler is then called with the request as a plain ``Proposal`` and the peer that sent it, and gives back an
``Answer``. This module decides nothing: the node does (``node.acceptance``).

Refusal reasons are the wire enum's names in snake case (``REFUSAL_REASON_OUTSIDE_WINDOW`` → ``outside_window``),
the words logs, job stores and metrics use; ``REFUSAL_CODES`` maps the wire numbers to them. A ``Proposal`` keeps
what the peer sent as it was (a role the wire does not know is None), so the node can refuse a malformed one with
a reason rather than fail to read it.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable, Collection
from dataclasses import dataclass
from typing import Protocol, TypeVar, cast

import grpc

from jointstat.circuit.model import Party
from jointstat.protocol.frames import role_to_wire
from jointstat.transport.channel import MESSAGE_OPTIONS, SERVICE_NAME
from jointstat.transport.tls import NodeTLS, PeerRefused, check_peer
from jointstat.wire.jointstat.v1 import session_pb2 as pb

PROTOCOL_VERSION = 1  # of run proposals (unchanged since version 1 of the wire format)
PROPOSE_METHOD = pb.DESCRIPTOR.services_by_name["Session"].methods_by_name["Propose"].name
PROPOSE_PATH = f"/{SERVICE_NAME}/{PROPOSE_METHOD}"
PROPOSAL_TIMEOUT_S = 300.0  # the peer may compile the manifest before it answers

REFUSAL_CODES: dict[int, str] = {
    value.number: value.name.removeprefix("REFUSAL_REASON_").lower()
    for value in pb.RefusalReason.DESCRIPTOR.values
    if value.number != 0
}
_REFUSAL_NUMBERS = {code: number for number, code in REFUSAL_CODES.items()}
_PARTIES = {role_to_wire(party): party for party in Party}


@dataclass(frozen=True)
class Proposal:
    """A run proposal as the peer sent it (see the module docstring)."""

    protocol_version: int
    job: str
    manifest_digest: bytes
    session_id: bytes
    scheduled_for_us: int  # microseconds since the Unix epoch, UTC
    role: Party | None  # the proposing node's manifest party; None when missing or not a known role
    attempt: int
    trigger: str

    @classmethod
    def from_wire(cls, message: pb.RunProposal) -> Proposal:
        return cls(
            protocol_version=message.protocol_version,
            job=message.job,
            manifest_digest=bytes(message.manifest_digest),
            session_id=bytes(message.session_id),
            scheduled_for_us=message.scheduled_for_us,
            role=_PARTIES.get(message.role),
            attempt=message.attempt,
            trigger=message.trigger,
        )

    def to_wire(self) -> pb.RunProposal:
        return pb.RunProposal(
            protocol_version=self.protocol_version,
            job=self.job,
            manifest_digest=self.manifest_digest,
            session_id=self.session_id,
            scheduled_for_us=self.scheduled_for_us,
            role=cast("pb.Role", 0 if self.role is None else role_to_wire(self.role)),
            attempt=self.attempt,
            trigger=self.trigger,
        )


@dataclass(frozen=True)
class Answer:
    """The peer's answer: accepted, or refused with a reason code (``REFUSAL_CODES``' words) and a message."""

    accepted: bool
    code: str | None = None
    message: str = ""

    @classmethod
    def refused(cls, code: str, message: str) -> Answer:
        if code not in _REFUSAL_NUMBERS:
            raise ValueError(f"no refusal reason {code!r} on the wire")
        return cls(False, code, message)

    @classmethod
    def from_wire(cls, message: pb.RunAnswer) -> Answer:
        if message.accepted:
            return cls(True)
        return cls(False, REFUSAL_CODES.get(message.reason, "refused"), message.message)

    def to_wire(self) -> pb.RunAnswer:
        if self.accepted:
            return pb.RunAnswer(accepted=True)
        assert self.code is not None
        reason = cast("pb.RefusalReason", _REFUSAL_NUMBERS[self.code])
        return pb.RunAnswer(accepted=False, reason=reason, message=self.message)


class ProposalTarget(Protocol):
    """Where a proposal goes: the peer's address, this node's client TLS pinning that peer, the peer's fingerprint."""

    @property
    def address(self) -> str: ...
    @property
    def tls(self) -> NodeTLS: ...
    @property
    def fingerprint(self) -> bytes: ...


async def propose(peer: ProposalTarget, proposal: pb.RunProposal) -> pb.RunAnswer:
    """Send a proposal to the peer over pinned mutual TLS; raises ``grpc.aio.AioRpcError`` if it does not arrive."""
    options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", peer.tls.server_name())]
    async with grpc.aio.secure_channel(
        peer.address, peer.tls.channel_credentials(peer.fingerprint), options=options
    ) as channel:
        call = channel.unary_unary(
            PROPOSE_PATH,
            request_serializer=pb.RunProposal.SerializeToString,
            response_deserializer=pb.RunAnswer.FromString,
        )
        answer: pb.RunAnswer = await call(proposal, timeout=PROPOSAL_TIMEOUT_S)
        return answer


P = TypeVar("P")


def proposal_service(
    pinned: Collection[bytes],
    peer_of: Callable[[bytes], P | None],
    handle: Callable[[Proposal, P], Awaitable[Answer]],
) -> Callable[[grpc.aio.Server], None]:
    """The ``Session/Propose`` handler, to register on the peer-facing server (``SessionServer(services=…)``).

    ``pinned`` are the fingerprints of the peer certificates, ``peer_of`` the configured peer holding a fingerprint
    (None: none), ``handle`` the node's answer to a proposal from that peer."""

    async def serve(request: pb.RunProposal, context: grpc.aio.ServicerContext) -> pb.RunAnswer:
        try:
            fp = check_peer(context.auth_context(), pinned)
        except PeerRefused as exc:
            await context.abort(grpc.StatusCode.PERMISSION_DENIED, str(exc))
            raise AssertionError("unreachable") from None
        peer = peer_of(fp)
        if peer is None:  # pinned but not a configured peer: cannot happen with a config-built NodeTLS
            await context.abort(grpc.StatusCode.PERMISSION_DENIED, "not a configured peer")
            raise AssertionError("unreachable")
        answer = await handle(Proposal.from_wire(request), peer)
        return answer.to_wire()

    def add(server: grpc.aio.Server) -> None:
        handler = grpc.unary_unary_rpc_method_handler(
            serve,
            request_deserializer=pb.RunProposal.FromString,
            response_serializer=pb.RunAnswer.SerializeToString,
        )
        server.add_generic_rpc_handlers(
            [grpc.method_handlers_generic_handler(SERVICE_NAME, {PROPOSE_METHOD: handler})]
        )

    return add


__all__ = [
    "PROPOSAL_TIMEOUT_S",
    "PROPOSE_METHOD",
    "PROPOSE_PATH",
    "PROTOCOL_VERSION",
    "REFUSAL_CODES",
    "Answer",
    "Proposal",
    "ProposalTarget",
    "proposal_service",
    "propose",
]
