"""Cost planning: what a compiled job will cost on the parties' link and in memory, before anything runs.

Theory of operation
-------------------
The gate counts, the AND depth bound and the memory come from running the job's program once on the count
backend (``CompiledStatistic.size``; no payload, only shapes and which bits are public). The traffic is computed
from what the protocol sends (κ = 128, 16-byte labels):

* garbler → evaluator: 32 bytes per AND gate (two half-gates ciphertexts; XOR and NOT are free), 16 bytes per
  garbler input label, the OT-extension corrections (16 bytes per evaluator input bit), the decoding information
  for the evaluator's outputs (16 bytes of check tags and one decoding bit each, as ``OutputDecoding.to_bytes``
  packs them) and the base-OT receiver's points (128 × 32 bytes);
* evaluator → garbler: the IKNP matrix columns (16 bytes per OT, each batch padded to a multiple of 128 OTs),
  the labels of the garbler's outputs (16 bytes each) and the base-OT sender's point (32 bytes).

The time estimate has four parts, each reported on its own:

* *tables*: garbling, transfer and evaluation overlap (tables stream while garbling goes on), so this phase takes
  the longest of the three: AND gates at the measured garbling and evaluation speed passed in (``Speed``; the
  command measures this machine with a short real run), and the tables' bytes at the given bandwidth;
* *oblivious transfer*: the 128 base OTs' public-key work (measured: ``Speed.base_ot_seconds``) and the OT
  extension at the measured rate (``Speed.ot_per_s``), plus the other bytes (OT, labels, decoding) at the bandwidth;
* *round trips* at the given round-trip time: ``round_trips`` counts the waits of one run from the flow of
  ``protocol.session`` and ``node.jobs`` — the proposal on a new connection (TCP handshake, TLS 1.3 handshake: one
  round trip each, RFC 8446 §2; the call itself), the session's own connection (TCP and TLS again), the hellos
  (half a round trip), the base OT (one), the OT extension (one per window of ``OT_WINDOW`` batches in flight), the
  first tables (half), the garbler's output labels, the evaluator's decoding and the finish (half each);
* *start-up*: compiling and counting the program, which each node does before it proposes or accepts (measured
  here as this plan counted it).

Both parties are assumed to be as fast as this machine; nothing else of the network (loss, congestion) is modelled.

Several statistics (``statistics:``) run as one program in one session: the totals are the job's, and
``statistics`` breaks the AND gates (and the garbled-table bytes they cost) down by statistic, each counted where
its work was first done (work two statistics share counts once, for the first), with the release gates apart;
each statistic's ε and the run's total ε (``CompiledStatistic.epsilon``, exact decimals) say what one run spends
of a privacy budget.

Memory: a party holds the labels of the bits its program holds (``ProgramSize.label_bytes``: 16 bytes per bit at
the program's peak, its input labels and the temporaries of its widest call) plus the process itself
(``PROCESS_BYTES``, measured). ``check_limits`` refuses a job above a node's memory or time limit with the
figures, so it is refused before a night's run rather than killed by the kernel halfway through.
"""

from __future__ import annotations

import math
import re
import time
from dataclasses import dataclass
from typing import TypedDict

from jointstat.circuit.compile import CompiledStatistic
from jointstat.circuit.model import Party
from jointstat.exact import decimal_text

LABEL_BYTES = 16
TABLE_BYTES_PER_AND = 32
BASE_OT_COUNT = 128
POINT_BYTES = 32
OT_BATCH = 1 << 16  # OTs per extension batch (jointstat.ot.extension.DEFAULT_BATCH)
OT_WINDOW = 4  # batches the receiver keeps in flight (jointstat.ot.extension.DEFAULT_WINDOW)
HANDSHAKE_ROUND_TRIPS = 2  # a new connection: TCP (one round trip) and TLS 1.3 (one, RFC 8446 §2)
DEFAULT_BANDWIDTH = "100Mbit/s"
DEFAULT_MEMORY_LIMIT = (
    8 * 2**30
)  # per session and party, when no node config says otherwise (common practice)
DEFAULT_TIME_LIMIT_S = 3600.0  # the node's default session deadline
# Resident memory of a node process before a session's labels: measured with `jointstat bench session` (the
# processes' peak RSS minus the labels a tiny program holds), rounded up.
PROCESS_BYTES = 160 * 2**20

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
    """This machine's measured speeds (``bench.garble.measured_speed``, ``bench.ot.measured_ot_speed``)."""

    garble_and_per_s: float
    evaluate_and_per_s: float
    base_ot_seconds: float = 0.0  # 128 base OTs, both sides
    ot_per_s: float = math.inf  # correlated OTs by extension, both sides


def round_trips(ot_count: int) -> float:
    """Round trips one run waits for, from proposal to finish (see the module docstring)."""
    proposal = HANDSHAKE_ROUND_TRIPS + 1
    session = HANDSHAKE_ROUND_TRIPS + 0.5  # connection, then the hellos cross
    if ot_count:
        batches = -(-padded_ots(ot_count) // OT_BATCH)
        session += 1 + -(-batches // OT_WINDOW)  # base OT, then the extension's windows
    session += 0.5 + 0.5 + 0.5 + 0.5  # first tables, output labels, decoding, finish
    return proposal + session


class StatisticShare(TypedDict):
    """One statistic's share of a job (``breakdown``)."""

    name: str
    kind: str
    and_gates: int
    table_bytes: int
    outputs: dict[str, list[str]]  # by the receiving party's role name
    epsilon: str  # an exact decimal


class PlanFigures(TypedDict):
    """The figures of ``plan``: sizes in bytes, times in seconds, speeds per second, ε as an exact decimal."""

    job: str
    statistic: str
    statistics: list[StatisticShare]
    and_gates_release: int
    epsilon: str
    and_gates: int
    xor_gates: int
    and_depth: int
    ot_count: int
    bytes_garbler_to_evaluator: int
    bytes_evaluator_to_garbler: int
    memory_bytes: int
    est_seconds: float
    tables_seconds: float
    ot_seconds: float
    round_trips: float
    rtt_seconds: float
    latency_seconds: float
    startup_seconds: float
    bandwidth_bytes_per_s: float
    garble_and_per_s: int
    evaluate_and_per_s: int
    count_seconds: float
    assumes: str


class LimitError(ValueError):
    """A job that would need more memory or time than the node allows; the message gives the figures."""


def plan(compiled: CompiledStatistic, bandwidth: float, speed: Speed, rtt: float = 0.0) -> PlanFigures:
    """The figures of ``jointstat plan`` at ``bandwidth`` (bytes/s) and round-trip time ``rtt`` (seconds); see the
    module docstring for what they assume."""
    t0 = time.perf_counter()
    size = compiled.size()
    count_s = time.perf_counter() - t0
    and_gates = size.and_gates
    ot_count = size.inputs[Party.EVALUATOR]
    ev_out, g_out = size.outputs[Party.EVALUATOR], size.outputs[Party.GARBLER]
    tables = TABLE_BYTES_PER_AND * and_gates
    ots = padded_ots(ot_count) if ot_count else 0
    base = BASE_OT_COUNT * POINT_BYTES if ot_count else 0
    g_to_e = (
        tables
        + LABEL_BYTES * size.inputs[Party.GARBLER]
        + LABEL_BYTES * ots
        + (2 * 8 * ev_out + (ev_out + 7) // 8)
        + base
    )
    e_to_g = LABEL_BYTES * ots + LABEL_BYTES * g_out + (POINT_BYTES if ot_count else 0)
    table_phase = max(
        and_gates / speed.garble_and_per_s, and_gates / speed.evaluate_and_per_s, tables / bandwidth
    )
    rest = (g_to_e - tables + e_to_g) / bandwidth
    ot_s = (speed.base_ot_seconds + ot_count / speed.ot_per_s if ot_count else 0.0) + rest
    trips = round_trips(ot_count)
    latency_s = trips * rtt
    return {
        "job": compiled.manifest.job.name,
        "statistic": compiled.kinds,
        "statistics": breakdown(compiled),
        "and_gates_release": int(size.extra.get("and_gates_release", 0)),
        "epsilon": decimal_text(compiled.epsilon()),
        "and_gates": and_gates,
        "xor_gates": size.xor_gates + size.not_gates,
        "and_depth": size.and_depth,
        "ot_count": ot_count,
        "bytes_garbler_to_evaluator": g_to_e,
        "bytes_evaluator_to_garbler": e_to_g,
        "memory_bytes": memory_bytes(compiled),
        "est_seconds": round(table_phase + ot_s + latency_s + count_s, 6),
        "tables_seconds": round(table_phase, 6),
        "ot_seconds": round(ot_s, 6),
        "round_trips": trips,
        "rtt_seconds": rtt,
        "latency_seconds": round(latency_s, 6),
        "startup_seconds": round(count_s, 6),
        "bandwidth_bytes_per_s": bandwidth,
        "garble_and_per_s": round(speed.garble_and_per_s),
        "evaluate_and_per_s": round(speed.evaluate_and_per_s),
        "count_seconds": round(count_s, 6),
        "assumes": (
            "garbling, transfer and evaluation overlap; AND gates and OTs at this machine's measured speeds on both"
            " sides; bytes at the given bandwidth; the counted round trips at the given round-trip time; start-up"
            " is compiling and counting the program"
        ),
    }


def breakdown(compiled: CompiledStatistic) -> list[StatisticShare]:
    """Each statistic's share of the job: its name and kind, AND gates, garbled-table bytes, outputs each party
    receives (by address) and ε (module docstring)."""
    by_statistic = compiled.size().extra.get("and_gates_by_statistic", {})
    out: list[StatisticShare] = []
    for part in compiled.parts:
        use = part.use
        and_gates = int(by_statistic.get(use.label or use.kind, 0))
        out.append(
            {
                "name": use.label or use.kind,
                "kind": use.kind,
                "and_gates": and_gates,
                "table_bytes": TABLE_BYTES_PER_AND * and_gates,
                "outputs": {p.role_name: [use.address(n) for n in part.received(p)] for p in Party},
                "epsilon": decimal_text(part.statistic.epsilon()),
            }
        )
    return out


def memory_bytes(compiled: CompiledStatistic) -> int:
    """Estimated peak resident memory of one party's node process running the job (module docstring)."""
    return PROCESS_BYTES + compiled.size().label_bytes()


def _gib(n: float) -> str:
    return f"{n / 2**30:.2f} GiB"


def check_limits(
    compiled: CompiledStatistic,
    *,
    memory_limit: int = DEFAULT_MEMORY_LIMIT,
    time_limit_s: float = DEFAULT_TIME_LIMIT_S,
    est_seconds: float | None = None,
) -> None:
    """Raise ``LimitError`` naming the figure when the job needs more memory (or estimated time) than allowed."""
    need = memory_bytes(compiled)
    if need > memory_limit:
        raise LimitError(
            f"job {compiled.manifest.job.name!r} needs about {_gib(need)} of memory per party"
            f" ({compiled.size().peak_bits:,} bits held at its peak, 16 bytes each), more than the"
            f" {_gib(memory_limit)} allowed; lower the capacities or raise the node's session memory limit"
        )
    if est_seconds is not None and est_seconds > time_limit_s:
        raise LimitError(
            f"job {compiled.manifest.job.name!r} is estimated at {est_seconds:,.0f} s, more than the"
            f" {time_limit_s:,.0f} s a session may take; lower the capacities or raise the session deadline"
        )
