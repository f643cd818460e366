"""Instrument strength (methods.md section 5): unit-level first stages for the Z2
columns, critical values, Cragg-Donald and Sanderson-Windmeijer statistics, the
observation-level first stage of each X2 column, and the candidate search.

All first stages for Z2 run at the unit level (n rows): the endogenous column on
the included [1, Z1] and the excluded unit means of X1.
"""

from __future__ import annotations

import csv
import itertools
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

from auditor.stats import models
from auditor.stats.pvalues import f_sf

# --------------------------------------------------------------------------- critical values


@lru_cache(maxsize=4)
def _stock_yogo_table(path: str) -> dict[tuple[int, int], dict[int, float]]:
    table: dict[tuple[int, int], dict[int, float]] = {}
    with open(path, encoding="utf-8") as fh:
        rows = [line for line in fh if line.strip() and not line.lstrip().startswith("#")]
    for rec in csv.DictReader(rows):
        key = (int(rec["endogenous"]), int(rec["instruments"]))
        table[key] = {
            int(name.split("_")[1]): float(v) for name, v in rec.items() if name.startswith("size_")
        }
    return table


def stock_yogo_path() -> Path:
    """The shipped Stock-Yogo table, rules/stock_yogo.csv."""
    from auditor.checks.config import rules_dir

    return rules_dir() / "stock_yogo.csv"


def stock_yogo(endogenous: int, instruments: int, size: int = 10) -> float | None:
    """Stock-Yogo (2005, Table 5.2) critical first-stage F for the given maximal size in percent.

    None where the shipped table has no cell.
    """
    cell = _stock_yogo_table(str(stock_yogo_path())).get((int(endogenous), int(instruments)))
    return None if cell is None else cell.get(int(size))


# --------------------------------------------------------------------------- first stages


@dataclass(frozen=True)
class FirstStage:
    """A first stage's partial F (classical and HC1-robust), partial R2 and degrees of freedom."""

    partial_f: float | None
    robust_f: float | None
    partial_r2: float | None
    df: tuple[int, int]


def _centred(included: np.ndarray, *arrays: np.ndarray) -> tuple[np.ndarray, ...]:
    """Copies with every column centred on its mean except the constant (``included[:, 0]``),
    so that partialling on [1, ...] keeps its digits when a column holds 100,000 plus a small
    variation (the constant absorbs the shift either way: every statistic here is unchanged)."""
    inc = np.array(included, dtype=float)
    if inc.shape[1] > 1:
        inc[:, 1:] -= inc[:, 1:].mean(axis=0)
    rest = tuple(np.asarray(a, dtype=float) - np.asarray(a, dtype=float).mean(axis=0) for a in arrays)
    return (inc, *rest)


def _residualise(target: np.ndarray, on: np.ndarray) -> np.ndarray:
    if on.shape[1] == 0:
        return target
    coef, *_ = np.linalg.lstsq(on, target, rcond=None)
    return target - on @ coef


def first_stage(endog: np.ndarray, included: np.ndarray, excluded: np.ndarray) -> FirstStage:
    """First stage of ``endog`` (n,) on ``included`` (n, g, constant included) and ``excluded`` (n, k).

    partial F = ((RSS_r - RSS_u)/k) / (RSS_u/(n - g - k)); robust F = HC1 Wald of the
    excluded coefficients / k; partial R2 = 1 - RSS_u/RSS_r.
    """
    n, g = included.shape
    k = excluded.shape[1]
    dfd = n - g - k
    if k == 0 or dfd <= 0:
        return FirstStage(None, None, None, (k, dfd))
    included, endog, excluded = _centred(included, endog, excluded)
    e_r = _residualise(endog, included)
    full = np.column_stack([included, excluded])
    xtx_inv = models.equilibrated_inv(full.T @ full)
    coef = xtx_inv @ (full.T @ endog)
    e_u = endog - full @ coef
    rss_r, rss_u = float(e_r @ e_r), float(e_u @ e_u)
    if rss_u <= 0 or rss_r <= 0:
        return FirstStage(None, None, None, (k, dfd))
    partial_f = ((rss_r - rss_u) / k) / (rss_u / dfd)
    meat = (full * (e_u**2)[:, None]).T @ full
    cov_hc1 = (n / (n - g - k)) * (xtx_inv @ meat @ xtx_inv)
    b = coef[g:]
    v = cov_hc1[g:, g:]
    robust = float(b @ models.equilibrated_inv(v) @ b) / k
    return FirstStage(float(partial_f), robust, 1.0 - rss_u / rss_r, (k, dfd))


def cragg_donald(endog: np.ndarray, included: np.ndarray, excluded: np.ndarray) -> float | None:
    """Cragg-Donald minimum eigenvalue statistic for endog (n, p) (Stock and Yogo 2005, eq. 2.3).

    min eig(S^-1/2' Y~' P Y~ S^-1/2) / k, with Y~ and the excluded instruments
    partialled on the included ones and S the first-stage residual covariance
    with n - g - k degrees of freedom. Equals the partial F when p = 1.
    """
    n, g = included.shape
    k = excluded.shape[1]
    if k == 0 or n - g - k <= 0:
        return None
    included, endog, excluded = _centred(included, endog, excluded)
    yt = _residualise(endog, included)
    xt = _residualise(excluded, included)
    proj, *_ = np.linalg.lstsq(xt, yt, rcond=None)
    fitted = xt @ proj
    resid = yt - fitted
    sigma = resid.T @ resid / (n - g - k)
    explained = fitted.T @ fitted
    vals, vecs = np.linalg.eigh(sigma)
    if np.min(vals) <= 0:
        return None
    root_inv = vecs @ np.diag(vals**-0.5) @ vecs.T
    return float(np.min(np.linalg.eigvalsh(root_inv @ explained @ root_inv)) / k)


def sanderson_windmeijer(endog: np.ndarray, included: np.ndarray, excluded: np.ndarray) -> list[float | None]:
    """Sanderson-Windmeijer (2016) conditional first-stage F for each column of endog (n, p).

    Column j is regressed on the other endogenous columns by 2SLS with the excluded
    instruments (all partialled on the included ones); the residual's F on the
    instruments has k - p + 1 numerator and n - g - k denominator degrees of freedom.
    """
    n, g = included.shape
    p = endog.shape[1]
    k = excluded.shape[1]
    dfn, dfd = k - p + 1, n - g - k
    if dfn <= 0 or dfd <= 0:
        return [None] * p
    included, endog, excluded = _centred(included, endog, excluded)
    yt = _residualise(endog, included)
    xt = _residualise(excluded, included)
    proj, *_ = np.linalg.lstsq(xt, yt, rcond=None)
    fitted = xt @ proj
    out: list[float | None] = []
    for j in range(p):  # loop over the few endogenous columns
        others = [c for c in range(p) if c != j]
        fo = fitted[:, others]
        delta = np.linalg.lstsq(fo, yt[:, j], rcond=None)[0]
        eps = yt[:, j] - yt[:, others] @ delta
        c, *_ = np.linalg.lstsq(xt, eps, rcond=None)
        expl = xt @ c
        ess = float(expl @ expl)
        rss = float((eps - expl) @ (eps - expl))
        out.append((ess / dfn) / (rss / dfd) if rss > 0 else None)
    return out


# --------------------------------------------------------------------------- the Z2 strength table


def verdict(f_value: float | None, critical: float | None, fallback: float) -> str:
    """``strong`` when ``f_value`` reaches the critical value (or ``fallback`` without one), else ``weak``."""
    if f_value is None or not np.isfinite(f_value):
        return "not-identified"
    return "strong" if f_value >= (critical if critical is not None else fallback) else "weak"


def unit_included(pa: models.PanelArrays, z1: list[str], included_means: list[str] | tuple[str, ...]) -> np.ndarray:
    """The included unit-level columns [1, Z1, unit means of X1 columns the within fit
    cannot identify (they identify themselves)]."""
    return np.column_stack([np.ones(pa.n), pa.zbar[:, [pa.z_names.index(c) for c in z1]],
                            pa.xbar[:, [pa.x_names.index(c) for c in included_means]]])


def critical_label(size: int) -> str:
    """Where a critical value comes from, for the maximal size in use."""
    return f"Stock-Yogo 2005, {int(size)}% maximal size"


def z2_strength(
    pa: models.PanelArrays,
    x1: list[str],
    z1: list[str],
    z2: list[str],
    *,
    size: int = 10,
    rule_of_thumb: float = 10.0,
    order_met: bool = True,
    included_means: list[str] | tuple[str, ...] = (),
    endogenous_means: list[str] | tuple[str, ...] = (),
) -> tuple[list[dict[str, Any]], float | None]:
    """The contract's ``strength`` rows for the unit-level endogenous columns and the Cragg-Donald statistic.

    ``x1``: the X1 columns whose unit means are the excluded instruments; ``z1`` and
    ``included_means`` (X1 columns identified by their own means) the included ones;
    the endogenous columns are ``z2`` and the unit means of ``endogenous_means`` (X2
    columns the within fit cannot identify). With one endogenous column its verdict
    compares the partial F with Stock-Yogo (1 endogenous, k1 instruments); with
    several, the Sanderson-Windmeijer F with Stock-Yogo (1 endogenous, k1 - g2 + 1
    instruments), as Sanderson and Windmeijer (2016) propose. Cragg-Donald is None for
    fewer than two endogenous columns.
    """
    targets = [(c, "Z2") for c in z2] + [(c, "X2 (between units only)") for c in endogenous_means]
    if not targets:
        return [], None
    included = unit_included(pa, z1, included_means)
    excluded = pa.xbar[:, [pa.x_names.index(c) for c in x1]]
    endog = np.column_stack([pa.zbar[:, [pa.z_names.index(c) for c in z2]],
                             pa.xbar[:, [pa.x_names.index(c) for c in endogenous_means]]])
    g2, k1 = len(targets), len(x1)
    cd = cragg_donald(endog, included, excluded) if g2 >= 2 and order_met else None
    sw = sanderson_windmeijer(endog, included, excluded) if g2 >= 2 and order_met else [None] * g2
    rows = []
    for j, (col, role) in enumerate(targets):
        fs = first_stage(endog[:, j], included, excluded)
        if g2 == 1:
            basis, basis_f, crit = "partial_f", fs.partial_f, stock_yogo(1, k1, size)
        else:
            basis, basis_f, crit = "conditional_f", sw[j], stock_yogo(1, k1 - g2 + 1, size) if order_met else None
        verd = verdict(basis_f, crit, rule_of_thumb) if order_met and k1 > 0 else "not-identified"
        rows.append(
            {
                "endogenous": col,
                "role": role,
                "instruments": list(x1),
                "included": [*z1, *[f"mean({c})" for c in included_means]],
                "partial_f": fs.partial_f,
                "robust_f": fs.robust_f,
                "partial_r2": fs.partial_r2,
                "df": [fs.df[0], fs.df[1]],
                "critical_value": crit,
                "critical_size": int(size) if crit is not None else None,
                "critical_source": critical_label(size) if crit is not None else f"rule of thumb F >= {rule_of_thumb:g}",
                "conditional_f": sw[j],
                "verdict_basis": basis,
                "verdict": verd,
            }
        )
    return rows, cd


def x2_first_stage(
    pa: models.PanelArrays, within_cols: list[str], x2: list[str], z1: list[str], theta: np.ndarray,
    means: list[str],
) -> list[dict[str, Any]]:
    """Observation-level first stage of each quasi-demeaned X2 column on the HT instruments.

    Instruments A = [X - X means (``within_cols``, the columns the within fit
    identifies), X1 means (``means``), 1, Z1]. Per X2 column: ``own_f``, the squared
    classical t of its own within deviation (its clustered variance is zero by
    construction, since within deviations sum to zero in every unit);
    ``other_f_cluster``, the unit-clustered Wald F (divided by its df) of the X1 means
    and Z1, which carry the between part of the column; and the regression's R2.
    """
    if not x2:
        return []
    zi1 = [pa.z_names.index(c) for c in z1]
    nw = len(within_cols)
    a = np.empty((pa.rows, nw + len(means) + 1 + len(zi1)), order="F")  # columns contiguous
    a[:, :nw] = pa.within_deviations(within_cols)
    for k, c in enumerate(means):
        np.take(np.ascontiguousarray(pa.xbar[:, pa.x_names.index(c)]), pa.codes, out=a[:, nw + k], mode="clip")
    a[:, nw + len(means)] = 1.0
    for k, j in enumerate(zi1):
        np.take(np.ascontiguousarray(pa.zbar[:, j]), pa.codes, out=a[:, nw + len(means) + 1 + k], mode="clip")
    names = [f"dev({c})" for c in within_cols] + [f"mean({c})" for c in means] + ["const"] + list(z1)
    other = [f"mean({c})" for c in means] + list(z1)
    out = []
    const = nw + len(means)
    pa.scaled(a)  # weighted equivalent rows (the dask engine): sums of products as over the panel's rows
    shifts = models.orthogonalise(a, a[:, const].copy(), skip=const)
    del shifts  # the instruments' span is all that matters here; the constant's coefficient is not reported
    bread = models.equilibrated_inv(a.T @ a)
    for c in x2:  # loop over the few X2 columns
        j = pa.x_names.index(c)
        target = pa.x[:, j] - models.gather(theta * pa.xbar[:, j], pa.codes)
        fit, e = models.ols(a, pa.scaled(target.copy()), names, pa.codes, pa.n, bread=bread, nobs=pa.nobs)
        own = fit.index([f"dev({c})"])
        rest = fit.index(other)
        own_t = fit.coef[own[0]] / fit.se[own[0]] if fit.se[own[0]] > 0 else np.inf
        other_w = models.wald(fit.coef[rest], fit.cov_cluster[np.ix_(rest, rest)])
        w = np.ones(target.size) if pa.weights is None else pa.weights
        centred = target - float(np.average(target, weights=w))
        tss = float((centred * w) @ centred)
        out.append(
            {
                "endogenous": c,
                "role": "X2",
                "instruments": [f"{c} (within deviation)"] + [f"{x} (unit mean)" for x in means] + list(z1),
                "own_f": float(own_t**2),
                "other_f_cluster": None if other_w.statistic is None else other_w.statistic / other_w.df,
                "r2": 1.0 - float(e @ e) / tss if tss > 0 else None,
            }
        )
    return out


# --------------------------------------------------------------------------- candidates


#: candidate states: validity accepted by a test, assumed (nothing to test), rejected, or
#: undecided (the set is rejected and no single mean can be blamed)
USABLE_STATE = {"accepted": True, "assumed": True, "invalid": False, "undecided": None}


def candidates(
    pa: models.PanelArrays,
    x1: list[str],
    z1: list[str],
    z2: list[str],
    mundlak_p: dict[str, float | None],
    *,
    alpha: float,
    size: int = 10,
    rule_of_thumb: float = 10.0,
    max_exhaustive: int = 12,
    c_p: dict[str, float | None] | None = None,
    states: dict[str, tuple[str, str]] | None = None,
    included_means: list[str] | tuple[str, ...] = (),
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Per (Z2, X1) the partial F of that X1 mean alone, its Mundlak p and its validity state;
    and per Z2 the suggested set.

    ``states`` gives, per X1 column, (state, basis) from the over-identification tests,
    the state one of USABLE_STATE; a column it does not name is judged by its Mundlak p
    (``invalid`` below ``alpha``, else ``accepted``). ``usable`` is true, false or null
    (undecided). The suggestion is the set of usable candidates whose joint partial F
    is largest relative to its critical value (Stock-Yogo for that many instruments,
    else the rule of thumb): every subset when there are at most ``max_exhaustive``
    usable candidates, a greedy forward search otherwise. When no candidate is usable
    but some are undecided, the suggestion is drawn from those and says so
    (``basis: "undecided"``). Subset statistics come from one cross-product matrix per
    Z2 column.
    """
    rows: list[dict[str, Any]] = []
    suggestions: list[dict[str, Any]] = []
    if not z2 or not x1:
        return rows, suggestions
    included, excl = _centred(unit_included(pa, z1, included_means), pa.xbar[:, [pa.x_names.index(c) for c in x1]])
    g = included.shape[1]
    xt = _residualise(excl, included)
    # scale for a well-conditioned cross-product
    scale = np.sqrt(np.sum(xt**2, axis=0))
    scale[scale == 0] = 1.0
    xt = xt / scale
    for col in z2:
        target = pa.zbar[:, pa.z_names.index(col)]
        zt = _residualise(target - target.mean(), included)
        rss_r = float(zt @ zt)
        gram = xt.T @ xt
        cross = xt.T @ zt

        def joint(subset: tuple[int, ...], gram: np.ndarray = gram, cross: np.ndarray = cross,
                  rss_r: float = rss_r) -> float | None:
            k = len(subset)
            dfd = pa.n - g - k
            if dfd <= 0 or rss_r <= 0:
                return None
            idx = list(subset)
            sub = gram[np.ix_(idx, idx)]
            if np.linalg.matrix_rank(sub) < k:
                return None
            ess = float(cross[idx] @ np.linalg.solve(sub, cross[idx]))
            rss_u = rss_r - ess
            return (ess / k) / (rss_u / dfd) if rss_u > 0 else None

        usable_idx, undecided_idx = [], []
        for i, x in enumerate(x1):
            p = mundlak_p.get(x)
            if states is not None and x in states:
                state, basis = states[x]
            else:
                state, basis = ("invalid" if p is not None and p < alpha else "accepted"), "mundlak"
            usable = USABLE_STATE[state]
            if usable:
                usable_idx.append(i)
            elif usable is None:
                undecided_idx.append(i)
            rows.append({"endogenous": col, "instrument": x, "partial_f": joint((i,)), "mundlak_p": p,
                         "c_p": (c_p or {}).get(x), "usable_basis": basis, "state": state, "usable": usable})
        pool, basis = (usable_idx, "usable") if usable_idx else (undecided_idx, "undecided")
        best = _best_subset(pool, joint, size, rule_of_thumb, max_exhaustive)
        f_best = joint(best) if best else None
        crit = stock_yogo(1, len(best), size) if best else None
        suggestions.append(
            {
                "endogenous": col,
                "instruments": [x1[i] for i in best],
                "partial_f": f_best,
                "critical_value": crit,
                "critical_source": critical_label(size) if crit is not None else f"rule of thumb F >= {rule_of_thumb:g}",
                "verdict": verdict(f_best, crit, rule_of_thumb) if best else "not-identified",
                "basis": basis if best else None,
                "set_rejected": bool(best) and basis == "undecided",
            }
        )
    return rows, suggestions


def _best_subset(pool: list[int], joint: Any, size: int, rule_of_thumb: float,
                 max_exhaustive: int) -> tuple[int, ...]:
    """The subset of ``pool`` whose joint F is largest relative to its critical value."""

    def score(subset: tuple[int, ...]) -> float:
        f = joint(subset)
        if f is None:
            return -np.inf
        crit = stock_yogo(1, len(subset), size) or rule_of_thumb
        return f / crit

    if not pool:
        return ()
    if len(pool) <= max_exhaustive:
        subsets = itertools.chain.from_iterable(itertools.combinations(pool, r) for r in range(1, len(pool) + 1))
        return max(subsets, key=score)
    chosen: list[int] = []
    left = list(pool)
    current = -np.inf
    while left:
        cand = max(left, key=lambda i: score(tuple(chosen + [i])))
        s = score(tuple(chosen + [cand]))
        if s <= current:
            break
        chosen.append(cand)
        left.remove(cand)
        current = s
    return tuple(chosen)


def f_pvalue(f_value: float | None, df: tuple[int, int] | list[int]) -> float | None:
    """Upper-tail p-value of an F statistic with (df1, df2) degrees of freedom."""
    if f_value is None or df[0] <= 0 or df[1] <= 0:
        return None
    return f_sf(f_value, df[0], df[1])


# --------------------------------------------------------------------------- Anderson-Rubin


def anderson_rubin(d: np.ndarray, z2: np.ndarray, included: np.ndarray, excluded: np.ndarray,
                   level: float = 0.95) -> dict[str, Any] | None:
    """The Anderson-Rubin (1949) confidence set for the coefficient of one unit-level endogenous column.

    ``d`` (n,) is y_bar_i - X_bar_i beta_W (Hausman-Taylor step 2), ``z2`` (n,) the endogenous
    column, ``included`` (n, g; the constant first) and ``excluded`` (n, k) the included and
    excluded instruments (methods.md section 8). b0 is in the set when the F test of the
    excluded coefficients in the regression of d - b0 z2 on [included, excluded] does not
    reject at ``level``: with P the projection on the partialled excluded instruments and
    kappa = F_crit k / (n - g - k), that is a b0^2 - 2 b b0 + c <= 0 for the quadratic form
    v'(P - kappa (I - P)) v of v = d - b0 z2. Returns ``{"level", "intervals", "kind"}``:
    pieces [lo, hi] with None for an infinite end; kind ``interval``, ``two rays``,
    ``whole line`` or ``empty``.
    """
    from auditor.stats.pvalues import f_isf

    n, g = included.shape
    k = excluded.shape[1]
    dfd = n - g - k
    if k == 0 or dfd <= 0:
        return None
    included, d, z2, excluded = _centred(included, d, z2, excluded)
    dt, zt, xt = (_residualise(v, included) for v in (d, z2, excluded))
    coef_d, *_ = np.linalg.lstsq(xt, dt, rcond=None)
    coef_z, *_ = np.linalg.lstsq(xt, zt, rcond=None)
    pd_, pz = xt @ coef_d, xt @ coef_z
    kappa = f_isf(1.0 - level, k, dfd) * k / dfd
    a = (1 + kappa) * float(zt @ pz) - kappa * float(zt @ zt)
    b = (1 + kappa) * float(zt @ pd_) - kappa * float(zt @ dt)
    c = (1 + kappa) * float(dt @ pd_) - kappa * float(dt @ dt)
    scale = max(abs(a), abs(b), abs(c), 1e-300)
    if abs(a) <= 1e-12 * scale:  # linear: -2 b b0 + c <= 0
        if abs(b) <= 1e-12 * scale:
            kind, pieces = ("whole line", [[None, None]]) if c <= 0 else ("empty", [])
        else:
            root = float(c / (2 * b))
            kind, pieces = "ray", [[root, None]] if b > 0 else [[None, root]]
        return {"level": level, "intervals": pieces, "kind": kind}
    disc = b * b - a * c
    if a > 0:
        if disc < 0:
            return {"level": level, "intervals": [], "kind": "empty"}
        r = np.sqrt(disc)
        return {"level": level, "intervals": [[float((b - r) / a), float((b + r) / a)]], "kind": "interval"}
    if disc <= 0:
        return {"level": level, "intervals": [[None, None]], "kind": "whole line"}
    r = np.sqrt(disc)
    lo, hi = sorted((float((b - r) / a), float((b + r) / a)))
    return {"level": level, "intervals": [[None, lo], [hi, None]], "kind": "two rays"}
