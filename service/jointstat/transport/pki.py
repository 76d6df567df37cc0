"""A small private PKI for tests, benchmarks and first set-ups: a CA and node certificates, via ``cryptography``.

Theory of operation: ``new_ca`` makes a self-signed CA certificate (basic constraints CA, path length 0);
``issue`` makes a node certificate signed by it whose subject alternative names carry the node's DNS name and
its IP addresses, valid for both TLS server and client authentication (mutual TLS). Keys are ECDSA P-256.
Each node then pins its peer's certificate (``node_tls``): the CA itself is not a trust anchor of the transport.
"""

from __future__ import annotations

import datetime
import ipaddress
from collections.abc import Sequence
from dataclasses import dataclass

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

from jointstat.transport.tls import NodeTLS


@dataclass(frozen=True)
class Issued:
    """A certificate and its private key, both PEM."""

    certificate: bytes
    private_key: bytes

    def load_certificate(self) -> x509.Certificate:
        return x509.load_pem_x509_certificate(self.certificate)

    def load_key(self) -> ec.EllipticCurvePrivateKey:
        key = serialization.load_pem_private_key(self.private_key, password=None)
        assert isinstance(key, ec.EllipticCurvePrivateKey)
        return key


def _pem_key(key: ec.EllipticCurvePrivateKey) -> bytes:
    return key.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    )


def _validity(days: int, now: datetime.datetime | None) -> tuple[datetime.datetime, datetime.datetime]:
    """From five minutes before ``now`` (clock skew between nodes) to ``days`` days after it."""
    start = now or datetime.datetime.now(datetime.UTC)
    return start - datetime.timedelta(minutes=5), start + datetime.timedelta(days=days)


def _subject(common_name: str, organisation: str | None) -> x509.Name:
    attrs = [x509.NameAttribute(NameOID.ORGANIZATION_NAME, organisation)] if organisation else []
    return x509.Name([*attrs, x509.NameAttribute(NameOID.COMMON_NAME, common_name)])


def _key_usage(*, ca: bool) -> x509.KeyUsage:
    return x509.KeyUsage(
        digital_signature=True,
        content_commitment=False,
        key_encipherment=False,
        data_encipherment=False,
        key_agreement=False,
        key_cert_sign=ca,
        crl_sign=ca,
        encipher_only=False,
        decipher_only=False,
    )


def new_ca(
    name: str, *, days: int = 365, now: datetime.datetime | None = None, organisation: str | None = None
) -> Issued:
    """A fresh self-signed P-256 CA named ``name``, valid from ``now`` (default: the current time)."""
    key = ec.generate_private_key(ec.SECP256R1())
    subject = _subject(name, organisation)
    start, end = _validity(days, now)
    cert = (
        x509.CertificateBuilder()
        .subject_name(subject)
        .issuer_name(subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(start)
        .not_valid_after(end)
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(_key_usage(ca=True), critical=True)
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False)
        .sign(key, hashes.SHA256())
    )
    return Issued(cert.public_bytes(serialization.Encoding.PEM), _pem_key(key))


def issue(
    ca: Issued,
    name: str,
    *,
    dns_names: Sequence[str] = (),
    ip_addresses: Sequence[str] = ("127.0.0.1",),
    days: int = 365,
    now: datetime.datetime | None = None,
    organisation: str | None = None,
) -> Issued:
    """A P-256 node certificate for DNS name ``name`` (plus ``dns_names`` and ``ip_addresses``), signed by ``ca``,
    valid for TLS server and client authentication."""
    ca_cert, ca_key = ca.load_certificate(), ca.load_key()
    key = ec.generate_private_key(ec.SECP256R1())
    start, end = _validity(days, now)
    names: list[x509.GeneralName] = [x509.DNSName(n) for n in (name, *dns_names)]
    names += [x509.IPAddress(ipaddress.ip_address(ip)) for ip in ip_addresses]
    cert = (
        x509.CertificateBuilder()
        .subject_name(_subject(name, organisation))
        .issuer_name(ca_cert.subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(start)
        .not_valid_after(end)
        .add_extension(x509.SubjectAlternativeName(names), critical=False)
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(_key_usage(ca=False), critical=True)
        .add_extension(
            x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH, ExtendedKeyUsageOID.CLIENT_AUTH]),
            critical=False,
        )
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(key.public_key()), critical=False)
        .add_extension(
            x509.AuthorityKeyIdentifier.from_issuer_public_key(ca_key.public_key()), critical=False
        )
        .sign(ca_key, hashes.SHA256())
    )
    return Issued(cert.public_bytes(serialization.Encoding.PEM), _pem_key(key))


def node_tls(own: Issued, *peers: Issued | bytes) -> NodeTLS:
    """The ``NodeTLS`` of a node with identity ``own`` that pins the given peers' certificates."""
    pinned = tuple(p.certificate if isinstance(p, Issued) else p for p in peers)
    return NodeTLS(certificate_chain=own.certificate, private_key=own.private_key, pinned_peers=pinned)
