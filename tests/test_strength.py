"""First-stage strength statistics against statsmodels and the Stock-Yogo table in check-values.md."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import statsmodels.api as sm
from statsmodels.sandbox.regression.gmm import IV2SLS
from test_models import _sim_arrays, simulate

from auditor.stats import models, strength


@pytest.fixture(scope="module")
def unit_level():
    d = simulate(seed=11)
    pa = _sim_arrays(d)
    included = np.column_stack([np.ones(pa.n), pa.zbar[:, [0]]])  # [1, z1]
    excluded = pa.xbar[:, [0, 1]]  # means of x1a, x1b
    return pa, included, excluded


def test_partial_f_equals_statsmodels_f_test(unit_level):
    # oracle: statsmodels OLS f_test of the two excluded coefficients on the unit-level regression
    pa, inc, exc = unit_level
    z2 = pa.zbar[:, 1]
    ref = sm.OLS(z2, np.column_stack([inc, exc])).fit()
    r = np.zeros((2, 4))
    r[0, 2] = r[1, 3] = 1
    fs = strength.first_stage(z2, inc, exc)
    assert fs.partial_f == pytest.approx(float(ref.f_test(r).fvalue), rel=1e-8)
    assert fs.df == (2, pa.n - 4)


def test_robust_f_equals_statsmodels_hc1_wald(unit_level):
    # oracle: statsmodels OLS with cov_type="HC1", Wald (chi-square form) of the excluded coefficients / 2
    pa, inc, exc = unit_level
    z2 = pa.zbar[:, 1]
    ref = sm.OLS(z2, np.column_stack([inc, exc])).fit(cov_type="HC1")
    r = np.zeros((2, 4))
    r[0, 2] = r[1, 3] = 1
    w = ref.wald_test(r, use_f=False, scalar=True)
    assert strength.first_stage(z2, inc, exc).robust_f == pytest.approx(float(w.statistic) / 2, rel=1e-8)


def test_partial_r2_equals_restricted_and_unrestricted_statsmodels_fits(unit_level):
    # oracle: 1 - RSS_u / RSS_r from two statsmodels OLS fits (methods.md section 5)
    pa, inc, exc = unit_level
    z2 = pa.zbar[:, 1]
    rss_u = sm.OLS(z2, np.column_stack([inc, exc])).fit().ssr
    rss_r = sm.OLS(z2, inc).fit().ssr
    assert strength.first_stage(z2, inc, exc).partial_r2 == pytest.approx(1 - rss_u / rss_r, rel=1e-8)


@pytest.mark.parametrize(
    ("endog", "instruments", "size", "value"),
    # Stock and Yogo (2005), Table 5.2, as recorded in check-values.md (values from memory)
    [(1, 1, 10, 16.38), (1, 2, 10, 19.93), (1, 3, 15, 12.83), (1, 10, 25, 11.65), (2, 2, 10, 7.03),
     (2, 5, 20, 8.38)],
)
def test_stock_yogo_cells_match_check_values(endog, instruments, size, value):
    assert strength.stock_yogo(endog, instruments, size) == value


def test_stock_yogo_has_no_cell_beyond_the_table():
    # check-values.md lists 1..10 instruments for one endogenous regressor only
    assert strength.stock_yogo(1, 11) is None
    assert strength.stock_yogo(3, 4) is None


def test_cragg_donald_with_one_endogenous_equals_partial_f(unit_level):
    # Stock and Yogo (2005): with one endogenous regressor the Cragg-Donald statistic is the
    # first-stage F; oracle statsmodels f_test
    pa, inc, exc = unit_level
    z2 = pa.zbar[:, 1]
    ref = sm.OLS(z2, np.column_stack([inc, exc])).fit()
    r = np.zeros((2, 4))
    r[0, 2] = r[1, 3] = 1
    assert strength.cragg_donald(z2[:, None], inc, exc) == pytest.approx(float(ref.f_test(r).fvalue), rel=1e-8)


def test_cragg_donald_two_endogenous_equals_generalised_eigenvalue():
    # oracle: the smallest generalised eigenvalue of (Y' P Y, S) / k from scipy.linalg.eigh, with Y
    # and S built from statsmodels OLS residuals (Cragg and Donald 1993; Stock and Yogo 2005, eq. 2.3)
    rng = np.random.default_rng(5)
    n = 300
    inc = np.column_stack([np.ones(n), rng.normal(size=n)])
    exc = rng.normal(size=(n, 3))
    y = np.column_stack([exc @ [0.5, 0.2, 0.0] + rng.normal(size=n), exc @ [0.0, 0.3, 0.4] + rng.normal(size=n)])
    ymw = np.column_stack([sm.OLS(y[:, j], inc).fit().resid for j in range(2)])
    fit_u = [sm.OLS(y[:, j], np.column_stack([inc, exc])).fit() for j in range(2)]
    resid = np.column_stack([f.resid for f in fit_u])
    s = resid.T @ resid / (n - 2 - 3)
    explained = ymw.T @ ymw - resid.T @ resid
    ref = scipy.linalg.eigh(explained, s, eigvals_only=True).min() / 3
    assert strength.cragg_donald(y, inc, exc) == pytest.approx(ref, rel=1e-8)


def test_sanderson_windmeijer_equals_statsmodels_iv2sls_construction():
    # oracle: Sanderson and Windmeijer (2016): 2SLS of y1 on [y2, included] with statsmodels IV2SLS,
    # then the statsmodels f_test of the instruments in OLS of its residual on [included, excluded],
    # rescaled from k to k - p + 1 numerator degrees of freedom
    rng = np.random.default_rng(9)
    n = 300
    inc = np.column_stack([np.ones(n), rng.normal(size=n)])
    exc = rng.normal(size=(n, 3))
    y = np.column_stack([exc @ [0.5, 0.2, 0.1] + rng.normal(size=n), exc @ [0.1, 0.3, 0.4] + rng.normal(size=n)])
    sw = strength.sanderson_windmeijer(y, inc, exc)
    full = np.column_stack([inc, exc])
    r = np.zeros((3, 5))
    r[0, 2] = r[1, 3] = r[2, 4] = 1
    for j in range(2):
        iv = IV2SLS(y[:, j], np.column_stack([y[:, 1 - j], inc]), full).fit()
        eps = y[:, j] - np.column_stack([y[:, 1 - j], inc]) @ iv.params
        f = float(sm.OLS(eps, full).fit().f_test(r).fvalue)
        assert sw[j] == pytest.approx(f * 3 / 2, rel=1e-7)


def test_sanderson_windmeijer_with_one_endogenous_equals_partial_f(unit_level):
    # Sanderson and Windmeijer (2016): with one endogenous regressor the conditional F is the
    # first-stage F; oracle statsmodels f_test
    pa, inc, exc = unit_level
    z2 = pa.zbar[:, 1]
    ref = sm.OLS(z2, np.column_stack([inc, exc])).fit()
    r = np.zeros((2, 4))
    r[0, 2] = r[1, 3] = 1
    assert strength.sanderson_windmeijer(z2[:, None], inc, exc)[0] == pytest.approx(
        float(ref.f_test(r).fvalue), rel=1e-8
    )


def test_related_design_is_strong_and_unrelated_design_is_weak():
    # known truth of the simulated design: z2 loads on the unit components of x1a, x1b (strong) or
    # not at all (weak); Stock-Yogo 10% cell for 2 instruments is 19.93 (check-values.md)
    rows, _ = strength.z2_strength(_sim_arrays(simulate(related=True)), ["x1a", "x1b"], ["z1"], ["z2"])
    assert rows[0]["verdict"] == "strong" and rows[0]["critical_value"] == 19.93
    rows, _ = strength.z2_strength(_sim_arrays(simulate(related=False)), ["x1a", "x1b"], ["z1"], ["z2"])
    assert rows[0]["verdict"] == "weak"
    assert rows[0]["partial_f"] < 19.93


def test_candidate_single_f_equals_statsmodels_and_flagged_candidate_is_left_out():
    # oracle: statsmodels f_test of the single excluded mean; a candidate whose Mundlak p is below
    # alpha is unusable and never part of the suggestion (methods.md section 5)
    d = simulate(seed=4)
    pa = _sim_arrays(d)
    rows, sugg = strength.candidates(pa, ["x1a", "x1b"], ["z1"], ["z2"], {"x1a": 0.5, "x1b": 0.001}, alpha=0.05)
    inc = np.column_stack([np.ones(pa.n), pa.zbar[:, 0]])
    ref = sm.OLS(pa.zbar[:, 1], np.column_stack([inc, pa.xbar[:, [0]]])).fit()
    assert rows[0]["partial_f"] == pytest.approx(float(ref.f_test(np.array([[0, 0, 1.0]])).fvalue), rel=1e-8)
    assert [r["usable"] for r in rows] == [True, False]
    assert sugg[0]["instruments"] == ["x1a"]


def test_suggestion_is_the_set_with_the_largest_f_relative_to_its_critical_value():
    # oracle: statsmodels f_test for each usable subset, divided by its Stock-Yogo 10% cell from
    # check-values.md (16.38 for one instrument, 19.93 for two); the suggestion maximises that ratio
    d = simulate(seed=4)
    pa = _sim_arrays(d)
    _, sugg = strength.candidates(pa, ["x1a", "x1b"], ["z1"], ["z2"], {"x1a": 0.5, "x1b": 0.5}, alpha=0.05)
    inc = np.column_stack([np.ones(pa.n), pa.zbar[:, 0]])
    ratios = {}
    for cols, crit in ((("x1a",), 16.38), (("x1b",), 16.38), (("x1a", "x1b"), 19.93)):
        idx = [["x1a", "x1b"].index(c) for c in cols]
        ref = sm.OLS(pa.zbar[:, 1], np.column_stack([inc, pa.xbar[:, idx]])).fit()
        r = np.zeros((len(idx), 2 + len(idx)))
        r[np.arange(len(idx)), 2 + np.arange(len(idx))] = 1
        ratios[cols] = (float(ref.f_test(r).fvalue), crit)
    best = max(ratios, key=lambda c: ratios[c][0] / ratios[c][1])
    assert tuple(sugg[0]["instruments"]) == best
    assert sugg[0]["partial_f"] == pytest.approx(ratios[best][0], rel=1e-8)


def test_x2_first_stage_own_f_matches_statsmodels_ols():
    # oracle: statsmodels OLS of the quasi-demeaned x2 on A (classical t of its own within deviation,
    # squared, and R2); the clustered F of the other instruments from statsmodels' cluster Wald
    d = simulate(seed=2)
    pa = _sim_arrays(d)
    ht = models.hausman_taylor(pa, ["x1a", "x1b"], ["x2"], ["z1"], ["z2"])
    theta = ht.components.theta
    out = strength.x2_first_stage(pa, ["x1a", "x1b", "x2"], ["x2"], ["z1"], theta, ["x1a", "x1b"])
    g = d.groupby("unit")
    mean = g[["x1a", "x1b", "x2"]].transform("mean")
    th = theta[d["unit"].to_numpy()]
    target = d["x2"] - th * mean["x2"]
    a = np.column_stack([d["x1a"] - mean["x1a"], d["x1b"] - mean["x1b"], d["x2"] - mean["x2"],
                         mean["x1a"], mean["x1b"], np.ones(len(d)), d["z1"]])
    ref = sm.OLS(target.to_numpy(), a).fit()
    assert out[0]["own_f"] == pytest.approx(float(ref.tvalues[2]) ** 2, rel=1e-8)
    assert out[0]["r2"] == pytest.approx(ref.rsquared, rel=1e-8)
    refc = sm.OLS(target.to_numpy(), a).fit(cov_type="cluster", cov_kwds={"groups": d["unit"].to_numpy()})
    r = np.zeros((3, 7))
    r[0, 3] = r[1, 4] = r[2, 6] = 1  # the X1 means and z1
    w = refc.wald_test(r, use_f=False, scalar=True)
    assert out[0]["other_f_cluster"] == pytest.approx(float(w.statistic) / 3, rel=1e-7)
