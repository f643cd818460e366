"""Robustness, second round (issue 19): no wrong units, no escape, no hang, no internal problem.

Items 3 (column names and key types from one reader), 7 and 8 (one sanitiser), 9 (YAML
aliases, depth and numbers), 10 (many periods), 12 (many columns), 13 (a gzip bomb),
15 (internal problems), 18 (integer extremes) and 19 (folders, rules encodings, Unicode
twins). The outputs and exit codes (items 1, 2, 4, 5, 6, 16) are in tests/test_outputs.py.

Expected values are written out from the files' contents, or computed here by an
independent route: numpy least squares on explicit dummies, Python sets and integers,
the unicodedata module, the json module.
"""

from __future__ import annotations

import gzip
import json
import math
import tracemalloc
import unicodedata
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from conftest import ROOT, approx_equal, run_cli
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import auditor
from auditor.cli import main
from auditor.errors import AuditError

CORPUS = Path(__file__).resolve().parent / "data" / "awkward"
EXAMPLES = ROOT / "examples"
KEYS = ("--unit", "orchard_id", "--time", "season")
OVERRIDE_CASES = ["header_trailing_space.csv", "header_long.csv", "header_straddle.csv"]


def _code(action) -> str:
    with pytest.raises(AuditError) as err:
        action()
    return err.value.code


def _acting(text: str) -> set[str]:
    """Characters of ``text`` that act instead of showing (oracle: unicodedata), newline aside."""
    return {f"U+{ord(c):04X}" for c in text if c != "\n" and unicodedata.category(c) in ("Cc", "Cf", "Zl", "Zp", "Cs")}


# --- item 3: names and key types from one reader ------------------------------------------


@pytest.mark.parametrize("name", OVERRIDE_CASES)
def test_text_keys_stay_text_whatever_the_header(name):
    # ids 007 and 7 are two units as text, one as numbers (make_corpus.py, _keys_007)
    result = auditor.profile(CORPUS / name, unit="orchard_id", time="season")
    assert result.panel["units"] == 2
    assert sorted(result.data.units["orchard_id"].to_list()) == ["007", "7"]


def test_a_header_name_with_doubled_quotes_is_read_unquoted():
    # "orchard ""id""" in CSV is the name: orchard "id" (RFC 4180 quoting)
    result = auditor.profile(CORPUS / "header_quotes.csv", unit='orchard "id"', time="season")
    assert result.panel["units"] == 2


def test_a_duplicate_name_past_64_kib_is_refused():
    error = _code(lambda: auditor.profile(CORPUS / "header_duplicate_far.csv", unit="orchard_id", time="season"))
    assert error == "duplicate-column-names"


def test_the_straddling_character_is_kept_in_the_first_name():
    cols = auditor.profile(CORPUS / "header_straddle.csv", unit="orchard_id", time="season").data.schema
    assert next(iter(cols)) == "x" * 65_535 + "é"


def test_twenty_thousand_columns_give_no_false_duplicate(tmp_path):
    # the names c0..c19999 are all different (the old 64 KiB cut made 'c1094' a duplicate)
    names = [f"c{j}" for j in range(20_000)]
    lines = [",".join(["orchard_id", "season", *names])]
    lines += [",".join([u, str(t), *["1"] * 20_000]) for u in ("007", "7") for t in (2020, 2021)]
    path = tmp_path / "wide.csv"
    path.write_text("\n".join(lines) + "\n")
    result = auditor.profile(path, unit="orchard_id", time="season")
    assert result.panel["units"] == 2
    assert result.columns["name"].to_list() == names


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    names=st.lists(
        st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\r\x00"), min_size=1, max_size=12),
        min_size=1, max_size=5,
    ),
    padding=st.integers(0, 3),
)
def test_fuzzed_header_names_find_their_key(tmp_path_factory, names, padding):
    # Header written by Python's csv module (an independent writer), the key column named
    # with a random text; the key is found under its stripped name and keeps '007' and '7'.
    import csv

    key = "k" + names[0].strip().replace(",", "") + " " * padding
    others = [n for n in dict.fromkeys(x.strip() for x in names[1:]) if n and n not in ("t", key.strip())]
    path = tmp_path_factory.mktemp("hdr") / "p.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow([key, "t", *others])
        for u in ("007", "7"):
            for t in (1, 2):
                w.writerow([u, t, *["1"] * len(others)])
    result = auditor.profile(path, unit=key.strip(), time="t")
    assert sorted(result.data.units[key.strip()].to_list()) == ["007", "7"]
    assert result.columns["name"].to_list() == others


# --- items 7 and 8: one sanitiser --------------------------------------------------------


def test_the_acting_class_is_exactly_the_unicode_categories():
    # oracle: this Python's unicodedata; the class may hold code points a newer Unicode assigns
    from auditor.render.sanitise import ACTING

    acting = {chr(c) for c in range(0x110000) if unicodedata.category(chr(c)) in ("Cc", "Cf", "Zl", "Zp", "Cs")}
    matched = {chr(c) for c in range(0x110000) if ACTING.fullmatch(chr(c))}
    assert acting <= matched
    assert all(unicodedata.category(c) == "Cn" for c in matched - acting)  # unassigned here


def test_visible_writes_code_points():
    from auditor.render.sanitise import visible

    assert visible("a\x1b]0;t\x07b\u202ec\u200bd\x9be") == "a<U+001B>]0;t<U+0007>b<U+202E>c<U+200B>d<U+009B>e"
    assert visible("plain café, 日本") == "plain café, 日本"


@settings(max_examples=200, deadline=None)
@given(st.dictionaries(st.text(), st.text() | st.integers() | st.none(), max_size=4))
def test_json_keeps_every_value_and_prints_nothing_that_acts(doc):
    from auditor.render.json import dumps

    text = dumps(doc)
    assert json.loads(text) == doc  # the json module as the oracle of the values
    assert not _acting(text)


def _hostile_contract(tmp_path) -> Path:
    """A contract for hostile_bidi.csv whose rules fail on a new wave (examples shown)."""
    rules = tmp_path / "c.yaml"
    assert main(["rules", "draft", str(CORPUS / "hostile_bidi.csv"), *KEYS, "--out", str(rules)]) == 0
    return rules


def test_check_shows_hostile_names_and_ids_escaped(tmp_path, capsys):
    rules = _hostile_contract(tmp_path)
    frame = pl.read_csv(CORPUS / "hostile_bidi.csv", infer_schema=False)
    rain = pl.col("rain\u202emm").cast(pl.Float64)
    # the unit 'OR-' U+202E '2' breaks the drafted minimum: its key shows in the examples
    wave = frame.with_columns(pl.when(pl.col("orchard_id") == "OR-\u202e2").then(-rain).otherwise(rain).alias("rain\u202emm"))
    path = tmp_path / "next.csv"
    wave.write_csv(path)
    capsys.readouterr()
    assert main(["check", str(path), "--rules", str(rules)]) == 1
    out = capsys.readouterr().out
    assert not _acting(out), _acting(out)
    assert "rain<U+202E>mm" in out and "OR-<U+202E>2" in out  # the examples' keys and values


def test_profile_and_compare_text_show_hostile_text_escaped(capsys):
    path = CORPUS / "hostile_bidi.csv"
    main(["profile", str(path), *KEYS])
    main(["compare", str(path), str(path), *KEYS])
    out = capsys.readouterr().out
    assert not _acting(out)
    assert "zero<U+200B>width" in out and "rain<U+202E>mm" in out


def test_html_report_and_its_svg_show_hostile_text_escaped(tmp_path, capsys):
    out = tmp_path / "r.html"
    figs = tmp_path / "figs"
    assert main(["report", str(CORPUS / "hostile_bidi.csv"), "--against", str(CORPUS / "hostile_bidi.csv"),
                 *KEYS, "--out", str(out), "--png-dir", str(figs), "--fail-on", "never"]) == 0
    page = out.read_text(encoding="utf-8")
    assert not _acting(page)
    svg = page[page.index("<svg"):]
    assert "zero&lt;U+200B&gt;width" in svg  # figure labels (inline SVG text)
    assert "rain&lt;U+202E&gt;mm" in page[: page.index("<svg")]  # tables


def test_json_keeps_hostile_names_exactly(capsys):
    main(["profile", str(CORPUS / "hostile_bidi.csv"), *KEYS, "--json"])
    text = capsys.readouterr().out
    assert not _acting(text)
    names = [c["name"] for c in json.loads(text)["columns"]]
    assert names == ["rain\u202emm", "zero\u200bwidth", "c1\u009b31m", "link\x1b]8;;http://example.invalid\x1b\\x"]


# --- item 9 and the rules files of items 15 and 19 -----------------------------------------


def _settings(path):
    from auditor.checks.config import load_settings

    return load_settings(path)


def test_a_17_byte_recursive_alias_is_refused_at_once():
    proc = run_cli("profile", str(EXAMPLES / "orchards.csv"), *KEYS, "--rules",
                   str(CORPUS / "rules_alias_loop.yaml"), timeout=60)
    assert proc.returncode == 2
    assert proc.stderr == (
        f"panel-audit: error: rules file '{CORPUS / 'rules_alias_loop.yaml'}' line 1: alias '*x' points into the "
        "node that holds it, so it would never end; write the values out\n"
    )


def test_a_billion_laughs_is_refused():
    # 9**10 strings once expanded; the cap is 100,000 values beyond those written
    assert _code(lambda: _settings(CORPUS / "rules_laughs.yaml")) == "rules-alias-expansion"


def test_ordinary_aliases_still_work():
    s = _settings(CORPUS / "rules_aliases.yaml")
    assert s.profile.high_missing_share == 0.30 and s.compare.missing_jump == 0.30


def test_a_number_of_5000_digits_is_refused_with_its_line():
    with pytest.raises(AuditError) as err:
        _settings(CORPUS / "rules_long_number.yaml")
    assert err.value.code == "rules-number-too-long" and "line 2" in err.value.message


def test_deep_block_nesting_is_refused_with_its_line(tmp_path):
    path = tmp_path / "deep.yaml"
    path.write_text("profile:\n" + "".join("  " * (i + 1) + f"k{i}:\n" for i in range(100)) + "  " * 101 + "x\n")
    with pytest.raises(AuditError) as err:
        _settings(path)
    assert err.value.code == "rules-too-deep" and "line 65" in err.value.message


@pytest.mark.parametrize("libyaml", [True, False])
def test_50000_levels_of_flow_nesting_are_a_clear_error(tmp_path, monkeypatch, libyaml):
    import yaml

    if not libyaml:
        monkeypatch.delattr(yaml, "CSafeLoader", raising=False)
    path = tmp_path / "deep.yaml"
    path.write_text("profile: " + "[" * 50_000 + "]" * 50_000 + "\n")
    code = _code(lambda: _settings(path))
    # libyaml's scanner stops at its own depth limit (a syntax error); the pure-Python
    # reader reaches the tool's limit first
    assert code == ("rules-syntax" if libyaml and hasattr(yaml, "CSafeLoader") else "rules-too-deep")


YAML_TOKENS = ["&a ", "&b ", "*a", "*b", "[", "]", "{", "}", ": ", ", ", "- ", "\n", "  ", "x", "1", "1e400",
               "!!str ", "!!python/object ", "'q'", '"\\u202e"', "? ", "profile", "severities", "gaps", "note"]


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.sampled_from(YAML_TOKENS), max_size=60))
def test_fuzzed_rules_files_end_in_settings_or_a_catalogued_error(tmp_path_factory, tokens):
    # whatever the tokens, reading ends (no loop, no blow-up) with settings or an AuditError
    path = tmp_path_factory.mktemp("yaml") / "r.yaml"
    path.write_text("".join(tokens), encoding="utf-8")
    try:
        _settings(path)
    except AuditError as err:
        assert err.code.startswith("rules-") or err.code.startswith("contract-"), err.code


def test_a_latin1_rules_file_is_refused_naming_the_byte():
    with pytest.raises(AuditError) as err:
        _settings(CORPUS / "rules_latin1.yaml")
    assert err.value.code == "rules-encoding"
    assert "line 3: byte 0xE9 is not UTF-8" in err.value.message


def test_a_utf16_rules_file_with_a_byte_order_mark_is_read(tmp_path):
    path = tmp_path / "r.yaml"
    path.write_bytes("severities:\n  gaps: note  # café\n".encode("utf-16"))
    assert _settings(path).severity("gaps", "warning") == "note"


@pytest.mark.parametrize(
    "section, key, value",
    [
        ("profile", "high_missing_share", ".nan"),
        ("profile", "near_constant_share", "-0.5"),
        ("profile", "float_tolerance", ".inf"),
        ("profile", "few_switchers", "-3"),
        ("report", "quantiles", "1"),
        ("instruments", "stock_yogo_size", "12"),
        ("instruments", "test_alpha", "1.0"),
        ("compare", "psi_bins", "1"),
    ],
)
def test_thresholds_out_of_range_are_refused(tmp_path, section, key, value):
    path = tmp_path / "r.yaml"
    path.write_text(f"{section}:\n  {key}: {value}\n")
    with pytest.raises(AuditError) as err:
        _settings(path)
    assert err.value.code == "rules-bad-value" and "line 2" in err.value.message


def test_every_shipped_default_is_inside_its_range():
    # the shipped file is the oracle of what a sensible value is
    from auditor.checks.config import RANGES, _defaults, range_problem

    d = _defaults()
    keys = {(s, k) for s, v in d.items() if isinstance(v, dict) for k in v}
    assert keys - set(RANGES) == set(), "a new threshold needs its range in auditor.checks.config.RANGES"
    assert set(RANGES) - keys == set()
    assert [(s, k) for s, k in keys if range_problem(s, k, d[s][k])] == []


# --- item 10: many periods ---------------------------------------------------------------


def _two_way_r2(u: np.ndarray, t: np.ndarray, x: np.ndarray) -> float:
    """R2 of period effects after unit effects, by numpy least squares on explicit dummies."""
    units, periods = u.max() + 1, t.max() + 1
    du = np.zeros((u.size, units))
    du[np.arange(u.size), u] = 1
    dt = np.zeros((u.size, periods))
    dt[np.arange(u.size), t] = 1
    within = x - du @ np.linalg.lstsq(du, x, rcond=None)[0]
    both = np.hstack([du, dt])
    residual = x - both @ np.linalg.lstsq(both, x, rcond=None)[0]
    return 1.0 - float(residual @ residual) / float(within @ within)


def test_many_periods_match_least_squares_without_a_dense_system():
    from auditor.stats.moments import DENSE_PERIODS, SparsePeriods
    from auditor.stats.variation import run_passes

    rng = np.random.default_rng(19)
    periods, units = DENSE_PERIODS + 50, 25
    u = np.repeat(np.arange(units), periods)
    t = np.tile(np.arange(periods), units)
    keep = rng.random(u.size) < 0.55  # unbalanced
    u, t = u[keep], t[keep]
    trend = 0.05 * t + rng.normal(scale=0.01, size=u.size)  # nearly absorbed by periods
    noise = rng.normal(size=u.size)
    gappy = noise.copy()
    gappy[rng.random(u.size) < 0.1] = np.nan  # its own system
    frame = pl.DataFrame({"u": u, "t": t, "trend": trend, "noise": noise, "gappy": gappy}).with_columns(
        pl.col("gappy").fill_nan(None)
    )
    result = auditor.profile(frame, unit="u", time="t")
    r2 = dict(zip(result.columns["name"].to_list(), result.columns["time_r2"].to_list(), strict=True))
    assert r2["trend"] == pytest.approx(_two_way_r2(u, t, trend), abs=1e-9)
    assert r2["noise"] == pytest.approx(_two_way_r2(u, t, noise), abs=1e-9)
    seen = ~np.isnan(gappy)
    assert r2["gappy"] == pytest.approx(_two_way_r2(u[seen], t[seen], gappy[seen]), abs=1e-9)
    assert result.columns.filter(pl.col("name") == "trend")["absorbed_by_time"].item() is True
    assert isinstance(run_passes(result.data, result.settings).system, SparsePeriods)


def test_a_chain_of_overlapping_units_converges():
    # each unit spans three consecutive periods: the slowest case for iterative solvers
    from auditor.stats.moments import SparsePeriods
    from auditor.stats.variation import _explained

    rng = np.random.default_rng(4)
    periods = 600
    u = np.repeat(np.arange(periods - 2), 3)
    t = (np.arange(periods - 2)[:, None] + np.arange(3)).ravel()
    x = rng.normal(size=u.size) + 0.01 * t
    means = np.bincount(u, weights=x) / np.bincount(u)
    dev = x - means[u]
    system = SparsePeriods.from_rows(u, t, periods - 2, periods)
    r2 = _explained(np.bincount(t, weights=dev, minlength=periods), float(dev @ dev), system)
    assert r2 == pytest.approx(_two_way_r2(u, t, x), abs=1e-9)


def test_streaming_many_periods_equal_in_memory(tmp_path):
    rng = np.random.default_rng(5)
    periods, units = 450, 12
    u = np.repeat(np.arange(units), periods)
    t = np.tile(np.arange(periods), units) + 1000
    path = tmp_path / "p.parquet"
    pl.DataFrame({"u": u, "t": t, "x": rng.normal(size=u.size) + 0.01 * t}).write_parquet(path)
    a = auditor.profile(path, unit="u", time="t", streaming=False).to_dict()
    b = auditor.profile(path, unit="u", time="t", streaming=True).to_dict()
    a.pop("tool"), b.pop("tool")
    assert approx_equal(a["columns"], b["columns"], rel=1e-9, abs_=1e-12)


# --- item 13: a gzip bomb is measured on the stream ----------------------------------------


def test_a_gzip_bomb_is_refused_before_it_fills_memory(tmp_path, monkeypatch):
    import auditor.io.sources as sources
    from auditor.io.sources import text_limit

    monkeypatch.setattr(sources, "memory_bytes", lambda: 64 * 2**20)  # text limit: 4 MiB
    limit = text_limit()
    assert limit == 4 * 2**20
    path = tmp_path / "bomb.csv.gz"
    with gzip.open(path, "wb", compresslevel=9) as fh:
        fh.write(b"orchard_id,season,yield_t\n" + b"OR-1,2020,1\n" * 2_000_000)  # 24 MB of text
    assert path.stat().st_size * 5 < limit  # the old guard (5x the file) let it through
    tracemalloc.start()
    try:
        code = _code(lambda: auditor.profile(path, unit="orchard_id", time="season"))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert code == "too-large"
    assert peak < limit + 4 * 2**20  # the text so far and one chunk, never the 24 MB


def test_a_gzip_file_under_the_limit_is_read(tmp_path):
    path = tmp_path / "small.csv.gz"
    with gzip.open(path, "wb") as fh:
        fh.write(b"orchard_id,season,yield_t\n007,2020,1\n7,2020,2\n007,2021,3\n7,2021,4\n")
    assert auditor.profile(path, unit="orchard_id", time="season").panel["units"] == 2


# --- item 15: internal problems become answers or clear errors ----------------------------


def test_a_time_key_beyond_int64_in_a_csv(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("u,t,x\na,1,1\na,99999999999999999999,2\nb,1,3\nb,99999999999999999999,4\n")
    p = auditor.profile(path, unit="u", time="t").panel
    assert p["period_values"] == [1, 99999999999999999999]
    assert p["step"] == 99999999999999999999 - 1  # Python integers as the oracle


@pytest.mark.parametrize("dtype, ids", [(pl.UInt64, [2**64 - 1, 2**64 - 2]), (pl.UInt64, [2**63, 5]),
                                        (pl.Int128, [2**126, -5])])
def test_unit_keys_at_the_ends_of_their_type(tmp_path, dtype, ids):
    path = tmp_path / "k.parquet"
    pl.DataFrame({"u": pl.Series([ids[0], ids[0], ids[1], ids[1]], dtype=dtype), "t": [1, 2, 1, 2],
                  "x": [1.0, 2.0, 3.0, 5.0]}).write_parquet(path)
    result = auditor.profile(path, unit="u", time="t")
    assert result.panel["units"] == 2
    assert sorted(result.data.units["u"].to_list()) == sorted(ids)


def _write(tmp_path, name, text) -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_check_on_integers_beyond_int64(tmp_path):
    from auditor.commands.check import check

    data = _write(tmp_path, "big.csv", "u,t,big\na,1,99999999999999999999\na,2,1\nb,1,3\nb,2,-99999999999999999999\n")
    rules = _write(tmp_path, "c.yaml", "panel: {unit: u, time: t}\ncolumns:\n  big: {min: 0, max: 99999999999999999999}\n")
    result = {r.rule: r for r in check(data, rules=rules).rules if r.column == "big"}
    # one value below 0 (the literal -99999999999999999999), none above the maximum
    assert (result["min"].passed, result["min"].failing) == (False, 1)
    assert (result["max"].passed, result["max"].failing) == (True, 0)


def test_check_on_a_column_with_an_empty_name(tmp_path):
    from auditor.commands.check import check

    data = _write(tmp_path, "e.csv", "u,t,\na,1,1\na,2,2\nb,1,3\nb,2,4\n")
    rules = _write(tmp_path, "c.yaml", "panel: {unit: u, time: t}\ncolumns:\n  '': {max: 3}\n")
    (rule,) = [r for r in check(data, rules=rules).rules if r.column == "" and r.rule == "max"]
    assert (rule.passed, rule.failing) == (False, 1)  # only the 4 is above 3


@pytest.mark.parametrize("name", ["__pa_row", "__pa_unit", "__pa_period", "__pa_anything"])
def test_columns_named_like_the_tools_own_are_refused(name):
    frame = pl.DataFrame({"u": ["a", "a"], "t": [1, 2], name: [1, 2]})
    with pytest.raises(AuditError) as err:
        auditor.profile(frame, unit="u", time="t")
    assert err.value.code == "reserved-column-name" and name in err.value.message


def test_a_parquet_map_column_streams_like_in_memory(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = tmp_path / "m.parquet"
    maps = pa.array([[("k", 1)], [("k", 2)], [], [("j", 3)]], type=pa.map_(pa.string(), pa.int64()))
    pq.write_table(pa.table({"u": ["a", "a", "b", "b"], "t": [1, 2, 1, 2], "m": maps}), path)
    a = auditor.profile(path, unit="u", time="t", streaming=False).to_dict()
    b = auditor.profile(path, unit="u", time="t", streaming=True).to_dict()
    assert a["columns"] == b["columns"]
    (m,) = a["columns"]
    assert (m["distinct"], m["units_changing"]) == (4, 2)  # four different maps, both units change


# --- item 18: integers at the ends of their types -------------------------------------------

EXTREMES = {
    pl.Int64: st.one_of(st.integers(-(2**63), -(2**63) + 4), st.integers(2**63 - 5, 2**63 - 1), st.integers(-3, 3)),
    pl.UInt64: st.one_of(st.integers(2**64 - 5, 2**64 - 1), st.integers(2**63 - 2, 2**63 + 2), st.integers(0, 3)),
}


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data(), dtype=st.sampled_from([pl.Int64, pl.UInt64]))
def test_integer_extremes_change_exactly_in_memory_and_streaming(tmp_path_factory, data, dtype):
    n_units = data.draw(st.integers(2, 5))
    values = {i: data.draw(st.lists(EXTREMES[dtype], min_size=2, max_size=3)) for i in range(n_units)}
    rows = [(f"u{i}", t, v) for i, vs in values.items() for t, v in enumerate(vs)]
    path = tmp_path_factory.mktemp("ext") / "x.parquet"
    pl.DataFrame({"u": [r[0] for r in rows], "t": [r[1] for r in rows],
                  "v": pl.Series([r[2] for r in rows], dtype=dtype)}).write_parquet(path)
    changing = sum(len(set(vs)) > 1 for vs in values.values())  # Python sets as the oracle
    distinct = len({r[2] for r in rows})
    docs = [auditor.profile(path, unit="u", time="t", streaming=s).to_dict()["columns"][0] for s in (False, True)]
    for doc in docs:
        assert (doc["units_changing"], doc["distinct"]) == (changing, distinct)
    assert docs[0]["kind"] == docs[1]["kind"]
    # a composite key takes the polars streaming pass: the same answer
    composite = pl.read_parquet(path).with_columns(pl.lit("g").alias("g"))
    composite.write_parquet(path)
    doc = auditor.profile(path, unit="g,u", time="t", streaming=True).to_dict()["columns"][0]
    assert (doc["units_changing"], doc["kind"]) == (changing, docs[0]["kind"])


# --- item 19: folders, Unicode twins ------------------------------------------------------------


def test_a_txt_file_in_a_data_folder_is_not_a_wave(tmp_path):
    folder = tmp_path / "waves"
    folder.mkdir()
    (folder / "w1.csv").write_bytes((CORPUS / "bom.csv").read_bytes())
    (folder / "README.txt").write_text("orchard_id,season,yield_t\nOR-9,2020,1\n")  # even one that parses
    (folder / ".hidden.csv").write_text("orchard_id,season\nOR-8,2020\n")
    result = auditor.profile(folder, unit="orchard_id", time="season")
    assert result.panel["rows"] == 9  # bom.csv alone: 3 units x 3 seasons
    (note,) = [f for f in result.findings if f.check == "files-skipped"]
    assert note.severity == "note" and note.count == 1 and "README.txt" in note.message
    glob = auditor.profile(str(folder / "*"), unit="orchard_id", time="season")
    assert glob.panel["rows"] == 9
    named = auditor.profile(folder / "README.txt", unit="orchard_id", time="season")  # named: read
    assert named.panel["rows"] == 1


def test_unicode_twins_of_an_id_are_noted():
    result = auditor.profile(CORPUS / "unicode_twins.csv", unit="orchard_id", time="season")
    assert result.panel["units"] == 5  # still counted apart: the tool reports, the analyst decides
    (note,) = [f for f in result.findings if f.check == "unit-key-twins"]
    # 'OR-café' composed, 'OR-cafe' + U+0301 and 'OR-' U+200B 'café': one group of three
    assert note.count == 3 and "3 units in 1 groups" in note.message
    differs = sorted(e["differs_by"] for e in note.examples)
    assert any("U+200B" in d for d in differs) and any("U+0301" in d for d in differs)


def test_ids_without_twins_get_no_note():
    result = auditor.profile(CORPUS / "leading_zeros.csv", unit="orchard_id", time="season")
    assert not [f for f in result.findings if f.check == "unit-key-twins"]


def test_numbers_in_the_corpus_are_finite():
    # the JSON of every corpus file above parses strictly (no NaN tokens)
    for name in ("unicode_twins.csv", "hostile_bidi.csv", *OVERRIDE_CASES):
        text = auditor.profile(CORPUS / name, unit="orchard_id", time="season").to_dict()
        json.dumps(text, allow_nan=False)
        assert all(not (isinstance(v, float) and not math.isfinite(v)) for c in text["columns"] for v in c.values())
