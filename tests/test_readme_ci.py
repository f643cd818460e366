"""The README's Quick start and .ci/run must not drift apart."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _quick_start_blocks() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    return [b.strip() for b in re.findall(r"```(?:sh|bash|shell)\n(.*?)```", section, flags=re.S)]


def test_quick_start_has_exactly_two_shell_commands() -> None:
    blocks = _quick_start_blocks()
    assert len(blocks) == 2
    assert all(len(b.splitlines()) == 1 for b in blocks)
    assert "panel-audit demo" in blocks[0]
    assert "pytest" in blocks[1]


def test_ci_runs_the_readme_test_command_verbatim() -> None:
    test_command = _quick_start_blocks()[1]
    ci_lines = [ln.strip() for ln in (ROOT / ".ci" / "run").read_text(encoding="utf-8").splitlines()]
    assert test_command in ci_lines
