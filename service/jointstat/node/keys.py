"""A node's keys: its Ed25519 log-signing key and, for local trials, a private CA with a TLS certificate per node.

Theory of operation: the signing key (Ed25519, RFC 8032) signs the node's session-log records and its transcript
attestations; it is stored as unencrypted PKCS #8 PEM in an owner-only file and its public half as
SubjectPublicKeyInfo PEM, which the peer organisation pins. Loading a private key goes through
``secrets.read_secret_file``, so a key readable by group or others is refused.

For a trial on one machine, :func:`init_trial` makes a private certificate authority (ECDSA P-256, self-signed,
``CA:TRUE, pathlen:0``) and for each node a P-256 TLS key and an X.509 certificate signed by it (RFC 5280) with
subject alternative names ``DNS:<node>``, ``DNS:localhost`` and ``IP:127.0.0.1`` and both server and client
authentication usages, for mutual TLS between the nodes. P-256 with ECDSA-SHA256 is accepted by every TLS stack
gRPC uses. A real deployment uses the organisations' own PKI instead; the CA key should then never exist.

All files are written owner-only and atomically; existing files are refused unless ``force`` is given, and the
whole set is checked before anything is written, so a refused run leaves nothing half-made.

File layout in the output directory: ``<node>.signing.key.pem``, ``<node>.signing.pub.pem``, and with a trial CA
also ``ca.cert.pem``, ``ca.key.pem``, ``<node>.tls.key.pem``, ``<node>.tls.cert.pem``.
"""

from __future__ import annotations

import base64
import hashlib
import os
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from cryptography import x509
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat.audit.records import node_name_ok, raw_public_key
from jointstat.node.secrets import SecretFileError, ensure_private_dir, read_secret_file, write_private_file
from jointstat.transport import pki

CA_CERT = "ca.cert.pem"
CA_KEY = "ca.key.pem"
ORGANISATION = "jointstat trial"


def signing_key_file(node: str) -> str:
    return f"{node}.signing.key.pem"


def signing_public_file(node: str) -> str:
    return f"{node}.signing.pub.pem"


def tls_key_file(node: str) -> str:
    return f"{node}.tls.key.pem"


def tls_cert_file(node: str) -> str:
    return f"{node}.tls.cert.pem"


def check_node_name(node: str) -> str:
    if not node_name_ok(node):
        raise SecretFileError(
            f"node name {node[:70]!r}: use lower-case letters, digits, '-' and '.' (DNS style, at most 63)"
        )
    return node


# -- signing keys ----------------------------------------------------------------------------------------------


def generate_signing_key() -> Ed25519PrivateKey:
    return Ed25519PrivateKey.generate()


def signing_key_pem(key: Ed25519PrivateKey) -> bytes:
    """Unencrypted PKCS #8 PEM."""
    return key.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    )


def public_key_pem(key: Ed25519PublicKey | Ed25519PrivateKey) -> bytes:
    """SubjectPublicKeyInfo PEM of the public key (of a private key's public half)."""
    if isinstance(key, Ed25519PrivateKey):
        key = key.public_key()
    return key.public_bytes(serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo)


def fingerprint(key: Ed25519PublicKey | Ed25519PrivateKey) -> str:
    """SHA-256 of the raw 32-byte public key, hex, for reading aloud over the phone."""
    return hashlib.sha256(raw_public_key(key)).hexdigest()


def load_signing_key(path: str | os.PathLike[str]) -> Ed25519PrivateKey:
    """The node's Ed25519 signing key from an owner-only PKCS #8 PEM file."""
    data = read_secret_file(path, "signing key")
    try:
        key = serialization.load_pem_private_key(data, password=None)
    except (ValueError, TypeError):
        raise SecretFileError(f"signing key {path}: not an unencrypted PEM private key") from None
    if not isinstance(key, Ed25519PrivateKey):
        raise SecretFileError(f"signing key {path}: not an Ed25519 key")
    return key


def load_public_key(path: str | os.PathLike[str]) -> Ed25519PublicKey:
    """An Ed25519 public key from a PEM file, or from a file holding the base64 form used in logs."""
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise SecretFileError(f"public key {path}: cannot read ({exc.strerror})") from None
    if b"PRIVATE KEY" in data:
        raise SecretFileError(f"public key {path}: holds a private key; pass the .pub.pem file")
    try:
        if data.lstrip().startswith(b"-----BEGIN"):
            key = serialization.load_pem_public_key(data)
        else:
            key = Ed25519PublicKey.from_public_bytes(base64.b64decode(data.strip(), validate=True))
    except (ValueError, TypeError):
        raise SecretFileError(f"public key {path}: not a PEM or base64 Ed25519 public key") from None
    if not isinstance(key, Ed25519PublicKey):
        raise SecretFileError(f"public key {path}: not an Ed25519 key")
    return key


def read_tls_key(path: str | os.PathLike[str]) -> bytes:
    """PEM bytes of an owner-only TLS private key file, checked to parse (what gRPC's credentials take)."""
    data = read_secret_file(path, "TLS key")
    try:
        serialization.load_pem_private_key(data, password=None)
    except (ValueError, TypeError):
        raise SecretFileError(f"TLS key {path}: not an unencrypted PEM private key") from None
    return data


# -- trial CA and TLS certificates ------------------------------------------------------------------------------


def _issued(key: ec.EllipticCurvePrivateKey, cert: x509.Certificate) -> pki.Issued:
    return pki.Issued(cert.public_bytes(serialization.Encoding.PEM), _tls_key_pem(key))


def _tls_key_pem(key: ec.EllipticCurvePrivateKey) -> bytes:
    return key.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    )


def make_ca(now: datetime, days: int) -> tuple[ec.EllipticCurvePrivateKey, x509.Certificate]:
    """A self-signed P-256 CA certificate valid from ``now`` (less 5 minutes of skew) for ``days`` days."""
    ca = pki.new_ca("jointstat trial CA", days=days, now=now, organisation=ORGANISATION)
    return ca.load_key(), ca.load_certificate()


def issue_node_certificate(
    ca_key: ec.EllipticCurvePrivateKey, ca_cert: x509.Certificate, node: str, now: datetime, days: int
) -> tuple[ec.EllipticCurvePrivateKey, x509.Certificate]:
    """A P-256 TLS key and a certificate for ``node`` (and localhost, 127.0.0.1; server and client auth), signed by
    the trial CA."""
    check_node_name(node)
    leaf = pki.issue(
        _issued(ca_key, ca_cert),
        node,
        dns_names=("localhost",),
        ip_addresses=("127.0.0.1",),
        days=days,
        now=now,
        organisation=ORGANISATION,
    )
    return leaf.load_key(), leaf.load_certificate()


# -- writing key sets ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class NodeKeyFiles:
    node: str
    signing_key: Path
    signing_public: Path
    public_key: str  # base64 of the raw key, as in the node's log_opened record
    fingerprint: str
    tls_key: Path | None = None
    tls_cert: Path | None = None


@dataclass(frozen=True)
class KeySet:
    nodes: list[NodeKeyFiles]
    ca_cert: Path | None = None
    ca_key: Path | None = None

    def paths(self) -> list[Path]:
        out = [p for p in (self.ca_cert, self.ca_key) if p is not None]
        for n in self.nodes:
            out += [p for p in (n.signing_key, n.signing_public, n.tls_key, n.tls_cert) if p is not None]
        return out


def _refuse_existing(paths: Sequence[Path], force: bool) -> None:
    if force:
        return
    existing = [str(p) for p in paths if p.exists() or p.is_symlink()]
    if existing:
        raise SecretFileError(f"refusing to overwrite {', '.join(existing)} (use --force to replace)")


def _node_paths(out: Path, node: str, tls: bool) -> list[Path]:
    names = [signing_key_file(node), signing_public_file(node)]
    if tls:
        names += [tls_key_file(node), tls_cert_file(node)]
    return [out / n for n in names]


def _write_signing(out: Path, node: str, force: bool) -> NodeKeyFiles:
    key = generate_signing_key()
    private = write_private_file(out / signing_key_file(node), signing_key_pem(key), overwrite=force)
    public = write_private_file(out / signing_public_file(node), public_key_pem(key), overwrite=force)
    return NodeKeyFiles(
        node=node,
        signing_key=private,
        signing_public=public,
        public_key=base64.b64encode(raw_public_key(key)).decode("ascii"),
        fingerprint=fingerprint(key),
    )


def init_node_keys(out: str | os.PathLike[str], node: str, *, force: bool = False) -> KeySet:
    """Write a fresh signing key pair for ``node`` into ``out`` (created 0700 if missing)."""
    check_node_name(node)
    directory = Path(out)
    _refuse_existing(_node_paths(directory, node, tls=False), force)
    ensure_private_dir(directory)
    return KeySet(nodes=[_write_signing(directory, node, force)])


def init_trial(
    out: str | os.PathLike[str], nodes: Sequence[str], *, now: datetime, days: int = 365, force: bool = False
) -> KeySet:
    """Signing keys for each node plus a private CA and a TLS key and certificate per node, for a local trial."""
    if len(nodes) < 2:
        raise SecretFileError("a trial needs at least two node names (e.g. --nodes alpha,beta)")
    if len(set(nodes)) != len(nodes):
        raise SecretFileError("node names must be distinct")
    if not 1 <= days <= 3650:
        raise SecretFileError(f"certificate lifetime {days} days: must be between 1 and 3650")
    for node in nodes:
        check_node_name(node)
    directory = Path(out)
    planned = [directory / CA_CERT, directory / CA_KEY]
    for node in nodes:
        planned += _node_paths(directory, node, tls=True)
    _refuse_existing(planned, force)
    ensure_private_dir(directory)
    ca_key, ca_cert = make_ca(now, days)
    pem = serialization.Encoding.PEM
    ca_cert_path = write_private_file(directory / CA_CERT, ca_cert.public_bytes(pem), overwrite=force)
    ca_key_path = write_private_file(directory / CA_KEY, _tls_key_pem(ca_key), overwrite=force)
    written = []
    for node in nodes:
        files = _write_signing(directory, node, force)
        tls_key, tls_cert = issue_node_certificate(ca_key, ca_cert, node, now, days)
        key_path = write_private_file(directory / tls_key_file(node), _tls_key_pem(tls_key), overwrite=force)
        cert_path = write_private_file(
            directory / tls_cert_file(node), tls_cert.public_bytes(pem), overwrite=force
        )
        written.append(
            NodeKeyFiles(
                node=files.node,
                signing_key=files.signing_key,
                signing_public=files.signing_public,
                public_key=files.public_key,
                fingerprint=files.fingerprint,
                tls_key=key_path,
                tls_cert=cert_path,
            )
        )
    return KeySet(nodes=written, ca_cert=ca_cert_path, ca_key=ca_key_path)
