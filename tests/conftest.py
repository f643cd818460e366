"""Shared test helpers."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import types
from pathlib import Path
from typing import Any

import pytest
from hypothesis import settings

ROOT = Path(__file__).resolve().parent.parent

# Property tests draw the same examples on every run (CI must not turn red by chance);
# HYPOTHESIS_PROFILE=explore draws new ones, to hunt for cases the fixed draw misses.
settings.register_profile("fixed", derandomize=True, print_blob=True)
settings.register_profile("explore", derandomize=False, print_blob=True)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "fixed"))


def approx_equal(a, b, rel: float, abs_: float) -> bool:
    """Two JSON documents equal, floats to ``rel`` relative (``abs_`` absolute near zero)."""
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(approx_equal(a[k], b[k], rel, abs_) for k in a)
    if isinstance(a, list):
        return (
            isinstance(b, list)
            and len(a) == len(b)
            and all(approx_equal(x, y, rel, abs_) for x, y in zip(a, b, strict=True))
        )
    if isinstance(a, float) and isinstance(b, float):
        return a == pytest.approx(b, rel=rel, abs=abs_)
    return a == b


PERIOD_BY_PERIOD = ("richer-sets-skipped", "richer-set-rejected", "selective-attrition")


def without_period_by_period(doc: dict) -> dict:
    """The document without the parts that need each row's period (Amemiya-MaCurdy,
    Breusch-Mizon-Schmidt, the attrition test): the dask engine's unit moments keep none
    and say so (README, "On a cluster")."""
    for name in ("amemiya_macurdy", "breusch_mizon_schmidt"):
        doc["estimates"].pop(name, None)
    for name in ("overidentification_by_estimator", "hausman_against_ht", "attrition", "attrition_note"):
        doc["tests"].pop(name, None)
    doc["findings"] = [f for f in doc["findings"] if f["check"] not in PERIOD_BY_PERIOD]
    return doc


def run_cli(*args: str, timeout: float = 120, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    """Run ``panel-audit ARGS`` in a subprocess (from the source tree) and capture its output."""
    full_env = dict(os.environ)
    full_env.setdefault("NO_COLOR", "1")
    full_env["PYTHONPATH"] = str(ROOT) + os.pathsep + full_env.get("PYTHONPATH", "")
    if env:
        full_env.update(env)
    proc = subprocess.run(
        [sys.executable, "-m", "auditor.cli", *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        env=full_env,
        cwd=ROOT,
    )
    if proc.returncode == 2:
        CLI_ERROR_LINES.extend(line for line in proc.stderr.splitlines() if line.startswith("panel-audit: error:"))
    elif "--json" in args and args and args[0] in SCHEMA_COMMANDS:
        record_document(args[0], proc.stdout, via="command line")
    return proc


@pytest.fixture
def cli():
    """The :func:`run_cli` helper as a fixture."""
    return run_cli


# --- error catalogue coverage (tests/test_error_catalogue.py) -----------------------------
# Codes raised in this process and error lines printed by CLI subprocesses, collected over
# the whole session; the coverage tests run last and judge them when the full suite ran.
# One shared record even when this file is imported twice (as 'conftest' by pytest and as
# 'tests.conftest' by a test module).
_STATE = sys.modules.setdefault("_panel_audit_test_record", types.ModuleType("_panel_audit_test_record"))
if not hasattr(_STATE, "codes"):
    _STATE.codes, _STATE.lines, _STATE.session = set(), [], {"full_suite": False}
if not hasattr(_STATE, "findings"):
    _STATE.findings, _STATE.odd_phrases = {}, set()
TRIGGERED_CODES: set[str] = _STATE.codes
CLI_ERROR_LINES: list[str] = _STATE.lines
SESSION: dict[str, bool] = _STATE.session
#: every finding made in this process: check code -> the counts it carried
FINDINGS_MADE: dict[str, set] = _STATE.findings
#: finding messages with a relation written twice ("p = < 1e-16"), judged in tests/test_workflow.py
ODD_PHRASES: set[str] = _STATE.odd_phrases
COVERAGE_TESTS = (
    "test_every_catalogue_entry_is_triggered",
    "test_every_cli_error_line_is_in_the_catalogue",
    "test_every_finding_code_the_suite_raised_is_explained",
    "test_every_recorded_document_matches_its_schema",
)


@pytest.fixture(autouse=True, scope="session")
def _record_error_codes():
    from auditor import errors

    original = errors.AuditError.__init__

    def recording(self, code, message):
        TRIGGERED_CODES.add(code)
        original(self, code, message)

    errors.AuditError.__init__ = recording
    from auditor.checks import findings

    made = findings.Finding.__init__

    def recording_finding(self, *args, **kwargs):
        made(self, *args, **kwargs)
        FINDINGS_MADE.setdefault(self.check, set()).add(self.count)
        if re.search(r"[=<>]\s+[<>=]", self.message):
            ODD_PHRASES.add(self.message)

    findings.Finding.__init__ = recording_finding
    yield
    errors.AuditError.__init__ = original
    findings.Finding.__init__ = made


# --- JSON documents (tests/test_schema.py) ----------------------------------------------
# Every document the suite produces, by command: the to_dict of the four result types (in
# process, which covers the CLI's --json run through main()) and the --json output of CLI
# subprocesses run through run_cli. Kept as JSON text, each distinct document once, with the
# first test that produced it; the schema test, placed last, validates them all.
SCHEMA_COMMANDS = ("profile", "instruments", "compare", "check")
if not hasattr(_STATE, "documents"):
    _STATE.documents = {name: {} for name in SCHEMA_COMMANDS}
DOCUMENTS: dict[str, dict[str, tuple[str, str]]] = _STATE.documents


def record_document(command: str, document: Any, via: str) -> None:
    """Keep ``document`` (a dict, or the JSON text a CLI printed) for the schema test."""
    import json

    if isinstance(document, str):
        try:
            document = json.loads(document)
        except ValueError:
            return  # not a document (the CLI failed); other tests judge that
    text = json.dumps(document, sort_keys=True, allow_nan=False)
    where = os.environ.get("PYTEST_CURRENT_TEST", "?").rsplit(" (", 1)[0]
    DOCUMENTS[command].setdefault(text, (where, via))


@pytest.fixture(autouse=True, scope="session")
def _record_documents():
    from auditor.commands.check import CheckResult
    from auditor.commands.compare import CompareResult
    from auditor.commands.instruments import InstrumentsResult
    from auditor.commands.profile import ProfileResult

    kinds = {"profile": ProfileResult, "instruments": InstrumentsResult, "compare": CompareResult,
             "check": CheckResult}
    originals = {name: cls.to_dict for name, cls in kinds.items()}

    def recording(name: str, original: Any) -> Any:
        def to_dict(self: Any) -> dict[str, Any]:
            document = original(self)
            record_document(name, document, via="to_dict")
            return document

        to_dict.__doc__ = original.__doc__
        return to_dict

    for name, cls in kinds.items():
        cls.to_dict = recording(name, originals[name])
    yield
    for name, cls in kinds.items():
        cls.to_dict = originals[name]


def pytest_collection_modifyitems(session, config, items):
    last = [i for i in items if i.name in COVERAGE_TESTS]
    items[:] = [i for i in items if i.name not in COVERAGE_TESTS] + last
    collected = {Path(str(i.fspath)).name for i in items}
    every = {p.name for p in (ROOT / "tests").glob("test_*.py")}
    deselect = config.getoption("-k") or config.getoption("-m")
    SESSION["full_suite"] = every <= collected and not deselect
