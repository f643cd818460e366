"""Merged shard statistics equal the whole panel's figures (auditor/merge.py).

Oracle: a direct numpy computation of methods.md section 2 on the whole panel, written
in this file (unit means by np.bincount, then centred squares), independent of polars
and of the merge code. Relative tolerance 1e-12 as asked by the issue.
"""

from __future__ import annotations

import math

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from auditor.merge import (
    column_figures,
    group_stats,
    merge_group_stats,
    merge_summaries,
    summarise_shard,
)

TOL = 1e-9  # methods.md section 3 default float tolerance


def direct_figures(units: np.ndarray, x: np.ndarray, *, integral: bool = False) -> dict:
    """methods.md section 2 computed directly with numpy on the whole column."""
    ok = np.isfinite(x)
    u, xv = units[ok], x[ok]
    codes, inv = np.unique(u, return_inverse=True)
    t_i = np.bincount(inv).astype(float)
    mean_i = np.bincount(inv, weights=xv) / t_i
    big_n, n = xv.size, codes.size
    xbar = xv.mean()
    wss = float(np.sum((xv - mean_i[inv]) ** 2))
    tss = float(np.sum((xv - xbar) ** 2))
    bss = float(np.sum(t_i * (mean_i - xbar) ** 2))
    order = np.argsort(inv, kind="stable")
    starts = np.r_[0, np.cumsum(np.bincount(inv))[:-1]]
    hi = np.maximum.reduceat(xv[order], starts)
    lo = np.minimum.reduceat(xv[order], starts)
    changing = (hi > lo) if integral else (hi - lo) > TOL * (1 + np.abs(mean_i))
    vals, counts = np.unique(xv, return_counts=True)
    return {
        "observations": big_n,
        "units": n,
        "missing_share": float(np.mean(np.isnan(x))),
        "mean": xbar,
        "total_ss": tss,
        "within_ss": wss,
        "between_ss": bss,
        "overall_sd": math.sqrt(tss / (big_n - 1)),
        "between_sd": float(np.std(mean_i, ddof=1)),
        "within_sd": math.sqrt(wss / (big_n - n)),
        "within_share": wss / tss,
        "units_changing": int(changing.sum()),
        "units_observed_twice": int((t_i >= 2).sum()),
        "distinct": vals.size,
        "dominant_share": counts.max() / big_n,
    }


def random_panel(seed: int, n_units: int = 60, n_periods: int = 9) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(n_units), n_periods)
    year = np.tile(np.arange(2001, 2001 + n_periods), n_units)
    keep = rng.random(unit.size) > 0.15  # unbalanced
    unit, year = unit[keep], year[keep]
    effect = rng.normal(0, 3, n_units)[unit]
    size = rng.normal(50, 10, unit.size) + effect
    size[rng.random(unit.size) < 0.05] = np.nan  # some missing values
    rate = rng.normal(0, 1, unit.size) * 1e-3 + 0.5
    count = rng.integers(0, 4, unit.size).astype(np.int64)
    fixed = np.round(rng.normal(0, 1, n_units), 2)[unit]  # time-invariant
    fixed_f = fixed + np.where((unit < 2) & (year > 2002), 1.0, 0.0)  # two units change
    return pl.DataFrame(
        {
            "orchard": unit,
            "season": year,
            "size": size,
            "rate": rate,
            "count": count,
            "fixed": fixed_f,
        }
    )


NUMERIC = ["size", "rate", "count", "fixed"]


def split(frame: pl.DataFrame, shard_of_row: np.ndarray, k: int) -> list[pl.DataFrame]:
    return [frame.filter(pl.Series(shard_of_row == s)) for s in range(k)]


def assert_matches_direct(figures: pl.DataFrame, frame: pl.DataFrame, rel: float = 1e-12) -> None:
    units = frame["orchard"].to_numpy()
    for row in figures.iter_rows(named=True):
        name = row["name"]
        integral = frame.schema[name].is_integer()
        expect = direct_figures(units, frame[name].cast(pl.Float64).to_numpy(), integral=integral)
        for key, want in expect.items():
            got = row[key]
            if isinstance(want, int | np.integer):
                assert got == want, (name, key, got, want)
            else:
                assert got == pytest.approx(want, rel=rel, abs=0), (name, key, got, want)


def test_merged_shards_with_split_units_equal_whole_panel_direct_numpy():
    # Oracle: direct numpy computation (direct_figures above) on the whole panel.
    frame = random_panel(7)
    rng = np.random.default_rng(1)
    shards = split(frame, rng.integers(0, 4, frame.height), 4)
    # every unit appears in more than one shard: the merge really combines units
    per_unit = (
        pl.concat(
            [
                s.select("orchard").unique().with_columns(pl.lit(i).alias("s"))
                for i, s in enumerate(shards)
            ]
        )
        .group_by("orchard")
        .len()
    )
    assert per_unit["len"].min() >= 2
    merged = merge_summaries(
        summarise_shard(s, unit="orchard", time="season", columns=NUMERIC) for s in shards
    )
    assert_matches_direct(column_figures(merged), frame)


def test_single_shard_equals_direct_numpy():
    # Oracle: direct numpy computation on the whole panel.
    frame = random_panel(11)
    whole = summarise_shard(frame, unit="orchard", time="season", columns=NUMERIC)
    assert_matches_direct(column_figures(whole), frame)


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    k=st.integers(1, 7),
    n_units=st.integers(3, 40),
    n_periods=st.integers(2, 8),
)
def test_property_random_splits_merge_to_whole_panel(seed, k, n_units, n_periods):
    # Oracle: direct numpy computation on the whole panel, for any split of the rows.
    frame = random_panel(seed, n_units, n_periods)
    if frame.height < 4 or frame["orchard"].n_unique() < 2:
        return
    rng = np.random.default_rng(seed + 1)
    shards = [s for s in split(frame, rng.integers(0, k, frame.height), k) if s.height]
    merged = merge_summaries(
        summarise_shard(s, unit="orchard", time="season", columns=NUMERIC) for s in shards
    )
    units = frame["orchard"].to_numpy()
    figures = column_figures(merged)
    for row in figures.iter_rows(named=True):
        x = frame[row["name"]].cast(pl.Float64).to_numpy()
        ok = np.isfinite(x)
        counts = np.bincount(np.unique(units[ok], return_inverse=True)[1])
        if ok.sum() < 2 or counts.size < 2 or ok.sum() == counts.size:
            continue  # degenerate sample: sds not defined
        expect = direct_figures(units, x, integral=frame.schema[row["name"]].is_integer())
        sq = float(np.sum(x[ok] ** 2))
        scale = dict.fromkeys(expect, 1.0)
        scale.update(total_ss=sq, within_ss=sq, between_ss=sq)
        scale.update(overall_sd=math.sqrt(sq / ok.sum()), between_sd=math.sqrt(sq / ok.sum()))
        scale.update(within_sd=math.sqrt(sq / ok.sum()), mean=math.sqrt(sq / ok.sum()))
        for key, want in expect.items():
            if isinstance(want, int | np.integer):
                assert row[key] == want, (row["name"], key)
                continue
            # 1e-12 relative; a figure that is zero in exact arithmetic (a unit whose
            # values are all equal) is rounding noise in both computations, so it is
            # compared at 1e-12 of the column's own scale instead.
            assert row[key] == pytest.approx(want, rel=1e-12, abs=1e-12 * scale[key]), (
                row["name"],
                key,
            )


def test_composite_unit_key_split_across_shards():
    # Oracle: direct numpy computation with the composite key encoded as one integer.
    frame = random_panel(3).with_columns(
        (pl.col("orchard") % 7).alias("block"), (pl.col("orchard") // 7).alias("row")
    )
    shards = split(frame, frame["season"].to_numpy() % 3, 3)  # by period: every unit split
    merged = merge_summaries(
        summarise_shard(s.drop("orchard"), unit=["block", "row"], time="season", columns=NUMERIC)
        for s in shards
    )
    assert_matches_direct(column_figures(merged), frame)


def test_column_absent_from_one_shard_counts_as_missing_there():
    # Hand-built: shard A has 3 rows of x, shard B 2 rows without x; missing share 2/5
    # (methods.md: a column missing from a file is missing there).
    a = pl.DataFrame({"u": [1, 1, 2], "t": [1, 2, 1], "x": [1.0, 3.0, 5.0]})
    b = pl.DataFrame({"u": [2, 3], "t": [2, 1]})
    merged = merge_group_stats(group_stats(s, ["u"], ["x"], keys=["u", "t"]) for s in (a, b))
    row = column_figures(merged).row(0, named=True)
    assert row["missing_share"] == pytest.approx(2 / 5)
    assert row["observations"] == 3
    assert row["units"] == 2
    # unit means 2 and 5 (hand computation): between sd = sd(2, 5) = 3 / sqrt(2)
    assert row["between_sd"] == pytest.approx(3 / math.sqrt(2), rel=1e-15)
    assert row["within_ss"] == pytest.approx(2.0, rel=1e-15)  # (1-2)^2 + (3-2)^2


def test_rows_with_missing_key_and_non_finite_values_are_left_out():
    # methods.md: rows with a missing key are excluded; infinite values are counted
    # and left out of every sum. Hand-built: usable values 1, 2 (unit 1) and 4 (unit 2).
    frame = pl.DataFrame(
        {
            "u": [1, 1, 1, None, 2, 2],
            "t": [1, 2, 3, 1, 1, 2],
            "x": [1.0, 2.0, float("inf"), 100.0, 4.0, float("nan")],
        }
    )
    s = summarise_shard(frame, unit="u", time="t", columns=["x"])
    row = column_figures(s).row(0, named=True)
    assert row["observations"] == 3
    assert row["non_finite"] == 1
    assert row["missing_share"] == pytest.approx(1 / 5)  # the NaN among 5 keyed rows
    assert row["mean"] == pytest.approx(7 / 3, rel=1e-15)
    assert row["within_ss"] == pytest.approx(0.5, rel=1e-15)


def test_large_offset_keeps_within_share_of_noise_across_shards():
    # methods.md section 2 stability test: 1e9 + noise of sd 1e-3 gives the same
    # within share (to 1e-6) as the noise alone, here after a four-way merge.
    rng = np.random.default_rng(5)
    unit = np.repeat(np.arange(200), 6)
    noise = rng.normal(0, 1e-3, unit.size) + rng.normal(0, 1e-3, 200)[unit]
    frame = pl.DataFrame({"u": unit, "t": np.tile(np.arange(6), 200), "a": noise, "b": noise + 1e9})
    shards = split(frame, rng.integers(0, 4, frame.height), 4)
    merged = merge_summaries(
        summarise_shard(s, unit="u", time="t", columns=["a", "b"]) for s in shards
    )
    fig = {r["name"]: r for r in column_figures(merged).iter_rows(named=True)}
    assert fig["b"]["within_share"] == pytest.approx(fig["a"]["within_share"], abs=1e-6)
    # and the noise alone against the direct numpy oracle
    want = direct_figures(unit, noise)["within_share"]
    assert fig["a"]["within_share"] == pytest.approx(want, rel=1e-12)


def test_period_only_column_has_no_period_with_varying_values():
    # Hand-built: a regional index equal for all units in each period varies in no
    # period; a unit-specific column varies in every period with two or more units.
    frame = pl.DataFrame(
        {
            "u": [1, 2, 3, 1, 2, 3],
            "t": [1, 1, 1, 2, 2, 2],
            "index": [0.5, 0.5, 0.5, 0.7, 0.7, 0.7],
            "own": [1.0, 2.0, 3.0, 1.5, 2.5, 3.5],
        }
    )
    fig = {
        r["name"]: r
        for r in column_figures(
            summarise_shard(frame, unit="u", time="t", columns=["index", "own"])
        ).iter_rows(named=True)
    }
    assert fig["index"]["periods_varying"] == 0
    assert fig["own"]["periods_varying"] == 2
    assert fig["index"]["units_changing"] == 3


def test_unit_in_one_shard_only_with_no_values_has_null_moments():
    # Hand-built: a unit whose only rows are missing contributes rows but no moments.
    a = pl.DataFrame({"u": [1, 1], "t": [1, 2], "x": [1.0, 2.0]})
    b = pl.DataFrame(
        {"u": [2, 2], "t": [1, 2], "x": [None, None]}, schema_overrides={"x": pl.Float64}
    )
    merged = merge_group_stats(group_stats(s, ["u"], ["x"]) for s in (a, b))
    row = column_figures(merged).row(0, named=True)
    assert row["units"] == 1
    assert row["between_sd"] is None  # one unit: no between sd (n - 1 = 0)
    assert row["missing_share"] == pytest.approx(0.5)


def test_merged_shards_agree_with_the_profile_columns():
    # Cross-check with a second, separately written implementation: the profile's own
    # grouped pass over the whole panel (auditor/variation.py). The numpy oracle above
    # is the primary check; this one says the two code paths define the figures alike.
    from auditor.profile import profile

    frame = random_panel(21)
    rng = np.random.default_rng(2)
    shards = split(frame, rng.integers(0, 5, frame.height), 5)
    merged = merge_summaries(
        summarise_shard(s, unit="orchard", time="season", columns=NUMERIC) for s in shards
    )
    ours = {r["name"]: r for r in column_figures(merged).iter_rows(named=True)}
    theirs = {
        r["name"]: r
        for r in profile(frame, unit="orchard", time="season").columns.iter_rows(named=True)
    }
    for name in NUMERIC:
        for key in (
            "missing_share",
            "mean",
            "overall_sd",
            "between_sd",
            "within_sd",
            "within_share",
            "dominant_share",
        ):
            assert ours[name][key] == pytest.approx(theirs[name][key], rel=1e-12), (name, key)
        for key in ("units_changing", "units_observed_twice", "distinct", "non_finite"):
            assert ours[name][key] == theirs[name][key], (name, key)


def _assert_matches_direct_without_whole_column(figures: pl.DataFrame, frame: pl.DataFrame) -> None:
    # As assert_matches_direct, for the figures a unit-partitioned pass gives (distinct
    # and dominant share need the whole column and are null there).
    units = frame["orchard"].to_numpy()
    for row in figures.iter_rows(named=True):
        integral = frame.schema[row["name"]].is_integer()
        expect = direct_figures(
            units, frame[row["name"]].cast(pl.Float64).to_numpy(), integral=integral
        )
        assert row["distinct"] is None and row["dominant_share"] is None
        for key, want in expect.items():
            if key in ("distinct", "dominant_share"):
                continue
            if isinstance(want, int | np.integer):
                assert row[key] == want, (row["name"], key)
            else:
                assert row[key] == pytest.approx(want, rel=1e-12, abs=0), (row["name"], key)


@pytest.mark.parametrize("parts", [1, 3, 8])
def test_unit_partitioned_passes_equal_whole_panel_direct_numpy(parts):
    # Oracle: direct numpy computation on the whole panel; the pass reads the data once
    # per partition of units and merges the column moments (Chan et al. update).
    from auditor.merge import partitioned_figures

    frame = random_panel(17, n_units=120)
    figures = partitioned_figures(
        frame, unit="orchard", time="season", columns=NUMERIC, parts=parts
    )
    _assert_matches_direct_without_whole_column(figures, frame)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), k=st.integers(2, 6))
def test_property_disjoint_unit_sets_merge_to_whole_panel(seed, k):
    # Oracle: direct numpy computation; the units are dealt at random into k sets.
    from auditor.merge import column_moments, figures_from_moments, merge_column_moments

    frame = random_panel(seed, n_units=50)
    rng = np.random.default_rng(seed)
    set_of_unit = rng.integers(0, k, 50)
    pieces = [
        frame.filter(pl.col("orchard").is_in(np.flatnonzero(set_of_unit == s).tolist()))
        for s in range(k)
    ]
    moments = [
        column_moments(group_stats(p, ["orchard"], NUMERIC, keys=["orchard", "season"]))
        for p in pieces
        if p.height
    ]
    _assert_matches_direct_without_whole_column(
        figures_from_moments(merge_column_moments(moments)), frame
    )
