"""``jointstat audit verify`` and ``jointstat audit compare``: check session logs from the command line.

Exit codes: 0 the log(s) check out; 1 a problem was found (named on stdout); 2 usage or file errors.
"""

from __future__ import annotations

import argparse
import json
from collections import Counter
from pathlib import Path
from typing import TYPE_CHECKING

from jointstat.problems import UserError

if TYPE_CHECKING:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey


def _key(path: str | None) -> Ed25519PublicKey | None:
    if path is None:
        return None
    from jointstat.node.keys import load_public_key
    from jointstat.node.secrets import SecretFileError

    try:
        return load_public_key(path)
    except SecretFileError as exc:
        raise UserError(str(exc)) from None


def _read(path: str) -> bytes:

    try:
        return Path(path).read_bytes()
    except OSError as exc:
        raise UserError(f"{path}: cannot read ({exc.strerror})") from None


def _verify(args: argparse.Namespace) -> int:
    from jointstat.audit.verify import verify_log

    key = _key(args.key)
    report = verify_log(_read(args.log), key, allow_open=args.allow_open)
    if args.json:
        print(json.dumps({"log": args.log, **report.to_dict()}, indent=2))
        return 0 if report.ok else 1
    if report.problem is not None:
        if report.problem.check in ("unclosed", "open"):
            print(f"{args.log}: the log's end is not closed: {report.problem}")
            print(f"{args.log}: its {report.records} records verify")
        else:
            print(f"{args.log}: first bad record at {report.problem}")
            print(f"{args.log}: the {report.records} records before it verify")
        return 1
    outcomes = Counter(s.outcome for s in report.sessions.values())
    summary = ", ".join(f"{n} {what}" for what, n in sorted(outcomes.items())) or "none"
    pinned = "pinned key" if key is not None else "key from its log_opened record"
    print(
        f"{args.log}: ok — {report.records} records by node {report.node}, chain and signatures verify ({pinned})"
    )
    print(f"  public key {report.public_key}")
    print(f"  sessions: {len(report.sessions)} ({summary})")
    if report.ends_with_checkpoint:
        print(
            f"  ends with a signed checkpoint: {report.records - 1} records before it, head {report.last_hash}"
            " (note both: a later copy of this log must contain them)"
        )
    else:
        since = f"line {report.last_checkpoint}" if report.last_checkpoint is not None else "none"
        print(f"  does not end with a checkpoint (allowed by --allow-open; the last is at {since}):")
        print("  records after the last checkpoint are not protected against removal")
    if report.recovered:
        lines = ", ".join(str(n) for n in report.recovered)
        print(
            f"  reopened after it was not closed at line(s) {lines}: records written just before may have been lost"
            " (a crash) or removed"
        )
    return 0


def _compare(args: argparse.Namespace) -> int:
    from jointstat.audit.verify import compare_logs

    mine_key, theirs_key = _key(args.my_key), _key(args.their_key)
    report = compare_logs(
        _read(args.mine),
        _read(args.theirs),
        mine_key=mine_key,
        theirs_key=theirs_key,
        allow_open=args.allow_open,
    )
    if args.json:
        print(json.dumps(report.to_dict(), indent=2))
        return 0 if report.ok else 1
    print(
        f"{args.mine} (node {report.mine.node}) vs {args.theirs} (node {report.theirs.node}): "
        f"{len(report.matched)} sessions in both, {len(report.only_mine)} only in mine, "
        f"{len(report.only_theirs)} only in theirs"
    )
    for line in report.problems:
        print(f"  problem: {line}")
    for line in report.notes:
        print(f"  note: {line}")
    if report.ok:
        print("  ok — both logs attest to the same transcripts for every shared session")
        return 0
    return 1


def add_commands(sub: argparse._SubParsersAction) -> None:
    audit = sub.add_parser("audit", help="verify and cross-check signed session logs")
    which = audit.add_subparsers(dest="what", required=True, metavar="WHAT")

    verify = which.add_parser(
        "verify", help="check a log's hash chain and signatures; name the first bad record"
    )
    verify.add_argument("log", metavar="LOG", help="session log (JSON Lines)")
    verify.add_argument("--key", metavar="FILE", help="the node's public key (PEM); default: the log's own")
    verify.add_argument("--json", action="store_true", help="print one JSON object")
    verify.add_argument(
        "--allow-open",
        action="store_true",
        help="accept a log that does not end with a checkpoint or leaves a session open (a running node's)",
    )
    verify.set_defaults(handler=_verify)

    compare = which.add_parser("compare", help="check that two nodes' logs attest to the same sessions")
    compare.add_argument("mine", metavar="MINE", help="this node's session log")
    compare.add_argument("theirs", metavar="THEIRS", help="the peer node's session log")
    compare.add_argument("--my-key", metavar="FILE", help="pin this node's public key (PEM)")
    compare.add_argument("--their-key", metavar="FILE", help="pin the peer's public key (PEM)")
    compare.add_argument("--json", action="store_true", help="print one JSON object")
    compare.add_argument(
        "--allow-open",
        action="store_true",
        help="accept logs of running nodes (see audit verify --allow-open)",
    )
    compare.set_defaults(handler=_compare)
