"""Wave files read as one panel (auditor/sources.py, issue 7 item 1).

Folder, glob and list inputs must give the same panel (and the same profile document)
as one concatenated file; a type that differs between files is a schema-mismatch
finding naming the files, not a crash. The oracle for "same" is the single file
written with polars itself, read by the same loader: the claim under test is that
splitting into files changes nothing.
"""

from __future__ import annotations

import json

import numpy as np
import polars as pl
import pytest

from auditor.io.load import load_panel


def orchard_waves(seed: int = 0) -> pl.DataFrame:
    # Invented orchard registry: 40 orchards, 5 seasons, some rows dropped.
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(40), 5)
    season = np.tile(np.arange(2019, 2024), 40)
    keep = rng.random(unit.size) > 0.1
    unit, season = unit[keep], season[keep]
    return pl.DataFrame(
        {
            "orchard": [f"O{u:03d}" for u in unit],
            "season": season,
            "yield_t": rng.normal(8, 2, unit.size),
            "trees": rng.integers(50, 400, unit.size),
            "altitude": (rng.normal(300, 80, 40)[unit]).round(0),
            "variety": rng.choice(["early", "late"], unit.size),
        }
    )


@pytest.fixture
def waves(tmp_path):
    frame = orchard_waves()
    folder = tmp_path / "waves"
    folder.mkdir()
    paths = []
    for year, part in frame.group_by("season", maintain_order=True):
        p = folder / f"season_{year[0]}.parquet"
        part.write_parquet(p)
        paths.append(p)
    whole = tmp_path / "whole.parquet"
    frame.write_parquet(whole)
    return frame, folder, sorted(paths), whole


def _rows(panel) -> pl.DataFrame:
    cols = [*panel.unit, panel.time, *panel.columns]
    return panel.frame.select(cols).sort([*panel.unit, panel.time])


@pytest.mark.parametrize("form", ["folder", "glob", "list"])
def test_folder_glob_and_list_give_the_same_panel_as_one_file(waves, form):
    frame, folder, paths, whole = waves
    data = {"folder": folder, "glob": str(folder / "*.parquet"), "list": paths}[form]
    many = load_panel(data, "orchard", "season")
    one = load_panel(whole, "orchard", "season")
    assert many.rows == one.rows == frame.height
    assert many.grid == one.grid
    assert many.n_units == one.n_units
    assert many.load_findings == ()
    assert _rows(many).equals(_rows(one))


def test_column_missing_from_one_wave_is_missing_there(tmp_path):
    # Hand-built: the second wave has no 'irrigated' column; its 2 rows are null there.
    pl.DataFrame({"o": ["a", "b"], "s": [1, 1], "irrigated": [1.0, 0.0]}).write_parquet(
        tmp_path / "w1.parquet"
    )
    pl.DataFrame({"o": ["a", "b"], "s": [2, 2]}).write_parquet(tmp_path / "w2.parquet")
    panel = load_panel(tmp_path, "o", "s")
    assert panel.rows == 4
    assert panel.frame["irrigated"].null_count() == 2
    assert panel.load_findings == ()


def test_type_differing_between_waves_is_a_schema_mismatch_naming_the_files(tmp_path):
    # Hand-built: 'soil' is text in one wave and an integer code in the other.
    pl.DataFrame({"o": ["a", "b"], "s": [1, 1], "soil": ["clay", "loam"]}).write_parquet(
        tmp_path / "w1.parquet"
    )
    pl.DataFrame({"o": ["a", "b"], "s": [2, 2], "soil": [3, 4]}).write_parquet(
        tmp_path / "w2.parquet"
    )
    panel = load_panel(tmp_path, "o", "s")
    (finding,) = panel.load_findings
    assert finding.check == "schema-mismatch"
    assert finding.column == "soil"
    assert "w1.parquet" in finding.message and "w2.parquet" in finding.message
    assert {e["file"] for e in finding.examples} == {"w1.parquet", "w2.parquet"}
    assert panel.schema["soil"] == pl.String
    assert sorted(panel.frame["soil"].to_list()) == ["3", "4", "clay", "loam"]


def test_integer_width_difference_is_not_a_mismatch(tmp_path):
    # Int32 in one file and Int64 in another hold the same kind of value.
    pl.DataFrame({"o": ["a"], "s": [1], "n": pl.Series([5], dtype=pl.Int32)}).write_parquet(
        tmp_path / "w1.parquet"
    )
    pl.DataFrame({"o": ["a"], "s": [2], "n": pl.Series([6], dtype=pl.Int64)}).write_parquet(
        tmp_path / "w2.parquet"
    )
    panel = load_panel(tmp_path, "o", "s")
    assert panel.load_findings == ()
    assert panel.frame["n"].to_list() == [5, 6]


def test_csv_column_empty_in_one_wave_takes_the_other_waves_type(tmp_path):
    # A text file whose column is blank throughout has no type of its own.
    (tmp_path / "w1.csv").write_text("o,s,rain\na,1,3.5\nb,1,4.0\n")
    (tmp_path / "w2.csv").write_text("o,s,rain\na,2,\nb,2,\n")
    panel = load_panel(tmp_path, "o", "s")
    assert panel.load_findings == ()
    assert panel.schema["rain"] == pl.Float64


def test_mixed_csv_and_parquet_waves_are_one_panel(tmp_path, waves):
    frame, _folder, _paths, whole = waves
    first = frame.filter(pl.col("season") == 2019)
    rest = frame.filter(pl.col("season") != 2019)
    first.write_csv(tmp_path / "a.csv")
    rest.write_parquet(tmp_path / "b.parquet")
    panel = load_panel([tmp_path / "a.csv", tmp_path / "b.parquet"], "orchard", "season")
    assert panel.rows == frame.height
    assert panel.n_units == load_panel(whole, "orchard", "season").n_units


def _profile_document(data) -> dict:
    from auditor.commands.profile import profile

    doc = profile(data, unit="orchard", time="season").to_dict()
    doc.pop("source", None)  # names the input itself, so differs by construction
    return json.loads(json.dumps(doc, default=str))


def _same(a, b, path="doc"):
    # Equal, except that floats may differ in the last digits: the rows arrive in
    # another order from several files, and floating sums depend on order.
    if isinstance(a, float) and isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-12, abs=1e-15), path
    elif isinstance(a, dict) and isinstance(b, dict):
        assert a.keys() == b.keys(), path
        for k in a:
            _same(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _same(x, y, f"{path}[{i}]")
    else:
        assert a == b, path


@pytest.mark.parametrize("form", ["folder", "glob", "list"])
def test_folder_glob_and_list_give_the_same_profile_document(waves, form):
    _frame, folder, paths, whole = waves
    data = {"folder": folder, "glob": str(folder / "*.parquet"), "list": paths}[form]
    _same(_profile_document(data), _profile_document(whole))


def test_schema_mismatch_reaches_the_profile_findings(tmp_path):
    pl.DataFrame({"orchard": ["a", "b"], "season": [1, 1], "soil": ["clay", "loam"]}).write_parquet(
        tmp_path / "w1.parquet"
    )
    pl.DataFrame({"orchard": ["a", "b"], "season": [2, 2], "soil": [3, 4]}).write_parquet(
        tmp_path / "w2.parquet"
    )
    doc = _profile_document(tmp_path)
    checks = [(f["check"], f["column"]) for f in doc["findings"]]
    assert ("schema-mismatch", "soil") in checks
