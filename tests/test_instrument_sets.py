"""Amemiya-MaCurdy, Breusch-Mizon-Schmidt, the Nijman-Verbeek attrition test and the
Anderson-Rubin set, against independent numpy/statsmodels computations and published properties.

Sources: Amemiya and MaCurdy (1986), Breusch, Mizon and Schmidt (1989), Nijman and Verbeek (1992)
with Wooldridge (2010, section 19.9), Anderson and Rubin (1949) (check-values.md). Designs are invented.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from statsmodels.sandbox.regression.gmm import IV2SLS
from test_models import simulate

from auditor.commands.instruments import instruments
from auditor.stats import instrument_sets, models, strength

X1, X2, Z1, Z2 = ["x1a", "x1b"], ["x2"], ["z1"], ["z2"]


def _pa(d: pd.DataFrame) -> models.PanelArrays:
    return models.PanelArrays.build(d["unit"].to_numpy(), d["y"].to_numpy(), d[X1 + X2].to_numpy(), X1 + X2,
                                    d[Z1 + Z2].to_numpy(), Z1 + Z2)


def _fits(d: pd.DataFrame):
    pa = _pa(d)
    sp = models.HTSpec.plain(X1, X2, Z1, Z2)
    ht = models.hausman_taylor(pa, X1, X2, Z1, Z2)
    _, period = np.unique(d["t"].to_numpy(), return_inverse=True)
    periods = int(period.max()) + 1
    out = {w: instrument_sets.fit(pa, sp, ht.components.theta, period.astype(np.int64), periods, w, ht.fit)
           for w in (instrument_sets.AM, instrument_sets.BMS)}
    return pa, ht, out


def _oracle(d: pd.DataFrame, theta: np.ndarray, which: str, balanced: bool):
    """2SLS on the quasi-demeaned data with the instrument matrix built row by row (pandas):
    [X - X means, 1, z1, X1 means, each X1 in every period (0 where absent), observation indicators
    (unbalanced), and for BMS each x2 within deviation in every period], by statsmodels IV2SLS."""
    d = d.reset_index(drop=True)
    th = pd.Series(theta)[pd.factorize(d["unit"], sort=True)[0]].to_numpy()
    cols = ["y", *X1, *X2, *Z1, *Z2]
    mean = d.groupby("unit")[cols].transform("mean")
    star = d[cols] - th[:, None] * mean
    design = pd.DataFrame({"x1a": star["x1a"], "x1b": star["x1b"], "x2": star["x2"], "const": 1 - th,
                           "z1": star["z1"], "z2": star["z2"]})
    inst = {f"w_{c}": d[c] - mean[c] for c in X1 + X2}
    inst["one"] = np.ones(len(d))
    inst["z1"] = d["z1"]
    periods = sorted(d["t"].unique())
    wide = {c: d.pivot_table(index="unit", columns="t", values=c, aggfunc="mean") for c in X1 + X2}
    dev = (d[X2[0]] - mean[X2[0]]).groupby([d["unit"], d["t"]]).mean().unstack()
    for c in X1:
        if not balanced:
            inst[f"m_{c}"] = mean[c]
        for t in periods:
            inst[f"{c}_{t}"] = wide[c][t].reindex(d["unit"]).fillna(0.0).to_numpy()
    if not balanced:
        present = wide[X1[0]].notna().astype(float)
        for t in periods:
            inst[f"s_{t}"] = present[t].reindex(d["unit"]).to_numpy()
    if which == instrument_sets.BMS:
        for t in periods[1:]:  # the deviations sum to zero over a balanced unit's periods
            inst[f"dev_{t}"] = dev[t].reindex(d["unit"]).fillna(0.0).to_numpy()
    a = pd.DataFrame(inst)
    fit = IV2SLS(star["y"].to_numpy(), design.to_numpy(), a.to_numpy()).fit()
    e = star["y"].to_numpy() - design.to_numpy() @ fit.params
    explained = sm.OLS(e, a.to_numpy()).fit().fittedvalues
    sargan = len(d) * float(explained @ explained) / float(e @ e)
    rank = np.linalg.matrix_rank(a.to_numpy())
    # clustered covariance written out: bread (D^' D^)^-1, per-unit scores of D^ e, G/(G-1)(N-1)/(N-K)
    dhat = a.to_numpy() @ np.linalg.lstsq(a.to_numpy(), design.to_numpy(), rcond=None)[0]
    bread = np.linalg.inv(dhat.T @ dhat)
    scores = pd.DataFrame(dhat * e[:, None]).groupby(d["unit"].to_numpy()).sum().to_numpy()
    n, nobs, k = d["unit"].nunique(), len(d), design.shape[1]
    cov_cl = (n / (n - 1)) * ((nobs - 1) / (nobs - k)) * bread @ scores.T @ scores @ bread
    names = list(design.columns)
    return (dict(zip(names, fit.params, strict=True)), dict(zip(names, fit.bse, strict=True)),
            dict(zip(names, np.sqrt(np.diag(cov_cl)), strict=True)), sargan, rank - k)


@pytest.mark.parametrize("balanced", [True, False])
@pytest.mark.parametrize("which", [instrument_sets.AM, instrument_sets.BMS])
def test_richer_sets_match_an_independent_2sls(which, balanced):
    d = simulate(seed=31, n=300)
    if not balanced:
        d = d[np.random.default_rng(31).random(len(d)) > 0.2].reset_index(drop=True)
    _, ht, out = _fits(d)
    coef, se, se_cl, sargan, dof = _oracle(d, ht.components.theta, which, balanced)
    got = out[which]
    for c, v in coef.items():
        assert got.fit.coef[got.fit.names.index(c)] == pytest.approx(v, rel=1e-8, abs=1e-10), c
        assert got.fit.se[got.fit.names.index(c)] == pytest.approx(se[c], rel=1e-8), c
        assert got.fit.se_cluster[got.fit.names.index(c)] == pytest.approx(se_cl[c], rel=1e-7), c
    assert got.sargan.df == dof
    assert got.sargan.statistic == pytest.approx(sargan, rel=1e-7)


def test_contrast_against_ht_equals_a_generalised_inverse_written_out():
    # oracle: H = d' (V_HT - V_AM)^+ d with numpy's pseudo-inverse, V_AM at Hausman-Taylor's sigma2
    # (README convention), on every coefficient but the constant; df the rank of the difference
    d = simulate(seed=40, n=500)
    d = d[np.random.default_rng(40).random(len(d)) > 0.15].reset_index(drop=True)
    _, ht, out = _fits(d)
    for rf in out.values():
        cols = [c for c in rf.fit.names if c != "const"]
        ih, ia = ht.fit.index(cols), rf.fit.index(cols)
        diff = ht.fit.cov[np.ix_(ih, ih)] - rf.fit.cov[np.ix_(ia, ia)] * ht.fit.sigma2 / rf.fit.sigma2
        dvec = ht.fit.coef[ih] - rf.fit.coef[ia]
        vals = np.linalg.eigvalsh(diff)
        rank = int(np.sum(vals > 1e-7 * vals.max()))
        h = float(dvec @ np.linalg.pinv(diff, rcond=1e-7, hermitian=True) @ dvec)
        assert rf.against_ht.df == rank
        assert rf.against_ht.statistic == pytest.approx(h, rel=1e-5)


def test_am_adds_k1_times_t_minus_1_restrictions_on_a_balanced_panel():
    # Amemiya and MaCurdy (1986), methods.md section 6: k1 (T - 1) more over-identifying restrictions
    d = simulate(seed=32, periods=6)
    _, ht, out = _fits(d)
    k1, t = 2, 6
    assert out[instrument_sets.AM].sargan.df - ht.sargan.df == k1 * (t - 1)
    # Breusch, Mizon and Schmidt (1989): beside those, T - 1 within deviations of each X2 column
    assert out[instrument_sets.BMS].sargan.df - out[instrument_sets.AM].sargan.df == 1 * (t - 1)


def test_am_equals_ht_when_x1_carries_nothing_beyond_its_unit_mean():
    # every X1 column is its unit mean plus a period shift common to all units, so its value in each
    # period is a combination of the constant and its unit mean: AM's instruments are HT's
    d = simulate(seed=33)
    rng = np.random.default_rng(33)
    for c in X1:  # a shift of its own for each column, the same for every unit
        shift = pd.Series(rng.normal(size=d["t"].nunique()))
        d[c] = d.groupby("unit")[c].transform("mean") + shift[d["t"]].to_numpy()
    _, ht, out = _fits(d)
    am = out[instrument_sets.AM]
    np.testing.assert_allclose(am.fit.coef, ht.fit.coef, rtol=1e-8, atol=1e-10)
    assert am.sargan.df == ht.sargan.df


def test_the_api_shows_the_three_estimators_side_by_side():
    d = simulate(seed=34)
    r = instruments(d, unit="unit", time="t", outcome="y", regressors=X1 + X2 + Z1 + Z2, correlated=["x2", "z2"])
    for key in ("hausman_taylor", "amemiya_macurdy", "breusch_mizon_schmidt"):
        assert set(getattr(r.estimates, key).coef) == set(r.estimates.hausman_taylor.coef)
        assert getattr(r.tests.overidentification_by_estimator, key).df >= 1
    assert set(r.tests.hausman_against_ht.to_dict()) == {"amemiya_macurdy", "breusch_mizon_schmidt"}
    from auditor.render.text_instruments import render

    text = render(r, width=160)
    assert "Amemiya-MaCurdy" in text and "Breusch-Mizon-Schmidt" in text


# --------------------------------------------------------------------------- attrition


def _attrition_panel(seed: int, selective: bool, n: int = 400, periods: int = 6) -> pd.DataFrame:
    """Units leave for good after a bad idiosyncratic shock (e < -1, about 16% a period) or at random
    with the same probability (invented numbers)."""
    rng = np.random.default_rng(seed)
    u = rng.normal(size=n)
    unit, t = np.repeat(np.arange(n), periods), np.tile(np.arange(periods), n)
    x = 0.5 * u[unit] + rng.normal(size=n * periods)
    e = rng.normal(size=n * periods)
    y = 1.0 + 0.5 * x + u[unit] + e
    leave_now = (e < -1.0) if selective else (rng.random(n * periods) < 0.1587)
    d = pd.DataFrame({"unit": unit, "t": t, "y": y, "x": x, "leave": leave_now})
    gone = d.groupby("unit")["leave"].transform(lambda s: s.cumsum().shift(fill_value=0) > 0)
    return d[~gone].drop(columns="leave").reset_index(drop=True)


@pytest.mark.slow
def test_attrition_test_rejects_selective_and_keeps_its_size_under_random_attrition():
    # seeded Monte Carlo (invented designs): selective attrition rejected in at least 80% of draws,
    # random attrition in at most 15%
    def rate(selective, reps):
        hits = 0
        for s in range(reps):
            r = instruments(_attrition_panel(s, selective), unit="unit", time="t", outcome="y", regressors=["x"],
                            correlated=[])
            hits += r.tests.attrition.p < 0.05
        return hits / reps

    assert rate(True, 25) >= 0.80
    assert rate(False, 60) <= 0.15


def test_attrition_test_matches_statsmodels_with_unit_dummies():
    # oracle: statsmodels OLS of y on x, next-period-observed and unit dummies on the rows before the
    # last period, cluster-robust by unit; our t is the within fit's clustered t (common practice:
    # the dummy and within forms give the same coefficient; the clustered se differs only by the
    # small-sample factor's K, here written out)
    d = _attrition_panel(3, True)
    r = instruments(d, unit="unit", time="t", outcome="y", regressors=["x"], correlated=[])
    present = set(zip(d["unit"], d["t"], strict=True))
    sub = d[d["t"] < d["t"].max()].copy()
    sub["nxt"] = [float((u, t + 1) in present) for u, t in zip(sub["unit"], sub["t"], strict=True)]
    ref = smf.ols("y ~ x + nxt + C(unit)", data=sub).fit()
    a = r.tests.attrition
    assert a.coef == pytest.approx(ref.params["nxt"], rel=1e-8)
    dm = sub[["y", "x", "nxt"]] - sub.groupby("unit")[["y", "x", "nxt"]].transform("mean")
    cl = sm.OLS(dm["y"], dm[["x", "nxt"]]).fit(cov_type="cluster", cov_kwds={"groups": sub["unit"].to_numpy()})
    assert a.t == pytest.approx(cl.params["nxt"] / cl.bse["nxt"], rel=1e-8)
    assert "selective-attrition" in [f.check for f in r.findings]


def test_no_attrition_test_when_nobody_leaves():
    r = instruments(simulate(seed=35), unit="unit", time="t", outcome="y", regressors=["x1a"], correlated=[])
    assert r.tests.attrition is None


# --------------------------------------------------------------------------- Anderson-Rubin


def _ar_inputs(d: pd.DataFrame):
    fe = smf.ols("y ~ x1a + x1b + x2 + C(unit)", data=d).fit()
    um = d.groupby("unit")[["y", "x1a", "x1b", "x2", "z1", "z2"]].mean()
    dd = um["y"] - um[["x1a", "x1b", "x2"]].to_numpy() @ fe.params[["x1a", "x1b", "x2"]].to_numpy()
    return um, dd


def _grid_accepts(um, dd, b0):
    # oracle: statsmodels OLS of d - b0 z2 on [1, z1, means of x1a, x1b] and its F test of the means
    fit = sm.OLS(dd - b0 * um["z2"], sm.add_constant(um[["z1", "x1a", "x1b"]])).fit()
    return float(fit.f_test("x1a = 0, x1b = 0").pvalue) >= 0.05


def _inside(ar, b0):
    return any((lo is None or b0 >= lo) and (hi is None or b0 <= hi) for lo, hi in ar.intervals)


@pytest.mark.parametrize("related", [True, False])
def test_anderson_rubin_set_matches_a_grid_of_statsmodels_f_tests(related):
    d = simulate(seed=36, related=related)
    r = instruments(d, unit="unit", time="t", outcome="y", regressors=X1 + X2 + Z1 + Z2, correlated=["x2", "z2"])
    ar = r.strength[0].anderson_rubin
    um, dd = _ar_inputs(d)
    bounds = [v for piece in ar.intervals for v in piece if v is not None]
    for b0 in np.linspace(-6, 8, 141):
        if any(abs(b0 - v) < 1e-6 for v in bounds):
            continue
        assert _inside(ar, b0) == _grid_accepts(um, dd, b0), b0
    for v in bounds:  # at an end of the set the F test's p is exactly 1 - level
        fit = sm.OLS(dd - v * um["z2"], sm.add_constant(um[["z1", "x1a", "x1b"]])).fit()
        assert float(fit.f_test("x1a = 0, x1b = 0").pvalue) == pytest.approx(0.05, rel=1e-6)
    if related:
        # strong instruments: a bounded interval holding the simulated truth (z2 coefficient 1.0)
        assert ar.kind == "interval" and _inside(ar, 1.0)
    else:
        assert ar.kind in ("two rays", "whole line")  # irrelevant instruments: unbounded


def test_anderson_rubin_with_an_irrelevant_instrument_is_unbounded():
    # strength.anderson_rubin directly, one excluded instrument unrelated to z2 (invented numbers)
    rng = np.random.default_rng(37)
    n = 400
    z2 = rng.normal(size=n)
    inst = rng.normal(size=(n, 1))
    d = 1.0 * z2 + rng.normal(size=n)
    ar = strength.anderson_rubin(d, z2, np.ones((n, 1)), inst)
    assert any(lo is None or hi is None for lo, hi in ar["intervals"])


def test_anderson_rubin_is_not_computed_with_two_z2_columns():
    d = simulate(seed=38)
    d["z3"] = d.groupby("unit")["x1a"].transform("mean") * 0.5 + np.random.default_rng(38).normal(size=len(d))
    d["z3"] = d.groupby("unit")["z3"].transform("mean")
    d["x1c"] = np.random.default_rng(39).normal(size=len(d))
    r = instruments(d, unit="unit", time="t", outcome="y", regressors=["x1a", "x1b", "x1c", "x2", "z1", "z2", "z3"],
                    correlated=["x2", "z2", "z3"])
    assert all(row.anderson_rubin is None for row in r.strength)
    assert all("not computed" in row.anderson_rubin_note for row in r.strength)
