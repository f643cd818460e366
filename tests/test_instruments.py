"""`instruments`: roles, identification, findings and the CLI, on hand-built and simulated panels."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import polars as pl
import pytest
import statsmodels.formula.api as smf
from statsmodels.datasets import grunfeld
from test_models import simulate

from auditor.commands.instruments import instruments
from auditor.errors import AuditError

DATA = Path(__file__).parent / "data"

SIM_REGS = ["x1a", "x1b", "x2", "z1", "z2"]


def run(d, **kw):
    kw.setdefault("unit", "unit")
    kw.setdefault("time", "t")
    kw.setdefault("outcome", "y")
    return instruments(d, **kw)


def checks(result, severity=None):
    return [f.check for f in result.findings if severity is None or f.severity == severity]


@pytest.fixture(scope="module")
def sim_result():
    return run(simulate(), regressors=SIM_REGS, correlated=["x2", "z2"])


def test_roles_follow_kinds_and_declaration(sim_result):
    # Hausman and Taylor (1981) notation, methods.md section 4: time-varying -> X, invariant -> Z
    assert sim_result.roles.to_dict() == {"X1": ["x1a", "x1b"], "X2": ["x2"], "Z1": ["z1"], "Z2": ["z2"]}
    assert sim_result.order_condition.to_dict() == {"k1": 2, "g2": 1, "met": True}


def test_ht_recovers_z2_and_random_effects_is_biased_through_the_api(sim_result):
    # known truth of the simulated design (tests/test_models.py::simulate): z2 coefficient 1.0
    ht = sim_result.estimates.hausman_taylor
    assert abs(ht.coef["z2"] - 1.0) < 3 * ht.se["z2"]
    re = sim_result.estimates.random
    assert abs(re.coef["z2"] - 1.0) > 5 * re.se["z2"]
    assert sim_result.strength[0].verdict == "strong"


def test_unrelated_instruments_are_weak_with_a_finding():
    # known truth: z2 does not load on the unit components of x1a, x1b
    r = run(simulate(related=False), regressors=SIM_REGS, correlated=["x2", "z2"])
    assert r.strength[0].verdict == "weak"
    weak = [f for f in r.findings if f.check == "weak-instrument"]
    assert len(weak) == 1 and weak[0].column == "z2"


def test_every_x_correlated_fails_the_order_condition():
    # Hausman and Taylor (1981): order condition k1 >= g2; here k1 = 0 < g2 = 1
    r = run(simulate(), regressors=SIM_REGS, correlated=["x1a", "x1b", "x2", "z2"])
    assert r.order_condition.to_dict() == {"k1": 0, "g2": 1, "met": False}
    assert r.estimates.hausman_taylor is None
    assert "order-condition" in checks(r, "error")
    assert r.strength[0].verdict == "not-identified"
    msg = next(f.message for f in r.findings if f.check == "order-condition")
    assert "not identified" in msg


def test_just_identified_has_no_overidentification_tests():
    # Hausman and Taylor (1981): with k1 = g2 nothing is over-identified
    r = run(simulate(), regressors=SIM_REGS, correlated=["x1b", "x2", "z2"])
    assert r.order_condition.k1 == 1
    assert r.tests.overidentification is None and r.tests.hausman_within_ht is None


def test_json_uses_the_contract_names(sim_result):
    # contract.md, instruments section
    d = json.loads(json.dumps(sim_result.to_dict(), allow_nan=False))
    assert d["tool"]["name"] == "panel-audit"
    for key in ("roles", "not_identified", "order_condition", "strength", "candidates", "tests", "estimates",
                "variance_components", "findings"):
        assert key in d
    row = d["strength"][0]
    for key in ("endogenous", "role", "instruments", "partial_f", "robust_f", "partial_r2", "df",
                "critical_value", "verdict"):
        assert key in row
    assert set(d["tests"]) >= {"mundlak", "hausman_within_random", "overidentification", "hausman_within_ht"}
    assert set(d["estimates"]) >= {"within", "random", "hausman_taylor"}
    assert "const" in d["estimates"]["random"]["coef"]
    assert set(d["variance_components"]) >= {"sigma_u", "sigma_e", "theta_mean"}
    assert set(d["candidates"][0]) >= {"endogenous", "instrument", "partial_f", "mundlak_p", "usable"}


def test_grunfeld_through_the_api_matches_baltagi_table_2_1():
    # Baltagi, Econometric Analysis of Panel Data, Table 2.1 (values from memory, check-values.md)
    d = grunfeld.load_pandas().data
    d = d[d["firm"] != "American Steel"]
    r = instruments(d, unit="firm", time="year", outcome="invest", regressors=["value", "capital"], correlated=[])
    w, re = r.estimates.within, r.estimates.random
    assert abs(w.coef["value"] - 0.1101) <= 5e-5 and abs(w.se["capital"] - 0.0174) <= 5e-5
    assert abs(re.coef["const"] - (-57.83)) <= 5e-3 and abs(re.se["const"] - 28.90) <= 5e-3
    assert abs(r.variance_components.sigma_u - 84.20) <= 5e-3
    assert abs(r.variance_components.theta_mean - 0.8612) <= 5e-5


def test_period_effects_within_equals_statsmodels_two_way_dummies():
    # oracle: statsmodels OLS with firm and year dummies on an unbalanced Grunfeld sample
    d = grunfeld.load_pandas().data
    d = d[d["firm"] != "American Steel"].reset_index(drop=True)
    d = d[~((d["year"] > 1950) & (d["firm"].isin(["IBM", "Chrysler"])))].reset_index(drop=True)
    r = instruments(d, unit="firm", time="year", outcome="invest", regressors=["value", "capital"],
                    correlated=[], period_effects=True)
    ref = smf.ols("invest ~ value + capital + C(firm) + C(year)", data=d).fit()
    w = r.estimates.within.coef
    assert w["value"] == pytest.approx(ref.params["value"], abs=1e-8)
    assert w["capital"] == pytest.approx(ref.params["capital"], abs=1e-8)
    assert w["period=1940"] == pytest.approx(ref.params["C(year)[T.1940.0]"], abs=1e-7)
    assert "period=1935" not in w  # the first period is the base (contract.md)


def _hand_panel() -> pd.DataFrame:
    """A small invented panel whose problems are evident by construction: 60 units x 5 periods."""
    rng = np.random.default_rng(1)
    n, t = 60, 5
    unit = np.repeat(np.arange(n), t)
    period = np.tile(np.arange(2001, 2001 + t), n)
    a = rng.normal(size=n)
    x1 = a[unit] + rng.normal(size=n * t)
    x2 = rng.normal(size=n * t)
    z1 = rng.normal(size=n)[unit]
    soil = np.array(["loam"] * 30 + ["sand"] * 20 + ["clay"] * 10)[unit]  # loam most common: the base
    return pd.DataFrame({
        "unit": unit, "t": period,
        "y": x1 + x2 + z1 + rng.normal(size=n * t),
        "x1": x1, "x2": x2, "z1": z1,
        "x_sum": x1 + 2 * x2,                       # exact within dependency on x1, x2
        "z_copy": 3 * z1 + 1,                       # exact between dependency on const, z1
        "everywhere": np.full(n * t, 7.0),          # constant
        "price": (period - 2000) * 1.5,             # period-only
        "age": (period - 2001) + rng.integers(20, 60, size=n)[unit],  # grows by one each period
        "soil": soil,
    })


def test_not_identified_columns_are_named_with_their_reason():
    # common practice (check-values.md, facts of the trade) and methods.md sections 3-4
    d = _hand_panel()
    r = run(d, regressors=["x1", "x2", "x_sum", "z1", "z_copy", "everywhere", "price", "age"], correlated=[],
            period_effects=True)
    reasons = {item.column: item.reason for item in r.not_identified}
    assert reasons == {"x_sum": "collinear-within", "z_copy": "collinear-between", "everywhere": "constant",
                       "price": "period-only", "age": "absorbed-by-time"}
    x_sum = next(i for i in r.not_identified if i.column == "x_sum")
    assert sorted(x_sum.with_) == ["x1", "x2"]
    # methods.md section 4: exact in levels too, so every fit loses it; age only within units
    assert list(x_sum.fits) == ["within", "between", "random", "mundlak", "hausman_taylor"]
    age = next(i for i in r.not_identified if i.column == "age")
    assert list(age.fits) == ["within"] and "age" in r.estimates.random.coef
    assert sum(1 for f in r.findings if f.check == "not-identified") == 5
    assert "x1" in r.estimates.within.coef and "x_sum" not in r.estimates.within.coef


def test_collinear_column_left_out_does_not_change_the_others():
    # methods.md section 4: the remaining coefficients do not depend on the set-aside column
    d = _hand_panel()
    with_dup = run(d, regressors=["x1", "x2", "x_sum"], correlated=[])
    without = run(d, regressors=["x1", "x2"], correlated=[])
    assert with_dup.estimates.within.coef["x1"] == pytest.approx(without.estimates.within.coef["x1"],
                                                                       abs=1e-10)


def test_text_regressor_becomes_indicators_with_the_most_common_level_as_base():
    # hand-built: soil has 30 'loam', 20 'sand', 10 'clay' units
    r = run(_hand_panel(), regressors=["x1", "soil"], correlated=[])
    assert list(r.roles.z1) == ["soil=sand", "soil=clay"]
    assert "soil=loam" not in r.estimates.random.coef
    base = {c.column: c.base_level for c in r.columns}
    assert base["soil=sand"] == "loam"


def test_treat_as_invariant_replaces_a_few_changes():
    # hand-built: 3 units change their z1 in one period; the unit's most common value is the original
    d = _hand_panel()
    d.loc[[0, 7, 14], "z1"] += 10.0  # units 0, 1, 2, one period each
    r = run(d, regressors=["x1", "z1"], correlated=[])
    assert list(r.roles.x1) == ["x1", "z1"]  # nearly-time-invariant counts as X (methods.md section 4)
    assert "nearly-invariant-regressor" in checks(r)
    r2 = run(d, regressors=["x1", "z1"], correlated=[], treat_as_invariant=["z1"])
    assert list(r2.roles.z1) == ["z1"]
    note = next(f for f in r2.findings if f.check == "treated-as-invariant")
    assert note.count == 3
    clean = run(_hand_panel(), regressors=["x1", "z1"], correlated=[])
    assert r2.estimates.random.coef["z1"] == pytest.approx(clean.estimates.random.coef["z1"], rel=1e-10)


def test_without_declaration_x2_is_suggested_and_z2_must_be_declared():
    # methods.md section 4: Mundlak per-column t points at columns that behave like X2;
    # known truth of the simulated design: only x2 is correlated with u_i among the X; with
    # related=False z2 carries no information on the X1 unit components, so the Mundlak
    # evidence is not disturbed by z2's own correlation with u_i
    r = run(simulate(related=False), regressors=SIM_REGS)
    assert r.roles_declared is False
    assert list(r.roles.x2) == ["x2"] and list(r.roles.z2) == []
    assert "correlated-not-declared" in checks(r, "note")


def test_outcome_time_invariant_is_an_error_finding():
    # common practice: a within model cannot explain an outcome that never changes within a unit
    d = _hand_panel()
    d["y"] = d["z1"] * 2
    r = run(d, regressors=["x1", "x2"], correlated=[])
    assert "outcome-time-invariant" in checks(r, "error")
    assert r.estimates.within is None


def test_too_few_units_for_the_unit_level_parameters():
    # methods.md section 4: the between fit has 1 + g + kx parameters; 3 units cannot carry 4
    d = _hand_panel()
    d = d[d["unit"] < 3]
    r = run(d, regressors=["x1", "x2", "z1"], correlated=[])
    assert "too-few-units" in checks(r, "error")
    assert r.estimates.random is None and r.estimates.within is not None


def test_pandas_and_polars_input_give_the_same_document(sim_result):
    # property: the input's frame library changes nothing
    other = run(pl.from_pandas(simulate()), regressors=SIM_REGS, correlated=["x2", "z2"])
    a, b = sim_result.to_dict(), other.to_dict()
    a.pop("source")
    b.pop("source")
    assert a == b


def test_shuffled_rows_give_the_same_estimates(sim_result):
    # property: row order changes nothing
    d = simulate().sample(frac=1.0, random_state=3)
    r = run(d, regressors=SIM_REGS, correlated=["x2", "z2"])
    for name in ("within", "random", "hausman_taylor"):
        for k, v in getattr(sim_result.estimates, name).coef.items():
            assert getattr(r.estimates, name).coef[k] == pytest.approx(v, rel=1e-9, abs=1e-12)


def test_missing_values_drop_rows_with_a_note():
    # hand-built: 4 rows lose x1
    d = _hand_panel()
    d.loc[[3, 50, 51, 200], "x1"] = np.nan
    r = run(d, regressors=["x1", "x2"], correlated=[])
    assert r.sample.rows == 296 and r.sample.rows_dropped == 4
    assert next(f for f in r.findings if f.check == "rows-dropped").count == 4


# --------------------------------------------------------------------------- bad input


@pytest.fixture(scope="module")
def sim_csv(tmp_path_factory):
    path = tmp_path_factory.mktemp("sim") / "sim.csv"
    d = simulate(n=40)
    d["empty"] = np.nan
    d.to_csv(path, index=False)
    return path


@pytest.mark.parametrize(
    ("extra", "code", "words"),
    [
        (["--outcome", "nope", "--regressors", "x1a"], "instruments-unknown-outcome", "outcome column 'nope'"),
        (["--outcome", "y", "--regressors", "x1a,zz"], "instruments-unknown-regressor", "regressor 'zz'"),
        (["--outcome", "y", "--regressors", "x1a,y"], "instruments-regressor-is-outcome", "'y' is the outcome"),
        (["--outcome", "y", "--regressors", "x1a,empty"], "instruments-no-complete-rows", "no row has"),
        (["--outcome", "y", "--regressors", "x1a", "--correlated", "z9"], "instruments-not-a-regressor", "z9"),
    ],
)
def test_bad_input_exits_2_with_one_line(cli, sim_csv, extra, code, words):
    # contract.md: exit 2, one line on stderr beginning 'panel-audit: error:'
    res = cli("instruments", str(sim_csv), "--unit", "unit", "--time", "t", *extra)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("panel-audit: error:")
    assert words in lines[0]
    assert "Traceback" not in res.stderr


def test_one_unit_is_refused(cli, tmp_path):
    # hand-built: every row belongs to unit 0
    d = simulate(n=1)
    path = tmp_path / "one.csv"
    d.to_csv(path, index=False)
    res = cli("instruments", str(path), "--unit", "unit", "--time", "t", "--outcome", "y", "--regressors", "x1a")
    assert res.returncode == 2 and "only one unit" in res.stderr


def test_error_codes_raised_by_the_api():
    # the catalogue entries of the instruments section, raised in Python as AuditError
    d = _hand_panel()
    with pytest.raises(AuditError) as e:
        run(d, regressors=["x1", "x1"])
    assert e.value.code == "instruments-regressor-repeated"
    with pytest.raises(AuditError) as e:
        run(d, regressors=["x1", "unit"])
    assert e.value.code == "instruments-key-as-regressor"
    with pytest.raises(AuditError) as e:
        run(d, regressors=[])
    assert e.value.code == "instruments-no-regressors"
    d2 = d.assign(y=d["soil"])
    with pytest.raises(AuditError) as e:
        run(d2, regressors=["x1"])
    assert e.value.code == "instruments-outcome-not-numeric"


def test_cli_text_and_json(cli, sim_csv):
    # contract.md: --json prints the document only; text shows the strength table and coefficients
    args = ["instruments", str(sim_csv), "--unit", "unit", "--time", "t", "--outcome", "y",
            "--regressors", ",".join(SIM_REGS), "--correlated", "x2,z2"]
    res = cli(*args, "--json")
    assert res.returncode in (0, 1)
    doc = json.loads(res.stdout)
    assert doc["roles"]["Z2"] == ["z2"]
    text = cli(*args)
    assert "Hausman-Taylor" in text.stdout and "Stock-Yogo" in text.stdout
    assert "19.93" in text.stdout  # Stock-Yogo cell for 2 instruments (check-values.md)


def test_an_x1_column_correlated_with_the_effect_is_caught_by_the_c_test():
    # known truth: x1b gets 1.5 times the unit part of x2 (0.8 u_i + noise) added, but is declared
    # exogenous; a third exogenous x1c keeps the model over-identified after any one mean is
    # dropped. The Sargan test rejects; only dropping x1b's mean makes the rest pass, and its
    # difference-in-Sargan test (Hayashi 2000, section 3.6) rejects, so x1b alone is marked
    rng = np.random.default_rng(12)
    d = simulate(seed=12, n=600)
    u_proxy = d.groupby("unit")["x2"].transform("mean")
    d["x1b"] = d["x1b"] + 1.5 * u_proxy + rng.normal(scale=0.01, size=len(d))
    c_unit = rng.normal(size=600)[d["unit"].to_numpy()]
    d["x1c"] = c_unit + rng.normal(size=len(d))
    d["z2"] = d["z2"] + 0.7 * c_unit
    d["y"] = d["y"] + 0.3 * 1.5 * u_proxy + 0.2 * d["x1c"] + 0.7 * c_unit
    r = run(d, regressors=["x1a", "x1b", "x1c", "x2", "z1", "z2"], correlated=["x2", "z2"])
    assert "overidentification-rejected" in checks(r)
    invalid = [f.column for f in r.findings if f.check == "invalid-instrument"]
    assert invalid == ["x1b"]
    usable = {c.instrument: c.usable for c in r.candidates}
    assert usable == {"x1a": True, "x1b": False, "x1c": True}


def test_x2_with_little_within_variation_is_flagged():
    # hand-built: x2's within share is far below the 5% threshold of rules/defaults.yaml
    d = simulate(seed=5)
    unit_part = d.groupby("unit")["x2"].transform("mean")
    d["x2"] = 10 * unit_part + 0.05 * (d["x2"] - unit_part)
    r = run(d, regressors=SIM_REGS, correlated=["x2", "z2"])
    share = r.x2_strength[0].within_share
    assert share < 0.05
    assert [f.column for f in r.findings if f.check == "weak-within-variation"] == ["x2"]


def test_with_one_overidentifying_restriction_the_sargan_test_decides_usability(sim_result):
    # Hausman and Taylor (1981): k1 - g2 = 1 over-identifying restriction; leaving one mean out
    # would just identify the model, so no per-column C test exists (Hayashi 2000, section 3.6)
    # and the Mundlak p, disturbed by the correlated z2, is shown but does not decide
    bases = {c.instrument: c.usable_basis for c in sim_result.candidates}
    assert all(b.startswith("sargan") for b in bases.values())
    assert all(c.c_p is None for c in sim_result.candidates)
    sargan_accepts = sim_result.tests.overidentification.p >= 0.05
    assert all(c.usable for c in sim_result.candidates) or not sargan_accepts


def test_attrition_test_with_a_rounding_level_standard_error_is_not_reported():
    # A small panel (found by tests/test_fuzz_commands.py) where s_i,t+1 varies within units
    # only where the within residuals are zero: the unit-clustered scores vanish in exact
    # arithmetic, so the clustered se is rounding (about 1e-16 of the coefficient) and t was
    # ~2e15, a different ~1e15 after reordering the rows. The test has no information there:
    # tests.attrition is null, whatever the row order.
    frame = pl.read_csv(DATA / "attrition_rounding_se.csv",
                        schema_overrides={"plot": pl.String})
    kw = dict(unit="plot", time="wave", outcome="y", regressors=["x1", "x2", "z"], correlated=["x2"])
    assert instruments(frame, **kw).to_dict()["tests"]["attrition"] is None
    shuffled = frame[np.random.default_rng(0).permutation(frame.height)]
    assert instruments(shuffled, **kw).to_dict()["tests"]["attrition"] is None


def _within_and_ht_by_hand(d: pd.DataFrame):
    """Within and Hausman-Taylor written out from methods.md section 4 with pandas, numpy and
    statsmodels' IV2SLS (the oracle): X1 = x1a, x1b; X2 = x2; Z1 = 1, z1; Z2 = z2."""
    from statsmodels.sandbox.regression.gmm import IV2SLS

    xs, cols = ["x1a", "x1b", "x2"], ["y", "x1a", "x1b", "x2", "z1", "z2"]
    g = d.groupby("unit")
    mean = g[cols].transform("mean")
    dev = d[cols] - mean
    xw, yw = dev[xs].to_numpy(), dev["y"].to_numpy()
    b_w, *_ = np.linalg.lstsq(xw, yw, rcond=None)
    n, nobs = d["unit"].nunique(), len(d)
    e = yw - xw @ b_w
    s2_e = float(e @ e) / (nobs - n - len(xs))  # step 1: N - n - K_X
    v_w = s2_e * np.linalg.inv(xw.T @ xw)
    # step 2: unit-level 2SLS of d_i = y_bar_i - X_bar_i b_W on [1, z1, z2], instruments [1, z1, X1 means]
    um = g[cols].mean()
    di = um["y"] - um[xs].to_numpy() @ b_w
    zi = pd.DataFrame({"one": 1.0, "z1": um["z1"], "z2": um["z2"]})
    step2 = IV2SLS(di, zi, pd.DataFrame({"one": 1.0, "z1": um["z1"], "ma": um["x1a"], "mb": um["x1b"]})).fit()
    r = di - zi.to_numpy() @ step2.params.to_numpy()
    t_i = g.size()
    s2_u = max(0.0, float(np.mean(r**2)) - s2_e * float(np.mean(1.0 / t_i)))
    theta = 1.0 - np.sqrt(s2_e / (s2_e + t_i * s2_u))  # step 3
    th = theta[d["unit"]].to_numpy()
    star = d[cols] - th[:, None] * mean
    star["const"] = 1.0 - th
    instr = pd.DataFrame({"wa": dev["x1a"], "wb": dev["x1b"], "w2": dev["x2"], "ma": mean["x1a"],
                          "mb": mean["x1b"], "one": 1.0, "z1": d["z1"]})
    ht = IV2SLS(star["y"], star[[*xs, "const", "z1", "z2"]], instr).fit()  # step 4
    b_ht = ht.params.to_numpy()[:3]
    bread = np.asarray(ht.normalized_cov_params)[:3, :3]
    return b_w, v_w, b_ht, bread, s2_e


@pytest.mark.parametrize("seed", [3, 11])
def test_within_vs_ht_contrast_equals_the_contrast_written_out(seed):
    # oracle: the within and Hausman-Taylor fits computed by hand (above), and the contrast
    # H = d' (V_W - V_HT)^+ d with numpy's pseudo-inverse, V_HT at the within sigma2_e (methods.md
    # section 4: the efficient fit's covariance at the consistent fit's residual variance);
    # df = k1 - g2 = 1 (Hausman and Taylor 1981). A planted swap of this test for the Sargan
    # statistic (an equally sized, equally powerful statistic) survived every other test.
    d = simulate(seed=seed, n=300, periods=5)
    res = run(d, regressors=SIM_REGS, correlated=["x2", "z2"])
    b_w, v_w, b_ht, bread, s2_e = _within_and_ht_by_hand(d)
    diff = v_w - s2_e * bread
    vals = np.linalg.eigvalsh((diff + diff.T) / 2)
    dvec = b_w - b_ht
    h = float(dvec @ np.linalg.pinv(diff, rcond=1e-8, hermitian=True) @ dvec)
    got = res.tests.hausman_within_ht
    assert int(np.sum(vals > 1e-8 * vals.max())) == 1 == got.df
    assert got.statistic == pytest.approx(h, rel=1e-5)
    assert got.statistic != pytest.approx(res.tests.overidentification.statistic, rel=1e-3)
