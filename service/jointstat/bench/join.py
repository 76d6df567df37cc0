"""``jointstat bench join``: build time, peak memory and AND count of a keyed-join sum circuit.

The job: each party holds ``rows`` rows with a 32-bit hashed key; the evaluator's rows also carry a 32-bit
unsigned value; the evaluator receives the sum of the values over the keys both hold (``library.join``). The
circuit is compiled from a manifest made in memory, exactly as a node would compile it. Figures:

* ``and_gates`` — AND gates of the compiled circuit;
* ``expected_and_gates`` — comparators of the bitonic merge × AND gates of one compare-and-swap on the 33-bit
  elements (the key and the invalid bit), the latter measured on a fresh builder;
* ``ratio`` — their quotient (the target is at most 1.2 for 2^16 rows);
* ``build_s`` — wall time of ``compile_manifest`` (the builder and the circuit assembly);
* ``peak_rss_mib`` — the process's peak resident memory after building (``getrusage``).
"""

from __future__ import annotations

import sys
import time

import yaml

from jointstat.bench.report import emit, peak_rss_mib


def join_manifest(rows: int) -> str:
    data = {
        "job": {"name": "bench-join", "version": 1},
        "parties": {"garbler": {"name": "bench garbler"}, "evaluator": {"name": "bench evaluator"}},
        "tables": {
            "garbler": {"capacity": rows, "columns": [{"name": "key", "type": "key", "width": 32}]},
            "evaluator": {
                "capacity": rows,
                "columns": [
                    {"name": "key", "type": "key", "width": 32},
                    {"name": "value", "type": "unsigned", "width": 32},
                ],
            },
        },
        "statistic": {"name": "keyed_join", "key": "key", "value": {"party": "evaluator", "column": "value"}},
        "outputs": {"evaluator": ["sum"]},
        # A circuit built to be measured, never run: 32-bit keys at up to 2^20 rows expect up to 256 false
        # matches, far above the default bound a job must meet, so the bound is lifted for it.
        "matching": {"max_false_matches": 1000.0},
    }
    return yaml.safe_dump(data)


def run(rows: int, as_json: bool) -> int:
    from jointstat.circuit.compile import compile_manifest
    from jointstat.circuit.library.blocks import and_per_compare_swap
    from jointstat.circuit.manifest import MAX_CAPACITY, parse_manifest

    if not 1 <= rows <= MAX_CAPACITY:
        print(f"jointstat bench join: --rows must be between 1 and {MAX_CAPACITY}", file=sys.stderr)
        return 2
    manifest = parse_manifest(join_manifest(rows), "<bench join>")
    started = time.perf_counter()
    compiled = compile_manifest(manifest)
    build_s = time.perf_counter() - started
    peak = peak_rss_mib()
    and_gates = compiled.circuit.and_count
    expected = compiled.extra["comparators"] * and_per_compare_swap(compiled.extra["key_bits"])
    emit(
        "keyed-join sum circuit (32-bit keys and values)",
        {
            "rows": rows,
            "and_gates": and_gates,
            "expected_and_gates": expected,
            "ratio": round(and_gates / expected, 4),
            "build_s": round(build_s, 2),
            "peak_rss_mib": round(peak, 1),
            "gates": compiled.circuit.n_gates,
            "comparators": compiled.extra["comparators"],
        },
        as_json,
    )
    return 0
