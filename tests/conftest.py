"""Shared test settings: hypothesis profiles sized for CI on a 2-core machine."""

from __future__ import annotations

import os

from hypothesis import HealthCheck, settings

settings.register_profile(
    "ci",
    max_examples=40,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
settings.register_profile("thorough", max_examples=500, deadline=None)
settings.load_profile(os.environ.get("JOINTSTAT_HYPOTHESIS", "ci"))
