"""Determinism (issue 8, item 3): the same input gives byte-identical JSON, and lists have a
stated order. Run on the invented orchard registry (examples/), through the command line
and through each command's Python entry.

The orders checked are the contract's (../shared/contract.md: findings by severity, then
check; key columns not listed) and the profile's own (columns in file order, periods
ascending, participation patterns most common first).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from conftest import run_cli

from auditor.render.json import dumps

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
BASE = EXAMPLES / "orchards.csv"
NEXT = EXAMPLES / "orchards_next_season.csv"
KEYS = {"unit": "orchard_id", "time": "season"}
SEVERITY_RANK = {"error": 0, "warning": 1, "note": 2}


def test_cli_profile_json_is_byte_identical_run_to_run():
    args = ("profile", str(BASE), "--unit", "orchard_id", "--time", "season", "--json")
    first, second = run_cli(*args, timeout=300), run_cli(*args, timeout=300)
    assert first.returncode == second.returncode == 1  # the registry has error findings
    assert first.stdout == second.stdout
    assert first.stdout.endswith("\n")
    json.loads(first.stdout)


def test_profile_python_entry_is_byte_identical_run_to_run():
    from auditor.commands.profile import profile

    a = dumps(profile(BASE, **KEYS).to_dict())
    b = dumps(profile(BASE, **KEYS).to_dict())
    assert a == b


def test_compare_python_entry_is_byte_identical_run_to_run():
    from auditor.commands.compare import compare

    a = dumps(compare(BASE, NEXT, **KEYS).to_dict())
    b = dumps(compare(BASE, NEXT, **KEYS).to_dict())
    assert a == b


def test_instruments_python_entry_is_byte_identical_run_to_run():
    from auditor.commands.instruments import instruments

    kw = dict(
        outcome="log_yield_ha",
        regressors=["rainfall_mm", "irrigation_h", "labour_days", "altitude_m", "founder_training_yrs"],
        correlated=["labour_days", "founder_training_yrs"],
        treat_as_invariant=["founder_training_yrs"],
    )
    a = dumps(instruments(BASE, **KEYS, **kw).to_dict())
    b = dumps(instruments(BASE, **KEYS, **kw).to_dict())
    assert a == b


@pytest.fixture(scope="module")
def doc() -> dict:
    from auditor.commands.profile import profile

    return profile(BASE, **KEYS).to_dict()


def test_columns_are_listed_in_file_order_without_keys(doc):
    header = BASE.read_text(encoding="utf-8").split("\n", 1)[0].split(",")
    assert [c["name"] for c in doc["columns"]] == [h for h in header if h not in KEYS.values()]


def test_findings_are_sorted_by_severity_then_check_then_column(doc):
    keys = [(SEVERITY_RANK[f["severity"]], f["check"], f["column"] or "") for f in doc["findings"]]
    assert keys == sorted(keys)


def test_periods_ascend_and_patterns_come_most_common_first(doc):
    p = doc["panel"]
    assert p["period_values"] == sorted(p["period_values"]) == list(range(2017, 2025))
    assert [a["period"] for a in p["attrition"]] == p["period_values"]
    counts = [pat["units"] for pat in p["patterns"]]
    assert counts == sorted(counts, reverse=True)

