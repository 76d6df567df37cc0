"""The reliability suite's two long runs, each done once per test session and shared by the tests that read them.

``campaign``: 36 sessions against a real node (``jointstat.node.daemon.Node``) — 18 faulted sessions, every fault
kind (cut, kill, stall) in every phase once with the node accepting or initiating, each followed by its job's
retry — judged and scanned for secrets (``jointstat.bench.faults.run_campaign``, what ``jointstat bench faults``
runs). ``fuzzing``: 10,000 mutated frames sent to a node's session server (``run_fuzzing``).
"""

from __future__ import annotations

import asyncio

import pytest
from jointstat.bench import faults

CAMPAIGN_SESSIONS = 36
FUZZ_FRAMES = 10_000


@pytest.fixture(scope="session")
def campaign(tmp_path_factory: pytest.TempPathFactory) -> faults.CampaignReport:
    return asyncio.run(faults.run_campaign(CAMPAIGN_SESSIONS, tmp_path_factory.mktemp("campaign")))


@pytest.fixture(scope="session")
def fuzzing() -> faults.FuzzReport:
    return asyncio.run(faults.run_fuzzing(FUZZ_FRAMES))
