"""The invented job of the fault harness: two bicycle-share schemes add up the metres their bikes rode.

Theory of operation: both the node under test and the harness's stand-in peer load the same manifest (a ``sum``
over one 40-bit column, four rows a side, count and sum to both parties) and each its own CSV file of three rows
(either file fits either role: the two tables have the same column). ``peer_job`` compiles the manifest as a node
does and encodes the peer's rows for either role. ``expected_result`` is the answer in plain Python.
``frames_per_phase`` counts the frames of each protocol phase that cross a session's stream (both directions), so
a fault can be planned at any frame of any phase. The figures are invented, 12 digits each, so that a log scan
cannot mistake them for a count or a duration.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from jointstat.circuit.compile import CompiledStatistic
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.garble.halfgates import TABLE_BYTES
from jointstat.ot.extension import DEFAULT_BATCH
from jointstat.protocol import frames as fr

HELLO, BASE_OT, EXTENSION, TABLES, OUTPUT_LABELS, FINISH = (
    "hello",
    "base_ot",
    "extension",
    "tables",
    "output_labels",
    "finish",
)
PHASES = (HELLO, BASE_OT, EXTENSION, TABLES, OUTPUT_LABELS, FINISH)
PHASE_OF_FRAME = {
    fr.HELLO: HELLO,
    fr.BASE_OT: BASE_OT,
    fr.OT_EXTENSION: EXTENSION,
    fr.GARBLER_INPUT_LABELS: TABLES,
    fr.GARBLED_TABLES: TABLES,
    fr.TABLES_ACK: TABLES,  # the evaluator's acknowledgement of each labels and tables frame
    fr.GARBLER_OUTPUT_LABELS: OUTPUT_LABELS,
    fr.EVALUATOR_OUTPUT_DECODING: OUTPUT_LABELS,
    fr.FINISH: FINISH,
}

NODE_NAME, PEER_NAME = "riverside-bikes", "hillside-bikes"
JOB_ACCEPTED = "fleet-metres-offered"  # the peer proposes it; the node evaluates and serves
JOB_INITIATED = "fleet-metres-started"  # the node proposes it, garbles, connects and retries
METRE_BITS = 40
MANIFEST_YAML = """\
# Invented: two bicycle-share schemes add up the metres their bikes rode in March, without showing per-bike figures.
job:
  name: fleet-metres
  version: 1
parties:
  garbler: {name: Riverside Bike Share}
  evaluator: {name: Hillside Bike Share}
tables:
  garbler:
    capacity: 4
    columns:
      - {name: metres, type: unsigned, width: 40}
  evaluator:
    capacity: 4
    columns:
      - {name: metres, type: unsigned, width: 40}
statistic:
  name: sum
  column: metres
outputs:
  garbler: [count, sum]
  evaluator: [count, sum]
"""
NODE_METRES = (128_734_509_117, 119_604_822_391, 131_277_046_853)
PEER_METRES = (124_418_995_072, 117_062_340_589, 129_953_781_206)


def phase_of(kind: str) -> str | None:
    """The protocol phase a frame type belongs to (None for ``abort`` and ``resume``)."""
    return PHASE_OF_FRAME.get(kind)


def expected_result() -> dict[str, int]:
    """The job's answer for both sides, computed in plain Python."""
    return {"count": len(NODE_METRES) + len(PEER_METRES), "sum": sum(NODE_METRES) + sum(PEER_METRES)}


@dataclass(frozen=True)
class JobFiles:
    manifest: Path
    node_csv: Path
    peer_csv: Path


def write_job_files(directory: Path) -> JobFiles:
    """The manifest and the two schemes' CSV files."""
    directory.mkdir(parents=True, exist_ok=True)
    files = JobFiles(directory / "manifest.yaml", directory / "riverside.csv", directory / "hillside.csv")
    files.manifest.write_text(MANIFEST_YAML, encoding="utf-8")
    for path, rows in ((files.node_csv, NODE_METRES), (files.peer_csv, PEER_METRES)):
        path.write_text("metres\n" + "".join(f"{v}\n" for v in rows), encoding="utf-8")
    return files


@dataclass(frozen=True)
class PeerJob:
    """The peer's compiled job, its program and its input bits in either role."""

    compiled: CompiledStatistic
    digest: bytes
    bits: dict[Party, np.ndarray]

    @property
    def program(self) -> Program:
        return self.compiled.as_program()


def peer_job(files: JobFiles) -> PeerJob:
    from jointstat.circuit.compile import compile_manifest
    from jointstat.circuit.inputs import encode_inputs, read_csv
    from jointstat.circuit.manifest import load_manifest

    compiled = compile_manifest(load_manifest(files.manifest))
    bits = {}
    for party in Party:
        table = compiled.manifest.table(party)
        records = read_csv(files.peer_csv, table, columns=compiled.inputs[party].columns)
        bits[party] = encode_inputs(compiled, party, records)
    return PeerJob(compiled, bytes.fromhex(compiled.digest), bits)


def frames_per_phase(program: Program, chunk_bytes: int) -> dict[str, int]:
    """How many frames of each phase cross a session's stream (both directions) for this program, with the
    garbler's tables in frames of ``chunk_bytes``."""
    n_in_e = program.n_inputs(Party.EVALUATOR)
    labels = 16 * program.n_inputs(Party.GARBLER)
    batches = -(
        -n_in_e // DEFAULT_BATCH
    )  # OT extension: columns and corrections, one frame each way per batch
    return {
        HELLO: 2,
        BASE_OT: 2 if n_in_e else 0,
        EXTENSION: 2 * batches,
        # labels and tables in frames of chunk_bytes, each acknowledged by the evaluator
        TABLES: 2 * (-(-labels // chunk_bytes) + -(-TABLE_BYTES * program.size.and_gates // chunk_bytes)),
        OUTPUT_LABELS: int(program.n_outputs(Party.GARBLER) > 0)
        + int(program.n_outputs(Party.EVALUATOR) > 0),
        FINISH: 2,
    }
