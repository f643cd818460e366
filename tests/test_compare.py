"""compare: a new wave against the panel so far.

Oracles, named beside each check:
- scipy.stats.ks_2samp called here on the same samples (a reference library, see
  ../shared/check-values.md) and a direct numpy computation of the largest gap between
  the two empirical distribution functions;
- stability indices computed by hand in the test from the bin counts written out;
- hand-built panels where the expected count is evident from the construction;
- the planted sizes of the invented orchard demo (auditor/demo_data.py, examples/README.md),
  with the affected keys recomputed here from plain Python sets;
- "common practice" marks a fact of the trade (the 0.25 cut-off for the stability index).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import polars as pl
import pytest
from scipy import stats

from auditor.checks.config import load_settings
from auditor.cli import main
from auditor.commands.compare import compare, level_psi, numeric_psi
from auditor.errors import AuditError

KEYS = {"unit": "id", "time": "year"}


def _checks(result, check: str, scope: str = "wave"):
    return [f for f in result.findings if f.check == check and result.scope_of(f) == scope]


def _one(result, check: str, column: str | None = None):
    hits = [f for f in _checks(result, check) if column is None or f.column == column]
    assert len(hits) == 1, [f.check for f in result.findings]
    return hits[0]


def _small_base() -> pl.DataFrame:
    """Six units, 2019-2021, hand-made: x changes by +1 a year, fixed never changes."""
    rows = []
    for u in range(1, 7):
        for y in (2019, 2020, 2021):
            rows.append(
                {"id": u, "year": y, "x": 10.0 * u + (y - 2019), "fixed": 100 + u, "grade": "ab"[u % 2],
                 "gone": 1.0}
            )
    return pl.DataFrame(rows)


def _small_new(**over) -> pl.DataFrame:
    rows = [
        {"id": u, "year": 2022, "x": 10.0 * u + 3, "fixed": 100 + u, "grade": "ab"[u % 2]}
        for u in range(1, 7)
    ]
    return pl.DataFrame(rows)


# --- distances -----------------------------------------------------------------------


def test_ks_statistic_and_p_equal_scipy_ks_2samp_on_the_same_samples():
    # Oracle: scipy.stats.ks_2samp on the reference sample (base's last period) and the
    # new wave, and a direct numpy computation of sup |F_base - F_new|.
    rng = np.random.default_rng(7)
    n_units = 120
    base = pl.DataFrame(
        {
            "id": np.repeat(np.arange(n_units), 3),
            "year": np.tile([2020, 2021, 2022], n_units),
            "v": rng.normal(0, 1, 3 * n_units),
        }
    )
    new = pl.DataFrame({"id": np.arange(n_units), "year": 2023, "v": rng.normal(0.3, 1.2, n_units)})
    res = compare(base, new, **KEYS)
    col = next(c for c in res.columns if c.column == "v")
    a = base.filter(pl.col("year") == 2022)["v"].to_numpy()
    b = new["v"].to_numpy()
    ref = stats.ks_2samp(a, b)
    assert col.ks_statistic == pytest.approx(ref.statistic, abs=1e-6)
    assert col.ks_p == pytest.approx(ref.pvalue, rel=1e-6, abs=1e-8)
    pooled = np.sort(np.concatenate([a, b]))
    gap = np.max(np.abs(np.searchsorted(np.sort(a), pooled, "right") / a.size
                        - np.searchsorted(np.sort(b), pooled, "right") / b.size))
    assert col.ks_statistic == pytest.approx(gap, abs=1e-6)
    assert res.reference == "base period 2022"
    assert col.n_base == n_units and col.n_new == n_units


def test_numeric_psi_equals_a_hand_computation_on_deciles_of_one_to_ten():
    # Hand computation. Base 1..10: numpy's linear quantiles at 0.1..0.9 are 1.9, 2.8, ...,
    # 9.1, so each base value sits alone in one of the 10 right-closed bins.
    # New [1,1,1,1,1,2,2,3,10,10]: bin counts 5,2,1,0,0,0,0,0,0,2.
    # Smoothing 0.5 per bin: base shares 1.5/15 = 0.1 each; new shares
    # 5.5/15, 2.5/15, 1.5/15, 0.5/15 (x6), 2.5/15.
    p = [0.1] * 10
    q = [5.5 / 15, 2.5 / 15, 1.5 / 15] + [0.5 / 15] * 6 + [2.5 / 15]
    hand = sum((qi - pi) * math.log(qi / pi) for pi, qi in zip(p, q, strict=True))
    # written out: 0.26667*ln(3.6667) + 0.06667*ln(1.6667) + 0 + 6*(-0.06667)*ln(0.33333)
    #              + 0.06667*ln(1.6667) = 0.34647 + 0.03406 + 0.43944 + 0.03406 = 0.8540
    assert hand == pytest.approx(0.8540, abs=1e-3)
    got = numeric_psi(np.arange(1, 11), np.array([1, 1, 1, 1, 1, 2, 2, 3, 10, 10]), bins=10, smoothing=0.5)
    assert got == pytest.approx(hand, rel=1e-12)


def test_numeric_psi_through_compare_uses_the_base_last_period_only():
    # Same hand case as above, placed in a panel: the base's earlier period (values 50..59)
    # must not enter the reference ("like with like"). The 2020 values are permuted across
    # units so that the within-unit changes differ (every unit changing by the same step
    # would make compare judge the wave less that step, issue 14).
    base = pl.DataFrame(
        {"id": list(range(10)) * 2, "year": [2020] * 10 + [2021] * 10,
         "v": [50.0 + (3 * i) % 10 for i in range(10)] + [float(i) for i in range(1, 11)]}
    )
    new = pl.DataFrame({"id": list(range(10)), "year": [2022] * 10, "v": [1.0, 1, 1, 1, 1, 2, 2, 3, 10, 10]})
    res = compare(base, new, **KEYS)
    p = [0.1] * 10
    q = [5.5 / 15, 2.5 / 15, 1.5 / 15] + [0.5 / 15] * 6 + [2.5 / 15]
    hand = sum((qi - pi) * math.log(qi / pi) for pi, qi in zip(p, q, strict=True))
    col = next(c for c in res.columns if c.column == "v")
    assert col.psi == pytest.approx(hand, abs=1e-6)
    assert col.reference == "base period 2021"
    # 0.85 > 0.25, the cut-off (common practice, no single source)
    assert _one(res, "distribution-shift", "v").severity == "warning"


def test_level_psi_equals_a_hand_computation():
    # Hand computation: base A 6, B 3, C 1 (D 0); new A 2, B 3, C 3, D 2; +0.5 per level:
    # base 6.5, 3.5, 1.5, 0.5 of 12; new 2.5, 3.5, 3.5, 2.5 of 12.
    p = [6.5 / 12, 3.5 / 12, 1.5 / 12, 0.5 / 12]
    q = [2.5 / 12, 3.5 / 12, 3.5 / 12, 2.5 / 12]
    hand = sum((qi - pi) * math.log(qi / pi) for pi, qi in zip(p, q, strict=True))
    got = level_psi({"A": 6, "B": 3, "C": 1}, {"A": 2, "B": 3, "C": 3, "D": 2}, smoothing=0.5)
    assert got == pytest.approx(hand, rel=1e-12)
    # written out: -0.33333*ln(0.38462) + 0 + 0.16667*ln(2.3333) + 0.16667*ln(5)
    #              = 0.31850 + 0.14122 + 0.26824 = 0.7280
    assert got == pytest.approx(0.7280, abs=1e-3)


def test_identical_samples_have_zero_psi_and_zero_ks():
    # Hand fact: equal shares give (q - p) = 0 in every term; equal samples have no gap.
    base = pl.DataFrame({"id": [1, 2, 3, 4], "year": [2020] * 4, "v": [1.0, 2, 3, 4], "c": list("aabb")})
    new = pl.DataFrame({"id": [1, 2, 3, 4], "year": [2021] * 4, "v": [1.0, 2, 3, 4], "c": list("aabb")})
    res = compare(base, new, **KEYS)
    by = {c.column: c for c in res.columns}
    assert by["v"].psi == 0 and by["v"].ks_statistic == 0
    assert by["c"].psi == 0


# --- hand-built cases, one per check -------------------------------------------------------


def test_overlapping_periods_counts_colliding_keys_with_examples():
    new = pl.concat([_small_new(), pl.DataFrame({"id": [2, 5], "year": [2021, 2021], "x": [0.0, 0.0],
                                                  "fixed": [102, 105], "grade": ["a", "b"]})])
    res = compare(_small_base(), new, **KEYS)
    f = _one(res, "overlapping-periods")
    assert f.severity == "error" and f.count == 2  # two (unit, 2021) keys the base holds
    assert {(e["id"], e["year"]) for e in f.examples} == {("2", 2021), ("5", 2021)}
    assert "drop or re-key the 2021 rows" in f.message
    assert res.periods.overlap == (2021,) and res.periods.colliding_keys == 2


def test_new_rows_in_a_held_period_without_collision_are_a_backfill_note():
    new = pl.concat([_small_new(), pl.DataFrame({"id": [99], "year": [2021], "x": [1.0], "fixed": [1],
                                                  "grade": ["a"]})])
    res = compare(_small_base(), new, **KEYS)
    assert not _checks(res, "overlapping-periods")
    assert _one(res, "backfilled-rows").count == 1


def test_duplicate_keys_inside_the_new_wave():
    new = pl.concat([_small_new(), _small_new().filter(pl.col("id") == 3)])
    res = compare(_small_base(), new, **KEYS)
    f = _one(res, "duplicate-keys")
    assert f.severity == "error" and f.count == 1
    assert f.examples[0]["id"] == "3" and f.examples[0]["rows"] == 2


def test_missing_keys_in_the_new_wave_are_an_error():
    new = pl.concat([_small_new(), pl.DataFrame({"id": [None], "year": [2022], "x": [1.0], "fixed": [1],
                                                  "grade": ["a"]}, schema_overrides={"id": pl.Int64})])
    res = compare(_small_base(), new, **KEYS)
    assert _one(res, "missing-keys").count == 1


def test_integer_ids_in_base_and_text_ids_in_new_still_match_and_report_type_changed():
    new = _small_new().with_columns(pl.col("id").cast(pl.String))
    res = compare(_small_base(), new, **KEYS)
    assert res.units.returning == 6 and res.units.entering == 0
    f = _one(res, "type-changed", "id")
    assert f.severity == "error"  # a key column (contract: error for a key)
    assert {"column": "id", "base": "int64", "new": "string", "key": True} in [t.to_dict() for t in res.schema.type_changed]


def test_float_ids_holding_whole_numbers_match_integer_ids():
    new = _small_new().with_columns(pl.col("id").cast(pl.Float64))
    res = compare(_small_base(), new, **KEYS)
    assert res.units.returning == 6


def test_type_changed_on_an_ordinary_column_is_a_warning():
    new = _small_new().with_columns(pl.col("fixed").cast(pl.Float64))
    res = compare(_small_base(), new, **KEYS)
    f = _one(res, "type-changed", "fixed")
    assert f.severity == "warning"
    assert not _checks(res, "invariant-changed")  # 103 == 103.0: compared as numbers


def test_columns_added_and_removed():
    new = _small_new().with_columns(pl.lit(1).alias("brand_new"))
    res = compare(_small_base(), new, **KEYS)
    assert res.schema.added == ("brand_new",) and res.schema.removed == ("gone",)
    assert _one(res, "column-added", "brand_new").severity == "note"
    assert _one(res, "column-removed", "gone").severity == "warning"


def test_invariant_changed_counts_returning_units_with_a_new_value():
    new = _small_new().with_columns(
        pl.when(pl.col("id").is_in([2, 4])).then(pl.col("fixed") + 7).otherwise(pl.col("fixed")).alias("fixed"),
        pl.when(pl.col("id") == 1).then(pl.lit("a")).otherwise(pl.col("grade")).alias("grade"),
    )
    res = compare(_small_base(), new, **KEYS)
    f = _one(res, "invariant-changed", "fixed")
    assert f.count == 2
    assert {e["id"] for e in f.examples} == {"2", "4"}
    assert {(e["base"], e["new"]) for e in f.examples} == {(102.0, 109.0), (104.0, 111.0)}
    assert _one(res, "invariant-changed", "grade").count == 1  # text columns too


def test_a_one_season_typo_in_the_base_is_not_held_against_a_correct_new_value():
    # unit 1 reported 101 twice and 111 once in the base; 101 in the new wave is no change
    base = _small_base().with_columns(
        pl.when((pl.col("id") == 1) & (pl.col("year") == 2021)).then(111).otherwise(pl.col("fixed")).alias("fixed")
    )
    res = compare(base, _small_new(), **KEYS)
    assert not _checks(res, "invariant-changed")


def test_implausible_jump_against_the_base_within_changes():
    # Base changes of x: +1 for every unit except a little noise; unit 4 jumps by +500.
    rng = np.random.default_rng(3)
    n = 40
    base = pl.DataFrame(
        {"id": np.repeat(np.arange(n), 4), "year": np.tile([2018, 2019, 2020, 2021], n),
         "x": np.repeat(np.arange(n) * 10.0, 4) + np.tile([0.0, 1, 2, 3], n) + rng.normal(0, 0.3, 4 * n)}
    )
    last = base.filter(pl.col("year") == 2021)
    new = last.with_columns(pl.lit(2022).alias("year"), (pl.col("x") + 1 + rng.normal(0, 0.3, n)).alias("x"))
    new = new.with_columns(pl.when(pl.col("id") == 4).then(pl.col("x") + 500).otherwise(pl.col("x")).alias("x"))
    res = compare(base, new, **KEYS)
    f = _one(res, "implausible-jump", "x")
    assert f.count == 1 and f.examples[0]["id"] == "4"
    # the scale is 1.4826 x the MAD of the base's changes (numpy oracle on the same changes)
    d = base.sort("id", "year").with_columns(pl.col("x").diff().over("id").alias("d"))["d"].drop_nulls().to_numpy()
    mad = np.median(np.abs(d - np.median(d)))
    col = next(c for c in res.columns if c.column == "x")
    assert col.within.change_scale == pytest.approx(1.4826 * mad, rel=1e-5)
    assert col.within.change_median == pytest.approx(np.median(d), rel=1e-5)


def test_new_and_vanished_categories():
    n = 60
    base = pl.DataFrame({"id": list(range(n)), "year": [2021] * n, "crop": ["pear", "plum", "fig"] * 20})
    # fig vanishes (20 of 60 reference rows: 20 expected in 60 new rows), quince is new
    new = pl.DataFrame({"id": list(range(n)), "year": [2022] * n, "crop": ["pear", "plum", "quince"] * 20})
    res = compare(base, new, **KEYS)
    f = _one(res, "new-categories", "crop")
    assert f.count == 1 and f.examples[0] == {"level": "quince", "rows": 20}
    g = _one(res, "vanished-categories", "crop")
    assert g.count == 1 and g.examples[0]["level"] == "fig"


def test_a_rare_level_missing_by_chance_is_not_reported_as_vanished():
    # 1 row in 60 holds "fig": 1 expected in the new wave, below vanished_min_expected (5)
    base = pl.DataFrame({"id": list(range(60)), "year": [2021] * 60, "crop": ["pear"] * 59 + ["fig"]})
    new = pl.DataFrame({"id": list(range(60)), "year": [2022] * 60, "crop": ["pear"] * 60})
    assert not _checks(compare(base, new, **KEYS), "vanished-categories")


def test_missing_jump():
    new = _small_new().with_columns(
        pl.when(pl.col("id") <= 3).then(None).otherwise(pl.col("x")).alias("x")
    )
    res = compare(_small_base(), new, **KEYS)
    f = _one(res, "missing-jump", "x")
    assert f.count == 3  # 3 of 6 rows missing against none in 2021
    col = next(c for c in res.columns if c.column == "x")
    assert col.missing_base == 0 and col.missing_new == 0.5


def test_nan_counts_as_missing():
    new = _small_new().with_columns(pl.when(pl.col("id") <= 3).then(float("nan")).otherwise(pl.col("x")).alias("x"))
    col = next(c for c in compare(_small_base(), new, **KEYS).columns if c.column == "x")
    assert col.missing_new == 0.5


def test_unexpected_period_skipping_a_year():
    new = _small_new().with_columns(pl.lit(2023).alias("year"))
    res = compare(_small_base(), new, **KEYS)
    f = _one(res, "unexpected-period")
    assert f.examples[0]["period"] == 2023 and "2022" in f.examples[0]["reason"]


def test_unexpected_period_off_the_grid_step():
    base = _small_base().with_columns((2019 + (pl.col("year") - 2019) * 2).alias("year"))  # 2019, 2021, 2023
    ok = compare(base, _small_new().with_columns(pl.lit(2025).alias("year")), **KEYS)
    assert not _checks(ok, "unexpected-period")
    bad = compare(base, _small_new().with_columns(pl.lit(2024).alias("year")), **KEYS)
    assert "step of 2" in _one(bad, "unexpected-period").examples[0]["reason"]


def test_quarterly_dates_continue_by_one_quarter():
    from datetime import date

    base = pl.DataFrame({"id": [1, 1, 2, 2], "year": [date(2024, 1, 1), date(2024, 4, 1)] * 2, "v": [1.0, 2, 3, 4]})
    nxt = pl.DataFrame({"id": [1, 2], "year": [date(2024, 7, 1)] * 2, "v": [1.0, 2]})
    res = compare(base, nxt, **KEYS)
    assert not _checks(res, "unexpected-period")
    assert res.periods.new == ("2024Q3",)
    skip = compare(base, nxt.with_columns(pl.lit(date(2024, 10, 1)).alias("year")), **KEYS)
    assert _one(skip, "unexpected-period").count == 1


def test_a_quarterly_base_of_one_period_expects_the_next_quarter():
    # one base quarter has no grid of its own: on a calendar scale the next period is one
    # step on (compare_align.align), so 2024Q2 continues it and 2024Q3 skips 2024Q2
    from datetime import date

    base = pl.DataFrame({"id": [1, 2], "year": [date(2024, 1, 1)] * 2, "v": [1.0, 2]})
    nxt = pl.DataFrame({"id": [1, 2], "year": [date(2024, 4, 1)] * 2, "v": [1.0, 2]})
    res = compare(base, nxt, **KEYS)
    assert res.periods.step == 1 and not _checks(res, "unexpected-period")
    skip = compare(base, nxt.with_columns(pl.lit(date(2024, 7, 1)).alias("year")), **KEYS)
    assert "skips 2024Q2" in _one(skip, "unexpected-period").message


def test_units_returning_entering_and_not_returning():
    base = _small_base().filter(~((pl.col("id") == 2) & (pl.col("year") == 2021)))  # 2 absent in 2021
    new = pl.concat([
        _small_new().filter(pl.col("id") != 6),  # 6 does not come back
        pl.DataFrame({"id": [7, 8], "year": [2022, 2022], "x": [1.0, 2.0], "fixed": [1, 2], "grade": ["a", "b"]}),
    ])
    res = compare(base, new, **KEYS)
    assert res.units.to_dict() == {
        "base": 6, "new": 7, "returning": 5, "entering": 2, "not_returning": 1,
        "returning_after_absence": 1, "last_period": 5, "not_returning_from_last_period": 1,
    }
    assert _one(res, "returning-after-absence").examples[0] == {"id": "2", "last_base_period": 2020}
    assert _one(res, "units-not-returning").examples[0] == {"id": "6"}


def test_merged_view_adds_the_profile_of_base_and_new_marked_as_merged():
    new = pl.concat([_small_new(), _small_base().filter(pl.col("id") == 1, pl.col("year") == 2021).drop("gone")])
    plain = compare(_small_base(), new, **KEYS)
    assert all(plain.scope_of(f) == "wave" for f in plain.findings)
    res = compare(_small_base(), new, **KEYS, merged=True)
    dup = [f for f in res.findings if f.check == "duplicate-keys" and res.scope_of(f) == "merged"]
    assert len(dup) == 1 and dup[0].count == 1 and dup[0].message.startswith("base + new: ")
    doc = res.to_dict()
    assert any(f["scope"] == "merged" for f in doc["findings"])
    assert doc["merged"]["panel"]["periods"] == 4


# --- no false alarms -----------------------------------------------------------------------


def _simulate(seed: int, n_units: int, years: list[int], effects: np.ndarray) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    n = n_units * len(years)
    unit = np.repeat(np.arange(n_units), len(years))
    return pl.DataFrame(
        {
            "id": unit,
            "year": np.tile(years, n_units),
            "output": 50 + effects[unit] + rng.normal(0, 4, n),
            "hours": rng.gamma(4.0, 10.0, n),
            "size_class": np.array(["small", "mid", "large"])[unit % 3],
            "zone": np.array(["n", "s", "e", "w"])[rng.integers(0, 4, n)],
            "founded": 1950 + unit % 60,
            "score": np.where(rng.random(n) < 0.05, np.nan, rng.normal(0, 1, n)),
        }
    )


def test_a_clean_new_wave_from_the_same_process_raises_no_alarm():
    # base and new simulated from one process with fixed seeds: no error finding, no
    # distribution-shift, missing-jump, invariant-changed, implausible-jump or new level
    n_units = 800
    effects = np.random.default_rng(1).normal(0, 10, n_units)
    base = _simulate(11, n_units, [2019, 2020, 2021, 2022], effects)
    new = _simulate(12, n_units, [2023], effects)
    res = compare(base, new, **KEYS)
    assert [f for f in res.findings if f.severity == "error"] == []
    quiet = {"distribution-shift", "missing-jump", "invariant-changed", "implausible-jump", "new-categories",
             "vanished-categories", "type-changed", "unexpected-period"}
    assert [f.check for f in res.findings if f.check in quiet] == []
    assert all(c.psi < 0.05 for c in res.columns if c.psi is not None)


# --- the invented orchard demo: every planted change is found -----------------------------------


@pytest.fixture(scope="module")
def orchards():
    from auditor.io.demo_data import make_next_season, make_orchards

    base = make_orchards()
    new = make_next_season(base)
    return base, new, compare(base, new, unit="orchard_id", time="season", merged=True)


def test_demo_next_season_every_planted_change_is_found(orchards):
    from auditor.io.demo_data import PLANTED_NEXT

    base, new, res = orchards
    # late corrections labelled 2024: keys recomputed here with Python sets
    held = set(zip(base["orchard_id"].to_list(), base["season"].to_list(), strict=True))
    new_keys = list(zip(new["orchard_id"].to_list(), new["season"].to_list(), strict=True))
    colliding = {k for k in new_keys if k in held}
    f = _one(res, "overlapping-periods")
    assert f.count == len(colliding) == PLANTED_NEXT["colliding_rows"]
    assert {(e["orchard_id"], e["season"]) for e in f.examples} <= colliding
    # appending them duplicates keys: the merged view says so
    assert any(g.check == "duplicate-keys" for g in _checks(res, "duplicate-keys", "merged"))
    # units
    last = set(base.filter(pl.col("season") == 2024)["orchard_id"].drop_nulls().to_list())
    came = set(new.filter(pl.col("season") == 2025)["orchard_id"].to_list())
    assert res.units.not_returning_from_last_period == len(last - came) == PLANTED_NEXT["not_returning"]
    assert res.units.entering == PLANTED_NEXT["entering"]
    # training: the orchards whose new value is none of their base values (Python sets)
    seen: dict[str, set] = {}
    for o, t in zip(base["orchard_id"].to_list(), base["founder_training_yrs"].to_list(), strict=True):
        if o is not None and t is not None:
            seen.setdefault(o, set()).add(t)
    first_new = new.sort("season").unique("orchard_id", keep="first")
    changed = {o for o, t in zip(first_new["orchard_id"].to_list(), first_new["founder_training_yrs"].to_list(),
                                 strict=True) if o in seen and t not in seen[o]}
    g = _one(res, "invariant-changed", "founder_training_yrs")
    assert g.count == len(changed) == PLANTED_NEXT["training_changed"]
    assert {e["orchard_id"] for e in g.examples} <= changed
    h = _one(res, "new-categories", "soil_class")
    assert h.examples[0] == {"level": "PT", "rows": PLANTED_NEXT["new_soil_code"]}
    assert [f.column for f in _checks(res, "distribution-shift")] == ["rainfall_mm"]
    assert _one(res, "missing-jump", "labour_days").count > 0
    assert res.schema.removed == ("quarantine_flag",) and _one(res, "column-removed", "quarantine_flag")
    assert res.schema.added == ("hail_net",) and _one(res, "column-added", "hail_net")


def test_demo_from_the_shipped_csv_files_finds_the_planted_changes():
    # the shipped files (examples/README.md, "Planted changes"): same truth read from CSV
    from pathlib import Path

    from auditor.io.demo_data import PLANTED_NEXT

    ex = Path(__file__).resolve().parent.parent / "examples"
    res = compare(ex / "orchards.csv", ex / "orchards_next_season.csv", unit="orchard_id", time="season")
    found = {(f.check, f.column) for f in res.findings}
    assert found >= {
        ("overlapping-periods", None), ("invariant-changed", "founder_training_yrs"),
        ("new-categories", "soil_class"), ("distribution-shift", "rainfall_mm"),
        ("missing-jump", "labour_days"), ("column-removed", "quarantine_flag"), ("column-added", "hail_net"),
    }
    assert _one(res, "overlapping-periods").count == PLANTED_NEXT["colliding_rows"]
    assert _one(res, "invariant-changed", "founder_training_yrs").count == PLANTED_NEXT["training_changed"]
    assert res.units.entering == PLANTED_NEXT["entering"]
    assert res.units.not_returning_from_last_period == PLANTED_NEXT["not_returning"]


# --- the JSON document and the text ------------------------------------------------------


def test_json_uses_the_contract_names_and_is_strict():
    res = compare(_small_base(), _small_new(), **KEYS)
    doc = json.loads(json.dumps(res.to_dict(), allow_nan=False))
    assert doc["tool"]["name"] == "panel-audit"
    assert set(doc["schema"]) >= {"added", "removed", "type_changed"}
    assert set(doc["units"]) >= {"base", "new", "returning", "entering", "not_returning"}
    assert set(doc["periods"]) >= {"base", "new", "overlap"}
    assert doc["periods"]["base"] == [2019, 2020, 2021] and doc["periods"]["new"] == [2022]
    for c in doc["columns"]:
        assert set(c) >= {"column", "ks_statistic", "ks_p", "psi", "missing_base", "missing_new"}
    assert doc["reference"] == "base period 2021"


def test_pandas_and_polars_inputs_give_the_same_document():
    a = compare(_small_base(), _small_new(), **KEYS).to_dict()
    b = compare(_small_base().to_pandas(), pd.DataFrame(_small_new().to_pandas()), **KEYS).to_dict()
    a.pop("sources"), b.pop("sources")
    assert a == b


def test_text_says_whether_to_append_and_what_to_do():
    from auditor.render.text_compare import render

    new = pl.concat([_small_new(), _small_base().filter(pl.col("id") == 1, pl.col("year") == 2021).drop("gone")])
    text = render(compare(_small_base(), new, **KEYS), width=100, colour=False)
    assert "do not append yet" in text and "drop or re-key the 2021 rows" in text
    clean = render(compare(_small_base(), _small_new().with_columns(pl.lit(0.0).alias("gone")), **KEYS), width=100)
    assert "no error" in clean


def test_thresholds_come_from_the_rules_file(tmp_path):
    # PSI of the hand case is 0.85; a cut-off of 1.0 silences it
    rules = tmp_path / "r.yaml"
    rules.write_text("compare:\n  psi_shift: 1.0\n")
    base = pl.DataFrame({"id": list(range(10)), "year": [2021] * 10, "v": [float(i) for i in range(1, 11)]})
    new = pl.DataFrame({"id": list(range(10)), "year": [2022] * 10, "v": [1.0, 1, 1, 1, 1, 2, 2, 3, 10, 10]})
    assert _checks(compare(base, new, **KEYS), "distribution-shift")
    assert not _checks(compare(base, new, **KEYS, settings=load_settings(rules)), "distribution-shift")
    assert not _checks(compare(base, new, **KEYS, rules=rules), "distribution-shift")


# --- bad input: exit 2, one clear line -------------------------------------------------------


def _write(path, frame: pl.DataFrame):
    frame.write_csv(path)
    return str(path)


def test_no_common_key_columns_exit_2_with_one_line(tmp_path, capsys):
    base = _write(tmp_path / "base.csv", _small_base())
    new = _write(tmp_path / "new.csv", _small_new().rename({"id": "code", "year": "wave"}))
    rc = main(["compare", base, new, "--unit", "id", "--time", "year"])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.count("\n") == 1 and err.startswith("panel-audit: error: ")
    assert "'id'" in err and "'year'" in err and "code" in err


def test_an_empty_new_wave_exit_2_with_one_line(tmp_path, capsys):
    base = _write(tmp_path / "base.csv", _small_base())
    empty = tmp_path / "new.csv"
    empty.write_text("id,year,x\n")
    rc = main(["compare", base, str(empty), "--unit", "id", "--time", "year"])
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and err.startswith("panel-audit: error: ")
    assert "new wave" in err and "no data rows" in err


def test_an_empty_new_frame_raises_the_compare_error():
    with pytest.raises(AuditError) as e:
        compare(_small_base(), _small_new().head(0), **KEYS)
    assert e.value.code == "compare-empty-new"


def test_time_written_differently_in_the_two_files_is_one_clear_error(tmp_path, capsys):
    base = _write(tmp_path / "base.csv", _small_base())
    # integer years in the base, calendar dates in the new wave: no one scale for both
    new = _write(tmp_path / "new.csv", _small_new().with_columns(pl.lit("2022-03-15").alias("year")))
    rc = main(["compare", base, new, "--unit", "id", "--time", "year"])
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and "time key 'year'" in err


def test_cli_exit_code_follows_fail_on(tmp_path, capsys):
    base = _write(tmp_path / "base.csv", _small_base())
    new = _write(tmp_path / "new.csv", _small_new())  # 'gone' removed: a warning, no error
    assert main(["compare", base, new, "--unit", "id", "--time", "year"]) == 0
    assert main(["compare", base, new, "--unit", "id", "--time", "year", "--fail-on", "warning"]) == 1
    capsys.readouterr()
    assert main(["compare", base, new, "--unit", "id", "--time", "year", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["units"]["returning"] == 6


def test_a_base_of_one_period_calls_no_column_fixed():
    # with one base period no unit is seen twice: nothing is known to be time-invariant
    res = compare(_small_base().filter(pl.col("year") == 2021), _small_new().with_columns(pl.col("fixed") + 1), **KEYS)
    assert not _checks(res, "invariant-changed")
    assert res.periods.step is None and not _checks(res, "unexpected-period")


def test_a_column_left_empty_in_the_new_wave_is_a_missing_jump_not_a_type_change():
    new = _small_new().with_columns(pl.lit(None, dtype=pl.String).alias("x"))
    res = compare(_small_base(), new, **KEYS)
    assert not _checks(res, "type-changed")
    assert _one(res, "missing-jump", "x").count == 6


def test_composite_unit_keys_match_across_types():
    base = _small_base().with_columns((pl.col("id") % 2).alias("farm"), (pl.col("id") // 2).alias("plot")).drop("id")
    new = _small_new().with_columns(
        (pl.col("id") % 2).cast(pl.String).alias("farm"), (pl.col("id") // 2).alias("plot")
    ).drop("id")
    res = compare(base, new, unit="farm,plot", time="year")
    assert res.units.returning == 6 and res.units.entering == 0
    assert _one(res, "type-changed", "farm").severity == "error"


def test_shuffling_the_rows_of_either_input_changes_nothing():
    # invariant (style.md): row order carries no meaning in a panel
    from auditor.io.demo_data import make_next_season, make_orchards

    base = make_orchards()
    new = make_next_season(base)
    a = compare(base, new, unit="orchard_id", time="season").to_dict()
    b = compare(base.sample(fraction=1.0, shuffle=True, seed=5), new.sample(fraction=1.0, shuffle=True, seed=6),
                unit="orchard_id", time="season").to_dict()
    assert a == b


def test_a_base_without_the_key_raises_the_compare_error_naming_the_base():
    with pytest.raises(AuditError) as e:
        compare(_small_base().rename({"id": "code"}), _small_new(), **KEYS)
    assert e.value.code == "compare-key-missing" and "the base has no key column 'id'" in e.value.message
