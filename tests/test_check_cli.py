"""`panel-audit check` and `panel-audit rules draft|export` from the command line.

Exit codes and JSON names are the project's contract (../shared/contract.md);
the data is the invented orchard demo (auditor/demo_data.py) with its planted
changes (PLANTED_NEXT).
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    """``panel-audit ARGS`` in a subprocess from the source tree, no colour (the shared helper,
    which records error lines and --json documents for the suite-wide tests)."""
    from conftest import run_cli as shared

    return shared(*args, timeout=300, env={"NO_COLOR": "1"})


@pytest.fixture(scope="module")
def orchard_files(tmp_path_factory) -> dict[str, Path]:
    from auditor.io.demo_data import make_next_season, make_orchards

    folder = tmp_path_factory.mktemp("orchards")
    base = make_orchards()
    paths = {"base": folder / "base.csv", "next": folder / "next.csv"}
    base.write_csv(paths["base"])
    make_next_season(base).write_csv(paths["next"])
    return paths


@pytest.fixture(scope="module")
def drafted(orchard_files, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("draft") / "contract.yaml"
    run = run_cli("rules", "draft", str(orchard_files["base"]), "--unit", "orchard_id", "--time", "season", "--out", str(out))
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == str(out)
    return out


def test_check_exits_0_on_the_data_the_contract_was_drafted_from(orchard_files, drafted):
    run = run_cli("check", str(orchard_files["base"]), "--rules", str(drafted))
    assert run.returncode == 0, run.stdout + run.stderr
    assert run.stdout.startswith("contract holds")


def test_check_exits_1_on_the_next_season_and_json_names_the_rules(orchard_files, drafted):
    from auditor.io.demo_data import PLANTED_NEXT

    run = run_cli("check", str(orchard_files["next"]), "--rules", str(drafted), "--json")
    assert run.returncode == 1, run.stderr
    doc = json.loads(run.stdout)
    assert doc["tool"]["name"] == "panel-audit" and doc["passed"] is False
    failed = {(r["rule"], r["column"]): r for r in doc["rules"] if not r["passed"]}
    assert failed[("allowed", "soil_class")]["failing"] == PLANTED_NEXT["new_soil_code"]
    assert failed[("allowed", "soil_class")]["level"] == "row"
    assert failed[("only_listed_columns", None)]["level"] == "panel"


def test_check_text_lists_broken_rules(orchard_files, drafted):
    run = run_cli("check", str(orchard_files["next"]), "--rules", str(drafted))
    assert run.returncode == 1
    assert "contract broken" in run.stdout and "soil_class" in run.stdout and "PT" in run.stdout


@pytest.mark.parametrize(
    ("text", "needle"),
    [
        ("panel:\n  unit: orchard_id\n  time: [season\n", "line"),
        ("panel:\n  unit: orchard_id\n  time: season\n  min_unit: 3\n", "'min_unit'"),
        ("panel: {unit: orchard_id, time: season}\ncolumns:\n  tree_age: {monotone: up}\n", "columns.tree_age.monotone"),
    ],
)
def test_invalid_file_exits_2_with_one_line(orchard_files, tmp_path, text, needle):
    path = tmp_path / "bad.yaml"
    path.write_text(text, encoding="utf-8")
    run = run_cli("check", str(orchard_files["base"]), "--rules", str(path))
    assert run.returncode == 2
    assert run.stdout == ""
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("panel-audit: error:")
    assert needle in lines[0]


def test_yaml_tag_is_refused_and_nothing_runs(orchard_files, tmp_path):
    marker = tmp_path / "ran"
    path = tmp_path / "evil.yaml"
    path.write_text(
        textwrap.dedent(
            f"""\
            panel:
              unit: orchard_id
              time: !!python/object/apply:os.system ["touch {marker}"]
            """
        ),
        encoding="utf-8",
    )
    run = run_cli("check", str(orchard_files["base"]), "--rules", str(path))
    assert run.returncode == 2
    assert "line 3" in run.stderr and "tag" in run.stderr
    assert not marker.exists()


def test_export_writes_a_suite_and_never_overwrites_without_force(drafted, tmp_path):
    out = tmp_path / "suite.json"
    run = run_cli("rules", "export", str(drafted), "--out", str(out))
    assert run.returncode == 0, run.stderr
    suite = json.loads(out.read_text())
    assert suite["expectations"] and all(e["type"].startswith("expect_") for e in suite["expectations"])
    again = run_cli("rules", "export", str(drafted), "--out", str(out))
    assert again.returncode == 2 and "--force" in again.stderr
    forced = run_cli("rules", "export", str(drafted), "--out", str(out), "--force")
    assert forced.returncode == 0


def test_help_and_profile_never_import_great_expectations(orchard_files):
    code = textwrap.dedent(
        f"""
        import sys
        from auditor.cli import main
        try:
            main(["--help"])
        except SystemExit:
            pass
        assert "great_expectations" not in sys.modules, "after --help"
        rc = main(["profile", {str(orchard_files["base"])!r}, "--unit", "orchard_id", "--time", "season", "--json"])
        assert rc in (0, 1), rc
        print("LOADED" if "great_expectations" in sys.modules else "CLEAN")
        """
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=300)
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip().endswith("CLEAN")


def test_check_does_import_great_expectations(orchard_files, drafted):
    # the same probe must be able to fail: check is the command that loads the library
    code = textwrap.dedent(
        f"""
        import sys
        from auditor.cli import main
        main(["check", {str(orchard_files["base"])!r}, "--rules", {str(drafted)!r}, "--json"])
        print("LOADED" if "great_expectations" in sys.modules else "CLEAN")
        """
    )
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=300)
    assert run.stdout.strip().endswith("LOADED")


def test_a_contract_serves_as_the_thresholds_file_of_profile(tmp_path):
    # labour_days is 25% missing in the next season (auditor/demo_data.py NEXT_LABOUR_MISSING):
    # high-missing under the default ceiling (0.20), not under a contract that raises it to 0.30
    text = (ROOT / "examples" / "orchards_contract.yaml").read_text(encoding="utf-8")
    assert "high_missing_share: 0.10" in text
    contract = tmp_path / "lenient.yaml"
    contract.write_text(text.replace("high_missing_share: 0.10", "high_missing_share: 0.30"), encoding="utf-8")
    data = str(ROOT / "examples" / "orchards_next_season.csv")
    keys = ["--unit", "orchard_id", "--time", "season", "--json", "--fail-on", "never"]

    def flagged(*extra: str) -> bool:
        run = run_cli("profile", data, *keys, *extra)
        assert run.returncode == 0, run.stderr
        doc = json.loads(run.stdout)
        return any(f["check"] == "high-missing" and f["column"] == "labour_days" for f in doc["findings"])

    assert flagged()
    assert not flagged("--rules", str(contract))
