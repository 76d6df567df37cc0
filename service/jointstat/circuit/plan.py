"""Cost planning: what a compiled job will cost on the parties' link, before anything runs.

Theory of operation
-------------------
The gate counts and layers come from the compiled circuit and its layer schedule. The traffic is computed from
what the protocol sends (κ = 128, 16-byte labels):

* garbler → evaluator: 32 bytes per AND gate (two half-gates ciphertexts; XOR and NOT are free), 16 bytes per
  garbler input label and per constant label, the OT-extension corrections (16 bytes per evaluator input bit),
  the decoding information for the evaluator's outputs (16 bytes of check tags and one decoding bit each, as
  ``OutputDecoding.to_bytes`` packs them) and the base-OT receiver's points (128 × 32 bytes);
* evaluator → garbler: the IKNP matrix columns (16 bytes per OT, each batch padded to a multiple of 128 OTs),
  the labels of the garbler's outputs (16 bytes each) and the base-OT sender's point (32 bytes).

The time estimate assumes garbling, transfer and evaluation overlap (tables stream while garbling goes on), so the
table phase takes the longest of the three: AND gates at this machine's measured garbling and evaluation speed
(a short real run of ``jointstat.bench.garble``, about a second), and the garbler's bytes at the given bandwidth;
the OT and output bytes are added at the bandwidth. It leaves out network latency, OT-extension computation and
the base OTs' public-key work (tens of milliseconds); both parties are assumed to be as fast as this machine.
"""

from __future__ import annotations

import re
import time
from dataclasses import dataclass

from jointstat.circuit.compile import CompiledStatistic
from jointstat.circuit.model import GateKind, Party

LABEL_BYTES = 16
TABLE_BYTES_PER_AND = 32
BASE_OT_COUNT = 128
POINT_BYTES = 32
OT_BATCH = 1 << 16  # OTs per extension batch (jointstat.ot.extension.DEFAULT_BATCH)
DEFAULT_BANDWIDTH = "100Mbit/s"

_RATE = re.compile(r"\s*(\d+(?:\.\d+)?)\s*([kKMGT]i?)?\s*(bit/s|bps|b/s|B/s|byte/s|bytes/s)\s*")
_PREFIX = {
    None: 1,
    "k": 1e3,
    "K": 1e3,
    "M": 1e6,
    "G": 1e9,
    "T": 1e12,
    "Ki": 2**10,
    "Mi": 2**20,
    "Gi": 2**30,
    "Ti": 2**40,
}


def parse_rate(text: str) -> float:
    """'100Mbit/s', '1Gbit/s', '50MB/s', '2MiB/s' … → bytes per second; ValueError with the accepted forms."""
    m = _RATE.fullmatch(text)
    if not m or m.group(2) in ("ki",):
        raise ValueError(
            f"cannot read the bandwidth {text!r}: write a number, an optional prefix (k, M, G, T or Ki, Mi, Gi, Ti)"
            " and a unit (bit/s or B/s), e.g. 100Mbit/s, 1Gbit/s or 50MB/s"
        )
    value = float(m.group(1)) * _PREFIX[m.group(2)]
    if m.group(3) in ("bit/s", "bps", "b/s"):
        value /= 8
    if value <= 0:
        raise ValueError(f"the bandwidth {text!r} must be more than zero")
    return value


def padded_ots(count: int, batch: int = OT_BATCH) -> int:
    """OTs after padding each extension batch to a multiple of 128."""
    full, rest = divmod(count, batch)
    return full * batch + (-(-rest // 128) * 128)


@dataclass(frozen=True)
class Speed:
    garble_and_per_s: float
    evaluate_and_per_s: float


_speed_cache: list[Speed] = []


def measure_speed(and_gates: int = 1 << 19) -> Speed:
    """Garble and evaluate a wide circuit once (``bench.garble``'s circuit), cached for the process."""
    if not _speed_cache:
        from jointstat.bench.garble import measure, wide_circuit
        from jointstat.circuit.layers import schedule

        layered = schedule(wide_circuit(and_gates, 8192))
        figures = measure(layered, check=False)
        _speed_cache.append(
            Speed(and_gates / max(figures["garble_s"], 1e-9), and_gates / max(figures["evaluate_s"], 1e-9))
        )
    return _speed_cache[0]


def plan(compiled: CompiledStatistic, bandwidth: float, speed: Speed | None = None) -> dict[str, object]:
    """The figures of ``jointstat plan`` (see the module docstring for what they assume)."""
    c = compiled.circuit
    and_gates = c.count(GateKind.AND)
    xor_gates = c.count(GateKind.XOR) + c.count(GateKind.NOT)
    ot_count = c.n_inputs(Party.EVALUATOR)
    ev_out, g_out = c.n_outputs(Party.EVALUATOR), c.n_outputs(Party.GARBLER)
    tables = TABLE_BYTES_PER_AND * and_gates
    ots = padded_ots(ot_count) if ot_count else 0
    base = BASE_OT_COUNT * POINT_BYTES if ot_count else 0
    g_to_e = (
        tables
        + LABEL_BYTES * (c.n_inputs(Party.GARBLER) + 2)
        + LABEL_BYTES * ots
        + (2 * 8 * ev_out + (ev_out + 7) // 8)
        + base
    )
    e_to_g = LABEL_BYTES * ots + LABEL_BYTES * g_out + (POINT_BYTES if ot_count else 0)
    t0 = time.perf_counter()
    layers = compiled.layered.n_layers
    schedule_s = time.perf_counter() - t0
    sp = speed or measure_speed()
    table_phase = max(and_gates / sp.garble_and_per_s, and_gates / sp.evaluate_and_per_s, tables / bandwidth)
    rest = (g_to_e - tables + e_to_g) / bandwidth
    return {
        "job": compiled.manifest.job.name,
        "statistic": compiled.statistic.name,
        "and_gates": and_gates,
        "xor_gates": xor_gates,
        "layers": layers,
        "ot_count": ot_count,
        "bytes_garbler_to_evaluator": g_to_e,
        "bytes_evaluator_to_garbler": e_to_g,
        "est_seconds": round(table_phase + rest + schedule_s, 6),
        "bandwidth_bytes_per_s": bandwidth,
        "garble_and_per_s": round(sp.garble_and_per_s),
        "evaluate_and_per_s": round(sp.evaluate_and_per_s),
        "assumes": (
            "garbling, transfer and evaluation overlap; AND gates at this machine's measured speed on both sides;"
            " bytes at the given bandwidth; plus the layer scheduling measured here; no latency, OT-extension"
            " computation or base-OT public-key work"
        ),
    }
