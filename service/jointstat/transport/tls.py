"""Mutual TLS with pinned peer certificates for the session transport.

Theory of operation
-------------------
Each node has its own certificate and private key and, from its configuration, the certificate of every peer it
accepts (the *pinned* certificates). The pinned certificates are the *only* trust anchors given to gRPC's TLS
(BoringSSL): the client verifies the server's certificate against them, the server requires a client certificate
and verifies it against them. A certificate that is not one of the pinned ones — from another CA, or from the same
CA but not pinned — does not verify, so the TLS handshake fails and no stream (hence no protocol frame) ever
exists. A CA that issued the node certificates is therefore not trusted by itself: pinning the peer's own
certificate is stricter than trusting its issuer.

That holds only if a pinned file is the peer's own certificate and nothing else (``pinned_certificate``): every
certificate in a file given to TLS becomes a trust anchor, so a "full chain" file (leaf and CA) would trust every
certificate the CA issues for the peer's name, and a CA certificate pinned alone likewise. A pinned file holding
more than one certificate, or a certificate that can sign certificates (basic constraints CA, the key-cert-sign
key usage, or an X.509 version 1 certificate, which has no extensions to say it cannot), is refused here and by
``node check``.

The server checks each stream once more before reading any frame (``check_peer``): the connection must be TLS,
must have negotiated TLS 1.3 (RFC 8446; gRPC reports it in the auth context as ``ssl_tls_version``) and the client
certificate's SHA-256 fingerprint must be one of the pinned fingerprints. gRPC Python offers no option to set a
minimum TLS version; gRPC negotiates TLS 1.3 whenever both ends support it, the server refuses any stream that
negotiated less, and a client cannot read the negotiated version (gRPC Python exposes no client auth context) —
but its server is authenticated by the pinned certificate whatever the version.

The client side has no auth context to read the server's certificate from, so it checks the fingerprint where it
can: its credentials (``channel_credentials``) are built from exactly one pinned certificate — one certificate,
not a CA — and, given the fingerprint the node expects for that peer, only if the pinned certificate is that one.
The handshake then succeeds only with a server presenting exactly that certificate. The peer's hello, signed with
its Ed25519 key (``protocol.session``), is the second, independent check of who the peer is.

The client names the server by the DNS name in its pinned certificate (``grpc.ssl_target_name_override``), so the
address may be an IP address or a name that is not in the certificate.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field

import grpc
from cryptography import x509
from cryptography.hazmat.primitives import serialization
from cryptography.x509.oid import NameOID

REQUIRED_TLS_VERSION = b"TLSv1.3"


class PeerRefused(Exception):
    """The peer's connection is not acceptable (not TLS 1.3, or its certificate is not pinned)."""


def _load_certificates(pem: bytes, what: str) -> list[x509.Certificate]:
    if not isinstance(pem, bytes | bytearray):
        raise ValueError(f"{what}: expected PEM bytes, got {type(pem).__name__}")
    try:
        certs = x509.load_pem_x509_certificates(bytes(pem))
    except ValueError as exc:
        raise ValueError(f"{what}: not a PEM certificate ({exc})") from None
    if not certs:
        raise ValueError(f"{what}: no certificate found")
    return certs


def can_sign_certificates(cert: x509.Certificate) -> bool:
    """Whether TLS could take ``cert`` as an issuer: basic constraints CA, key usage key-cert-sign, or X.509 v1."""
    if cert.version == x509.Version.v1:
        return True
    try:
        if cert.extensions.get_extension_for_class(x509.BasicConstraints).value.ca:
            return True
    except x509.ExtensionNotFound:
        pass
    try:
        return bool(cert.extensions.get_extension_for_class(x509.KeyUsage).value.key_cert_sign)
    except x509.ExtensionNotFound:
        return False


def pinned_certificate(pem: bytes, what: str) -> x509.Certificate:
    """The peer certificate of a pinned file; ``ValueError`` unless it is exactly one certificate that is no CA."""
    certs = _load_certificates(pem, what)
    if len(certs) != 1:
        raise ValueError(
            f"{what}: holds {len(certs)} certificates; pin the peer's own certificate only (every certificate "
            "in the file would be trusted, so a chain or a CA there would let others pass as the peer)"
        )
    if can_sign_certificates(certs[0]):
        raise ValueError(
            f"{what}: is a CA certificate (it can sign certificates); pin the peer's own certificate, not its "
            "issuer (everything the CA signs for the peer's name would be trusted)"
        )
    return certs[0]


def fingerprint(certificate: bytes | x509.Certificate) -> bytes:
    """SHA-256 (FIPS 180-4) of the certificate's DER encoding; accepts PEM bytes or a parsed certificate."""
    cert = (
        certificate
        if isinstance(certificate, x509.Certificate)
        else _load_certificates(certificate, "cert")[0]
    )
    return hashlib.sha256(cert.public_bytes(serialization.Encoding.DER)).digest()


def certificate_name(certificate: bytes) -> str:
    """The first DNS name of the certificate's subject alternative names, else its common name."""
    cert = _load_certificates(certificate, "certificate")[0]
    try:
        names = cert.extensions.get_extension_for_class(x509.SubjectAlternativeName).value
        dns = names.get_values_for_type(x509.DNSName)
        if dns:
            return str(dns[0])
    except x509.ExtensionNotFound:
        pass
    common = cert.subject.get_attributes_for_oid(NameOID.COMMON_NAME)
    if not common:
        raise ValueError("certificate has neither a DNS subject alternative name nor a common name")
    return str(common[0].value)


@dataclass(frozen=True)
class NodeTLS:
    """This node's TLS identity and the peer certificates it pins.

    ``certificate_chain`` is this node's certificate (PEM, optionally followed by intermediates), ``private_key``
    its key (PEM, unencrypted), ``pinned_peers`` the PEM certificates of the peers this node accepts.
    """

    certificate_chain: bytes
    private_key: bytes
    pinned_peers: tuple[bytes, ...]
    _fingerprints: frozenset[bytes] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        _load_certificates(self.certificate_chain, "node certificate")
        try:
            serialization.load_pem_private_key(bytes(self.private_key), password=None)
        except (TypeError, ValueError) as exc:
            raise ValueError(
                f"node private key: not an unencrypted PEM private key ({type(exc).__name__})"
            ) from None
        peers = tuple(self.pinned_peers)
        if not peers:
            raise ValueError("pinned_peers: at least one peer certificate must be pinned")
        prints = set()
        for i, pem in enumerate(peers):
            prints.add(fingerprint(pinned_certificate(pem, f"pinned peer certificate {i}")))
        object.__setattr__(self, "pinned_peers", peers)
        object.__setattr__(self, "_fingerprints", frozenset(prints))

    @property
    def pinned_fingerprints(self) -> frozenset[bytes]:
        return self._fingerprints

    def _trust_anchors(self) -> bytes:
        return b"".join(pem if pem.endswith(b"\n") else pem + b"\n" for pem in self.pinned_peers)

    def server_credentials(self) -> grpc.ServerCredentials:
        """Server side: present this node's certificate, require a client certificate verified by the pins."""
        return grpc.ssl_server_credentials(
            [(self.private_key, self.certificate_chain)],
            root_certificates=self._trust_anchors(),
            require_client_auth=True,
        )

    def channel_credentials(self, peer_fingerprint: bytes | None = None) -> grpc.ChannelCredentials:
        """Client side: verify the server against the one pinned certificate, present this node's certificate.

        ``peer_fingerprint`` (SHA-256 of the DER) is the certificate the caller expects the server to present; the
        credentials are refused (``ValueError``) if the pinned certificate is another one.
        """
        if len(self.pinned_peers) != 1:
            raise ValueError(
                f"a client pins exactly one server certificate; this NodeTLS pins {len(self.pinned_peers)}"
            )
        if peer_fingerprint is not None and peer_fingerprint not in self._fingerprints:
            raise ValueError(
                f"the pinned server certificate is not the one expected (SHA-256 {peer_fingerprint.hex()[:16]}…)"
            )
        return grpc.ssl_channel_credentials(
            root_certificates=self._trust_anchors(),
            private_key=self.private_key,
            certificate_chain=self.certificate_chain,
        )

    def server_name(self) -> str:
        """The name the client expects in the server's certificate: that of the single pinned peer."""
        if len(self.pinned_peers) != 1:
            raise ValueError(
                f"{len(self.pinned_peers)} peers are pinned: give the server name to connect to explicitly"
            )
        return certificate_name(self.pinned_peers[0])


def check_peer(auth_context: Mapping[str, Iterable[bytes]], pinned: Iterable[bytes]) -> bytes:
    """The peer's certificate fingerprint, after checking TLS 1.3 and pinning; raises ``PeerRefused``."""
    if list(auth_context.get("transport_security_type", [])) != [b"ssl"]:
        raise PeerRefused("the connection is not protected by TLS")
    versions = list(auth_context.get("ssl_tls_version", []))
    if versions != [REQUIRED_TLS_VERSION]:
        shown = b",".join(versions).decode(errors="replace") or "not reported"
        raise PeerRefused(f"the connection negotiated TLS version {shown}; TLS 1.3 is required")
    certs = list(auth_context.get("x509_pem_cert", []))
    if len(certs) != 1:
        raise PeerRefused("the peer presented no client certificate")
    try:
        got = fingerprint(bytes(certs[0]))
    except ValueError:
        raise PeerRefused("the peer's certificate could not be read") from None
    if got not in set(pinned):
        raise PeerRefused(f"the peer's certificate (SHA-256 {got.hex()[:16]}…) is not pinned by this node")
    return got
