"""Awkward and hostile input files (issue 8, item 1): one test per file, its expected behaviour stated.

The files are under tests/data/awkward/ (written by make_corpus.py there). Every
run goes through the command line in a subprocess with a timeout, and every
test checks the common guarantees (contract.md, "exit codes"): no traceback,
exit 2 prints exactly one line starting ``panel-audit: error:``, and the input
file's bytes (and its folder) are unchanged.

Expected numbers are written out from the file contents by hand or computed with
numpy from the literal values, never by auditor's own code.
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path

import numpy as np
import pytest
from conftest import run_cli

CORPUS = Path(__file__).resolve().parent / "data" / "awkward"
KEYS = ("--unit", "orchard_id", "--time", "season")
CONTROL = {chr(c) for c in range(32) if chr(c) not in "\n"} | {"\x7f"}


def _strict_json(text: str) -> dict:
    def refuse(token: str):
        raise AssertionError(f"non-standard JSON token {token}")

    return json.loads(text, parse_constant=refuse)


def _run(name: str, *extra: str, json_out: bool = True, timeout: float = 60):
    """Run ``profile`` on a corpus file; check the common guarantees; return the process."""
    path = CORPUS / name
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    listing = sorted(p.name for p in CORPUS.iterdir())
    args = ["profile", str(path), *KEYS, *extra]
    if json_out:
        args.append("--json")
    proc = run_cli(*args, timeout=timeout)
    assert "Traceback" not in proc.stderr and "Traceback" not in proc.stdout
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before, "the input was written to"
    assert sorted(p.name for p in CORPUS.iterdir()) == listing, "a file appeared beside the input"
    if proc.returncode == 2:
        lines = proc.stderr.splitlines()
        assert len(lines) == 1 and lines[0].startswith("panel-audit: error: "), proc.stderr
        assert proc.stdout == ""
    else:
        assert proc.returncode in (0, 1), proc.stderr
        assert proc.stderr == ""
    return proc


def _profile(name: str, expect_rc: int) -> dict:
    proc = _run(name)
    assert proc.returncode == expect_rc, proc.stderr
    return _strict_json(proc.stdout)


def _column(doc: dict, name: str) -> dict:
    (col,) = [c for c in doc["columns"] if c["name"] == name]
    return col


def _checks(doc: dict) -> dict[tuple[str, str | None], dict]:
    return {(f["check"], f["column"]): f for f in doc["findings"]}


def _error(name: str) -> str:
    proc = _run(name)
    assert proc.returncode == 2
    return proc.stderr.strip()


# --- encodings and layouts ---------------------------------------------------------


def test_utf8_byte_order_mark_is_not_part_of_the_first_column_name():
    # The first header cell is "\ufefforchard_id" in the raw bytes; it must be found as orchard_id.
    doc = _profile("bom.csv", 0)
    assert (doc["panel"]["units"], doc["panel"]["periods"], doc["panel"]["rows"]) == (3, 3, 9)
    assert [c["name"] for c in doc["columns"]] == ["yield_t"]


def test_windows_line_endings_leave_numbers_numeric():
    doc = _profile("crlf.csv", 0)
    col = _column(doc, "yield_t")
    assert col["dtype"] == "float64"
    # values i * 1.5 + t * 0.25 for i = 0..2, t = 2020..2022 (make_corpus.py), numpy oracle
    values = [round(i * 1.5 + t * 0.25, 2) for i in range(3) for t in (2020, 2021, 2022)]
    assert col["mean"] == pytest.approx(np.mean(values), rel=1e-12)


def test_latin1_text_is_decoded():
    # Latin-1 bytes for "grün", "süß", "café" are not valid UTF-8; they must be read as text.
    doc = _profile("latin1.csv", 0)
    note = _column(doc, "note")
    assert note["dtype"] == "string" and note["distinct"] == 3
    from auditor.commands.profile import profile

    frame = profile(CORPUS / "latin1.csv", unit="orchard_id", time="season").data.frame
    assert set(frame["note"].to_list()) == {"grün", "süß", "café"}


def test_semicolon_delimiter_is_detected():
    doc = _profile("semicolon.csv", 0)
    col = _column(doc, "yield_t")
    assert col["dtype"] == "float64"
    assert col["mean"] == pytest.approx(np.mean([0.1, 0.2, 1.1, 1.2, 2.1, 2.2]), rel=1e-12)
    assert doc["panel"]["units"] == 3


def test_quoted_fields_with_newlines_stay_one_row_each():
    # six records, each with a quoted remark holding two newlines, a comma and quotes
    doc = _profile("quoted_newlines.csv", 0)
    assert doc["panel"]["rows"] == 6
    remark = _column(doc, "remark")
    assert remark["distinct"] == 1  # the same remark on every row
    assert ("constant-column", "remark") in _checks(doc)
    from auditor.commands.profile import profile

    frame = profile(CORPUS / "quoted_newlines.csv", unit="orchard_id", time="season").data.frame
    assert frame["remark"][0] == 'line one\nline two, with a comma\nand "quotes"'


# --- sizes: nothing, one row, one unit, one period -----------------------------------


def test_header_only_file_stops_with_one_line():
    assert "holds no data rows" in _error("header_only.csv")


def test_one_row():
    doc = _profile("one_row.csv", 0)
    p = doc["panel"]
    assert (p["rows"], p["units"], p["periods"], p["singleton_units"]) == (1, 1, 1, 1)
    col = _column(doc, "yield_t")
    # one value: TSS = 0, so the within share is undefined (methods.md section 2), and the
    # overall sd has N - 1 = 0 degrees of freedom
    assert col["within_share"] is None and col["overall_sd"] is None
    assert ("singleton-units", None) in _checks(doc)


def test_one_unit_has_all_variation_within():
    doc = _profile("one_unit.csv", 0)
    p = doc["panel"]
    assert (p["units"], p["periods"], p["balanced"]) == (1, 5, True)
    col = _column(doc, "yield_t")
    # one unit: BSS = 0, so within share = WSS / TSS = 1; between sd has n - 1 = 0 df
    assert col["within_share"] == pytest.approx(1.0, abs=1e-12)
    assert col["between_sd"] is None
    # within sd = sqrt(WSS / (N - n)) with N = 5, n = 1: numpy's ddof=1 sd of 3..7
    assert col["within_sd"] == pytest.approx(np.std([3, 4, 5, 6, 7], ddof=1), rel=1e-12)


def test_one_period_has_no_within_variation():
    doc = _profile("one_period.csv", 0)
    p = doc["panel"]
    assert (p["units"], p["periods"], p["step"], p["singleton_units"]) == (5, 1, None, 5)
    col = _column(doc, "yield_t")
    assert col["within_share"] == 0.0  # every unit seen once: WSS = 0, TSS > 0
    assert col["within_sd"] is None  # N = n: no within degrees of freedom
    assert col["units_observed_twice"] == 0
    # between sd of 2, 4, 6, 8, 10 (numpy, ddof=1)
    assert col["between_sd"] == pytest.approx(np.std([2, 4, 6, 8, 10], ddof=1), rel=1e-12)


def test_very_wide_file_with_2000_columns():
    # Must finish (no hang); the timeout is generous because CI machines are shared.
    proc = _run("wide.csv", timeout=300)
    assert proc.returncode == 0
    doc = _strict_json(proc.stdout)
    assert [c["name"] for c in doc["columns"]] == [f"v{j:04d}" for j in range(2000)]


# --- keys and times -----------------------------------------------------------------


def test_duplicate_column_names_stop_with_one_line():
    assert "more than one column named 'yield_t'" in _error("duplicate_columns.csv")


def test_time_column_mixing_numbers_and_words_stops_with_one_line():
    msg = _error("time_words.csv")
    assert "season" in msg and "'unknown'" in msg


def test_fractional_times_stop_with_one_line():
    msg = _error("time_fractional.csv")
    assert "fractional" in msg and "2020.5" in msg


def test_ids_with_leading_zeros_are_different_units():
    # "007", "7", "07" and "0070" are four orchards, not one (contract: keys keep their text form)
    doc = _profile("leading_zeros.csv", 0)
    assert doc["panel"]["units"] == 4
    from auditor.commands.profile import profile

    units = profile(CORPUS / "leading_zeros.csv", unit="orchard_id", time="season").data.units
    assert sorted(units["orchard_id"].to_list()) == ["007", "0070", "07", "7"]  # Python string order


def test_integer_ids_beyond_2_to_the_53_stay_distinct_and_exact():
    # 2**53 and 2**53 + 1 are the same float64; as ids they are two orchards, and the duplicate
    # planted on 2**53 + 1 is reported with its exact digits.
    doc = _profile("big_ids.csv", 1)
    assert doc["panel"]["units"] == 2
    assert doc["panel"]["duplicate_keys"] == 1
    dup = _checks(doc)[("duplicate-keys", None)]
    assert dup["examples"][0]["orchard_id"] == "9007199254740993"
    assert 2**53 + 1 == 9007199254740993  # the arithmetic the file relies on


# --- values -----------------------------------------------------------------------------


def test_inf_and_nan_in_a_numeric_column():
    # yield_t holds inf twice, -inf once, nan twice and 2, 4, 5, 6 (make_corpus.py).
    # Conventions (methods.md): NaN is missing; infinite values are reported and left out.
    doc = _profile("nonfinite.csv", 0)
    col = _column(doc, "yield_t")
    assert col["dtype"] == "float64"
    assert col["non_finite"] == 3
    assert col["missing_share"] == pytest.approx(2 / 9, rel=1e-12)
    assert col["mean"] == pytest.approx(np.mean([2.0, 4.0, 5.0, 6.0]), rel=1e-12)
    assert _checks(doc)[("non-finite", "yield_t")]["count"] == 3
    for c in doc["columns"]:
        for v in c.values():
            assert not (isinstance(v, float) and not math.isfinite(v))


def test_all_missing_column_is_a_finding_not_a_crash():
    doc = _profile("all_missing_column.csv", 0)
    col = _column(doc, "empty_col")
    assert col["missing_share"] == 1.0
    assert ("column-all-missing", "empty_col") in _checks(doc)


def test_very_long_text_values_are_shortened_on_the_terminal():
    # A 5,003-character orchard id (with a duplicate key, so it appears in the examples) and
    # a 20,000-character note. JSON keeps the data as it is; the terminal text stays readable.
    doc = _profile("long_text.csv", 1)
    dup = _checks(doc)[("duplicate-keys", None)]
    assert dup["examples"][0]["orchard_id"] == "OR-" + "9" * 5000
    text = _run("long_text.csv", json_out=False)
    assert text.returncode == 1
    assert max(len(line) for line in text.stdout.splitlines()) < 1000
    assert len(text.stdout) < 20_000


def test_hostile_column_names_and_ids():
    # Column names with HTML and terminal control sequences, and a unit id with an
    # escape sequence that would set a terminal's title.
    hostile = ["<script>alert('x')</script>", "\x1b[2J\x1b[31mred\x1b[0m", "bell\x07and\x08back"]
    doc = _profile("hostile_names.csv", 1)
    assert [c["name"] for c in doc["columns"]] == hostile  # JSON keeps names exactly (escaped)
    text = _run("hostile_names.csv", json_out=False)
    leaked = {ch for ch in text.stdout if ch in CONTROL}
    assert not leaked, f"control characters reached the terminal: {sorted(map(ord, leaked))}"
    assert "<script>" in text.stdout  # shown as plain text, not removed


def test_int64_ids_beyond_2_to_the_53_in_parquet_keep_their_exact_value(tmp_path):
    # Binary formats keep stored types: int64 ids 2**53 and 2**53 + 1 are two units, and
    # JSON (which allows integers of any size) shows the duplicate's id exactly.
    import polars as pl

    path = tmp_path / "big_ids.parquet"
    pl.DataFrame({
        "orchard_id": [2**53, 2**53, 2**53 + 1, 2**53 + 1, 2**53 + 1],
        "season": [2020, 2021, 2020, 2021, 2021],
        "yield_t": [1.0, 2.0, 3.0, 4.0, 5.0],
    }).write_parquet(path)
    before = path.read_bytes()
    proc = run_cli("profile", str(path), *KEYS, "--json", timeout=60)
    assert proc.returncode == 1 and "Traceback" not in proc.stderr
    assert path.read_bytes() == before
    doc = _strict_json(proc.stdout)
    assert doc["panel"]["units"] == 2
    dup = _checks(doc)[("duplicate-keys", None)]
    assert dup["examples"][0]["orchard_id"] == 9007199254740993


def test_profiling_leaves_the_callers_frames_unchanged():
    # integer keys far from zero are coded in place on arrays the profile owns; a
    # pandas or polars frame handed in (zero-copy to numpy) must come back untouched
    import pandas as pd
    import polars as pl

    import auditor

    rng = np.random.default_rng(8)
    df = pd.DataFrame(
        {
            "farm": np.repeat(np.arange(5_000, 5_060), 5),
            "year": np.tile(np.arange(2010, 2015), 60),
            "yield_t": rng.normal(size=300),
        }
    )
    before = df.copy()
    frame = pl.from_pandas(df)
    frame_before = frame.clone()
    auditor.profile(df, unit="farm", time="year")
    auditor.profile(frame, unit="farm", time="year")
    assert df.equals(before)
    assert frame.equals(frame_before)
