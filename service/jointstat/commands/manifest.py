"""``jointstat manifest schema|check|digest`` and ``jointstat plan``."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING

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
    from jointstat.circuit.plan import LimitError, check_limits, memory_bytes

    compiled = _compile(args.file)
    m = compiled.manifest
    size = compiled.size()
    print(f"{args.file}: ok — job {m.job.name} version {m.job.version}, statistic {compiled.statistic.name}")
    print(
        f"  program: {size.and_gates:,} AND gates, {size.xor_gates + size.not_gates:,} free XOR/NOT gates,"
        f" about {_size(memory_bytes(compiled))} of memory per party"
    )
    for role in ("garbler", "evaluator"):
        names = getattr(m.outputs, role)
        print(
            f"  {role} ({getattr(m.parties, role).name}) receives: {', '.join(['withheld', *names]) if names else '—'}"
        )
    if m.disclosure.min_count:
        print(f"  disclosure: every result withheld below a count of {m.disclosure.min_count}")
    line = _false_matches_line(m)
    if line is not None:
        print(f"  {line}")
    try:
        check_limits(compiled)
    except LimitError as exc:
        raise UserError(str(exc)) from None
    return 0


def _digest(args: argparse.Namespace) -> int:
    print(_compile(args.file).digest)
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
    rows = max(manifest.tables.garbler.capacity, manifest.tables.evaluator.capacity)
    if rows > BIG_PLAN_ROWS:
        print(
            f"jointstat plan: tables of up to {rows:,} rows a side; counting the program first takes time and memory"
            " in proportion (seconds to minutes, up to a few GiB); the figures below include what it took",
            file=sys.stderr,
            flush=True,
        )
    compiled = compile_manifest(manifest)
    base_ot_seconds, ot_per_s = measured_ot_speed()
    speed = dataclasses.replace(measured_speed(), base_ot_seconds=base_ot_seconds, ot_per_s=ot_per_s)
    figures = plan(compiled, rate, speed, rtt)
    figures["planner_seconds"] = round(
        time.perf_counter() - started, 6
    )  # counting, measuring speeds, all of it
    figures["planner_peak_memory_bytes"] = round(peak_rss_mib() * 2**20)
    matching = key_matching(compiled.manifest)
    figures["expected_false_matches"] = None if matching is None else matching.expected
    figures["max_false_matches"] = compiled.manifest.matching.max_false_matches
    refused = None
    try:
        check_limits(compiled, est_seconds=float(figures["est_seconds"]))  # type: ignore[arg-type]
    except LimitError as exc:
        refused = str(exc)
    figures["refused"] = refused
    if args.json:
        json.dump(figures, sys.stdout)
        sys.stdout.write("\n")
        if refused:
            print(f"jointstat: {refused}", file=sys.stderr)
            return 2
        return 0
    print(
        f"plan for {args.file} (job {figures['job']}, statistic {figures['statistic']}) at {args.bandwidth}"
    )
    rows = [
        ("AND gates", f"{figures['and_gates']:,}"),
        ("XOR/NOT gates (free)", f"{figures['xor_gates']:,}"),
        ("AND depth (at most)", f"{figures['and_depth']:,}"),
        ("oblivious transfers", f"{figures['ot_count']:,}"),
        ("garbler → evaluator", _size(int(figures["bytes_garbler_to_evaluator"]))),  # type: ignore[arg-type]
        ("evaluator → garbler", _size(int(figures["bytes_evaluator_to_garbler"]))),  # type: ignore[arg-type]
        ("memory per party", _size(int(figures["memory_bytes"]))),  # type: ignore[arg-type]
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
            f"{figures['planner_seconds']:,.2f} s and {_size(int(figures['planner_peak_memory_bytes']))} of memory (peak)",
        ),  # type: ignore[arg-type]
    ]
    width = max(len(k) for k, _ in rows)
    for key, value in rows:
        print(f"  {key:<{width}}  {value}")
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
