"""Panel contracts: row rules against independent polars counts, panel rules on hand-built
panels, drafting, export, and strict loading of rule files.

Oracles: row-rule failing counts (which come from great-expectations) are checked
against an independent polars computation on the same data; panel rules against
hand-built panels whose counts are evident by construction, and against pandas
group-by computations; drafting against statsmodels' Grunfeld data and the
invented orchard demo with its planted changes (auditor/demo_data.py, PLANTED_NEXT).
"""

from __future__ import annotations

import datetime as dt
import textwrap
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import yaml

from auditor.commands.check import check
from auditor.commands.draft import draft
from auditor.contracts.rules import export_suite
from auditor.errors import AuditError

# --- helpers ---------------------------------------------------------------------


def write(tmp_path: Path, text: str, name: str = "contract.yaml") -> Path:
    p = tmp_path / name
    p.write_text(textwrap.dedent(text), encoding="utf-8")
    return p


def by_rule(result, rule: str, column: str | None = None):
    hits = [r for r in result.rules if r.rule == rule and r.column == column]
    assert len(hits) == 1, [(r.rule, r.column) for r in result.rules]
    return hits[0]


@pytest.fixture(scope="module")
def random_panel() -> pl.DataFrame:
    """A 400-unit, 6-period panel with random values, gaps in columns, and planted oddities."""
    rng = np.random.default_rng(7)
    n_units, n_periods = 400, 6
    n = n_units * n_periods
    unit = np.repeat([f"u{i:04d}" for i in range(n_units)], n_periods)
    period = np.tile(np.arange(2001, 2001 + n_periods), n_units)
    x = rng.normal(50, 20, n)
    x[rng.random(n) < 0.05] = np.nan  # NaN: missing to the row rules
    k = rng.integers(0, 9, n)
    code = rng.choice(["AA-1", "AB-2", "zz", "AC-33", "A-1"], n)
    ident = rng.integers(0, 2 * n, n)  # some values repeat
    frame = pl.DataFrame(
        {"unit": unit, "period": period, "x": x, "k": k, "code": code, "ident": ident}
    ).with_columns(
        pl.when(pl.int_range(pl.len()) % 17 == 0).then(None).otherwise(pl.col("k")).alias("k"),
        pl.when(pl.int_range(pl.len()) % 23 == 0).then(None).otherwise(pl.col("code")).alias("code"),
    )
    return frame


ROW_CONTRACT = """\
panel:
  unit: unit
  time: period
columns:
  x: {type: float, min: 20, max: 90, max_missing: 0.01}
  k: {type: integer, allowed: [0, 1, 2, 3, 4, 5], max_missing: 0.2}
  code: {type: text, pattern: "A[A-Z]-[0-9]", max_missing: 0.0}
  ident: {unique: true, type: text}
"""


# --- row rules: great-expectations counts equal independent polars counts ---------


@pytest.fixture(scope="module")
def row_result(random_panel, tmp_path_factory):
    path = write(tmp_path_factory.mktemp("row"), ROW_CONTRACT)
    return check(random_panel, rules=path)


def test_min_failing_count_equals_polars(random_panel, row_result):
    # oracle: polars on the same data, NaN read as missing (common practice for pandas-backed checks)
    x = random_panel["x"].fill_nan(None)
    expected = int((x < 20).sum())
    r = by_rule(row_result, "min", "x")
    assert expected > 0
    assert (r.failing, r.passed, r.engine) == (expected, False, "great-expectations")


def test_max_failing_count_equals_polars(random_panel, row_result):
    x = random_panel["x"].fill_nan(None)
    expected = int((x > 90).sum())
    assert expected > 0
    assert by_rule(row_result, "max", "x").failing == expected


def test_allowed_failing_count_equals_polars(random_panel, row_result):
    k = random_panel["k"].drop_nulls()
    expected = int((~k.is_in([0, 1, 2, 3, 4, 5])).sum())
    assert expected > 0
    assert by_rule(row_result, "allowed", "k").failing == expected


def test_max_missing_counts_missing_rows_and_judges_the_share(random_panel, row_result):
    x = random_panel["x"]
    missing_x = int(x.is_null().sum() + x.is_nan().sum())
    r = by_rule(row_result, "max_missing", "x")
    assert r.failing == missing_x
    assert r.passed is (missing_x / random_panel.height <= 0.01)
    assert r.passed is False  # about 5% missing against a 1% ceiling
    missing_k = int(random_panel["k"].is_null().sum())
    rk = by_rule(row_result, "max_missing", "k")
    assert (rk.failing, rk.passed) == (missing_k, True)  # about 6% against 20%
    rc = by_rule(row_result, "max_missing", "code")
    assert (rc.failing, rc.passed) == (int(random_panel["code"].is_null().sum()), False)


def test_pattern_failing_count_equals_polars(random_panel, row_result):
    code = random_panel["code"].drop_nulls()
    expected = int((~code.str.contains(r"^(?:A[A-Z]-[0-9])$")).sum())
    assert expected > 0
    r = by_rule(row_result, "pattern", "code")
    assert r.failing == expected
    # 'AC-33' breaks it because the whole value must match
    assert any(e["code"] in ("zz", "AC-33", "A-1") for e in r.examples)


def test_unique_failing_count_equals_polars(random_panel, row_result):
    ident = random_panel["ident"].drop_nulls()
    expected = int(ident.is_duplicated().sum())
    assert expected > 0
    assert by_rule(row_result, "unique", "ident").failing == expected


def test_type_rule_reads_the_schema_and_counts_values(random_panel, row_result):
    # ident is an integer column, the contract says text: every non-missing value breaks it
    r = by_rule(row_result, "type", "ident")
    assert (r.passed, r.failing) == (False, random_panel["ident"].count())
    assert by_rule(row_result, "type", "x").passed
    assert by_rule(row_result, "type", "k").passed  # integers with gaps stay integers


def test_examples_locate_failing_rows(random_panel, row_result):
    r = by_rule(row_result, "max", "x")
    assert 0 < len(r.examples) <= 5
    for e in r.examples:
        hit = random_panel.filter((pl.col("unit") == e["unit"]) & (pl.col("period") == e["period"]))
        assert hit["x"][0] == e["x"] and e["x"] > 90


def test_result_document_follows_the_contract(row_result):
    doc = row_result.to_dict()
    assert doc["tool"]["name"] == "panel-audit"
    assert doc["passed"] is False
    for r in doc["rules"]:
        assert {"rule", "level", "column", "passed", "failing", "message"} <= set(r)
        assert r["level"] in ("row", "panel")


def test_date_bounds_apply_to_date_columns(tmp_path):
    frame = pl.DataFrame(
        {
            "u": ["a", "a", "b", "b"],
            "t": [1, 2, 1, 2],
            "visited": [dt.date(2020, 1, 5), dt.date(2020, 3, 1), None, dt.date(2021, 7, 1)],
        }
    )
    path = write(tmp_path, "panel: {unit: u, time: t}\ncolumns:\n  visited: {type: date, min: 2020-02-01, max: 2021-01-01}\n")
    res = check(frame, rules=path)
    # evident by construction: one date before, one after the bounds
    assert by_rule(res, "min", "visited").failing == 1
    assert by_rule(res, "max", "visited").failing == 1


# --- panel rules on polars -------------------------------------------------------


def _hand_panel() -> pl.DataFrame:
    # five units over 2010-2014; u3 misses 2012; u4 leaves after 2011; u5 appears in 2013;
    # u1 is observed twice in 2011 (one duplicate key row).
    rows = []
    for u, periods in {
        "u1": [2010, 2011, 2011, 2012, 2013, 2014],
        "u2": [2010, 2011, 2012, 2013, 2014],
        "u3": [2010, 2011, 2013, 2014],
        "u4": [2010, 2011],
        "u5": [2013, 2014],
    }.items():
        for i, p in enumerate(periods):
            rows.append({"u": u, "t": p, "i": i})
    f = pl.DataFrame(rows)
    return f.with_columns(
        # soil is fixed except for u2, which changes once
        pl.when((pl.col("u") == "u2") & (pl.col("t") >= 2013)).then(pl.lit("B")).otherwise(pl.lit("A")).alias("soil"),
        # age rises by one a period except u3, whose age falls once (2013)
        (pl.col("t") - 2000 - pl.when((pl.col("u") == "u3") & (pl.col("t") >= 2013)).then(3).otherwise(0)).alias("age"),
    ).drop("i")


def test_panel_rules_on_a_hand_built_panel(tmp_path):
    frame = _hand_panel()
    path = write(
        tmp_path,
        """\
        panel:
          unit: u
          time: t
          step: 1
          periods: [2010, 2011, 2012, 2013, 2014, 2015]
          min_units: 7
          balanced: true
          max_attrition: 0.2
          max_duplicate_keys: 0
          only_listed_columns: true
        columns:
          soil: {invariant: true}
          age: {monotone: increasing, max_change: 1}
        """,
    )
    res = check(frame, rules=path)
    assert by_rule(res, "step").passed
    per = by_rule(res, "periods")
    assert (per.passed, per.failing) == (False, 1) and "2015" in per.message
    assert by_rule(res, "min_units").failing == 2  # 5 units, 7 asked
    assert by_rule(res, "balanced").failing == 3  # u3, u4, u5 miss a period
    # after 2011, u4 of the 4 units present is never seen again: 25% > 20%
    att = by_rule(res, "max_attrition")
    assert (att.failing, att.examples[0]["period"]) == (1, 2011)
    assert by_rule(res, "max_duplicate_keys").failing == 1
    assert by_rule(res, "only_listed_columns").passed
    inv = by_rule(res, "invariant", "soil")
    assert (inv.failing, inv.examples[0]["u"]) == (1, "u2")
    mono = by_rule(res, "monotone", "age")
    assert mono.failing == 1 and mono.examples[0]["u"] == "u3"
    # every step between consecutive observations is -1, 0 or +1: none exceeds 1
    assert by_rule(res, "max_change", "age").failing == 0


def test_invariant_and_monotone_counts_equal_pandas_groupby(random_panel, tmp_path):
    # oracle: pandas group-by (an independent library) on the same data
    import pandas as pd

    frame = random_panel.with_columns((pl.col("k").fill_null(0) % 3).alias("grade"))
    path = write(
        tmp_path,
        "panel: {unit: unit, time: period}\ncolumns:\n  grade: {invariant: true, monotone: increasing, max_change: 1}\n",
    )
    res = check(frame, rules=path)
    pdf = frame.select("unit", "period", "grade").to_pandas().sort_values(["unit", "period"])
    changing = int((pdf.groupby("unit")["grade"].nunique() > 1).sum())
    diffs = pdf.groupby("unit")["grade"].diff().dropna()
    assert by_rule(res, "invariant", "grade").failing == changing
    assert by_rule(res, "monotone", "grade").failing == int((diffs < 0).sum())
    assert by_rule(res, "max_change", "grade").failing == int((diffs.abs() > 1).sum())
    assert isinstance(pdf, pd.DataFrame)


def test_period_range_counts_periods_outside(tmp_path):
    path = write(tmp_path, "panel: {unit: u, time: t, period_range: {first: 2011, last: 2013}}\n")
    res = check(_hand_panel(), rules=path)
    assert by_rule(res, "period_range").failing == 2  # 2010 and 2014


def test_missing_required_column_fails_and_optional_is_skipped(tmp_path):
    path = write(tmp_path, "panel: {unit: u, time: t}\ncolumns:\n  gone: {type: float}\n  maybe: {required: false, min: 0}\n")
    res = check(_hand_panel(), rules=path)
    assert [(r.rule, r.column, r.passed) for r in res.rules] == [("present", "gone", False)]


# --- drafting --------------------------------------------------------------------


def test_draft_passes_on_grunfeld():
    # open data: statsmodels' Grunfeld investment panel (check-values.md)
    from statsmodels.datasets import grunfeld

    data = grunfeld.load_pandas().data
    data = data[data["firm"] != "American Steel"].reset_index(drop=True)
    text = draft(data, unit="firm", time="year")
    doc = yaml.safe_load(text)
    # 10 firms (Baltagi, Table 2.1 sample) in the last year; the floor keeps 80% of them
    assert doc["panel"]["min_units"] == 8
    assert doc["panel"]["period_range"] == {"first": 1935} and doc["panel"]["step"] == 1
    assert doc["panel"]["balanced"] is True
    # the observed range (pandas) widened by half its width, not below 0 (investment is positive)
    lo, hi = data["invest"].min(), data["invest"].max()
    assert doc["columns"]["invest"]["min"] == 0
    assert hi + 0.5 * (hi - lo) <= doc["columns"]["invest"]["max"] <= hi + 0.6 * (hi - lo)


def test_draft_passes_on_its_own_data_and_round_trips(tmp_path):
    from auditor.io.demo_data import make_orchards

    base = make_orchards()
    path = tmp_path / "draft.yaml"
    path.write_text(draft(base, unit="orchard_id", time="season"), encoding="utf-8")
    res = check(base, rules=path)
    assert res.passed, [r for r in res.rules if not r.passed]
    assert len(res.rules) > 30


def test_draft_of_grunfeld_passes_check(tmp_path):
    from statsmodels.datasets import grunfeld

    data = grunfeld.load_pandas().data
    path = tmp_path / "g.yaml"
    path.write_text(draft(data, unit="firm", time="year"), encoding="utf-8")
    assert check(data, rules=path).passed


def test_draft_fails_on_next_season_with_planted_changes_named(tmp_path):
    # the demo's next-season file and its planted sizes (auditor/demo_data.py, PLANTED_NEXT)
    from auditor.io.demo_data import NEXT_SEASON, PLANTED_NEXT, make_next_season, make_orchards

    base = make_orchards()
    nxt = make_next_season(base)
    path = tmp_path / "draft.yaml"
    path.write_text(draft(base, unit="orchard_id", time="season"), encoding="utf-8")
    res = check(nxt, rules=path)
    assert not res.passed
    failed = {(r.rule, r.column): r for r in res.failed}
    soil = failed[("allowed", "soil_class")]
    assert soil.failing == PLANTED_NEXT["new_soil_code"]
    assert {e["soil_class"] for e in soil.examples} == {"PT"}
    lab = failed[("max_missing", "labour_days")]
    assert lab.failing == int(nxt["labour_days"].is_null().sum())  # polars oracle
    assert "hail_net" in failed[("only_listed_columns", None)].message  # a question first asked this season
    assert ("present", "quarantine_flag") in failed  # the column the new file dropped
    # the draft is made for the next delivery (issue 14): season NEXT_SEASON, one period and
    # fewer units than the registry in all, keeps its period, step and unit-count rules
    held = {(r.rule, r.column) for r in res.rules if r.passed}
    assert {("period_range", None), ("step", None), ("min_units", None)} <= held
    assert NEXT_SEASON == 2025


# --- export ----------------------------------------------------------------------


def test_export_is_a_suite_great_expectations_reruns_with_polars_counts(random_panel, tmp_path):
    import great_expectations as gx

    from auditor.contracts.rules import to_pandas_once

    path = write(tmp_path, ROW_CONTRACT)
    doc = export_suite(path)
    types = sorted(e["type"] for e in doc["expectations"])
    assert types.count("expect_column_values_to_be_between") == 2
    assert "columns.x.type" in doc["meta"]["panel_audit"]["not_exported"]
    # the library reads the exported document back and evaluates it on the data
    ctx = gx.get_context(mode="ephemeral")
    suite = gx.ExpectationSuite(**{k: v for k, v in doc.items() if k != "id"})
    batch = (
        ctx.data_sources.add_pandas("t").add_dataframe_asset("a").add_batch_definition_whole_dataframe("b")
        .get_batch(batch_parameters={"dataframe": to_pandas_once(random_panel)})
    )
    out = batch.validate(suite, result_format="SUMMARY")
    counts = {(r.expectation_config.meta["column"], r.expectation_config.meta["rule"]): r.result["unexpected_count"] for r in out.results}
    assert counts[("x", "max")] == int((random_panel["x"].fill_nan(None) > 90).sum())  # polars oracle
    assert counts[("ident", "unique")] == int(random_panel["ident"].is_duplicated().sum())


# --- strict loading --------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "code", "needles"),
    [
        ("panel:\n  unit: u\n  time: t\n  balnced: true\n", "rules-unknown-key", ["balnced", "line 4", "balanced"]),
        ("panel: {unit: u, time: t}\ncolumns:\n  x:\n    maximum: 3\n", "rules-unknown-key", ["maximum", "line 4", "max_change"]),
        ("panel: {unit: u, time: t}\ncolumns:\n  x: {max_missing: lots}\n", "rules-bad-value", ["columns.x.max_missing", "line 3", "share"]),
        ("panel: {unit: u, time: t, min_units: -1}\n", "rules-bad-value", ["panel.min_units", "at least 0"]),
        ("panel: {unit: u, time: t}\ncolumns:\n  x: {min: 5, max: 1}\n", "rules-bad-value", ["columns.x.max"]),
        ("panel: {unit: u, time: t}\ncolumns:\n  x: {pattern: '[a-'}\n", "rules-bad-value", ["columns.x.pattern", "regular expression"]),
        ("panel: {unit: u, time: t, periods: [1, 2], period_range: {first: 1}}\n", "rules-bad-value", ["panel.period_range"]),
        ("panel: {unit: u, time: t}\ncolumns:\n  x: {type: real}\n", "rules-bad-value", ["columns.x.type", "integer"]),
        ("panel:\n  unit: u\n  time: [t\n", "rules-syntax", ["line"]),
        ("panel: !!python/object/apply:os.system ['true']\n", "rules-tag", ["line 1", "python/object"]),
        ("thresholds: {}\n", "contract-empty", ["no 'panel' or 'columns'"]),
        ("columns:\n  x: {min: 0}\n", "contract-no-keys", ["--unit"]),
        ("panel: {unit: u, time: t}\ncolumns:\n  x: {min: 0}\n  x: {max: 1}\n", "contract-repeated-key", ["'x'", "line 4", "columns"]),
    ],
)
def test_invalid_contract_names_the_problem(tmp_path, text, code, needles):
    path = write(tmp_path, text)
    with pytest.raises(AuditError) as info:
        check(_hand_panel(), rules=path)
    assert info.value.code == code
    for n in needles:
        assert n in info.value.message


def test_rule_that_cannot_apply_to_the_column_type_fails_its_type_and_is_not_evaluated(tmp_path):
    # issue 14 item 2: a column whose type no longer fits its rules is a broken delivery
    # (exit 1: the type rule fails with the type found), not a broken tool (exit 2)
    path = write(tmp_path, "panel: {unit: u, time: t}\ncolumns:\n  age: {pattern: '[0-9]+', max_missing: 0.5}\n")
    res = check(_hand_panel(), rules=path)
    by_rule = {r.rule: r for r in res.rules if r.column == "age"}
    assert not by_rule["type"].passed and "Int64" in by_rule["type"].message
    assert "a text column" in by_rule["type"].message
    assert by_rule["pattern"].evaluated is False and by_rule["pattern"].failing is None
    assert by_rule["max_missing"].evaluated and by_rule["max_missing"].passed  # what can run, runs
    assert not res.passed and res.to_dict()["summary"]["not_evaluated"] == 1


@pytest.mark.parametrize(
    ("text", "needles"),
    [
        ("  age: {type: integer, pattern: '[0-9]+'}\n", ["line 3", "'pattern'", "'type: integer'"]),
        ("  age: {min: 0, pattern: '[0-9]+'}\n", ["'pattern'", "rule 'min'"]),
        ("  age: {type: text, max_change: 2}\n", ["'max_change'", "a numeric column"]),
        ("  age: {type: integer, allowed: [a, b]}\n", ["'allowed'", "a text column"]),
    ],
)
def test_rules_that_no_column_could_meet_together_are_an_invalid_contract(tmp_path, text, needles):
    path = write(tmp_path, "panel: {unit: u, time: t}\ncolumns:\n" + text)
    with pytest.raises(AuditError) as info:
        check(_hand_panel(), rules=path)
    assert info.value.code == "contract-rule-conflict"
    for n in needles:
        assert n in info.value.message


def test_keys_given_and_declared_must_agree(tmp_path):
    path = write(tmp_path, "panel: {unit: u, time: t}\ncolumns:\n  age: {min: 0}\n")
    with pytest.raises(AuditError) as info:
        check(_hand_panel(), rules=path, unit="soil")
    assert info.value.code == "contract-key-conflict"
    # keys may come from the call when the contract leaves them out
    bare = write(tmp_path, "columns:\n  age: {min: 0}\n", name="bare.yaml")
    assert check(_hand_panel(), rules=bare, unit="u", time="t").passed


# --- the shipped example contract ---------------------------------------------------

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def test_example_contract_breaks_exactly_the_planted_faults():
    # planted sizes: auditor/demo_data.py PLANTED (listed in examples/README.md)
    from auditor.io.demo_data import PLANTED

    res = check(EXAMPLES / "orchards.csv", rules=EXAMPLES / "orchards_contract.yaml")
    failed = {(r.rule, r.column): r.failing for r in res.failed}
    assert failed == {
        ("max_missing_keys", None): PLANTED["null_unit_rows"] + PLANTED["null_season_rows"],
        ("max_duplicate_keys", None): PLANTED["duplicate_rows"],
        ("invariant", "founder_training_yrs"): PLANTED["training_errors"],
    }


def test_example_contract_on_the_next_season_names_its_planted_changes():
    from auditor.io.demo_data import PLANTED_NEXT

    res = check(EXAMPLES / "orchards_next_season.csv", rules=EXAMPLES / "orchards_contract.yaml")
    failed = {(r.rule, r.column): r.failing for r in res.failed}
    nxt = pl.read_csv(EXAMPLES / "orchards_next_season.csv")
    assert failed == {
        ("allowed", "soil_class"): PLANTED_NEXT["new_soil_code"],
        ("max_missing", "labour_days"): int(nxt["labour_days"].is_null().sum()),  # polars oracle
    }


def test_example_contract_thresholds_reach_the_settings():
    from auditor.checks.contract import read_contract

    _, settings = read_contract(EXAMPLES / "orchards_contract.yaml")
    assert settings.profile.high_missing_share == 0.10
    assert settings.severity("few-switchers", "warning") == "note"


def test_readme_example_contract_is_valid(tmp_path):
    import re

    text = (EXAMPLES.parent / "README.md").read_text(encoding="utf-8")
    section = text.split("## Panel contracts", 1)[1].split("\n## ", 1)[0]
    block = re.findall(r"```yaml\n(.*?)```", section, flags=re.S)
    assert len(block) == 1
    from auditor.checks.contract import read_contract

    contract, settings = read_contract(write(tmp_path, block[0]))
    names = [c.name for c in contract.columns]
    assert names == ["orchard_id", "labour_days", "soil_class", "tree_age", "farm_age", "frost_alert",
                     "registry_code", "visited"]
    assert contract.columns[4].max_change_per_period == 1 and contract.columns[5].follows_period
    assert contract.columns[-1].min == dt.date(2017, 1, 1)
    assert contract.panel.only_listed_columns and contract.panel.first_period == 2017
    assert settings.severity("few-switchers", "warning") == "note"


def test_steps_skip_missing_values_like_pandas_dropna_then_diff(random_panel, tmp_path):
    # oracle: pandas, dropping missing values first, then diff within unit ordered by period
    frame = random_panel.with_columns(
        pl.when(pl.int_range(pl.len()) % 7 == 3).then(None).otherwise(pl.col("x").fill_nan(None).round(0)).alias("score")
    )
    path = write(tmp_path, "panel: {unit: unit, time: period}\ncolumns:\n  score: {monotone: decreasing, max_change: 25}\n")
    res = check(frame, rules=path)
    pdf = frame.select("unit", "period", "score").to_pandas().dropna().sort_values(["unit", "period"])
    diffs = pdf.groupby("unit")["score"].diff().dropna()
    assert by_rule(res, "monotone", "score").failing == int((diffs > 0).sum())
    assert by_rule(res, "max_change", "score").failing == int((diffs.abs() > 25).sum())


def test_shuffled_rows_and_pandas_input_give_the_same_results(random_panel, tmp_path):
    # invariants (style.md): row order and the frame library do not change the outcome
    path = write(tmp_path, ROW_CONTRACT + "  x2: {required: false}\n")
    base = check(random_panel, rules=path).to_dict()["rules"]
    shuffled = check(random_panel.sample(fraction=1.0, shuffle=True, seed=3), rules=path).to_dict()["rules"]
    # arrow-backed pandas keeps integer columns with gaps as integers (plain pandas makes them floats)
    from_pandas = check(random_panel.to_pandas(use_pyarrow_extension_array=True), rules=path).to_dict()["rules"]

    def strip(rules):
        return [(r["rule"], r["column"], r["passed"], r["failing"]) for r in rules]

    assert strip(shuffled) == strip(base)
    assert strip(from_pandas) == strip(base)


def test_draft_passes_on_composite_keys_monthly_dates_and_gaps(tmp_path):
    # a hand-built panel exercising every column type the draft writes; the claim is the
    # issue's: the data a contract was drafted from passes it
    rng = np.random.default_rng(11)
    months = pl.date_range(dt.date(2020, 1, 1), dt.date(2021, 12, 1), "1mo", eager=True)
    frame = (
        pl.DataFrame({"region": ["N", "S", "E"]})
        .join(pl.DataFrame({"farm": list(range(40))}), how="cross")
        .join(pl.DataFrame({"month": months}), how="cross")
    )
    n = frame.height
    frame = frame.with_columns(
        pl.Series("price", np.where(rng.random(n) < 0.1, np.nan, rng.normal(3, 1, n))),
        pl.Series("herd", rng.integers(0, 400, n)),
        pl.Series("certified", rng.random(n) < 0.3),
        pl.Series("grade", rng.choice(["a", "b", None], n)),
        (pl.col("month") + pl.duration(days=pl.col("farm") % 20)).alias("visited"),
        pl.col("month").cast(pl.Datetime("us")).alias("stamp"),
        (pl.col("farm") * 3 + 10).alias("founded"),
    ).filter(pl.Series(rng.random(n) > 0.07))
    text = draft(frame, unit=["region", "farm"], time="month")
    doc = yaml.safe_load(text)
    assert doc["panel"]["unit"] == ["region", "farm"]
    assert doc["panel"]["period_range"] == {"first": "2020-01"}
    assert doc["columns"]["founded"]["invariant"] is True
    assert doc["columns"]["certified"]["allowed"] == [False, True]
    # visit dates rise with the month within every farm: a floor below the first, no ceiling
    assert doc["columns"]["visited"]["min"] <= dt.date(2020, 1, 1) and "max" not in doc["columns"]["visited"]
    assert doc["columns"]["visited"]["monotone"] == "increasing"
    path = tmp_path / "c.yaml"
    path.write_text(text, encoding="utf-8")
    res = check(frame, rules=path)
    assert res.passed, [r for r in res.rules if not r.passed]
    # and a changed delivery breaks it: one herd out of range, one founding year changed
    worse = frame.with_columns(
        pl.when(pl.int_range(pl.len()) == 5).then(10_000).otherwise(pl.col("herd")).alias("herd"),
        pl.when(pl.int_range(pl.len()) == 0).then(999).otherwise(pl.col("founded")).alias("founded"),
    )
    failed = {(r.rule, r.column): r.failing for r in check(worse, rules=path).failed}
    assert failed == {("max", "herd"): 1, ("invariant", "founded"): 1, ("max", "founded"): 1}


def test_an_exception_inside_great_expectations_is_exit_2_naming_the_rule(tmp_path, monkeypatch):
    # hand the library a column it cannot compare with a number: it reports an exception
    import auditor.contracts.rules as rules_mod

    real = rules_mod.to_pandas_once

    def mixed(frame):
        pdf = real(frame)
        col = pdf.columns[0]  # the batch's name for 'age', the one ruled column
        pdf[col] = pdf[col].astype(object)
        pdf.loc[0, col] = "ten"
        return pdf

    monkeypatch.setattr(rules_mod, "to_pandas_once", mixed)
    path = write(tmp_path, "panel: {unit: u, time: t}\ncolumns:\n  age: {min: 0}\n")
    with pytest.raises(AuditError) as info:
        check(_hand_panel(), rules=path)
    assert info.value.code == "contract-engine"
    assert "'min'" in info.value.message and "'age'" in info.value.message
