"""The command line of the profile: exit codes, one-line errors, JSON on stdout only, lazy imports."""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys

import numpy as np
import polars as pl
import pytest

from tests.conftest import ROOT, run_cli


@pytest.fixture
def panel_csv(tmp_path):
    rng = np.random.default_rng(2)
    n, periods = 30, 4
    df = pl.DataFrame(
        {
            "farm": [f"F{i:03d}" for i in np.repeat(np.arange(n), periods)],
            "year": np.tile(np.arange(2011, 2011 + periods), n),
            "output": rng.normal(size=n * periods),
        }
    )
    path = tmp_path / "panel.csv"
    df.write_csv(path)
    return path


def _digest(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_json_goes_to_stdout_alone_and_parses(panel_csv) -> None:
    r = run_cli("profile", str(panel_csv), "--unit", "farm", "--time", "year", "--json")
    assert r.returncode == 0, r.stderr
    assert r.stderr == ""
    doc = json.loads(r.stdout)
    assert doc["tool"]["name"] == "panel-audit"
    assert doc["panel"]["units"] == 30 and doc["panel"]["periods"] == 4
    assert [c["name"] for c in doc["columns"]] == ["output"]


def test_text_output_has_facts_findings_and_columns(panel_csv) -> None:
    r = run_cli("profile", str(panel_csv), "--unit", "farm", "--time", "year")
    assert r.returncode == 0
    assert "units 30" in r.stdout and "findings:" in r.stdout and "columns" in r.stdout
    assert "\x1b[" not in r.stdout  # no colour when not on a terminal


def test_fail_on_decides_the_exit_code(tmp_path, panel_csv) -> None:
    df = pl.read_csv(panel_csv)
    df = pl.concat([df, df.head(2)])  # two duplicate keys: an error finding
    p = tmp_path / "dup.csv"
    df.write_csv(p)
    base = ("profile", str(p), "--unit", "farm", "--time", "year", "--json")
    assert run_cli(*base).returncode == 1
    assert run_cli(*base, "--fail-on", "never").returncode == 0
    gaps = df.head(118).filter(~((pl.col("farm") == "F001") & (pl.col("year") == 2012)))
    gaps.write_csv(p)
    assert run_cli(*base).returncode == 0
    assert run_cli(*base, "--fail-on", "warning").returncode == 1


@pytest.mark.parametrize(
    "args, needle",
    [
        (("--unit", "farmer", "--time", "year"), "column 'farmer' not found; columns are: farm, year, output"),
        (("--unit", "farm", "--time", "yr"), "column 'yr' not found"),
        (("--unit", "farm", "--time", "farm"), "both a unit key and the time key"),
        (("--unit", "farm,farm", "--time", "year"), "more than once"),
        (("--unit", "farm"), "--time"),
        (("--unit", "farm", "--time", "year", "--fail-on", "sometimes"), "invalid choice"),
    ],
)
def test_bad_arguments_exit_2_with_one_line(panel_csv, args, needle) -> None:
    before = _digest(panel_csv)
    r = run_cli("profile", str(panel_csv), *args)
    assert r.returncode == 2
    assert r.stderr.startswith("panel-audit: error:")
    assert len(r.stderr.strip().splitlines()) == 1
    assert needle in r.stderr
    assert "Traceback" not in r.stderr and r.stdout == ""
    assert _digest(panel_csv) == before


def _write(tmp_path, name: str, data: bytes):
    p = tmp_path / name
    p.write_bytes(data)
    return p


@pytest.mark.parametrize(
    "name, data, needle",
    [
        ("missing.csv", None, "no such file"),
        ("empty.csv", b"", "holds no data rows"),
        ("header.csv", b"farm,year,output\n", "holds no data rows"),
        ("bad.parquet", b"PAR1 not really parquet", "cannot read"),
        ("data.xlsx", b"abc", "unknown file type '.xlsx'"),
        ("nulls.csv", b"farm,year,output\n,2011,1\n,2012,2\n", "key column 'farm' is empty"),
        ("words.csv", b"farm,year,output\nA,2011,1\nA,spring,2\n", "cannot be ordered"),
        ("frac.csv", b"farm,year,output\nA,2011.5,1\nA,2012,2\n", "fractional"),
        ("dupcols.csv", b"farm,year,output,output\nA,2011,1,2\n", "more than one column named 'output'"),
        ("bad.csv.gz", b"not gzip at all", "gzip"),
    ],
)
def test_unusable_files_exit_2_and_stay_unchanged(tmp_path, name, data, needle) -> None:
    path = tmp_path / name
    if data is not None:
        path.write_bytes(data)
        before = _digest(path)
    r = run_cli("profile", str(path), "--unit", "farm", "--time", "year")
    assert r.returncode == 2, r.stdout
    assert r.stderr.startswith("panel-audit: error:")
    assert len(r.stderr.strip().splitlines()) == 1
    assert needle in r.stderr
    assert "Traceback" not in r.stderr
    if data is not None:
        assert _digest(path) == before


def test_help_is_light_and_imports_no_heavy_library() -> None:
    code = (
        "import sys, runpy\n"
        "sys.argv = ['panel-audit', '--help']\n"
        "try:\n"
        "    runpy.run_module('auditor.cli', run_name='__main__')\n"
        "except SystemExit:\n"
        "    pass\n"
        "heavy = [m for m in ('polars', 'numpy', 'pandas', 'matplotlib', 'great_expectations', 'scipy') if m in sys.modules]\n"
        "print('HEAVY=' + ','.join(heavy))\n"
    )
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip().splitlines()[-1] == "HEAVY="


def test_profile_never_imports_great_expectations_or_matplotlib(panel_csv) -> None:
    code = (
        "import sys\n"
        "from auditor.cli import main\n"
        f"rc = main(['profile', {str(panel_csv)!r}, '--unit', 'farm', '--time', 'year', '--json'])\n"
        "print('LOADED', [m for m in ('great_expectations', 'matplotlib') if m in sys.modules])\n"
    )
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert "LOADED []" in r.stdout, r.stdout[-500:] + r.stderr


def test_composite_unit_key_and_text_keys_keep_leading_zeros(tmp_path) -> None:
    p = _write(
        tmp_path,
        "hh.csv",
        b"household,person,wave,x\n007,1,1,1.0\n007,1,2,2.0\n7,1,1,3.0\n7,1,2,4.0\n007,2,1,5.0\n",
    )
    r = run_cli("profile", str(p), "--unit", "household,person", "--time", "wave", "--json")
    doc = json.loads(r.stdout)
    assert doc["panel"]["units"] == 3  # 007/1, 7/1 and 007/2
    assert doc["panel"]["unit"] == ["household", "person"]


def test_dates_are_placed_on_a_quarter_grid(tmp_path) -> None:
    lines = ["unit,when,x"] + [f"u{i},{y}-{m:02d}-01,{i + m}" for i in range(3) for y in (2020, 2021) for m in (1, 4, 7, 10)]
    p = _write(tmp_path, "q.csv", ("\n".join(lines) + "\n").encode())
    doc = json.loads(run_cli("profile", str(p), "--unit", "unit", "--time", "when", "--json").stdout)
    assert doc["panel"]["frequency"] == "quarter"
    assert doc["panel"]["period_values"][:3] == ["2020Q1", "2020Q2", "2020Q3"]
    assert doc["panel"]["periods"] == 8 and doc["panel"]["step"] == 1
