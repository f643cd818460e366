"""One small hand-built panel per check, where the expected count is evident."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

import auditor


def _checks(result) -> dict[str, list]:
    out: dict[str, list] = {}
    for f in result.findings:
        out.setdefault(f.check, []).append(f)
    return out


def _balanced(n: int = 40, periods: int = 5, seed: int = 0) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    u = np.repeat(np.arange(n), periods)
    t = np.tile(np.arange(2001, 2001 + periods), n)
    return pl.DataFrame({"id": u, "yr": t, "x": rng.normal(size=n * periods)})


def test_three_duplicate_rows_give_duplicate_keys_3() -> None:
    df = _balanced()
    df = pl.concat([df, df.head(3)])
    r = auditor.profile(df, unit="id", time="yr")
    assert r.panel["duplicate_keys"] == 3
    f = _checks(r)["duplicate-keys"][0]
    assert f.severity == "error" and f.count == 3
    assert f.examples[0]["id"] == 0 and f.examples[0]["yr"] == 2001


def test_two_null_keys_give_missing_keys_2() -> None:
    df = _balanced().with_columns(
        pl.when(pl.int_range(pl.len()) == 4).then(None).otherwise(pl.col("id")).alias("id"),
        pl.when(pl.int_range(pl.len()) == 7).then(None).otherwise(pl.col("yr")).alias("yr"),
    )
    r = auditor.profile(df, unit="id", time="yr")
    assert r.panel["missing_keys"] == 2
    assert r.panel["rows"] == 200
    f = _checks(r)["missing-keys"][0]
    assert f.count == 2 and f.severity == "error"
    assert [e["row"] for e in f.examples] == [5, 8]


def test_internal_gaps_are_counted_per_unit_and_period() -> None:
    df = _balanced()
    # unit 1 loses 2002 and 2003 (two gap periods), unit 2 loses 2004 (one); unit 3 loses 2005 (its end: no gap)
    drop = ((pl.col("id") == 1) & pl.col("yr").is_in([2002, 2003])) | ((pl.col("id") == 2) & (pl.col("yr") == 2004)) | ((pl.col("id") == 3) & (pl.col("yr") == 2005))
    r = auditor.profile(df.filter(~drop), unit="id", time="yr")
    assert r.panel["units_with_gaps"] == 2
    assert r.panel["gap_periods"] == 3
    assert r.panel["balanced"] is False
    assert _checks(r)["gaps"][0].count == 2
    pats = {p["periods"]: p["units"] for p in r.panel["patterns"]}
    assert pats["2001-2005"] == 37
    assert pats["2001, 2004-2005"] == 1
    assert pats["2001-2003, 2005"] == 1
    assert pats["2001-2004"] == 1


def test_attrition_counts_entries_exits_and_returns() -> None:
    df = _balanced(n=4, periods=4)
    # unit 0 enters in 2002; unit 1 leaves after 2003; unit 2 misses 2002 and returns in 2003.
    drop = ((pl.col("id") == 0) & (pl.col("yr") == 2001)) | ((pl.col("id") == 1) & (pl.col("yr") == 2004)) | ((pl.col("id") == 2) & (pl.col("yr") == 2002))
    r = auditor.profile(df.filter(~drop), unit="id", time="yr")
    att = {a["period"]: a for a in r.panel["attrition"]}
    assert att[2001] == {"period": 2001, "present": 3, "entering": 3, "leaving": 0, "returning": 0}
    assert att[2002]["present"] == 3 and att[2002]["entering"] == 1
    assert att[2003]["returning"] == 1 and att[2003]["leaving"] == 1
    assert att[2004]["present"] == 3
    assert att[2004]["leaving"] is None  # who leaves after the last period is not yet known


def test_singletons_and_unbalancedness() -> None:
    df = _balanced(n=10, periods=4)
    df = df.filter(~((pl.col("id") < 2) & (pl.col("yr") > 2001)))  # two units seen once
    r = auditor.profile(df, unit="id", time="yr")
    assert r.panel["singleton_units"] == 2
    t = np.array([1, 1] + [4] * 8, dtype=float)
    # Ahrens and Pincus (1981): r = n / (T_mean * sum 1/T_i); the harmonic mean is n / sum 1/T_i.
    assert r.panel["unbalancedness"] == pytest.approx(10 / (t.mean() * (1 / t).sum()), rel=1e-12)
    assert r.panel["obs_per_unit"]["harmonic_mean"] == pytest.approx(10 / (1 / t).sum(), rel=1e-12)
    assert {"singleton-units", "unbalanced"} <= set(_checks(r))


def test_irregular_grid_reports_the_missing_period() -> None:
    df = _balanced(periods=5).filter(pl.col("yr") != 2003)
    r = auditor.profile(df, unit="id", time="yr")
    f = _checks(r)["irregular-periods"][0]
    assert f.count == 1 and f.examples[0] == {"from": 2002, "to": 2004}
    assert r.panel["step"] is None and r.panel["grid_step"] == 1
    assert r.panel["units_with_gaps"] == 0  # a whole missing period is not a unit's gap


def test_column_kinds_and_their_findings() -> None:
    n, periods = 60, 5
    rng = np.random.default_rng(3)
    u = np.repeat(np.arange(n), periods)
    t = np.tile(np.arange(periods), n)
    training = np.repeat(rng.integers(8, 16, n), periods).astype(float)
    training[(u < 2) & (t == 4)] += 1.0  # two of 60 units change: nearly time-invariant
    switch = np.zeros(n * periods)
    switch[(u < 5) & (t >= 3)] = 1.0  # five switchers
    flag = np.zeros(n * periods)
    flag[0] = 1.0  # one row of 300 differs: near-constant
    df = pl.DataFrame(
        {
            "id": u,
            "t": t,
            "const": np.ones(n * periods),
            "national": np.tile(rng.normal(size=periods), n),
            "altitude": np.repeat(rng.normal(size=n), periods),
            "training": training,
            "organic": switch,
            "flag": flag,
            "rain": rng.normal(size=n * periods),
            "soil": np.repeat(np.array(["loam", "clay", "sand"])[rng.integers(0, 3, n)], periods),
        }
    )
    r = auditor.profile(df, unit="id", time="t")
    kinds = dict(zip(r.columns["name"], r.columns["kind"], strict=True))
    assert kinds == {
        "const": "constant",
        "national": "period-only",
        "altitude": "time-invariant",
        "training": "nearly-time-invariant",
        "organic": "time-varying",
        "flag": "nearly-time-invariant",
        "rain": "time-varying",
        "soil": "time-invariant",
    }
    c = _checks(r)
    assert [f.column for f in c["constant-column"]] == ["const"]
    assert [f.column for f in c["period-only"]] == ["national"]
    assert c["nearly-time-invariant"][0].column in ("flag", "training")
    training_f = [f for f in c["nearly-time-invariant"] if f.column == "training"][0]
    assert training_f.count == 2
    switchers = {f.column: f.count for f in c["few-switchers"]}
    assert switchers == {"organic": 5, "flag": 1}
    assert "flag" in {f.column for f in c["near-constant"]}
    row = r.columns.filter(pl.col("name") == "flag").to_dicts()[0]
    assert row["dominant_share"] == pytest.approx(299 / 300)


def test_missing_in_period_and_high_missing() -> None:
    df = _balanced(n=10, periods=5).with_columns(
        pl.when(pl.col("yr") == 2003).then(None).otherwise(pl.col("x")).alias("asked"),
        pl.when(pl.col("id") < 3).then(None).otherwise(pl.col("x")).alias("sparse"),
    )
    r = auditor.profile(df, unit="id", time="yr")
    c = _checks(r)
    mip = [f for f in c["missing-in-period"] if f.column == "asked"][0]
    assert mip.count == 1 and mip.examples[0] == {"period": "2003"}
    # 'asked' is missing in exactly 20% of rows, which is not above the 20% default
    assert {f.column for f in c["high-missing"]} == {"sparse"}
    row = r.columns.filter(pl.col("name") == "sparse").to_dicts()[0]
    assert row["missing_share"] == pytest.approx(0.3)


def test_non_finite_values_are_reported_and_left_out() -> None:
    df = _balanced(n=10, periods=3)
    x = df["x"].to_numpy().copy()
    x[[0, 5]] = [np.inf, -np.inf]
    x[7] = np.nan
    r = auditor.profile(df.with_columns(pl.Series("x", x)), unit="id", time="yr")
    f = _checks(r)["non-finite"][0]
    assert f.count == 2
    row = r.columns.to_dicts()[0]
    finite = np.delete(x, [0, 5, 7])
    assert row["mean"] == pytest.approx(finite.mean(), rel=1e-12)
    assert row["missing_share"] == pytest.approx(1 / 30)


def test_rules_file_overrides_a_threshold_and_a_severity(tmp_path) -> None:
    df = pl.concat([_balanced(), _balanced().head(1)])
    rules = tmp_path / "r.yaml"
    rules.write_text("thresholds:\n  profile:\n    few_switchers: 3\nseverities:\n  duplicate-keys: warning\n")
    r = auditor.profile(df, unit="id", time="yr", rules=rules)
    assert r.settings.profile.few_switchers == 3
    assert _checks(r)["duplicate-keys"][0].severity == "warning"
