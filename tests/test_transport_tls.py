"""Mutual TLS with pinned certificates: only the pinned peer gets a stream, refused before any protocol frame."""

from __future__ import annotations

import asyncio
import hashlib
import ssl
from pathlib import Path

import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
from jointstat.transport import Limits, SessionServer, run_client
from jointstat.transport.pki import Issued, issue, new_ca, node_tls
from jointstat.transport.tls import NodeTLS, PeerRefused, check_peer, fingerprint

MANIFEST = hashlib.sha256(b"invented manifest: two libraries compare loan counts").digest()
LIMITS = Limits(deadline_s=20, idle_timeout_s=10, abort_grace_s=1)


class PKI:
    def __init__(self) -> None:
        self.ca = new_ca("jointstat test CA")
        self.other_ca = new_ca("someone else's CA")
        self.north = issue(self.ca, "north.library.test")  # the server node
        self.south = issue(self.ca, "south.library.test")  # the client node
        self.south_twin = issue(self.ca, "south.library.test")  # same CA, same name, not pinned
        self.north_twin = issue(self.ca, "north.library.test")
        self.stranger = issue(self.other_ca, "south.library.test")  # another CA altogether


@pytest.fixture(scope="module")
def pki() -> PKI:
    return PKI()


def tiny_program(bld: Builder) -> None:
    g = bld.input(Party.GARBLER, 4)
    e = bld.input(Party.EVALUATOR, 4)
    bld.output(Party.EVALUATOR, bld.and_(g, e))
    bld.output(Party.GARBLER, bld.xor(g, e))


@pytest.fixture(scope="module")
def tiny() -> Program:
    return Program.of(tiny_program)


def pair(program: Program, sid: bytes) -> tuple[GarblerSession, EvaluatorSession]:
    gk, ek = Ed25519PrivateKey.generate(), Ed25519PrivateKey.generate()
    g = GarblerSession(
        session_id=sid,
        program=program,
        manifest_digest=MANIFEST,
        inputs=np.array([1, 0, 1, 1]),
        sign=signer(gk),
        verify=verifier(ek.public_key()),
    )
    e = EvaluatorSession(
        session_id=sid,
        program=program,
        manifest_digest=MANIFEST,
        inputs=np.array([1, 1, 0, 1]),
        sign=signer(ek),
        verify=verifier(gk.public_key()),
    )
    return g, e


async def attempt(
    program: Program, server_tls: NodeTLS, client_tls: NodeTLS, sid: bytes
) -> tuple[GarblerSession, EvaluatorSession, object, object]:
    garbler, evaluator = pair(program, sid)
    server = SessionServer(server_tls, limits=LIMITS)
    port = await server.start()
    try:
        expected = server.expect(garbler)
        result = await run_client(
            evaluator, f"127.0.0.1:{port}", client_tls, limits=LIMITS, server_name="north.library.test"
        )
    finally:
        await server.stop(None)
    return garbler, evaluator, result, expected


async def test_the_pinned_peers_complete_a_session_over_tls_1_3(pki: PKI, tiny: Program) -> None:
    garbler, _evaluator, result, _ = await attempt(
        tiny, node_tls(pki.north, pki.south), node_tls(pki.south, pki.north), b"tls-ok"
    )
    assert result.completed and garbler.done
    assert list(result.outputs) == [1, 0, 0, 1]
    assert list(garbler.outputs) == [0, 1, 1, 0]


@pytest.mark.parametrize("client", ["stranger", "south_twin"])
async def test_a_client_certificate_that_is_not_pinned_is_refused(
    pki: PKI, tiny: Program, client: str
) -> None:
    # "stranger": issued by another CA; "south_twin": issued by the right CA for the right name, but not pinned.
    presented: Issued = getattr(pki, client)
    garbler, evaluator, result, expected = await attempt(
        tiny, node_tls(pki.north, pki.south), node_tls(presented, pki.north), b"tls-client-" + client.encode()
    )
    assert not result.completed and result.outputs is None and evaluator.failed
    assert result.counters.frames_sent == 0  # not even the hello left
    assert result.abort is not None and result.abort.reason.name == "CONNECTION_LOST"
    # The server never saw a protocol frame: its session did not even start.
    assert garbler.state == "new" and garbler.frames_received == 0
    assert not expected.done() or expected.cancelled()


@pytest.mark.parametrize("server", ["north_twin", "stranger"])
async def test_a_server_certificate_that_is_not_pinned_is_refused(
    pki: PKI, tiny: Program, server: str
) -> None:
    presented: Issued = getattr(pki, server)
    garbler, evaluator, result, _ = await attempt(
        tiny, node_tls(presented, pki.south), node_tls(pki.south, pki.north), b"tls-server-" + server.encode()
    )
    assert not result.completed and evaluator.failed
    assert result.abort is not None and "CERTIFICATE_VERIFY_FAILED" in result.abort.message
    assert garbler.state == "new" and garbler.frames_received == 0
    assert result.counters.frames_sent == result.counters.frames_received == 0


async def test_the_server_negotiates_tls_1_3_with_a_pinned_client(pki: PKI, tmp_path: Path) -> None:
    """An ordinary TLS client that accepts only TLS 1.3 (Python's ssl) completes a handshake with the server."""
    cert, key = tmp_path / "south.pem", tmp_path / "south.key"
    cert.write_bytes(pki.south.certificate)
    key.write_bytes(pki.south.private_key)
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    ctx.minimum_version = ssl.TLSVersion.TLSv1_3
    ctx.verify_flags |= ssl.VERIFY_X509_PARTIAL_CHAIN  # the pinned server certificate is the trust anchor
    ctx.load_verify_locations(cadata=pki.north.certificate.decode())
    ctx.load_cert_chain(cert, key)
    ctx.set_alpn_protocols(["h2"])
    server = SessionServer(node_tls(pki.north, pki.south))
    port = await server.start()
    try:
        _, writer = await asyncio.open_connection(
            "127.0.0.1", port, ssl=ctx, server_hostname="north.library.test"
        )
        version = writer.get_extra_info("ssl_object").version()
        writer.close()
    finally:
        await server.stop(None)
    assert version == "TLSv1.3"


def _context(pem: bytes, version: bytes = b"TLSv1.3") -> dict[str, list[bytes]]:
    return {"transport_security_type": [b"ssl"], "ssl_tls_version": [version], "x509_pem_cert": [pem]}


def test_check_peer_accepts_exactly_the_pinned_certificate(pki: PKI) -> None:
    pinned = {fingerprint(pki.south.certificate)}
    assert check_peer(_context(pki.south.certificate), pinned) == fingerprint(pki.south.certificate)
    with pytest.raises(PeerRefused, match="not pinned"):
        check_peer(_context(pki.south_twin.certificate), pinned)


def test_check_peer_refuses_tls_below_1_3_plaintext_and_missing_certificates(pki: PKI) -> None:
    pinned = {fingerprint(pki.south.certificate)}
    with pytest.raises(PeerRefused, match=r"TLS 1\.3 is required"):
        check_peer(_context(pki.south.certificate, b"TLSv1.2"), pinned)
    with pytest.raises(PeerRefused, match="not protected by TLS"):
        check_peer({"transport_security_type": [b"insecure"]}, pinned)
    with pytest.raises(PeerRefused, match="no client certificate"):
        check_peer({"transport_security_type": [b"ssl"], "ssl_tls_version": [b"TLSv1.3"]}, pinned)


def test_a_pinned_file_must_hold_the_peers_own_certificate_only(pki: PKI) -> None:
    # A leaf + CA "full chain" would make the CA a trust anchor: any certificate it issues for the peer's name would
    # pass the client's TLS check. A CA alone, or two certificates of any kind, are refused likewise.
    for pinned, words in (
        (pki.north.certificate + pki.ca.certificate, "holds 2 certificates"),
        (pki.ca.certificate, "is a CA certificate"),
        (pki.north.certificate + pki.north_twin.certificate, "holds 2 certificates"),
    ):
        with pytest.raises(
            ValueError, match=f"pinned peer certificate 0: {words}.*pin the peer's own certificate"
        ):
            node_tls(pki.south, pinned)


async def test_a_client_connects_only_to_the_server_whose_fingerprint_it_was_given(
    pki: PKI, tiny: Program
) -> None:
    client_tls = node_tls(pki.south, pki.north)
    assert client_tls.channel_credentials(fingerprint(pki.north.certificate)) is not None
    with pytest.raises(ValueError, match="the pinned server certificate is not the one expected"):
        client_tls.channel_credentials(fingerprint(pki.north_twin.certificate))
    with pytest.raises(ValueError, match="a client pins exactly one server certificate"):
        node_tls(pki.south, pki.north, pki.north_twin).channel_credentials()
    garbler, evaluator = pair(tiny, b"tls-expected-fingerprint")
    async with SessionServer(node_tls(pki.north, pki.south), limits=LIMITS) as server:
        expected = server.expect(garbler)
        result = await run_client(
            evaluator,
            f"127.0.0.1:{server.port}",
            client_tls,
            limits=LIMITS,
            peer_fingerprint=fingerprint(pki.north.certificate),
        )
        assert result.completed and (await expected).completed


async def test_a_server_with_the_pinned_certificate_but_not_the_peers_signing_key_is_refused_at_its_hello(
    pki: PKI, tiny: Program
) -> None:
    garbler, evaluator = pair(tiny, b"tls-impostor-signing-key")
    garbler._sign = signer(Ed25519PrivateKey.generate())  # its TLS key leaked, the peer's signing key did not
    async with SessionServer(node_tls(pki.north, pki.south), limits=LIMITS) as server:
        server.expect(garbler)
        result = await run_client(
            evaluator,
            f"127.0.0.1:{server.port}",
            node_tls(pki.south, pki.north),
            limits=LIMITS,
            peer_fingerprint=fingerprint(pki.north.certificate),
        )
    assert not result.completed and result.abort is not None and not result.abort.by_peer
    assert result.abort.reason.name == "BAD_SIGNATURE" and "hello is not signed" in result.abort.message
    assert result.counters.frames_sent == 2  # its hello and its abort: no OT, nothing of its inputs


def test_node_tls_checks_its_material_and_names_what_is_wrong(pki: PKI) -> None:
    with pytest.raises(ValueError, match="pinned_peers: at least one"):
        NodeTLS(pki.north.certificate, pki.north.private_key, ())
    with pytest.raises(ValueError, match="pinned peer certificate 0: not a PEM certificate"):
        NodeTLS(pki.north.certificate, pki.north.private_key, (b"-----BEGIN CERTIFICATE-----\nAAAA\n",))
    with pytest.raises(ValueError, match="node private key"):
        NodeTLS(pki.north.certificate, b"not a key", (pki.south.certificate,))
    assert node_tls(pki.south, pki.north).server_name() == "north.library.test"
    assert node_tls(pki.south, pki.north).pinned_fingerprints == {fingerprint(pki.north.certificate)}
