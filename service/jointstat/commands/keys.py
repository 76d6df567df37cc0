"""``jointstat keys init``: a node's signing key, or for a local trial a private CA and keys for several nodes;
``jointstat keys secret``: a key-hashing secret to share with the peer organisation, and its fingerprint."""

from __future__ import annotations

import argparse
import json
from datetime import UTC, datetime

from jointstat.commands import jointstat_command
from jointstat.problems import UserError


def _init(args: argparse.Namespace) -> int:
    from jointstat.node.keys import init_node_keys, init_trial
    from jointstat.node.secrets import SecretFileError

    try:
        if args.trial_ca:
            if args.node is not None:
                raise UserError("--trial-ca takes --nodes NAME,NAME, not --node")
            if not args.nodes:
                raise UserError("--trial-ca needs --nodes NAME,NAME (e.g. --nodes alpha,beta)")
            names = [n.strip() for n in args.nodes.split(",") if n.strip()]
            keyset = init_trial(args.out, names, now=datetime.now(UTC), days=args.days, force=args.force)
        else:
            if args.nodes is not None:
                raise UserError("--nodes is for --trial-ca; for one node use --node NAME")
            keyset = init_node_keys(args.out, args.node or "node", force=args.force)
    except SecretFileError as exc:
        raise UserError(str(exc)) from None
    if args.json:
        out = {
            "files": [str(p) for p in keyset.paths()],
            "nodes": [
                {"node": n.node, "public_key": n.public_key, "fingerprint": n.fingerprint}
                for n in keyset.nodes
            ],
        }
        print(json.dumps(out, indent=2))
        return 0
    for path in keyset.paths():
        print(f"wrote {path} (owner-only)")
    for n in keyset.nodes:
        print(f"node {n.node}: signing public key {n.public_key}")
        print(f"  fingerprint {n.fingerprint} — give {n.signing_public.name} to the peer organisation")
    if keyset.ca_key is not None:
        print(f"trial CA only: {keyset.ca_key.name} can issue certificates; do not use it in production")
        print(
            f"next: a key-hashing secret both nodes share ({jointstat_command()} keys secret --out FILE, then copy it"
            " to the other node owner-only), and a node config for each node (configs/nodes/README.md)"
        )
    else:
        print(
            "a node also needs a TLS certificate and key (tls.certificate, tls.private_key: from your PKI, with the"
            " node's DNS name and both server and client use), the peer's certificate and signing public key, and,"
            f" for identifier columns, the shared key-hashing secret ({jointstat_command()} keys secret); for a trial on one"
            " machine use --trial-ca --nodes A,B instead; see the README's 'Setting up two nodes'"
        )
    return 0


def _secret(args: argparse.Namespace) -> int:
    from jointstat.node.keys import key_secret_fingerprint, read_key_secret, write_key_secret
    from jointstat.node.secrets import SecretFileError

    try:
        if args.fingerprint is not None:
            if args.out is not None:
                raise UserError("give either --out FILE (make a secret) or --fingerprint FILE (check one)")
            fp = key_secret_fingerprint(read_key_secret(args.fingerprint))
            print(f"{args.fingerprint}: fingerprint {fp}")
            return 0
        if args.out is None:
            raise UserError(
                "give --out FILE to make a secret, or --fingerprint FILE to show an existing one's"
            )
        fp = write_key_secret(args.out, force=args.force)
    except SecretFileError as exc:
        raise UserError(str(exc)) from None
    print(f"wrote {args.out} (owner-only): fingerprint {fp}")
    print(
        "copy the file to the peer organisation by a channel you trust (never e-mail); there, keep it owner-only"
        f" (chmod 600) and run {jointstat_command()} keys secret --fingerprint FILE: both operators must read the same"
        " fingerprint"
    )
    return 0


def add_commands(sub: argparse._SubParsersAction) -> None:
    keys = sub.add_parser("keys", help="make a node's signing key (and trial TLS certificates)")
    which = keys.add_subparsers(dest="what", required=True, metavar="WHAT")
    init = which.add_parser(
        "init", help="write a fresh Ed25519 signing key; --trial-ca adds a CA and TLS files"
    )
    init.add_argument("--out", required=True, metavar="DIR", help="directory for the key files (made 0700)")
    init.add_argument("--node", metavar="NAME", help="this node's name (default: node)")
    init.add_argument(
        "--trial-ca", action="store_true", help="also make a private CA and TLS key+cert per node"
    )
    init.add_argument("--nodes", metavar="NAMES", help="comma-separated node names for --trial-ca")
    init.add_argument("--days", type=int, default=365, help="certificate lifetime in days (default 365)")
    init.add_argument("--force", action="store_true", help="replace existing files")
    init.add_argument("--json", action="store_true", help="print one JSON object")
    init.set_defaults(handler=_init)
    secret = which.add_parser(
        "secret",
        help="write a fresh key-hashing secret owner-only and print its fingerprint, or show a secret's fingerprint",
    )
    secret.add_argument(
        "--out", metavar="FILE", help="the file to write (its directory made 0700 if missing)"
    )
    secret.add_argument(
        "--fingerprint", metavar="FILE", help="print the fingerprint of an existing secret file"
    )
    secret.add_argument("--force", action="store_true", help="replace an existing file")
    secret.set_defaults(handler=_secret)
