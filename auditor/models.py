"""The diagnostic estimators: within, between, random effects (Swamy-Arora), Mundlak,
Hausman-Taylor, and the Hausman and Sargan tests (methods.md section 4).

Everything works on numpy arrays with integer unit codes 0..n-1: unit means come
from ``np.bincount``, never from a loop over units, and no n x n or N x n matrix is
ever formed (unit dummies exist in the tests only). Each fit carries classical
standard errors (``se``) and standard errors clustered by unit (``se_cluster``).

Conventions chosen here (README states the same):
- cluster-robust covariances use the small-sample factor G/(G-1) * (N-1)/(N-K)
  (common practice; G = units, K = estimated coefficients of that fit);
- the random-effects and Hausman-Taylor residual variance is e'e / (N - K);
- Wald statistics are referred to the chi-square distribution, single coefficients
  to the standard normal.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from auditor.pvalues import chi2_sf, normal_sf

CONST = "const"


# --------------------------------------------------------------------------- arrays


class UnitGrouper:
    """Sums over units as one sparse product: an n x N indicator matrix built once per codes array."""

    def __init__(self, codes: np.ndarray, n: int) -> None:
        from scipy import sparse

        codes = np.asarray(codes)
        self.n = n
        self.nobs = codes.shape[0]
        self.order = np.argsort(codes, kind="stable")
        counts = np.bincount(codes, minlength=n)
        self.indptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        self._sparse = sparse
        self.indicator = sparse.csr_matrix((np.ones(self.nobs), self.order, self.indptr), shape=(n, self.nobs))

    def sums(self, values: np.ndarray) -> np.ndarray:
        """Per-unit sums of ``values`` ((N,) or (N, k)); returns (n,) or (n, k)."""
        return _product(self.indicator, values)

    def weighted_sums(self, weights: np.ndarray, values: np.ndarray) -> np.ndarray:
        """Per-unit sums of ``weights * values`` without forming the N x k product."""
        m = self._sparse.csr_matrix((weights[self.order], self.order, self.indptr), shape=(self.n, self.nobs))
        return _product(m, values)


def _product(m: Any, values: np.ndarray) -> np.ndarray:
    """``m @ values`` for a sparse ``m``; a column-major (N, k) array goes column by
    column (the same sums in the same order), where scipy would first copy it to row
    order."""
    if values.ndim == 2 and not values.flags.c_contiguous and values.flags.f_contiguous:
        out = np.empty((m.shape[0], values.shape[1]))
        for j in range(values.shape[1]):  # a loop over columns, not units
            out[:, j] = m @ values[:, j]
        return out
    return np.asarray(m @ values)


_GROUPERS: list[tuple[np.ndarray, int, UnitGrouper]] = []
_GROUPERS_LOCK = threading.Lock()  # fits may run in two threads


def grouper(codes: np.ndarray, n: int) -> UnitGrouper:
    """The UnitGrouper of ``codes`` (the same array object reuses the last few built)."""
    with _GROUPERS_LOCK:
        for arr, size, g in _GROUPERS:
            if arr is codes and size == n:
                return g
        g = UnitGrouper(codes, n)
        _GROUPERS.insert(0, (codes, n, g))
        del _GROUPERS[4:]
        return g


def unit_means(codes: np.ndarray, n: int, values: np.ndarray, counts: np.ndarray | None = None) -> np.ndarray:
    """Per-unit means of ``values`` ((N,) or (N, k)); returns (n,) or (n, k) in the values' units."""
    if counts is None:
        counts = np.bincount(codes, minlength=n).astype(float)
    sums = grouper(codes, n).sums(values)
    return sums / (counts if values.ndim == 1 else counts[:, None])


def unit_sums(codes: np.ndarray, n: int, values: np.ndarray) -> np.ndarray:
    """Per-unit sums of the columns of ``values`` (N, k); returns (n, k)."""
    return grouper(codes, n).sums(values)


@dataclass(frozen=True)
class PanelArrays:
    """The numeric panel a model sees: rows with every used column present.

    ``codes`` are unit codes 0..n-1 (every code present), ``x`` the time-varying
    regressors (N, kx) and ``z`` the time-invariant ones without the constant (N, kz).
    """

    codes: np.ndarray
    n: int
    y: np.ndarray
    x: np.ndarray
    x_names: tuple[str, ...]
    z: np.ndarray
    z_names: tuple[str, ...]
    counts: np.ndarray = field(init=False, repr=False)
    ybar: np.ndarray = field(init=False, repr=False)
    xbar: np.ndarray = field(init=False, repr=False)
    zbar: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        counts = np.bincount(self.codes, minlength=self.n).astype(float)
        object.__setattr__(self, "counts", counts)
        object.__setattr__(self, "ybar", unit_means(self.codes, self.n, self.y, counts))
        object.__setattr__(self, "xbar", unit_means(self.codes, self.n, _two_d(self.x), counts))
        object.__setattr__(self, "zbar", unit_means(self.codes, self.n, _two_d(self.z), counts))

    @property
    def nobs(self) -> int:
        """N, the number of rows."""
        return int(self.y.shape[0])

    @classmethod
    def build(
        cls,
        codes: np.ndarray,
        y: np.ndarray,
        x: np.ndarray | None,
        x_names: tuple[str, ...] | list[str],
        z: np.ndarray | None,
        z_names: tuple[str, ...] | list[str],
    ) -> PanelArrays:
        """Arrays from raw codes (any integers): codes are renumbered 0..n-1 in sorted order."""
        uniq, dense = np.unique(np.asarray(codes), return_inverse=True)
        nrow = len(dense)
        xa = np.zeros((nrow, 0)) if x is None else _two_d(np.asarray(x, dtype=float))
        za = np.zeros((nrow, 0)) if z is None else _two_d(np.asarray(z, dtype=float))
        return cls(
            codes=dense.astype(np.int64),
            n=len(uniq),
            y=np.asarray(y, dtype=float),
            x=xa,
            x_names=tuple(x_names),
            z=za,
            z_names=tuple(z_names),
        )

    def select(self, x_cols: list[str], z_cols: list[str]) -> PanelArrays:
        """The same panel with only the named X and Z columns (in the given order)."""
        xi = [self.x_names.index(c) for c in x_cols]
        zi = [self.z_names.index(c) for c in z_cols]
        out = object.__new__(PanelArrays)
        values = {
            "codes": self.codes, "n": self.n, "y": self.y, "x": self.x[:, xi], "x_names": tuple(x_cols),
            "z": self.z[:, zi], "z_names": tuple(z_cols), "counts": self.counts, "ybar": self.ybar,
            "xbar": self.xbar[:, xi], "zbar": self.zbar[:, zi],
        }
        for key, value in values.items():  # the unit means are reused, not recomputed
            object.__setattr__(out, key, value)
        return out


def _two_d(a: np.ndarray) -> np.ndarray:
    return a.reshape(-1, 1) if a.ndim == 1 else a


# --------------------------------------------------------------------------- fits


@dataclass(frozen=True)
class Fit:
    """One estimated linear model: coefficients, classical and unit-clustered covariances."""

    names: tuple[str, ...]
    coef: np.ndarray
    cov: np.ndarray
    cov_cluster: np.ndarray
    sigma2: float
    df_resid: int
    nobs: int
    bread: np.ndarray | None = field(default=None, repr=False)  # (X'X)^-1 of an OLS fit

    @property
    def se(self) -> np.ndarray:
        """Classical standard errors, in the units of the coefficients."""
        return np.sqrt(np.clip(np.diag(self.cov), 0.0, None))

    @property
    def se_cluster(self) -> np.ndarray:
        """Standard errors clustered by unit, in the units of the coefficients."""
        return np.sqrt(np.clip(np.diag(self.cov_cluster), 0.0, None))

    def index(self, names: list[str] | tuple[str, ...]) -> list[int]:
        """Positions of ``names`` among this fit's coefficients."""
        return [self.names.index(c) for c in names]

    def to_dict(self) -> dict[str, Any]:
        """``{"coef": {...}, "se": {...}, "se_cluster": {...}}`` keyed by column name."""
        return {
            "coef": {k: _num(v) for k, v in zip(self.names, self.coef, strict=True)},
            "se": {k: _num(v) for k, v in zip(self.names, self.se, strict=True)},
            "se_cluster": {k: _num(v) for k, v in zip(self.names, self.se_cluster, strict=True)},
        }


def _num(v: float) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None


def _cluster_cov(bread: np.ndarray, design: np.ndarray, e: np.ndarray, codes: np.ndarray, n: int,
                 nobs: int) -> np.ndarray:
    k = bread.shape[0]
    g = grouper(codes, n).weighted_sums(e, design)  # per-unit sums of design * e
    meat = g.T @ g
    factor = (n / (n - 1.0)) * ((nobs - 1.0) / max(nobs - k, 1)) if n > 1 else np.nan
    return factor * (bread @ meat @ bread)


def _inv(m: np.ndarray) -> np.ndarray:
    try:
        return np.linalg.inv(m)
    except np.linalg.LinAlgError:
        return np.linalg.pinv(m)


def ols(
    design: np.ndarray,
    y: np.ndarray,
    names: tuple[str, ...] | list[str],
    codes: np.ndarray,
    n: int,
    *,
    df_resid: int | None = None,
    bread: np.ndarray | None = None,
) -> tuple[Fit, np.ndarray]:
    """Least squares of ``y`` on ``design`` (N, K); returns (Fit, residuals).

    ``df_resid`` overrides N - K (the within fit uses N - n - K); ``bread`` is
    (design' design)^-1 when already known (several outcomes on one design).
    """
    nobs, k = design.shape
    if k == 0:
        e = y.copy()
        dfr = nobs if df_resid is None else df_resid
        empty = np.zeros((0, 0))
        return Fit(tuple(names), np.zeros(0), empty, empty, float(e @ e / max(dfr, 1)), dfr, nobs), e
    if bread is None:
        bread = _inv(design.T @ design)
    coef = bread @ (design.T @ y)
    e = y - design @ coef
    dfr = nobs - k if df_resid is None else df_resid
    sigma2 = float(e @ e) / max(dfr, 1)
    cov = sigma2 * bread
    cov_cl = _cluster_cov(bread, design, e, codes, n, nobs)
    return Fit(tuple(names), coef, cov, cov_cl, sigma2, int(dfr), nobs, bread), e


def _solve_sym(m: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve m x = b for a symmetric positive semi-definite m, equilibrated by its diagonal."""
    d = np.sqrt(np.clip(np.diag(m), 0.0, None))
    d = np.where(d > 0, 1.0 / np.where(d > 0, d, 1.0), 1.0)
    ms = m * d[:, None] * d[None, :]
    bs = b * (d[:, None] if b.ndim == 2 else d)
    try:
        xs = np.linalg.solve(ms, bs)
    except np.linalg.LinAlgError:
        xs = np.linalg.pinv(ms) @ bs
    return xs * (d[:, None] if b.ndim == 2 else d)


@dataclass(frozen=True)
class _GramIV:
    """2SLS pieces from one cross-product matrix of [instruments, design, y]."""

    coef: np.ndarray
    proj: np.ndarray  # instruments -> fitted design (L, K)
    bread: np.ndarray  # (W'P W)^-1
    e_pa_e: float  # e' P_A e
    e_e: float  # e' e


def _gram_iv(g: np.ndarray, ia: list[int], iw: list[int], iy: int) -> _GramIV:
    saa = g[np.ix_(ia, ia)]
    saw = g[np.ix_(ia, iw)]
    say = g[ia, iy]
    proj = _solve_sym(saa, saw)
    wpw = saw.T @ proj
    wpw = (wpw + wpw.T) / 2.0
    bread = _inv(wpw)
    coef = bread @ (proj.T @ say)
    ae = say - saw @ coef
    e_pa_e = float(ae @ _solve_sym(saa, ae))
    sww = g[np.ix_(iw, iw)]
    e_e = float(g[iy, iy] - 2.0 * coef @ g[iw, iy] + coef @ sww @ coef)
    return _GramIV(coef, proj, bread, e_pa_e, max(e_e, 0.0))


def tsls(
    design: np.ndarray,
    instruments: np.ndarray,
    y: np.ndarray,
    names: tuple[str, ...] | list[str],
    codes: np.ndarray,
    n: int,
    *,
    gram: np.ndarray | None = None,
) -> tuple[Fit, np.ndarray]:
    """Two-stage least squares of ``y`` on ``design`` with ``instruments``; returns (Fit, residuals).

    Works from the cross-product matrix of [instruments, design, y] (pass it as
    ``gram`` when already computed) plus one pass for residuals and clustered scores.
    Residual variance e'e / (N - K), e the structural residuals.
    """
    nobs, k = design.shape
    L = instruments.shape[1]
    if gram is None:
        full = np.column_stack([instruments, design, y])
        gram = full.T @ full
    piv = _gram_iv(gram, list(range(L)), list(range(L, L + k)), L + k)
    coef = piv.coef
    e = y - design @ coef
    fitted = instruments @ piv.proj
    dfr = nobs - k
    sigma2 = float(e @ e) / max(dfr, 1)
    cov = sigma2 * piv.bread
    cov_cl = _cluster_cov(piv.bread, fitted, e, codes, n, nobs)
    return Fit(tuple(names), coef, cov, cov_cl, sigma2, int(dfr), nobs), e


def within(pa: PanelArrays) -> tuple[Fit, np.ndarray]:
    """The within (fixed-effects) fit on the time-varying columns; returns (Fit, residuals).

    sigma2 = e'e / (N - n - K_X) (methods.md section 4).
    """
    xw = pa.x - pa.xbar[pa.codes]
    yw = pa.y - pa.ybar[pa.codes]
    dfr = pa.nobs - pa.n - xw.shape[1]
    return ols(xw, yw, pa.x_names, pa.codes, pa.n, df_resid=dfr)


def between(pa: PanelArrays, mean_columns: list[str] | None = None) -> tuple[Fit, np.ndarray]:
    """OLS of the unit means of y on [1, X means, Z] with n rows; returns (Fit, residuals).

    ``mean_columns`` limits the X means to those columns (default: every X), for
    example to leave out means that are collinear with the constant.
    """
    cols = list(pa.x_names) if mean_columns is None else list(mean_columns)
    xi = [pa.x_names.index(c) for c in cols]
    design = np.column_stack([np.ones(pa.n), pa.xbar[:, xi], pa.zbar])
    names = (CONST, *cols, *pa.z_names)
    return ols(design, pa.ybar, names, np.arange(pa.n), pa.n)


@dataclass(frozen=True)
class Components:
    """Variance components: sigma_u and sigma_e in the outcome's units, theta per unit."""

    sigma2_u: float
    sigma2_e: float
    theta: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``variance_components``: sigma_u, sigma_e, theta_mean (mean over units)."""
        return {
            "sigma_u": _num(np.sqrt(self.sigma2_u)),
            "sigma_e": _num(np.sqrt(self.sigma2_e)),
            "theta_mean": _num(float(np.mean(self.theta))) if self.theta.size else None,
        }


def _theta(sigma2_e: float, sigma2_u: float, counts: np.ndarray) -> np.ndarray:
    total = sigma2_e + counts * sigma2_u
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, 1.0 - np.sqrt(sigma2_e / total), 0.0)


def _quasi_demean(pa: PanelArrays, theta: np.ndarray, out: np.ndarray | None = None,
                  order: list[int] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """[1, X, Z] and y transformed to w - theta_i w_bar_i, filled column by column.

    ``out`` (N, 1 + kx + kz) receives the design (columns placed at ``order``, default
    in the order const, X, Z) so that no extra N x K copy is made.
    """
    th = np.take(theta, pa.codes, mode="clip")
    kx, kz = pa.x.shape[1], pa.z.shape[1]
    k = 1 + kx + kz
    design = np.empty((pa.nobs, k), order="F") if out is None else out  # columns filled one by one
    pos = list(range(k)) if order is None else order
    np.subtract(1.0, th, out=design[:, pos[0]])
    buf = np.empty(pa.nobs)
    for j in range(kx):  # loop over columns, never over units
        np.take(np.ascontiguousarray(theta * pa.xbar[:, j]), pa.codes, out=buf, mode="clip")
        np.subtract(pa.x[:, j], buf, out=design[:, pos[1 + j]])
    for j in range(kz):
        np.take(np.ascontiguousarray(theta * pa.zbar[:, j]), pa.codes, out=buf, mode="clip")
        np.subtract(pa.z[:, j], buf, out=design[:, pos[1 + kx + j]])
    np.take(theta * pa.ybar, pa.codes, out=buf, mode="clip")
    return design, pa.y - buf


def random_effects(
    pa: PanelArrays, within_fit: Fit | None = None, between_fit: Fit | None = None
) -> tuple[Fit, Components]:
    """Swamy-Arora random effects on [1, X, Z]; returns (Fit, Components).

    sigma2_u = max(0, sigma2_b - sigma2_e * mean_i(1/T_i)), sigma2_b the between
    residual variance with n - K_b degrees of freedom.
    """
    wf = within_fit if within_fit is not None else within(pa)[0]
    bf = between_fit if between_fit is not None else between(pa)[0]
    sigma2_e = wf.sigma2
    sigma2_u = max(0.0, bf.sigma2 - sigma2_e * float(np.mean(1.0 / pa.counts)))
    theta = _theta(sigma2_e, sigma2_u, pa.counts)
    design, ys = _quasi_demean(pa, theta)
    fit, _ = ols(design, ys, (CONST, *pa.x_names, *pa.z_names), pa.codes, pa.n)
    return fit, Components(sigma2_u, sigma2_e, theta)


# --------------------------------------------------------------------------- tests


@dataclass(frozen=True)
class WaldTest:
    """A chi-square test: statistic, degrees of freedom, p-value, and how it was computed."""

    statistic: float | None
    df: int
    p: float | None
    positive_definite: bool | None = None
    note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``{"statistic", "df", "p"}`` plus ``positive_definite`` and ``note``."""
        out: dict[str, Any] = {"statistic": _num(self.statistic) if self.statistic is not None else None,
                               "df": int(self.df),
                               "p": _num(self.p) if self.p is not None else None}
        if self.positive_definite is not None:
            out["positive_definite"] = self.positive_definite
        if self.note:
            out["note"] = self.note
        return out


def wald(coef: np.ndarray, cov: np.ndarray) -> WaldTest:
    """Joint Wald test that ``coef`` is zero, chi-square with len(coef) degrees of freedom."""
    k = len(coef)
    if k == 0:
        return WaldTest(None, 0, None)
    stat = float(coef @ np.linalg.solve(cov, coef)) if np.linalg.matrix_rank(cov) == k else float(
        coef @ np.linalg.pinv(cov) @ coef
    )
    return WaldTest(stat, k, float(chi2_sf(stat, k)))


def contrast(b_eff: np.ndarray, v_eff: np.ndarray, b_cons: np.ndarray, v_cons: np.ndarray,
             df: int | None = None) -> WaldTest:
    """Hausman contrast of a consistent estimate (``b_cons``) against an efficient one.

    H = d' (V_cons - V_eff)^+ d. When the difference matrix has negative eigenvalues
    it is not positive definite: the statistic is then computed on the subspace of
    its positive eigenvalues only (a generalised inverse), with that many degrees of
    freedom, and the result says so. ``df`` fixes the degrees of freedom (the
    over-identification contrast uses k1 - g2).
    """
    d = b_cons - b_eff
    diff = v_cons - v_eff
    diff = (diff + diff.T) / 2.0
    if d.size == 0:
        return WaldTest(None, 0, None)
    vals, vecs = np.linalg.eigh(diff)
    scale = max(float(np.max(np.abs(vals))), 1e-300)
    tol = scale * 1e-10 * len(vals)
    positive = vals > tol
    negative = vals < -tol
    pd = bool(positive.all())
    proj = vecs[:, positive].T @ d
    stat = float(np.sum(proj**2 / vals[positive])) if positive.any() else 0.0
    rank = int(positive.sum())
    dof = rank if df is None else min(df, rank) if rank else df
    note = None
    if not pd:
        note = (
            f"the difference of the covariance matrices is not positive definite "
            f"({int(negative.sum())} negative, {len(vals) - rank - int(negative.sum())} zero eigenvalues); "
            f"the statistic uses the {rank} positive directions only"
        )
    p = float(chi2_sf(stat, dof)) if dof > 0 else None
    return WaldTest(stat, dof, p, pd, note)


@dataclass(frozen=True)
class Mundlak:
    """Mundlak (1978) correlated random effects: pooled OLS on [1, X, Z, X means], clustered by unit."""

    fit: Fit
    joint: WaldTest
    per_column: tuple[dict[str, Any], ...]

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``tests.mundlak``."""
        out = self.joint.to_dict()
        out["per_column"] = [dict(r) for r in self.per_column]
        return out


def mundlak(
    pa: PanelArrays,
    mean_columns: list[str] | None = None,
    tested: list[str] | None = None,
    within_fit: tuple[Fit, np.ndarray] | None = None,
) -> Mundlak:
    """The Mundlak regression and its joint and per-column tests of the X-mean coefficients.

    ``mean_columns``: the X columns whose unit means enter (default every X; leave out
    only means that are exact linear combinations of [1, Z, the other means]).
    ``tested``: the means in the joint test and the per-column rows (default every
    mean that enters). Per-column t = coefficient / clustered se, two-sided normal p.
    ``within_fit``: the (Fit, residuals) of :func:`within` on ``pa``, when known.

    Computed without the N x K pooled design: since X - X means is orthogonal to every
    unit-level column, the pooled OLS splits into the within fit and a T_i-weighted
    regression of the unit means of y on U = [1, Z, X means], and the clustered scores
    into the within scores and U_i T_i r_i (r_i the unit-level residual). The
    coefficients and both covariances are mapped back to [1, X, Z, X means]; the
    tests check them against statsmodels' pooled OLS.
    """
    cols = list(pa.x_names) if mean_columns is None else list(mean_columns)
    tested_cols = cols if tested is None else [c for c in tested if c in cols]
    kx, kz = len(pa.x_names), len(pa.z_names)
    wf, ew = within_fit if within_fit is not None else within(pa)
    xi = [pa.x_names.index(c) for c in cols]
    u = np.column_stack([np.ones(pa.n), pa.zbar, pa.xbar[:, xi]])
    p = u.shape[1]
    t_i = pa.counts
    utwu = u.T @ (t_i[:, None] * u)
    bread_u = _inv(utwu)
    delta = bread_u @ (u.T @ (t_i * pa.ybar))
    r = pa.ybar - u @ delta
    # J maps beta into U's coordinates: X means enter as X_bar beta = U J beta
    jmat = np.zeros((p, kx))
    for k, c in enumerate(pa.x_names):  # loop over the few columns
        if c in cols:
            jmat[1 + kz + cols.index(c), k] = 1.0
        else:
            jmat[:, k] = np.linalg.lstsq(u, pa.xbar[:, k], rcond=None)[0]
    beta = wf.coef
    c_vec = delta - jmat @ beta
    nobs = pa.nobs
    k_all = kx + p
    dfr = nobs - k_all
    ee = float(ew @ ew) + float(t_i @ (r**2))
    sigma2 = ee / max(dfr, 1)
    bread_w = wf.bread if wf.bread is not None else np.zeros((0, 0))
    bread = np.zeros((k_all, k_all))
    bread[:kx, :kx] = bread_w
    bread[kx:, kx:] = bread_u
    scores = np.column_stack([grouper(pa.codes, pa.n).weighted_sums(ew, pa.x), u * (t_i * r)[:, None]])
    factor = (pa.n / (pa.n - 1.0)) * ((nobs - 1.0) / max(nobs - k_all, 1)) if pa.n > 1 else np.nan
    cov_new = sigma2 * bread
    cl_new = factor * (bread @ (scores.T @ scores) @ bread)
    # from (beta, delta) to the output order (const, X, Z, means): c = delta - J beta
    tmat = np.zeros((k_all, k_all))
    tmat[1 : 1 + kx, :kx] = np.eye(kx)
    rows_u = [0, *range(1 + kx, 1 + kx + kz), *range(1 + kx + kz, k_all)]
    for a, row in enumerate(rows_u):
        tmat[row, kx + a] = 1.0
        tmat[row, :kx] = -jmat[a]
    coef = np.concatenate([[c_vec[0]], beta, c_vec[1 : 1 + kz], c_vec[1 + kz :]])
    mean_names = tuple(f"mean({c})" for c in cols)
    fit = Fit((CONST, *pa.x_names, *pa.z_names, *mean_names), coef, tmat @ cov_new @ tmat.T,
              tmat @ cl_new @ tmat.T, sigma2, int(dfr), nobs)
    idx = fit.index([f"mean({c})" for c in tested_cols])
    b = fit.coef[idx]
    v = fit.cov_cluster[np.ix_(idx, idx)]
    joint = wald(b, v)
    se = np.sqrt(np.clip(np.diag(v), 0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = b / se
    rows = tuple(
        {"column": c, "coef": _num(bi), "t": _num(ti), "p": _num(2 * normal_sf(abs(ti))) if np.isfinite(ti) else None}
        for c, bi, ti in zip(tested_cols, b, t, strict=True)
    )
    return Mundlak(fit, joint, rows)


def hausman_within_random(wf: Fit, re: Fit, columns: list[str] | None = None) -> WaldTest:
    """Hausman test of within against random effects on the time-varying coefficients.

    ``columns`` limits the comparison (default every within coefficient).
    """
    cols = list(wf.names) if columns is None else list(columns)
    i_re, i_w = re.index(cols), wf.index(cols)
    return contrast(re.coef[i_re], re.cov[np.ix_(i_re, i_re)], wf.coef[i_w], wf.cov[np.ix_(i_w, i_w)])


# --------------------------------------------------------------------------- Hausman-Taylor


@dataclass(frozen=True)
class HausmanTaylor:
    """The Hausman-Taylor (1981) fit, its variance components and over-identification tests.

    ``c_tests`` holds, per X1 mean instrument, the difference-in-Sargan (C) test of that
    mean: C = (e'P_A e - e_r'P_Ar e_r) / (e'e / N), the full instrument set A against A
    without that mean at the same theta, scaled by the full model's residual variance
    (Eichenbaum, Hansen and Singleton 1988; Hayashi 2000, section 3.6), chi-square 1 df;
    None unless the remaining means still over-identify the model (with a single
    over-identifying restriction every C equals the Sargan statistic and cannot say
    which instrument is at fault). ``rest_sargan`` holds the Sargan statistic of the
    instrument set without that mean: a C test is only meaningful when that rest is
    itself accepted.
    """

    fit: Fit
    components: Components
    sargan: WaldTest | None
    hausman_within: WaldTest | None
    c_tests: dict[str, WaldTest | None] = field(default_factory=dict)
    rest_sargan: dict[str, WaldTest] = field(default_factory=dict)


def _reorder(fit: Fit, names: list[str]) -> Fit | None:
    """``fit`` with its coefficients in the order ``names`` (None when the sets differ)."""
    if sorted(fit.names) != sorted(names):
        return None
    i = fit.index(names)
    return Fit(tuple(names), fit.coef[i], fit.cov[np.ix_(i, i)], fit.cov_cluster[np.ix_(i, i)], fit.sigma2,
               fit.df_resid, fit.nobs)


def hausman_taylor(
    pa: PanelArrays,
    x1: list[str],
    x2: list[str],
    z1: list[str],
    z2: list[str],
    within_fit: Fit | None = None,
    mean_instruments: list[str] | None = None,
) -> HausmanTaylor | None:
    """The Hausman-Taylor estimator exactly as methods.md section 4; None when k1 < g2.

    Coefficients are ordered X1, X2, const, Z1, Z2. ``mean_instruments`` names the X1
    columns whose unit means serve as instruments (default all X1; period dummies are
    left out by the caller) and k1 counts them. The Sargan statistic (N times the
    uncentred R2 of the transformed residuals on the instruments) and the contrast
    with the within fit are given when k1 > g2, else None.
    """
    means = list(x1) if mean_instruments is None else list(mean_instruments)
    k1, g2 = len(means), len(z2)
    if k1 < g2:
        return None
    sub = pa.select(x1 + x2, z1 + z2)
    wf = _reorder(within_fit, x1 + x2) if within_fit is not None else None
    if wf is None:
        wf = within(sub)[0]
    sigma2_e = wf.sigma2
    nx = len(x1) + len(x2)
    xbar1 = sub.xbar[:, [sub.x_names.index(c) for c in means]]
    zi = sub.zbar
    # step 2: unit-level 2SLS of d on [1, Z1, Z2], instruments [1, Z1, X1 means]
    d = sub.ybar - sub.xbar @ wf.coef if nx else sub.ybar.copy()
    design_u = np.column_stack([np.ones(sub.n), zi])
    instr_u = np.column_stack([np.ones(sub.n), zi[:, : len(z1)], xbar1])
    unit_codes = np.arange(sub.n)
    _, r = tsls(design_u, instr_u, d, (CONST, *z1, *z2), unit_codes, sub.n)
    sigma2_u = max(0.0, float(np.mean(r**2)) - sigma2_e * float(np.mean(1.0 / sub.counts)))
    theta = _theta(sigma2_e, sigma2_u, sub.counts)
    full = _ht_arrays(sub, x1, x2, z1, z2, means, theta)
    L = sub.x.shape[1] + len(means) + 1 + len(z1)
    K = 1 + sub.x.shape[1] + sub.z.shape[1]
    instr, design, ys = full[:, :L], full[:, L : L + K], full[:, L + K]
    gram = full.T @ full
    names = (*x1, *x2, CONST, *z1, *z2)
    fit, _ = tsls(design, instr, ys, names, sub.codes, sub.n, gram=gram)
    ia, iw, iy = list(range(L)), list(range(L, L + K)), L + K
    base = _gram_iv(gram, ia, iw, iy)
    sargan = hw = None
    # an exact fit (no residual variation, e.g. a tiny panel) leaves both statistics undefined
    exact = not base.e_e > 0
    if k1 > g2:
        dof = k1 - g2
        if not exact:
            stat = float(sub.nobs * base.e_pa_e / base.e_e)
            sargan = WaldTest(stat, dof, float(chi2_sf(stat, dof)))
        idx = list(range(nx))
        hw = contrast(fit.coef[idx], fit.cov[np.ix_(idx, idx)], wf.coef, wf.cov, df=dof)
    c_tests: dict[str, WaldTest | None] = {}
    rest_sargan: dict[str, WaldTest] = {}
    # the unit means sit after the len(x1) + len(x2) within deviations in the instruments
    first_mean = nx
    scale = base.e_e / sub.nobs
    for j, c in enumerate(means):  # loop over the few X1 means
        if len(means) - 1 <= g2 or exact:  # the rest just identified: every C would equal the Sargan
            c_tests[c] = None
            continue
        keep = [i for i in ia if i != first_mean + j]
        restricted = _gram_iv(gram, keep, iw, iy)
        stat = max(0.0, (base.e_pa_e - restricted.e_pa_e) / scale)
        c_tests[c] = WaldTest(stat, 1, float(chi2_sf(stat, 1)))
        if restricted.e_e > 0:
            rest = float(sub.nobs * restricted.e_pa_e / restricted.e_e)
            dof_r = len(means) - 1 - g2
            rest_sargan[c] = WaldTest(rest, dof_r, float(chi2_sf(rest, dof_r)))
    return HausmanTaylor(fit, Components(sigma2_u, sigma2_e, theta), sargan, hw, c_tests, rest_sargan)


def _ht_arrays(
    sub: PanelArrays, x1: list[str], x2: list[str], z1: list[str], z2: list[str], means: list[str],
    theta: np.ndarray,
) -> np.ndarray:
    """Steps 3-4 of Hausman-Taylor in one (N, L + K + 1) array: the instruments
    A = [X - X means, X1 means, 1, Z1], the transformed design (X1, X2, const, Z1, Z2)
    and the transformed outcome, filled column by column."""
    nx = len(x1) + len(x2)
    nz = sub.z.shape[1]
    L = nx + len(means) + 1 + len(z1)
    K = 1 + nx + nz
    full = np.empty((sub.nobs, L + K + 1), order="F")  # columns contiguous: filled one by one
    codes = sub.codes
    buf = np.empty(sub.nobs)
    for j in range(nx):  # loop over columns, never over units
        np.take(np.ascontiguousarray(sub.xbar[:, j]), codes, out=buf, mode="clip")
        np.subtract(sub.x[:, j], buf, out=full[:, j])
    for m, c in enumerate(means):
        np.take(np.ascontiguousarray(sub.xbar[:, sub.x_names.index(c)]), codes, out=full[:, nx + m], mode="clip")
    full[:, nx + len(means)] = 1.0
    for j in range(len(z1)):
        full[:, nx + len(means) + 1 + j] = sub.z[:, j]
    # design order X1, X2, const, Z1, Z2 from the const, X, Z order of _quasi_demean
    order = [L + nx] + [L + j for j in range(nx)] + [L + nx + 1 + j for j in range(nz)]
    _, ys = _quasi_demean(sub, theta, out=full[:, L : L + K], order=[o - L for o in order])
    full[:, L + K] = ys
    return full
