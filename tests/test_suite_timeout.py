"""The test suite's own safety net: a test that hangs is stopped by a per-test timeout instead of hanging the run.

Specification: the pytest settings give every test a timeout (pytest-timeout, a pinned development dependency), and
with the plugin a test that never returns fails with a timeout message instead of blocking the whole suite.
"""

from __future__ import annotations

import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_every_test_has_a_timeout_from_a_pinned_plugin() -> None:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    timeout = project["tool"]["pytest"]["ini_options"]["timeout"]
    assert isinstance(timeout, int) and 0 < timeout <= 900
    assert any(dep.startswith("pytest-timeout") for dep in project["project"]["optional-dependencies"]["dev"])
    pins = (ROOT / "constraints.txt").read_text(encoding="utf-8").splitlines()
    assert any(line.startswith("pytest-timeout==") for line in pins)


def test_a_test_that_hangs_fails_with_a_timeout_instead_of_blocking_the_run(tmp_path: Path) -> None:
    hanging = tmp_path / "test_hangs.py"
    hanging.write_text("import threading\n\n\ndef test_waits_forever():\n    threading.Event().wait()\n")
    run = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "--timeout=2", str(hanging)],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=120,
    )
    assert run.returncode == 1, run.stdout + run.stderr
    assert "Timeout" in run.stdout + run.stderr
    assert "1 failed" in run.stdout
