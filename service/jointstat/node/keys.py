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

A running node's keys are read here too, and only here: ``load_node_keys`` reads each secret file of a node config
once (owner-only, it must parse; the TLS key must match the certificate) and the peers' public files, and gives the
``NodeKeys`` the node holds — its signing key, its server TLS pinning every peer, and per peer a ``PeerIdentity``
(address, client TLS pinning that peer alone, certificate fingerprint, signing public key). ``secret_problems``
and ``file_problems`` are the same reads as checks for ``node check`` (``NodeConfig.secret_problems`` /
``file_problems``): every problem named by its field path and file, never a secret's content.
``session_signing`` gives a session the node's ``sign`` and ``verify``.
"""

from __future__ import annotations

import base64
import hashlib
import os
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING

from cryptography import x509
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from jointstat import statements
from jointstat.audit.records import node_name_ok, raw_public_key
from jointstat.node.config import ConfigError, NodeConfig
from jointstat.node.secrets import SecretFileError, ensure_private_dir, read_secret_file, write_private_file
from jointstat.problems import Problem
from jointstat.statements import TRANSCRIPT, Statement
from jointstat.transport import pki
from jointstat.transport.tls import NodeTLS, pinned_certificate
from jointstat.transport.tls import fingerprint as certificate_fingerprint

if TYPE_CHECKING:
    from jointstat.audit.log import SessionLog
    from jointstat.protocol.session import Sign, Verify

CA_CERT = "ca.cert.pem"
CA_KEY = "ca.key.pem"
ORGANISATION = "jointstat trial"
MIN_KEY_SECRET_BYTES = 16  # the rule jointstat.circuit.inputs applies to the key-hashing secret
MIN_CONSOLE_TOKEN_CHARS = 32


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
        written.append(replace(files, tls_key=key_path, tls_cert=cert_path))
    return KeySet(nodes=written, ca_cert=ca_cert_path, ca_key=ca_key_path)


# -- a running node's keys -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PeerIdentity:
    """A configured peer as this node knows it (see the module docstring)."""

    name: str
    address: str
    tls: NodeTLS  # client side: pins this peer only
    fingerprint: bytes
    certificate_der: bytes
    signing_key: Ed25519PublicKey


@dataclass(frozen=True)
class NodeKeys:
    """What the node holds after reading its key files."""

    signing_key: Ed25519PrivateKey
    server_tls: NodeTLS  # pins every peer
    peers: dict[str, PeerIdentity]
    key_secret: bytes | None

    def peer_by_fingerprint(self, value: bytes) -> PeerIdentity | None:
        for peer in self.peers.values():
            if peer.fingerprint == value:
                return peer
        return None


def load_node_keys(config: NodeConfig) -> NodeKeys:
    """Read the node's secrets (each once) and its peers' public files; raises ``ConfigError`` listing every secret
    problem, ``ValueError`` for a pinned peer certificate that cannot be used."""
    found = _read_secrets(config)
    if found.problems:
        raise ConfigError(config.source, found.problems)
    assert found.tls_key is not None and found.signing_key is not None
    own_cert = config.tls.certificate.read_bytes()
    peer_certs = {p.name: p.certificate.read_bytes() for p in config.peers}
    peers = {}
    for p in config.peers:
        pem = peer_certs[p.name]
        cert = pinned_certificate(pem, f"peer {p.name}: {p.certificate}")
        if p.certificate_sha256 is not None and certificate_fingerprint(cert).hex() != p.certificate_sha256:
            raise ValueError(f"peer {p.name}: {p.certificate} is not the certificate of certificate_sha256")
        peers[p.name] = PeerIdentity(
            name=p.name,
            address=str(p.address),
            tls=NodeTLS(own_cert, found.tls_key, (pem,)),
            fingerprint=certificate_fingerprint(cert),
            certificate_der=cert.public_bytes(serialization.Encoding.DER),
            signing_key=load_public_key(p.signing_public_key),
        )
    return NodeKeys(
        signing_key=found.signing_key,
        server_tls=NodeTLS(own_cert, found.tls_key, tuple(peer_certs.values())),
        peers=peers,
        key_secret=found.key_secret,
    )


def session_signing(
    session_log: SessionLog, key: Ed25519PrivateKey, peer_key: Ed25519PublicKey, sid: str
) -> tuple[Sign, Verify]:
    """A session's ``sign`` and ``verify`` on a node: its hello signed with the node's key, its transcript signed by
    the session log (which records the digest and the signature as the finish frame is made), the peer's checked
    against ``peer_key``; both refuse statements of any session but ``sid`` (``jointstat.statements``)."""

    def sign(statement: Statement) -> bytes:
        if statement.session != sid:
            raise ValueError("asked to sign a statement of another session")
        if statement.kind == TRANSCRIPT:
            return session_log.transcript(sid, statement.digest)
        return statements.sign(key, statement)

    def verify(signature: bytes, statement: Statement) -> bool:
        return statement.session == sid and statements.signature_ok(peer_key, statement, signature)

    return sign, verify


# -- checking a node config's key files ------------------------------------------------------------------------


@dataclass
class _Secrets:
    """A node config's secrets as read, and every problem found reading them."""

    tls_key: bytes | None = None
    signing_key: Ed25519PrivateKey | None = None
    key_secret: bytes | None = None
    problems: list[Problem] = field(default_factory=list)


def secret_problems(config: NodeConfig) -> list[Problem]:
    """Each secret file must exist, be owner-only and parse; the TLS key must match the certificate."""
    return _read_secrets(config).problems


def _read_secrets(config: NodeConfig) -> _Secrets:
    found = _Secrets()
    problems = found.problems
    try:
        found.tls_key = read_tls_key(config.tls.private_key)
    except SecretFileError as exc:
        problems.append(Problem("tls.private_key", str(exc)))
    else:
        try:
            cert = x509.load_pem_x509_certificate(config.tls.certificate.read_bytes())
        except (OSError, ValueError):
            pass  # reported by file_problems
        else:
            if not _key_matches(found.tls_key, cert):
                problems.append(
                    Problem("tls.private_key", f"{config.tls.private_key}: is not the key of tls.certificate")
                )
    try:
        found.signing_key = load_signing_key(config.signing_key)
    except SecretFileError as exc:
        problems.append(Problem("signing_key", str(exc)))
    if config.key_hashing_secret is not None:
        try:
            found.key_secret = read_secret_file(config.key_hashing_secret, "key-hashing secret")
        except SecretFileError as exc:
            problems.append(Problem("key_hashing_secret", str(exc)))
        else:
            if len(found.key_secret) < MIN_KEY_SECRET_BYTES:
                problems.append(
                    Problem(
                        "key_hashing_secret",
                        f"{config.key_hashing_secret}: must hold at least {MIN_KEY_SECRET_BYTES} bytes",
                    )
                )
    problems += _console_token_problems(config)
    for i, job in enumerate(config.jobs):
        sql = job.input.sql
        if sql is not None and sql.password_file is not None:
            try:
                if not read_secret_file(sql.password_file, "database password").strip():
                    problems.append(
                        Problem(f"jobs[{i}].input.sql.password_file", f"{sql.password_file}: is empty")
                    )
            except SecretFileError as exc:
                problems.append(Problem(f"jobs[{i}].input.sql.password_file", str(exc)))
    return found


def _console_token_problems(config: NodeConfig) -> list[Problem]:
    """A configured console token file must exist; the default one is made at first start if missing."""
    node = config.node
    if node.console is None:
        return []
    path = node.console_token_path()
    field = "node.console_token_file" if node.console_token_file is not None else "node.console"
    if node.console_token_file is None and not path.exists():
        return []
    try:
        data = read_secret_file(path, "console login token")
    except SecretFileError as exc:
        return [Problem(field, str(exc))]
    problem = console_token_problem(data)
    return [] if problem is None else [Problem(field, f"{path}: {problem}")]


def console_token_problem(data: bytes) -> str | None:
    """What is wrong with a console token file's content (one line of printable ASCII, long enough), or None."""
    try:
        text = data.decode("ascii").removesuffix("\n")
    except UnicodeDecodeError:
        return "the login token must be printable ASCII text"
    if not text.isprintable() or any(c.isspace() for c in text):
        return "the login token must be one line of printable ASCII without spaces"
    if len(text) < MIN_CONSOLE_TOKEN_CHARS:
        return f"the login token must be at least {MIN_CONSOLE_TOKEN_CHARS} characters long"
    return None


def file_problems(config: NodeConfig, now: datetime | None = None) -> list[Problem]:
    """The public files: certificates parse and are valid at ``now``, pins match, keys load, manifests exist."""
    moment = now or datetime.now(UTC)
    problems = []
    problem = _certificate_problem(config.tls.certificate, moment)
    if problem is not None:
        problems.append(Problem("tls.certificate", problem))
    for i, peer in enumerate(config.peers):
        problem = _certificate_problem(peer.certificate, moment, pinned=True)
        if problem is not None:
            problems.append(Problem(f"peers[{i}].certificate", problem))
        elif peer.certificate_sha256 is not None:
            got = certificate_fingerprint(peer.certificate.read_bytes()).hex()
            if got != peer.certificate_sha256:
                problems.append(
                    Problem(
                        f"peers[{i}].certificate_sha256",
                        f"does not match {peer.certificate} (its SHA-256 is {got})",
                    )
                )
        try:
            load_public_key(peer.signing_public_key)
        except SecretFileError as exc:
            problems.append(Problem(f"peers[{i}].signing_public_key", str(exc)))
    for i, job in enumerate(config.jobs):
        if not job.manifest.is_file():
            problems.append(Problem(f"jobs[{i}].manifest", f"{job.manifest}: no such file"))
    for field_name in ("data_dir", "results_dir"):
        path = getattr(config.node, field_name)
        if path.exists() and not path.is_dir():
            problems.append(Problem(f"node.{field_name}", f"{path}: exists and is not a directory"))
    return problems


def _key_matches(key_pem: bytes, cert: x509.Certificate) -> bool:
    key = serialization.load_pem_private_key(key_pem, password=None)
    spki = serialization.Encoding.DER, serialization.PublicFormat.SubjectPublicKeyInfo
    return bool(key.public_key().public_bytes(*spki) == cert.public_key().public_bytes(*spki))


def _certificate_problem(path: Path, now: datetime, *, pinned: bool = False) -> str | None:
    """What is wrong with a certificate file, or None; a ``pinned`` peer file must be one non-CA certificate."""
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        return f"{path}: no such file"
    except OSError as exc:
        return f"{path}: cannot read ({exc.strerror})"
    if b"PRIVATE KEY" in data:
        return f"{path}: holds a private key; name the certificate file"
    try:
        cert = x509.load_pem_x509_certificate(data)
    except ValueError:
        return f"{path}: not a PEM certificate"
    if pinned:
        try:
            cert = pinned_certificate(data, str(path))
        except ValueError as exc:
            return str(exc)
    if now < cert.not_valid_before_utc:
        return f"{path}: not valid before {cert.not_valid_before_utc:%Y-%m-%d %H:%M} UTC"
    if now >= cert.not_valid_after_utc:
        return f"{path}: expired on {cert.not_valid_after_utc:%Y-%m-%d %H:%M} UTC"
    return None
