"""``jointstat bench faults``: a real node under injected faults and fuzzed frames, and the figures that show it.

The harness is ``jointstat.harness``: ``campaign`` runs a node under test (``node.daemon.Node``) through faulted
sessions — the connection cut, the peer process killed, a frame held — in every protocol phase, with the node
accepting or initiating, each followed by its job's retry, and ``verdicts`` judges them; ``fuzzer`` sends mutated
frames to a node's session server; ``scanner`` searches every log line for the run's secrets. This command runs
both and prints the figures.

Figures: ``sessions`` (faulted sessions and their retries), ``completed``, ``aborted_cleanly``, ``hung``,
``outputs_released_wrongly``, ``frames_fuzzed``, ``crashes`` (fault campaign and fuzzing together), then the
details: unclean sessions, faults per kind and phase, the fuzzing's verdicts and memory, and the secrets found.
Targets: ``hung`` = ``outputs_released_wrongly`` = ``crashes`` = 0, ``completed + aborted_cleanly = sessions``, and
no secret in any log; the exit status is 1 when one is missed. Problems are printed on standard error.
"""

from __future__ import annotations

import asyncio
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from jointstat.bench.report import emit
from jointstat.harness.campaign import CampaignReport, run_campaign
from jointstat.harness.fuzzer import DEFAULT_FUZZ_FRAMES, FuzzReport, run_fuzzing


@dataclass
class FaultsReport:
    """Everything one ``bench faults`` run measured: the figures, and the two reports behind them."""

    figures: dict[str, Any]
    campaign: CampaignReport
    fuzz: FuzzReport

    @property
    def problems(self) -> list[str]:
        return self.campaign.problems + self.campaign.crashes + self.fuzz.crashes


async def measure_async(sessions: int, frames: int, workdir: Path, *, seed: int = 2027) -> FaultsReport:
    """The fault campaign (``sessions`` sessions) and the fuzzing (``frames`` mutated frames); the figures."""
    start = time.monotonic()
    campaign = await run_campaign(sessions, workdir, seed=seed)
    fuzz = await run_fuzzing(frames, seed=seed + 1) if frames else FuzzReport([], [], [], {})
    c, f = campaign.figures, fuzz.figures
    figures: dict[str, Any] = {
        "sessions": c["sessions"],
        "completed": c["completed"],
        "aborted_cleanly": c["aborted_cleanly"],
        "hung": c["hung"] + f.get("fuzz_hung", 0),
        "outputs_released_wrongly": c["outputs_released_wrongly"] + f.get("fuzz_accepted", 0),
        "frames_fuzzed": f.get("frames_fuzzed", 0),
        "crashes": c["crashes"] + f.get("fuzz_crashes", 0),
        "unclean": c["unclean"],
        "faults": c["faults"],
        "phases": c["phases"],
        "node_initiated_faults": c["node_initiated_faults"],
        **{k: v for k, v in f.items() if k.startswith(("fuzz_", "node_")) and k != "fuzz_crashes"},
        "secrets_found_in_logs": c["secrets_found_in_logs"] + f.get("secrets_found_in_logs", 0),
        "log_lines_scanned": c["log_lines_scanned"] + f.get("log_lines_scanned", 0),
        "wall_s": round(time.monotonic() - start, 1),
    }
    return FaultsReport(figures, campaign, fuzz)


def measure(sessions: int, frames: int = DEFAULT_FUZZ_FRAMES, *, seed: int = 2027) -> FaultsReport:
    with tempfile.TemporaryDirectory(prefix="jointstat-faults-") as tmp:
        return asyncio.run(measure_async(sessions, frames, Path(tmp), seed=seed))


def targets_met(figures: dict[str, Any]) -> bool:
    """Nothing hung, no output released wrongly, no crash, every session completed or aborted cleanly, and no
    secret in any log."""
    return (
        figures["hung"] == 0
        and figures["outputs_released_wrongly"] == 0
        and figures["crashes"] == 0
        and figures["completed"] + figures["aborted_cleanly"] == figures["sessions"]
        and figures["secrets_found_in_logs"] == 0
    )


def run(sessions: int, frames: int, as_json: bool) -> int:
    from jointstat.problems import UserError

    if sessions < 1:
        raise UserError(f"bench faults: --sessions must be at least 1, got {sessions}")
    if frames < 0:
        raise UserError(f"bench faults: --frames must be 0 or more, got {frames}")
    report = measure(sessions, frames)
    emit(
        "fault injection and frame fuzzing (a node under test, loopback mutual TLS)", report.figures, as_json
    )
    findings = report.campaign.findings + report.fuzz.findings
    for problem in report.problems + [f"secret in {f.source}, line {f.line}: {f.what}" for f in findings]:
        print(f"problem: {problem}", file=sys.stderr)
    return 0 if targets_met(report.figures) else 1
