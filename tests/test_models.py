"""The diagnostic estimators against Baltagi's Table 2.1, statsmodels oracles and published properties."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from statsmodels.datasets import grunfeld

from auditor.stats import models


@pytest.fixture(scope="module")
def grunfeld10() -> pd.DataFrame:
    # statsmodels' Grunfeld copy; the textbook sample drops firm "American Steel" (check-values.md)
    d = grunfeld.load_pandas().data
    d = d[d["firm"] != "American Steel"].reset_index(drop=True)
    assert len(d) == 200
    return d


def _arrays(d: pd.DataFrame, x=("value", "capital"), z=()) -> models.PanelArrays:
    return models.PanelArrays.build(
        d["firm"].to_numpy(), d["invest"].to_numpy(), d[list(x)].to_numpy(), list(x),
        d[list(z)].to_numpy() if z else None, list(z),
    )


def _unbalanced(d: pd.DataFrame) -> pd.DataFrame:
    # drop a deterministic, uneven set of rows: firm-dependent numbers of years
    codes = d["firm"].astype("category").cat.codes.to_numpy()
    year = d["year"].to_numpy().astype(int)
    keep = (year - 1935) < 20 - codes  # firm k keeps 20 - k years
    return d[keep].reset_index(drop=True)


def test_within_matches_baltagi_table_2_1(grunfeld10):
    # Baltagi, Econometric Analysis of Panel Data, Table 2.1 (values from memory, check-values.md)
    fit, _ = models.within(_arrays(grunfeld10))
    assert fit.coef == pytest.approx([0.1101, 0.3101], abs=5e-5)
    assert fit.se == pytest.approx([0.0119, 0.0174], abs=5e-5)
    assert np.sqrt(fit.sigma2) == pytest.approx(52.77, abs=5e-3)


def test_swamy_arora_matches_baltagi_table_2_1(grunfeld10):
    # Baltagi, Table 2.1, random effects Swamy-Arora (values from memory, check-values.md)
    fit, comp = models.random_effects(_arrays(grunfeld10))
    i = fit.index(["value", "capital", "const"])
    half_digit = np.array([5e-5, 5e-5, 5e-3])  # half a unit in the table's last printed digit
    assert np.all(np.abs(fit.coef[i] - [0.1098, 0.3081, -57.83]) <= half_digit)
    assert np.all(np.abs(fit.se[i] - [0.0105, 0.0172, 28.90]) <= half_digit)
    d = comp.to_dict()
    assert d["sigma_u"] == pytest.approx(84.20, abs=5e-3)
    assert d["sigma_e"] == pytest.approx(52.77, abs=5e-3)
    assert d["theta_mean"] == pytest.approx(0.8612, abs=5e-5)


@pytest.mark.parametrize("balanced", [True, False])
def test_within_equals_least_squares_with_unit_dummies(grunfeld10, balanced):
    # oracle: statsmodels OLS with one dummy per firm (the within estimator written as dummies)
    d = grunfeld10 if balanced else _unbalanced(grunfeld10)
    assert balanced or d.groupby("firm").size().nunique() > 1
    ref = smf.ols("invest ~ value + capital + C(firm)", data=d).fit()
    fit, _ = models.within(_arrays(d))
    np.testing.assert_allclose(fit.coef, ref.params[["value", "capital"]].to_numpy(), rtol=0, atol=1e-8)
    np.testing.assert_allclose(fit.se, ref.bse[["value", "capital"]].to_numpy(), rtol=1e-8)
    assert fit.sigma2 == pytest.approx(ref.scale, rel=1e-10)


def test_within_clustered_se_matches_statsmodels_cluster_on_demeaned_data(grunfeld10):
    # oracle: statsmodels cluster-robust covariance (groups = firm) on the demeaned regression,
    # with our stated small-sample factor G/(G-1) * (N-1)/(N-K) (statsmodels' default correction)
    d = _unbalanced(grunfeld10)
    cols = ["invest", "value", "capital"]
    dm = d[cols] - d.groupby("firm")[cols].transform("mean")
    codes = d["firm"].astype("category").cat.codes.to_numpy()
    ref = sm.OLS(dm["invest"], dm[["value", "capital"]]).fit(cov_type="cluster", cov_kwds={"groups": codes})
    fit, _ = models.within(_arrays(d))
    np.testing.assert_allclose(fit.se_cluster, ref.bse.to_numpy(), rtol=1e-8)


def test_between_equals_ols_on_unit_means(grunfeld10):
    # oracle: statsmodels OLS on the firm means computed by pandas
    d = _unbalanced(grunfeld10)
    means = d.groupby("firm")[["invest", "value", "capital"]].mean()
    ref = sm.OLS(means["invest"], sm.add_constant(means[["value", "capital"]])).fit()
    fit, _ = models.between(_arrays(d))
    np.testing.assert_allclose(fit.coef, ref.params.to_numpy(), rtol=1e-8)
    np.testing.assert_allclose(fit.se, ref.bse.to_numpy(), rtol=1e-8)


@pytest.mark.parametrize("balanced", [True, False])
def test_mundlak_x_coefficients_equal_within(grunfeld10, balanced):
    # Mundlak (1978), Econometrica 46(1): the X coefficients of OLS on [1, X, X means] are the within ones
    d = grunfeld10 if balanced else _unbalanced(grunfeld10)
    pa = _arrays(d)
    mu = models.mundlak(pa)
    wf, _ = models.within(pa)
    np.testing.assert_allclose(mu.fit.coef[mu.fit.index(["value", "capital"])], wf.coef, rtol=0, atol=1e-8)


def test_mundlak_matches_statsmodels_pooled_ols_clustered(grunfeld10):
    # oracle: statsmodels OLS of invest on value, capital and pandas firm means, clustered by firm;
    # joint Wald of the two mean coefficients as statsmodels' wald_test (chi-square form)
    d = _unbalanced(grunfeld10).copy()
    d["m_value"] = d.groupby("firm")["value"].transform("mean")
    d["m_capital"] = d.groupby("firm")["capital"].transform("mean")
    codes = d["firm"].astype("category").cat.codes.to_numpy()
    ref = sm.OLS(d["invest"], sm.add_constant(d[["value", "capital", "m_value", "m_capital"]])).fit(
        cov_type="cluster", cov_kwds={"groups": codes}
    )
    w = ref.wald_test("m_value = 0, m_capital = 0", use_f=False, scalar=True)
    mu = models.mundlak(_arrays(d))
    assert mu.joint.statistic == pytest.approx(float(w.statistic), rel=1e-8)
    assert mu.per_column[1]["t"] == pytest.approx(ref.tvalues["m_capital"], rel=1e-8)


def test_hausman_within_random_equals_direct_formula(grunfeld10):
    # oracle: the Hausman (1978) statistic written out with the statsmodels dummy-OLS within fit
    # and the Baltagi-checked random-effects covariance, d'(V_W - V_RE)^-1 d, chi-square(2); the
    # random-effects covariance is rescaled to the within fit's sigma2_e (the README's convention,
    # common practice: then V_W - V_RE is positive semi-definite)
    from scipy import stats

    pa = _arrays(grunfeld10)
    ref = smf.ols("invest ~ value + capital + C(firm)", data=grunfeld10).fit()
    bw = ref.params[["value", "capital"]].to_numpy()
    vw = ref.cov_params().loc[["value", "capital"], ["value", "capital"]].to_numpy()
    re, _ = models.random_effects(pa)
    i = re.index(["value", "capital"])
    dvec = bw - re.coef[i]
    v_re = re.cov[np.ix_(i, i)] * ref.scale / re.sigma2
    h = float(dvec @ np.linalg.solve(vw - v_re, dvec))
    test = models.hausman_within_random(models.within(pa)[0], re)
    assert test.statistic == pytest.approx(h, rel=1e-6)
    assert test.p == pytest.approx(stats.chi2.sf(h, 2), rel=1e-6)
    assert test.df == 2 and test.positive_definite is True
    assert np.all(np.linalg.eigvalsh(vw - v_re) > 0)


def test_contrast_reports_a_matrix_that_is_not_positive_definite():
    # common practice: a negative eigenvalue in V_cons - V_eff is reported, and the statistic
    # uses the positive directions only; here V_cons - V_eff = diag(1, -1), d = (2, 5): H = 4, df 1
    t = models.contrast(np.zeros(2), np.diag([1.0, 3.0]), np.array([2.0, 5.0]), np.diag([2.0, 2.0]))
    assert t.positive_definite is False
    assert t.df == 1
    assert t.statistic == pytest.approx(4.0)
    assert "not positive definite" in t.note


# --------------------------------------------------------------------------- Hausman-Taylor


def simulate(seed: int = 7, n: int = 400, periods: int = 6, related: bool = True) -> pd.DataFrame:
    """A known-truth Hausman-Taylor design (invented numbers).

    u_i the unit effect; x1a, x1b exogenous time-varying with unit components a_i, b_i;
    x2 time-varying and correlated with u_i; z1 exogenous time-invariant; z2
    time-invariant, correlated with u_i and (when ``related``) with a_i and b_i.
    """
    rng = np.random.default_rng(seed)
    u = rng.normal(size=n)
    a = rng.normal(size=n)
    b = rng.normal(size=n)
    z1 = rng.normal(size=n)
    z2 = (0.9 * a + 0.6 * b if related else 0.0) + 0.8 * u + rng.normal(scale=0.5, size=n)
    unit = np.repeat(np.arange(n), periods)
    rows = n * periods
    x1a = a[unit] + rng.normal(size=rows)
    x1b = b[unit] + rng.normal(size=rows)
    x2 = 0.8 * u[unit] + rng.normal(size=rows)
    y = (1.0 + 0.5 * x1a + 0.3 * x1b + 0.7 * x2 + 0.4 * z1[unit] + 1.0 * z2[unit]
         + u[unit] + rng.normal(size=rows))
    return pd.DataFrame({"unit": unit, "t": np.tile(np.arange(periods), n), "y": y, "x1a": x1a,
                         "x1b": x1b, "x2": x2, "z1": z1[unit], "z2": z2[unit]})


def _sim_arrays(d: pd.DataFrame, x=("x1a", "x1b", "x2"), z=("z1", "z2")) -> models.PanelArrays:
    return models.PanelArrays.build(d["unit"].to_numpy(), d["y"].to_numpy(), d[list(x)].to_numpy(), list(x),
                                    d[list(z)].to_numpy(), list(z))


def test_just_identified_ht_equals_within():
    # Hausman and Taylor (1981), Econometrica 49(6): with k1 = g2 the time-varying coefficients
    # equal the within estimator's
    d = simulate()
    pa = _sim_arrays(d)
    ht = models.hausman_taylor(pa, ["x1a"], ["x1b", "x2"], ["z1"], ["z2"])
    wf, _ = models.within(pa.select(["x1a", "x1b", "x2"], []))
    np.testing.assert_allclose(ht.fit.coef[:3], wf.coef, rtol=0, atol=1e-8)
    assert ht.sargan is None and ht.hausman_within is None


def test_ht_recovers_z2_while_random_effects_is_biased():
    # known truth of the simulated design: z2 coefficient 1.0; z2 is correlated with u_i, so random
    # effects is biased upwards (common practice), while Hausman-Taylor is consistent
    d = simulate()
    pa = _sim_arrays(d)
    ht = models.hausman_taylor(pa, ["x1a", "x1b"], ["x2"], ["z1"], ["z2"])
    j = ht.fit.index(["z2"])[0]
    assert abs(ht.fit.coef[j] - 1.0) < 3 * ht.fit.se[j]
    re, _ = models.random_effects(pa)
    jr = re.index(["z2"])[0]
    assert abs(re.coef[jr] - 1.0) > 5 * re.se[jr]
    # over-identified (k1 = 2 > g2 = 1): both over-identification statistics, df 1, valid instruments
    assert ht.sargan.df == 1 and ht.hausman_within.df == 1
    assert ht.sargan.p > 0.01


def test_ht_matches_statsmodels_iv2sls_on_the_transformed_data():
    # oracle: statsmodels IV2SLS (sandbox) applied to the quasi-demeaned data built with pandas from
    # our reported theta; the 2SLS step of methods.md section 4 step 4
    from statsmodels.sandbox.regression.gmm import IV2SLS

    d = simulate(seed=3)
    pa = _sim_arrays(d)
    ht = models.hausman_taylor(pa, ["x1a", "x1b"], ["x2"], ["z1"], ["z2"])
    th = pd.Series(ht.components.theta)[d["unit"]].to_numpy()
    g = d.groupby("unit")
    cols = ["y", "x1a", "x1b", "x2", "z1", "z2"]
    mean = g[cols].transform("mean")
    star = d[cols] - th[:, None] * mean
    star["const"] = 1 - th
    instr = pd.DataFrame({"wa": d["x1a"] - mean["x1a"], "wb": d["x1b"] - mean["x1b"],
                          "w2": d["x2"] - mean["x2"], "ma": mean["x1a"], "mb": mean["x1b"],
                          "one": 1.0, "z1": d["z1"]})
    ref = IV2SLS(star["y"], star[["x1a", "x1b", "x2", "const", "z1", "z2"]], instr).fit()
    np.testing.assert_allclose(ht.fit.coef, ref.params.to_numpy(), rtol=1e-8)


def test_ht_returns_none_when_order_condition_fails():
    # Hausman and Taylor (1981): order condition k1 >= g2; here k1 = 0 < g2 = 1
    pa = _sim_arrays(simulate())
    assert models.hausman_taylor(pa, [], ["x1a", "x1b", "x2"], ["z1"], ["z2"]) is None


def test_unit_means_match_pandas_groupby():
    # oracle: pandas groupby mean
    d = simulate(n=50)
    pa = _sim_arrays(d)
    ref = d.groupby("unit")[["x1a", "x1b", "x2"]].mean().to_numpy()
    np.testing.assert_allclose(pa.xbar, ref, rtol=1e-12)


def test_difference_in_sargan_matches_statsmodels_iv2sls_fits():
    # oracle: C = (e'P_A e - e_r'P_Ar e_r) / (e'e / N) (Hayashi 2000, section 3.6) with both 2SLS
    # fits by statsmodels IV2SLS on the quasi-demeaned data, and e'P e from statsmodels OLS of the
    # residuals on the instruments (uncentred explained sum of squares)
    from statsmodels.sandbox.regression.gmm import IV2SLS

    d = simulate(seed=8)
    pa = _sim_arrays(d)
    # no Z2, so dropping one of the two X1 means leaves the model over-identified
    ht = models.hausman_taylor(pa, ["x1a", "x1b"], ["x2"], ["z1", "z2"], [])
    th = pd.Series(ht.components.theta)[d["unit"]].to_numpy()
    mean = d.groupby("unit")[["y", "x1a", "x1b", "x2", "z1", "z2"]].transform("mean")
    cols = ["x1a", "x1b", "x2", "z1", "z2"]
    star = d[cols] - th[:, None] * mean[cols]
    star.insert(3, "const", 1 - th)
    ystar = d["y"] - th * mean["y"]
    a = pd.DataFrame({"wa": d["x1a"] - mean["x1a"], "wb": d["x1b"] - mean["x1b"], "w2": d["x2"] - mean["x2"],
                      "ma": mean["x1a"], "mb": mean["x1b"], "one": 1.0, "z1": d["z1"], "z2": d["z2"]})

    def epe(instr):
        fit = IV2SLS(ystar, star, instr).fit()
        e = ystar - star @ fit.params.to_numpy()
        return float(sm.OLS(e, instr).fit().fittedvalues.pow(2).sum()), float(e @ e)

    full, ee = epe(a)
    restricted, _ = epe(a.drop(columns=["ma"]))
    c = (full - restricted) / (ee / len(d))
    assert ht.c_tests["x1a"].statistic == pytest.approx(c, rel=1e-6)
    assert ht.sargan.statistic == pytest.approx(len(d) * full / ee, rel=1e-8)


def test_mundlak_classical_se_matches_statsmodels_pooled_ols(grunfeld10):
    # oracle: statsmodels OLS (non-robust) of invest on [1, value, capital, firm means]
    d = _unbalanced(grunfeld10).copy()
    d["m_value"] = d.groupby("firm")["value"].transform("mean")
    d["m_capital"] = d.groupby("firm")["capital"].transform("mean")
    ref = sm.OLS(d["invest"], sm.add_constant(d[["value", "capital", "m_value", "m_capital"]])).fit()
    mu = models.mundlak(_arrays(d))
    np.testing.assert_allclose(mu.fit.coef, ref.params.to_numpy(), rtol=1e-8)
    np.testing.assert_allclose(mu.fit.se, ref.bse.to_numpy(), rtol=1e-8)


def test_mundlak_with_a_mean_left_out_matches_statsmodels(grunfeld10):
    # oracle: statsmodels OLS clustered by firm of invest on [1, value, capital, year dummies,
    # firm means of value and capital]; in a balanced panel the firm means of the year dummies are
    # all 1/20, collinear with the constant, so they are left out (common practice)
    d = grunfeld10.copy()
    years = sorted(d["year"].unique())[1:]
    names = []
    for y in years:
        name = f"period={int(y)}"
        d[name] = (d["year"] == y).astype(float)
        names.append(name)
    d["m_value"] = d.groupby("firm")["value"].transform("mean")
    d["m_capital"] = d.groupby("firm")["capital"].transform("mean")
    codes = d["firm"].astype("category").cat.codes.to_numpy()
    exog = sm.add_constant(d[["value", "capital", *names, "m_value", "m_capital"]])
    ref = sm.OLS(d["invest"], exog).fit(cov_type="cluster", cov_kwds={"groups": codes})
    pa = _arrays(d, x=("value", "capital", *names))
    mu = models.mundlak(pa, mean_columns=["value", "capital"])
    np.testing.assert_allclose(mu.fit.coef, ref.params.to_numpy(), rtol=1e-7, atol=1e-8)
    np.testing.assert_allclose(mu.fit.se_cluster, ref.bse.to_numpy(), rtol=1e-7)
