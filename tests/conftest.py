"""Shared test helpers."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def run_cli(*args: str, timeout: float = 120, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    """Run ``panel-audit ARGS`` in a subprocess (from the source tree) and capture its output."""
    full_env = dict(os.environ)
    full_env.setdefault("NO_COLOR", "1")
    full_env["PYTHONPATH"] = str(ROOT) + os.pathsep + full_env.get("PYTHONPATH", "")
    if env:
        full_env.update(env)
    return subprocess.run(
        [sys.executable, "-m", "auditor.cli", *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        env=full_env,
        cwd=ROOT,
    )


@pytest.fixture
def cli():
    """The :func:`run_cli` helper as a fixture."""
    return run_cli
