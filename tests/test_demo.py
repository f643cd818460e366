"""The invented orchard demo: reproducible files, a truth that holds, every planted fault found.

Oracles: pandas groupby counts written here (independent of auditor's code),
statsmodels OLS with orchard and season dummies (the within estimator written as
dummies, as listed in ../shared/check-values.md), and the planted sizes that the
generator documents in examples/README.md.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from auditor.io import demo_data
from auditor.io.demo_data import PLANTED, PLANTED_NEXT, TRUE_COEF

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
BASE_CSV = EXAMPLES / "orchards.csv"
NEXT_CSV = EXAMPLES / "orchards_next_season.csv"
KEYS = ["orchard_id", "season"]


@pytest.fixture(scope="module")
def base_pd() -> pd.DataFrame:
    # keep ids as text: "OR-0007" must stay as written
    return pd.read_csv(BASE_CSV, dtype={"orchard_id": str})


@pytest.fixture(scope="module")
def next_pd() -> pd.DataFrame:
    return pd.read_csv(NEXT_CSV, dtype={"orchard_id": str})


# --- the shipped files are the generator's output -------------------------------------


def test_shipped_csvs_equal_a_fresh_run_of_the_generator():
    files = demo_data.orchard_files()
    assert BASE_CSV.read_text(encoding="utf-8") == demo_data.csv_text(files["orchards.csv"])
    assert NEXT_CSV.read_text(encoding="utf-8") == demo_data.csv_text(files["orchards_next_season.csv"])


def test_generator_depends_on_its_seed():
    a = demo_data.make_orchards(seed=1)
    b = demo_data.make_orchards(seed=2)
    assert not a["log_yield_ha"].equals(b["log_yield_ha"])


def test_orchard_ids_keep_leading_zeros(base_pd):
    ids = base_pd["orchard_id"].dropna()
    assert ids.str.fullmatch(r"OR-\d{4}").all()
    assert "OR-0007" in set(ids)


# --- the planted sizes hold (pandas counts, independent of auditor) ---------------------


def test_registry_has_1200_orchards_over_eight_seasons(base_pd):
    keyed = base_pd.dropna(subset=KEYS)
    assert keyed["orchard_id"].nunique() == 1200
    assert sorted(keyed["season"].astype(int).unique()) == list(range(2017, 2025))


def test_planted_duplicate_rows_are_exact_double_entries(base_pd):
    keyed = base_pd.dropna(subset=KEYS)
    assert keyed.duplicated(subset=KEYS).sum() == PLANTED["duplicate_rows"] == 6
    assert keyed.duplicated().sum() == 6  # the whole row repeated, not only the key


def test_planted_null_keys(base_pd):
    assert base_pd["orchard_id"].isna().sum() == PLANTED["null_unit_rows"] == 3
    assert base_pd["season"].isna().sum() == PLANTED["null_season_rows"] == 2


def test_planted_gaps_one_season_each(base_pd):
    keyed = base_pd.dropna(subset=KEYS)
    g = keyed.groupby("orchard_id")["season"]
    missing_inside = (g.max() - g.min() + 1) - g.nunique()
    assert (missing_inside > 0).sum() == PLANTED["gap_orchards"] == 30
    assert missing_inside.sum() == 30


def _units_changing(frame: pd.DataFrame, column: str) -> int:
    keyed = frame.dropna(subset=KEYS)
    return int((keyed.groupby("orchard_id")[column].nunique() > 1).sum())


def test_planted_changes_per_column(base_pd):
    assert _units_changing(base_pd, "founder_training_yrs") == PLANTED["training_errors"] == 8
    assert _units_changing(base_pd, "organic") == PLANTED["organic_switchers"] == 14
    assert _units_changing(base_pd, "quarantine_flag") == PLANTED["quarantine_orchards"] == 70
    assert _units_changing(base_pd, "altitude_m") == 0
    assert _units_changing(base_pd, "soil_class") == 0


def test_frost_alert_is_one_value_per_season(base_pd):
    keyed = base_pd.dropna(subset=KEYS)
    assert (keyed.groupby("season")["frost_alert"].nunique() == 1).all()
    assert keyed["frost_alert"].nunique() > 1


def test_tree_age_grows_by_one_each_season(base_pd):
    keyed = base_pd.dropna(subset=KEYS)
    offset = keyed["tree_age"] - keyed["season"]
    assert (offset.groupby(keyed["orchard_id"]).nunique() == 1).all()


def test_quarantine_flag_is_near_constant(base_pd):
    share_zero = (base_pd.dropna(subset=KEYS)["quarantine_flag"] == 0).mean()
    assert 0.99 <= share_zero < 0.995


# --- the documented truth holds --------------------------------------------------------


def _clean(base_pd: pd.DataFrame) -> pd.DataFrame:
    return base_pd.dropna(subset=KEYS).drop_duplicates(subset=KEYS).dropna()


def test_within_fit_recovers_true_time_varying_coefficients(base_pd):
    # Oracle: statsmodels OLS with orchard and season dummies (the within estimator as
    # dummies, check-values.md "general-purpose reference libraries"). The truth is
    # TRUE_COEF; allow four standard errors.
    sm = pytest.importorskip("statsmodels.formula.api")
    d = _clean(base_pd)
    fit = sm.ols(
        "log_yield_ha ~ rainfall_mm + irrigation_h + labour_days + organic"
        " + C(season) + C(orchard_id)",
        d,
    ).fit()
    for col in ("rainfall_mm", "irrigation_h", "labour_days", "organic"):
        assert abs(fit.params[col] - TRUE_COEF[col]) < 4 * fit.bse[col], col


def test_pooled_ols_overstates_the_correlated_regressors(base_pd):
    # The demo's point (examples/README.md): labour days and training load on u_i, so
    # pooled OLS is biased upwards for both. Oracle: statsmodels OLS.
    sm = pytest.importorskip("statsmodels.formula.api")
    d = _clean(base_pd)
    fit = sm.ols(
        "log_yield_ha ~ rainfall_mm + irrigation_h + labour_days + altitude_m + C(soil_class)"
        " + founder_training_yrs + frost_alert + tree_age + organic",
        d,
    ).fit()
    for col in ("labour_days", "founder_training_yrs"):
        assert fit.params[col] - TRUE_COEF[col] > 4 * fit.bse[col], col


def test_training_instruments_are_strong(base_pd):
    # Hausman-Taylor instruments for the Z2 column: orchard means of the X1 columns, given
    # Z1 (methods.md section 5). Oracle: statsmodels nested-model F test at the orchard
    # level; rule of thumb F >= 10 (Staiger and Stock 1997, check-values.md) and the
    # Stock-Yogo 10% value for two instruments, 19.93 (check-values.md, from memory).
    sm = pytest.importorskip("statsmodels.formula.api")
    d = _clean(base_pd)
    means = d.groupby("orchard_id").agg(
        training=("founder_training_yrs", "median"),
        rain=("rainfall_mm", "mean"),
        irr=("irrigation_h", "mean"),
        alt=("altitude_m", "first"),
        soil=("soil_class", "first"),
    )
    restricted = sm.ols("training ~ alt + C(soil)", means).fit()
    unrestricted = sm.ols("training ~ alt + C(soil) + rain + irr", means).fit()
    f, _p, df = unrestricted.compare_f_test(restricted)
    assert df == 2
    assert f > 19.93


# --- the next-season file --------------------------------------------------------------


def test_next_season_planted_changes(base_pd, next_pd):
    base_ids = set(base_pd["orchard_id"].dropna())
    last = set(base_pd.loc[base_pd["season"] == 2024, "orchard_id"].dropna())
    new_2025 = next_pd[next_pd["season"] == 2025]
    ids_2025 = set(new_2025["orchard_id"])
    assert len(last - ids_2025) == PLANTED_NEXT["not_returning"] == 50
    assert len(ids_2025 - base_ids) == PLANTED_NEXT["entering"] == 40
    collide = next_pd.merge(base_pd.dropna(subset=KEYS), on=KEYS, how="inner")
    assert len(collide) == PLANTED_NEXT["colliding_rows"] == 4
    assert (next_pd["soil_class"] == "PT").sum() == PLANTED_NEXT["new_soil_code"] == 5
    assert "PT" not in set(base_pd["soil_class"])
    assert "quarantine_flag" not in next_pd.columns and "hail_net" in next_pd.columns


def test_next_season_training_changed_for_seven_returning_orchards(base_pd, next_pd):
    keyed = base_pd.dropna(subset=KEYS)
    # the registry's usual value per orchard (the coding errors are one season of several)
    usual = keyed.groupby("orchard_id")["founder_training_yrs"].agg(lambda s: s.mode().iloc[0])
    new = next_pd[next_pd["season"] == 2025].set_index("orchard_id")["founder_training_yrs"]
    common = new.index.intersection(usual.index)
    assert int((new[common] != usual[common]).sum()) == PLANTED_NEXT["training_changed"] == 7


def test_next_season_rainfall_shifted_and_labour_missing_jumped(base_pd, next_pd):
    new = next_pd[next_pd["season"] == 2025]
    shift = new["rainfall_mm"].mean() - base_pd["rainfall_mm"].mean()
    assert -220 < shift < -120  # planted: -170 mm
    assert base_pd["labour_days"].isna().mean() < 0.03
    assert 0.2 < new["labour_days"].isna().mean() < 0.3


# --- the profile finds every planted fault --------------------------------------------

@pytest.fixture(scope="module")
def demo_profile():
    from auditor.commands.profile import profile

    return profile(BASE_CSV, unit="orchard_id", time="season")


def _findings(result, check: str) -> list:
    return [f for f in result.findings if f.check == check]


def _column_row(result, name: str) -> dict:
    rows = result.columns.filter(result.columns["name"] == name).to_dicts()
    assert len(rows) == 1, name
    return rows[0]


def test_profile_panel_facts_match_the_planted_sizes(demo_profile):
    p = demo_profile.panel
    assert p["rows"] == 7882
    assert p["units"] == 1200
    assert p["periods"] == 8
    assert p["duplicate_keys"] == 6
    assert p["missing_keys"] == 5
    assert p["units_with_gaps"] == 30
    assert p["gap_periods"] == 30
    assert p["singleton_units"] == 42
    assert p["balanced"] is False


def test_profile_finds_duplicates_and_missing_keys_with_exact_counts(demo_profile):
    (dup,) = _findings(demo_profile, "duplicate-keys")
    assert dup.count == 6 and dup.severity == "error"
    (miss,) = _findings(demo_profile, "missing-keys")
    assert miss.count == 5
    (gaps,) = _findings(demo_profile, "gaps")
    assert gaps.count == 30


@pytest.mark.parametrize(
    ("check", "column"),
    [
        ("nearly-time-invariant", "founder_training_yrs"),
        ("absorbed-by-time", "tree_age"),
        ("period-only", "frost_alert"),
        ("few-switchers", "organic"),
        ("near-constant", "quarantine_flag"),
    ],
)
def test_profile_finds_each_planted_column_fault(demo_profile, check, column):
    assert column in {f.column for f in _findings(demo_profile, check)}


def test_profile_column_kinds_follow_the_truth(demo_profile):
    kinds = dict(zip(demo_profile.columns["name"], demo_profile.columns["kind"], strict=True))
    assert kinds["altitude_m"] == "time-invariant"
    assert kinds["soil_class"] == "time-invariant"
    assert kinds["founder_training_yrs"] == "nearly-time-invariant"
    assert kinds["frost_alert"] == "period-only"
    for col in ("log_yield_ha", "rainfall_mm", "irrigation_h", "labour_days", "tree_age"):
        assert kinds[col] == "time-varying", col
    assert _column_row(demo_profile, "founder_training_yrs")["units_changing"] == 8
    assert _column_row(demo_profile, "organic")["units_changing"] == 14
    assert _column_row(demo_profile, "tree_age")["absorbed_by_time"] is True
    assert _column_row(demo_profile, "rainfall_mm")["absorbed_by_time"] is False


def test_profile_raises_no_fault_that_was_not_planted(demo_profile):
    assert not _findings(demo_profile, "irregular-periods")
    assert not _findings(demo_profile, "constant-column")
    assert not _findings(demo_profile, "high-missing")
    assert not _findings(demo_profile, "missing-in-period")
    assert not _findings(demo_profile, "non-finite")
    flagged_nearly = {f.column for f in _findings(demo_profile, "nearly-time-invariant")}
    assert flagged_nearly <= {"founder_training_yrs", "organic"}
    assert {f.column for f in _findings(demo_profile, "near-constant")} <= {"quarantine_flag"}


def test_profile_dominant_share_of_the_flag_matches_pandas(demo_profile, base_pd):
    # Oracle: pandas share of the most common value among non-missing keyed rows.
    keyed = base_pd.dropna(subset=KEYS)
    expected = keyed["quarantine_flag"].value_counts(normalize=True).iloc[0]
    got = _column_row(demo_profile, "quarantine_flag")["dominant_share"]
    assert np.isclose(got, expected, rtol=1e-12)


# --- run_demo ------------------------------------------------------------------------


def test_run_demo_writes_the_files_and_refuses_to_overwrite(tmp_path):
    from auditor.commands.demo import run_demo
    from auditor.errors import AuditError

    run = run_demo(tmp_path / "demo")
    assert run.out_dir == tmp_path / "demo"
    for key in ("orchards", "orchards_next_season", "profile"):
        assert run.paths[key].is_file(), key
    assert run.paths["orchards"].read_bytes() == BASE_CSV.read_bytes()
    assert run.profile is not None and run.profile.panel["duplicate_keys"] == 6
    before = run.paths["orchards"].read_bytes()
    with pytest.raises(AuditError) as err:
        run_demo(tmp_path / "demo")
    assert err.value.code == "output-exists"
    assert run.paths["orchards"].read_bytes() == before
    again = run_demo(tmp_path / "demo", force=True)
    assert again.paths["profile"].read_bytes() == run.paths["profile"].read_bytes()
