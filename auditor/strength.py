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

from auditor import models
from auditor.pvalues import f_sf

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
    from auditor.config import rules_dir

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
    e_r = _residualise(endog, included)
    full = np.column_stack([included, excluded])
    xtx_inv = np.linalg.pinv(full.T @ full)
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
    robust = float(b @ np.linalg.pinv(v) @ b) / k
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


def z2_strength(
    pa: models.PanelArrays,
    x1: list[str],
    z1: list[str],
    z2: list[str],
    *,
    size: int = 10,
    rule_of_thumb: float = 10.0,
    order_met: bool = True,
) -> tuple[list[dict[str, Any]], float | None]:
    """The contract's ``strength`` rows for the Z2 columns and the Cragg-Donald statistic.

    With one Z2 column its verdict compares the partial F with Stock-Yogo
    (1 endogenous, k1 instruments); with several, the Sanderson-Windmeijer F with
    Stock-Yogo (1 endogenous, k1 - g2 + 1 instruments), as Sanderson and Windmeijer
    (2016) propose. Cragg-Donald is None for fewer than two Z2 columns.
    """
    if not z2:
        return [], None
    xi = [pa.x_names.index(c) for c in x1]
    included = np.column_stack([np.ones(pa.n), pa.zbar[:, [pa.z_names.index(c) for c in z1]]])
    excluded = pa.xbar[:, xi]
    endog = pa.zbar[:, [pa.z_names.index(c) for c in z2]]
    g2, k1 = len(z2), len(x1)
    cd = cragg_donald(endog, included, excluded) if g2 >= 2 and order_met else None
    sw = sanderson_windmeijer(endog, included, excluded) if g2 >= 2 and order_met else [None] * g2
    rows = []
    for j, col in enumerate(z2):
        fs = first_stage(endog[:, j], included, excluded)
        if g2 == 1:
            basis, basis_f, crit = "partial_f", fs.partial_f, stock_yogo(1, k1, size)
        else:
            basis, basis_f, crit = "conditional_f", sw[j], stock_yogo(1, k1 - g2 + 1, size) if order_met else None
        verd = verdict(basis_f, crit, rule_of_thumb) if order_met and k1 > 0 else "not-identified"
        rows.append(
            {
                "endogenous": col,
                "role": "Z2",
                "instruments": list(x1),
                "partial_f": fs.partial_f,
                "robust_f": fs.robust_f,
                "partial_r2": fs.partial_r2,
                "df": [fs.df[0], fs.df[1]],
                "critical_value": crit,
                "critical_source": "Stock-Yogo 2005, 10% maximal size" if crit is not None else "rule of thumb F >= 10",
                "conditional_f": sw[j],
                "verdict_basis": basis,
                "verdict": verd,
            }
        )
    return rows, cd


def x2_first_stage(
    pa: models.PanelArrays, x1: list[str], x2: list[str], z1: list[str], theta: np.ndarray,
    means: list[str] | None = None,
) -> list[dict[str, Any]]:
    """Observation-level first stage of each quasi-demeaned X2 column on the HT instruments.

    Instruments A = [X - X means, X1 means, 1, Z1]; ``means`` names the X1 columns
    whose unit means enter (default all X1). Per X2 column: ``own_f``, the
    squared classical t of its own within deviation (its clustered variance is zero by
    construction, since within deviations sum to zero in every unit);
    ``other_f_cluster``, the unit-clustered Wald F (divided by its df) of the X1 means
    and Z1, which carry the between part of the column; and the regression's R2.
    """
    if not x2:
        return []
    mean_cols = list(x1) if means is None else list(means)
    th = theta[pa.codes]
    xcols = x1 + x2
    xi = [pa.x_names.index(c) for c in xcols]
    zi1 = [pa.z_names.index(c) for c in z1]
    # A = [X - X means, X1 means, 1, Z1], filled column by column
    a = np.empty((pa.nobs, len(xi) + len(mean_cols) + 1 + len(zi1)), order="F")  # columns contiguous
    for k, j in enumerate(xi):  # loop over columns, never over units
        np.take(np.ascontiguousarray(pa.xbar[:, j]), pa.codes, out=a[:, k], mode="clip")
        np.subtract(pa.x[:, j], a[:, k], out=a[:, k])
    base = len(xi)
    for k, c in enumerate(mean_cols):
        np.take(np.ascontiguousarray(pa.xbar[:, pa.x_names.index(c)]), pa.codes, out=a[:, base + k], mode="clip")
    a[:, base + len(mean_cols)] = 1.0
    for k, j in enumerate(zi1):
        np.take(np.ascontiguousarray(pa.zbar[:, j]), pa.codes, out=a[:, base + len(mean_cols) + 1 + k], mode="clip")
    names = [f"dev({c})" for c in xcols] + [f"mean({c})" for c in mean_cols] + ["const"] + list(z1)
    other = [f"mean({c})" for c in mean_cols] + list(z1)
    out = []
    bread = np.linalg.pinv(a.T @ a)
    for c in x2:  # loop over the few X2 columns
        j = pa.x_names.index(c)
        target = pa.x[:, j] - th * np.take(np.ascontiguousarray(pa.xbar[:, j]), pa.codes, mode="clip")
        fit, e = models.ols(a, target, names, pa.codes, pa.n, bread=bread)
        own = fit.index([f"dev({c})"])
        rest = fit.index(other)
        own_t = fit.coef[own[0]] / fit.se[own[0]] if fit.se[own[0]] > 0 else np.inf
        other_w = models.wald(fit.coef[rest], fit.cov_cluster[np.ix_(rest, rest)])
        centred = target - target.mean()
        tss = float(centred @ centred)
        out.append(
            {
                "endogenous": c,
                "role": "X2",
                "instruments": [f"{c} (within deviation)"] + [f"{x} (unit mean)" for x in mean_cols] + list(z1),
                "own_f": float(own_t**2),
                "other_f_cluster": None if other_w.statistic is None else other_w.statistic / other_w.df,
                "r2": 1.0 - float(e @ e) / tss if tss > 0 else None,
            }
        )
    return out


# --------------------------------------------------------------------------- candidates


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
    invalid: dict[str, tuple[bool, str]] | None = None,
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Per (Z2, X1) the partial F of that X1 mean alone, its Mundlak p and whether it is usable;
    and per Z2 the suggested set.

    A candidate is unusable when its Mundlak p is below ``alpha`` (it behaves like X2,
    so as an instrument it would be correlated with u_i). ``invalid`` replaces that
    rule for the columns it names with the caller's (verdict, basis), for example from
    the over-identification tests; ``c_p`` is shown beside. The suggestion is the set of
    usable candidates whose joint partial F is largest relative to its critical value
    (Stock-Yogo for that many instruments, else the rule of thumb): every subset when
    there are at most ``max_exhaustive`` usable candidates, a greedy forward search
    otherwise. Subset statistics come from one cross-product matrix per Z2 column.
    """
    rows: list[dict[str, Any]] = []
    suggestions: list[dict[str, Any]] = []
    if not z2 or not x1:
        return rows, suggestions
    zi1 = [pa.z_names.index(c) for c in z1]
    included = np.column_stack([np.ones(pa.n), pa.zbar[:, zi1]])
    g = included.shape[1]
    excl = pa.xbar[:, [pa.x_names.index(c) for c in x1]]
    xt = _residualise(excl, included)
    # scale for a well-conditioned cross-product
    scale = np.sqrt(np.sum(xt**2, axis=0))
    scale[scale == 0] = 1.0
    xt = xt / scale
    for col in z2:
        zt = _residualise(pa.zbar[:, pa.z_names.index(col)], included)
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

        usable_idx = []
        for i, x in enumerate(x1):
            p = mundlak_p.get(x)
            cp = (c_p or {}).get(x)
            if invalid is not None and x in invalid:
                usable, basis = not invalid[x][0], invalid[x][1]
            else:
                usable, basis = p is None or p >= alpha, "mundlak"
            if usable:
                usable_idx.append(i)
            rows.append({"endogenous": col, "instrument": x, "partial_f": joint((i,)), "mundlak_p": p,
                         "c_p": cp, "usable_basis": basis, "usable": bool(usable)})

        def score(subset: tuple[int, ...]) -> float:
            f = joint(subset)
            if f is None:
                return -np.inf
            crit = stock_yogo(1, len(subset), size) or rule_of_thumb
            return f / crit

        best: tuple[int, ...] = ()
        if usable_idx:
            if len(usable_idx) <= max_exhaustive:
                subsets = itertools.chain.from_iterable(
                    itertools.combinations(usable_idx, r) for r in range(1, len(usable_idx) + 1)
                )
                best = max(subsets, key=score)
            else:
                chosen: list[int] = []
                left = list(usable_idx)
                current = -np.inf
                while left:
                    cand = max(left, key=lambda i: score(tuple(chosen + [i])))
                    s = score(tuple(chosen + [cand]))
                    if s <= current:
                        break
                    chosen.append(cand)
                    left.remove(cand)
                    current = s
                best = tuple(chosen)
        f_best = joint(best) if best else None
        crit = stock_yogo(1, len(best), size) if best else None
        suggestions.append(
            {
                "endogenous": col,
                "instruments": [x1[i] for i in best],
                "partial_f": f_best,
                "critical_value": crit,
                "verdict": verdict(f_best, crit, rule_of_thumb) if best else "not-identified",
            }
        )
    return rows, suggestions


def f_pvalue(f_value: float | None, df: tuple[int, int] | list[int]) -> float | None:
    """Upper-tail p-value of an F statistic with (df1, df2) degrees of freedom."""
    if f_value is None or df[0] <= 0 or df[1] <= 0:
        return None
    return f_sf(f_value, df[0], df[1])
