"""``jointstat manifest schema|check|digest|diff|reference`` and ``jointstat plan``."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from jointstat.exact import decimal_text
from jointstat.problems import UserError

if TYPE_CHECKING:
    from jointstat.circuit.compile import CompiledStatistic
    from jointstat.circuit.manifest import Manifest


def _load(path: str, plugins: list[str] | None = None) -> Manifest:
    from jointstat.circuit.manifest import ManifestError, load_manifest, load_plugins

    if plugins:
        problems = load_plugins(plugins, Path.cwd(), where="--plugin")
        if problems:
            raise UserError("\n".join(str(p) for p in problems))
    try:
        return load_manifest(path)
    except ManifestError as exc:
        raise UserError(str(exc)) from None


def _compile(path: str) -> CompiledStatistic:
    from jointstat.circuit.compile import compile_manifest

    return compile_manifest(_load(path))


def _schema(args: argparse.Namespace) -> int:
    from jointstat.circuit.manifest import load_plugins, schema

    problems = load_plugins(args.plugin or [], Path.cwd(), where="--plugin")
    if problems:
        raise UserError("\n".join(str(p) for p in problems))
    json.dump(schema(), sys.stdout, indent=2, sort_keys=True)
    sys.stdout.write("\n")
    return 0


def _false_matches_line(manifest: Manifest) -> str | None:
    from jointstat.circuit.manifest import key_matching

    f = key_matching(manifest)
    if f is None:
        return None
    return (
        f"false key matches: about {f.expected:.2g} expected at full capacity ({f.garbler_rows:,} × "
        f"{f.evaluator_rows:,} rows, {f.width}-bit key hashes; n_g·n_e/2^w), agreed bound {f.bound:g}"
    )


def _check(args: argparse.Namespace) -> int:
    from jointstat.circuit.manifest import deprecations
    from jointstat.circuit.plan import LimitError, check_limits, memory_bytes

    compiled = _compile(args.file)
    m = compiled.manifest
    size = compiled.size()
    what = "statistic" if len(compiled.parts) == 1 else "statistics"
    print(f"{args.file}: ok — job {m.job.name} version {m.job.version}, {what} {compiled.kinds}")
    print(
        f"  program: {size.and_gates:,} AND gates, {size.xor_gates + size.not_gates:,} free XOR/NOT gates,"
        f" about {_size(memory_bytes(compiled))} of memory per party"
    )
    for role in ("garbler", "evaluator"):
        names = [part.use.address(n) for part in compiled.parts for n in getattr(part.use.outputs, role)]
        print(
            f"  {role} ({getattr(m.parties, role).name}) receives: {', '.join(['withheld', *names]) if names else '—'}"
        )
    for part in compiled.parts:
        rule = part.use.disclosure.min_count
        if rule:
            whose = "every result" if len(compiled.parts) == 1 else f"every output of {part.title}"
            print(f"  disclosure: {whose} withheld below a count of {rule}")
    for address, eps in compiled.noisy_outputs.items():
        print(f"  noise: {address} with discrete Laplace noise at ε = {decimal_text(eps)}")
    if compiled.noisy_outputs:
        print(
            f"  privacy: one run spends ε = {decimal_text(compiled.epsilon())} (the sum over its noisy outputs)"
        )
    line = _false_matches_line(m)
    if line is not None:
        print(f"  {line}")
    for note in deprecations(m):
        print(f"  note: {note}")
    try:
        check_limits(compiled)
    except LimitError as exc:
        raise UserError(str(exc)) from None
    return 0


def _digest(args: argparse.Namespace) -> int:
    print(_compile(args.file).digest)
    return 0


def _diff(args: argparse.Namespace) -> int:
    """Field by field, where two manifests' canonical forms differ; exit 0 when their digests agree, 1 when not."""
    from jointstat.circuit.compile import compile_manifest
    from jointstat.circuit.manifest import canonical_differences

    a, b = _load(args.a), _load(args.b)
    differences = canonical_differences(a, b)
    same_digest = compile_manifest(a).digest == compile_manifest(b).digest
    if args.json:
        json.dump(
            {
                "same_digest": same_digest,
                "differences": [{"field": f, "a": x, "b": y} for f, x, y in differences],
            },
            sys.stdout,
            ensure_ascii=False,
        )
        sys.stdout.write("\n")
        return 0 if same_digest else 1
    if same_digest:
        print(f"{args.a} and {args.b} have the same digest: both describe the same job")
        return 0
    if not differences:
        print(
            f"{args.a} and {args.b} have the same canonical form but different programs: the two nodes run "
            "different versions of jointstat (compare `jointstat --version` on both)"
        )
        return 1
    print(f"{len(differences)} field{'s' if len(differences) != 1 else ''} differ ({args.a} | {args.b}):")
    for path, x, y in differences:
        print(f"  {path}: {_shown(x)} | {_shown(y)}")
    return 1


def _shown(value: object) -> str:
    from jointstat.circuit.manifest import ABSENT

    return "(absent)" if value is ABSENT else json.dumps(value, ensure_ascii=False, sort_keys=True)


def _reference(args: argparse.Namespace) -> int:
    """Write (or with --check compare) the manifest reference page."""
    from jointstat.circuit.reference_page import render

    text = render()
    out = Path(args.out)
    if args.check:
        try:
            current = out.read_text(encoding="utf-8")
        except OSError as exc:
            raise UserError(f"{out}: cannot read the page: {exc.strerror}") from None
        if current != text:
            raise UserError(f"{out} is out of date: run `jointstat manifest reference --out {out}`")
        print(f"{out} is up to date")
        return 0
    tmp = out.with_name(out.name + ".tmp")
    try:
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(out)  # whole or not at all
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise UserError(f"{out}: cannot write the page: {exc.strerror}") from None
    print(f"wrote {out}")
    return 0


BIG_PLAN_ROWS = (
    1 << 16
)  # rows a side above which counting the program itself takes noticeable time and memory


def _plan(args: argparse.Namespace) -> int:
    import dataclasses
    import time

    started = time.perf_counter()
    from jointstat.bench.garble import measured_speed
    from jointstat.bench.ot import measured_ot_speed
    from jointstat.bench.report import peak_rss_mib
    from jointstat.circuit.plan import LimitError, check_limits, parse_rate, plan
    from jointstat.harness.link.settings import parse_duration

    try:
        rate = parse_rate(args.bandwidth)
        rtt = parse_duration(args.rtt)
    except ValueError as exc:
        raise UserError(str(exc)) from None
    from jointstat.circuit.compile import compile_manifest
    from jointstat.circuit.manifest import key_matching

    manifest = _load(args.file)
    capacity = max(manifest.tables.garbler.capacity, manifest.tables.evaluator.capacity)
    if capacity > BIG_PLAN_ROWS:
        print(
            f"jointstat plan: tables of up to {capacity:,} rows a side; counting the program first takes time and memory"
            " in proportion (seconds to minutes, up to a few GiB); the figures below include what it took",
            file=sys.stderr,
            flush=True,
        )
    compiled = compile_manifest(manifest)
    base_ot_seconds, ot_per_s = measured_ot_speed()
    speed = dataclasses.replace(measured_speed(), base_ot_seconds=base_ot_seconds, ot_per_s=ot_per_s)
    figures = plan(compiled, rate, speed, rtt)
    planner_seconds = round(time.perf_counter() - started, 6)  # counting, measuring speeds, all of it
    planner_peak_memory_bytes = round(peak_rss_mib() * 2**20)
    matching = key_matching(compiled.manifest)
    refused = None
    try:
        check_limits(compiled, est_seconds=figures["est_seconds"])
    except LimitError as exc:
        refused = str(exc)
    if args.json:
        report = {
            **figures,
            "planner_seconds": planner_seconds,
            "planner_peak_memory_bytes": planner_peak_memory_bytes,
            "expected_false_matches": None if matching is None else matching.expected,
            "max_false_matches": compiled.manifest.matching.max_false_matches,
            "refused": refused,
        }
        json.dump(report, sys.stdout)
        sys.stdout.write("\n")
        if refused:
            print(f"jointstat: {refused}", file=sys.stderr)
            return 2
        return 0
    several = len(compiled.parts) > 1
    what = "statistics" if several else "statistic"
    print(f"plan for {args.file} (job {figures['job']}, {what} {figures['statistic']}) at {args.bandwidth}")
    rows = [
        ("AND gates", f"{figures['and_gates']:,}"),
        ("XOR/NOT gates (free)", f"{figures['xor_gates']:,}"),
        ("AND depth (at most)", f"{figures['and_depth']:,}"),
        ("oblivious transfers", f"{figures['ot_count']:,}"),
        ("garbler → evaluator", _size(figures["bytes_garbler_to_evaluator"])),
        ("evaluator → garbler", _size(figures["bytes_evaluator_to_garbler"])),
        ("memory per party", _size(figures["memory_bytes"])),
        ("garbling speed here", f"{figures['garble_and_per_s']:,} AND/s"),
        ("estimated time", f"{figures['est_seconds']:,.3f} s, of which"),
        ("  tables", f"{figures['tables_seconds']:,.3f} s (garbling, transfer and evaluation overlapping)"),
        ("  oblivious transfer", f"{figures['ot_seconds']:,.3f} s (base OTs, extension, their bytes)"),
        (
            "  round trips",
            f"{figures['latency_seconds']:,.3f} s ({figures['round_trips']:g} at {args.rtt} round-trip time)",
        ),
        ("  start-up", f"{figures['startup_seconds']:,.3f} s (compiling and counting the program)"),
        (
            "this plan used",
            f"{planner_seconds:,.2f} s and {_size(planner_peak_memory_bytes)} of memory (peak)",
        ),
        ("privacy ε per run", str(figures["epsilon"])),
    ]
    width = max(len(k) for k, _ in rows)
    for key, value in rows:
        print(f"  {key:<{width}}  {value}")
    if several:
        print("  by statistic (AND gates where its work was first done; the release gates apart):")
        parts = figures["statistics"]
        name_width = max(len(p["name"]) for p in parts)
        for p in parts:
            print(
                f"    {p['name']!s:<{name_width}}  {p['kind']!s:<10}  {p['and_gates']:>12,} AND  "
                f"{_size(p['table_bytes']):>24}  ε {p['epsilon']}"
            )
        release = figures["and_gates_release"]
        print(f"    {'release rules':<{name_width}}  {'':<10}  {release:>12,} AND")
    print(f"  assumes: {figures['assumes']}")
    line = _false_matches_line(compiled.manifest)
    if line is not None:
        print(f"  {line}")
    if refused:
        raise UserError(refused)
    return 0


def _size(n: int) -> str:
    for unit, scale in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= scale:
            return f"{n / scale:,.1f} {unit} ({n:,} B)"
    return f"{n:,} B"


def add_commands(sub: argparse._SubParsersAction) -> None:
    manifest = sub.add_parser("manifest", help="check, pin and describe job manifests")
    which = manifest.add_subparsers(dest="manifest_command", required=True, metavar="ACTION")
    schema = which.add_parser("schema", help="print the manifest JSON Schema")
    schema.add_argument("--plugin", action="append", help="a Python file registering custom statistics")
    schema.set_defaults(handler=_schema)
    check = which.add_parser("check", help="validate a manifest, count its program, check it fits the limits")
    check.add_argument("file")
    check.set_defaults(handler=_check)
    digest = which.add_parser("digest", help="print the digest pinning the manifest and its program")
    digest.add_argument("file")
    digest.set_defaults(handler=_digest)

    diff = which.add_parser(
        "diff", help="list the fields where two manifests differ (why their digests differ)"
    )
    diff.add_argument("a", metavar="A")
    diff.add_argument("b", metavar="B")
    diff.add_argument("--json", action="store_true", help="print one JSON object")
    diff.set_defaults(handler=_diff)
    reference = which.add_parser("reference", help="write the manifest reference page (docs/manifest.md)")
    reference.add_argument(
        "--out", default="docs/manifest.md", help="where to write it (default docs/manifest.md)"
    )
    reference.add_argument("--check", action="store_true", help="only say whether the page is up to date")
    reference.set_defaults(handler=_reference)

    plan = sub.add_parser("plan", help="gate counts, traffic and time estimate of a manifest's job")
    plan.add_argument("file")
    plan.add_argument("--bandwidth", default="100Mbit/s", help="link rate, e.g. 100Mbit/s, 1Gbit/s, 50MB/s")
    plan.add_argument(
        "--rtt",
        default="0ms",
        help="round-trip time between the two nodes, e.g. 40ms, 0.2s (default 0ms: same host)",
    )
    plan.add_argument("--json", action="store_true", help="print one JSON object")
    plan.set_defaults(handler=_plan)
