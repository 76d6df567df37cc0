"""The reliability suite's two long runs, each done once per test session and shared by the tests that read them.

``campaign``: 36 sessions against a real node (``jointstat.node.daemon.Node``) — 18 faulted sessions, every fault
kind (cut, kill, stall) in every phase once with the node accepting or initiating, each followed by its job's
retry — judged and scanned for secrets (``jointstat.harness.campaign.run_campaign``, what ``jointstat bench faults``
runs). ``fuzzing``: 10,000 mutated frames sent to a node's session server (``jointstat.harness.fuzzer``).
"""

from __future__ import annotations

import asyncio

import pytest
from jointstat.harness.campaign import CampaignReport, run_campaign
from jointstat.harness.fuzzer import FuzzReport, run_fuzzing

CAMPAIGN_SESSIONS = 36
FUZZ_FRAMES = 10_000


@pytest.fixture(scope="session")
def campaign(tmp_path_factory: pytest.TempPathFactory) -> CampaignReport:
    return asyncio.run(run_campaign(CAMPAIGN_SESSIONS, tmp_path_factory.mktemp("campaign")))


@pytest.fixture(scope="session")
def fuzzing() -> FuzzReport:
    return asyncio.run(run_fuzzing(FUZZ_FRAMES))
