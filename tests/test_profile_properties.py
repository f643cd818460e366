"""Invariants of the profile on random panels (hypothesis), stability, period-effect absorption."""

from __future__ import annotations

import json
import math

import numpy as np
import polars as pl
import pytest
from conftest import approx_equal
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import auditor


@st.composite
def panels(draw) -> pl.DataFrame:
    n = draw(st.integers(2, 25))
    periods = draw(st.integers(2, 7))
    seed = draw(st.integers(0, 2**31 - 1))
    keep = draw(st.floats(0.5, 1.0))
    rng = np.random.default_rng(seed)
    u = np.repeat(np.arange(n), periods)
    t = np.tile(np.arange(periods), n)
    mask = rng.random(n * periods) < keep
    mask[::periods] = True  # every unit keeps at least one row
    scale = draw(st.sampled_from([1e-3, 1.0, 1e4]))
    df = pl.DataFrame(
        {
            "unit": u,
            "wave": t + 1990,
            "x": rng.normal(size=n * periods) * scale + np.repeat(rng.normal(size=n), periods),
            "k": rng.integers(0, 3, n * periods).astype(np.int64),
            "z": np.repeat(rng.normal(size=n), periods),
            "s": np.repeat(np.array(["a", "b", "c"])[rng.integers(0, 3, n)], periods),
        }
    ).filter(pl.Series(mask))
    return df


def _doc(result) -> dict:
    doc = result.to_dict()
    doc.pop("source")
    return doc


def _approx_equal(a, b, rel: float = 1e-9) -> bool:
    return approx_equal(a, b, rel=rel, abs_=1e-12)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(panels())
def test_tss_equals_wss_plus_bss(df: pl.DataFrame) -> None:
    # The decomposition TSS = WSS + BSS holds to rounding (check-values.md, published properties);
    # WSS and BSS are recomputed here directly with numpy as the oracle.
    r = auditor.profile(df, unit="unit", time="wave")
    row = r.columns.filter(pl.col("name") == "x").to_dicts()[0]
    x = df["x"].to_numpy()
    u = df["unit"].to_numpy()
    means = np.bincount(u, weights=x) / np.maximum(np.bincount(u), 1)
    wss = float(((x - means[u]) ** 2).sum())
    tss = float(((x - x.mean()) ** 2).sum())
    seen = np.bincount(u) > 0
    bss = float((np.bincount(u)[seen] * (means[seen] - x.mean()) ** 2).sum())
    assert wss + bss == pytest.approx(tss, rel=1e-9)
    assert row["within_share"] == pytest.approx(wss / tss, rel=1e-8, abs=1e-12)
    assert 0.0 <= row["within_share"] <= 1.0
    assert row["overall_sd"] == pytest.approx(np.sqrt(tss / (len(x) - 1)), rel=1e-9)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(panels(), st.integers(0, 1000))
def test_shuffling_rows_and_relabelling_units_change_nothing(df: pl.DataFrame, seed: int) -> None:
    base = _doc(auditor.profile(df, unit="unit", time="wave"))
    shuffled = df.sample(fraction=1.0, shuffle=True, seed=seed)
    assert _approx_equal(base, _doc(auditor.profile(shuffled, unit="unit", time="wave")))
    # relabel units by an order-preserving map (examples name units by their labels)
    relabelled = df.with_columns((pl.col("unit") * 7 + 1000).alias("unit"))
    other = _doc(auditor.profile(relabelled, unit="unit", time="wave"))
    for f in other["findings"]:
        for e in f["examples"]:
            if "unit" in e:
                e["unit"] = (e["unit"] - 1000) // 7
    assert _approx_equal(base, other)


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(df=panels())
def test_pandas_polars_csv_parquet_give_the_same_document(df: pl.DataFrame, tmp_path_factory) -> None:
    folder = tmp_path_factory.mktemp("io")
    ref = _doc(auditor.profile(df, unit="unit", time="wave"))
    assert _approx_equal(ref, _doc(auditor.profile(df.to_pandas(), unit="unit", time="wave")))
    df.write_parquet(folder / "p.parquet")
    assert _approx_equal(ref, _doc(auditor.profile(folder / "p.parquet", unit="unit", time="wave")))
    # text files keep unit keys as text: the same document once keys are compared as text
    df.write_csv(folder / "p.csv")
    from_csv = _doc(auditor.profile(folder / "p.csv", unit="unit", time="wave"))
    assert from_csv["panel"] == ref["panel"] or _approx_equal(
        json.loads(json.dumps(ref["panel"])), from_csv["panel"]
    )
    assert _approx_equal(ref["columns"], from_csv["columns"], rel=1e-9)


def test_large_offset_gives_the_same_within_share_as_the_noise_alone() -> None:
    # methods.md section 2: a column 1e9 + noise of sd 1e-3 must give the noise's within share (1e-6).
    rng = np.random.default_rng(11)
    n, periods = 300, 8
    noise = rng.normal(scale=1e-3, size=n * periods) + np.repeat(rng.normal(scale=1e-3, size=n), periods)
    df = pl.DataFrame(
        {"u": np.repeat(np.arange(n), periods), "t": np.tile(np.arange(periods), n), "noise": noise, "big": 1e9 + noise}
    )
    r = auditor.profile(df, unit="u", time="t")
    rows = {d["name"]: d for d in r.columns.to_dicts()}
    assert rows["big"]["within_share"] == pytest.approx(rows["noise"]["within_share"], abs=1e-6)
    assert rows["big"]["between_sd"] == pytest.approx(rows["noise"]["between_sd"], rel=1e-4)
    assert rows["noise"]["kind"] == "time-varying"
    # methods.md section 3: a float unit "changes" only when (max - min) > 1e-9 * (1 + |mean|); at 1e9
    # a spread of 1e-3 is below that relative tolerance, so the offset column counts as time-invariant.
    assert rows["big"]["kind"] == "time-invariant"


def test_within_sd_does_not_depend_on_which_unit_comes_first() -> None:
    # methods.md section 2: within deviations must not be rounded on the scale of a value from
    # another unit. Oracle: the within sd from each unit's own deviations in exact rational
    # arithmetic (fractions), rounded once.
    from fractions import Fraction

    rows = {"p5": [32768.0], "p4": [0.0, -0.99999], "p6": [0.0], "p7": [1.5, 1.25, 1.75]}
    unit = [u for u, xs in rows.items() for _ in xs]
    x = [v for xs in rows.values() for v in xs]
    wave = [w for xs in rows.values() for w in range(len(xs))]
    wss = Fraction(0)
    for xs in rows.values():
        m = sum(map(Fraction, xs)) / len(xs)
        wss += sum((Fraction(v) - m) ** 2 for v in xs)
    expected = math.sqrt(wss / (len(x) - len(rows)))
    for order in (range(len(x)), reversed(range(len(x)))):  # the far value first, then last
        idx = list(order)
        df = pl.DataFrame({"u": [unit[i] for i in idx], "t": [wave[i] for i in idx], "x": [x[i] for i in idx]})
        got = {d["name"]: d for d in auditor.profile(df, unit="u", time="t").columns.to_dicts()}["x"]["within_sd"]
        assert got == pytest.approx(expected, rel=1e-14)


def test_age_growing_by_one_is_absorbed_in_an_unbalanced_panel() -> None:
    # Common practice (check-values.md, facts of the trade): a column growing by exactly one per period
    # for every unit is collinear with period effects once unit effects are in the model.
    rng = np.random.default_rng(5)
    n, periods = 200, 7
    u = np.repeat(np.arange(n), periods)
    t = np.tile(np.arange(periods), n)
    keep = rng.random(n * periods) < 0.75
    df = pl.DataFrame(
        {
            "u": u,
            "t": t + 2000,
            "age": np.repeat(rng.integers(20, 70, n), periods) + t,
            "slopes": np.repeat(rng.normal(size=n), periods) * t,
        }
    ).filter(pl.Series(keep))
    r = auditor.profile(df, unit="u", time="t")
    rows = {d["name"]: d for d in r.columns.to_dicts()}
    assert rows["age"]["absorbed_by_time"] is True
    assert rows["age"]["time_r2"] == pytest.approx(1.0, abs=1e-9)
    assert rows["slopes"]["absorbed_by_time"] is False
    assert {f.column for f in r.findings if f.check == "absorbed-by-time"} == {"age"}


def test_time_r2_matches_least_squares_with_unit_and_period_dummies() -> None:
    # Oracle: statsmodels OLS of x on unit and period dummies (the two-way fit written with dummies).
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(9)
    n, periods = 30, 5
    u = np.repeat(np.arange(n), periods)
    t = np.tile(np.arange(periods), n)
    keep = rng.random(n * periods) < 0.7
    x = rng.normal(size=n * periods) + 0.5 * t
    u, t, x = u[keep], t[keep], x[keep]
    r = auditor.profile(pl.DataFrame({"u": u, "t": t, "x": x}), unit="u", time="t")
    got = r.columns.to_dicts()[0]["time_r2"]
    du = (u[:, None] == np.unique(u)[None, :]).astype(float)
    dt = (t[:, None] == np.arange(1, periods)[None, :]).astype(float)
    two_way = sm.OLS(x, np.hstack([du, dt])).fit()
    one_way = sm.OLS(x, du).fit()
    expected = 1 - two_way.ssr / one_way.ssr
    assert got == pytest.approx(expected, rel=1e-9)
