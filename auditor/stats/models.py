"""The diagnostic estimators: within, between, random effects (Swamy-Arora), Mundlak,
Hausman-Taylor, and the Hausman and Sargan tests (methods.md section 4).

Everything works on numpy arrays with integer unit codes 0..n-1: unit means come
from a sparse unit-indicator product, never from a loop over units, and no n x n or
N x n matrix is ever formed (unit dummies exist in the tests only). Each fit carries
classical standard errors (``se``) and standard errors clustered by unit
(``se_cluster``). Which columns each fit takes is decided by the caller
(auditor.stats.identification); these functions fit what they are given.

Conventions chosen here (README states the same):
- cluster-robust covariances use the small-sample factor G/(G-1) * (N-1)/(N-K)
  (common practice; G = units, K = estimated coefficients of that fit);
- the random-effects and Hausman-Taylor residual variance is e'e / (N - K);
- Hausman contrasts scale the efficient fit's covariance to the within fit's
  sigma2_e, so that the difference of the two covariances is positive semi-definite
  with an exact rank (common practice);
- Wald statistics are referred to the chi-square distribution, single coefficients
  to the standard normal.

Numerical care: every design with a constant column is fitted with its other
columns orthogonalised against that column first (and the constant mapped back), and
every cross-product matrix is inverted after scaling it to a unit diagonal, so adding
a large number to a column or changing its units moves no coefficient beyond
rounding.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from auditor.stats.pvalues import chi2_sf, normal_sf

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


def gather(unit_values: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """A per-unit vector spread to the rows (``unit_values[codes]`` without holding the interpreter lock)."""
    out = np.empty(codes.shape[0])
    np.take(np.ascontiguousarray(unit_values), codes, out=out, mode="clip")
    return out


@dataclass(frozen=True)
class PanelArrays:
    """The numeric panel a model sees: rows with every used column present.

    ``codes`` are unit codes 0..n-1 (every code present), ``x`` the time-varying
    regressors in levels (N, kx), period effects included, and ``z`` the
    time-invariant ones without the constant (N, kz).

    ``weights`` (per row) and ``unit_rows`` (T_i per unit) are given when the rows are
    the equivalent rows of :func:`auditor.stats.moments.equivalent_rows` (the dask engine):
    every unit's rows then carry equal weights summing to T_i, and every weighted sum
    of products equals the sum over the panel's own rows. Each fit scales its rows by
    the square roots of the weights (:meth:`scaled`); ``nobs`` is then the sum of T_i.
    """

    codes: np.ndarray
    n: int
    y: np.ndarray
    x: np.ndarray
    x_names: tuple[str, ...]
    z: np.ndarray
    z_names: tuple[str, ...]
    weights: np.ndarray | None = None
    unit_rows: np.ndarray | None = None
    means: np.ndarray | None = None  # given unit means (n, 1 + kx + kz) of [y, X, Z], with equivalent rows
    counts: np.ndarray = field(init=False, repr=False)
    ybar: np.ndarray = field(init=False, repr=False)
    xbar: np.ndarray = field(init=False, repr=False)
    zbar: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        rows = np.bincount(self.codes, minlength=self.n).astype(float)  # equal weights within a unit
        counts = rows if self.unit_rows is None else np.asarray(self.unit_rows, dtype=float)
        object.__setattr__(self, "counts", counts)
        if self.means is not None:  # the unit moments' own means, exact where the rows' would round
            kx = _two_d(self.x).shape[1]
            object.__setattr__(self, "ybar", np.ascontiguousarray(self.means[:, 0]))
            object.__setattr__(self, "xbar", np.ascontiguousarray(self.means[:, 1 : 1 + kx]))
            object.__setattr__(self, "zbar", np.ascontiguousarray(self.means[:, 1 + kx :]))
            return
        object.__setattr__(self, "ybar", unit_means(self.codes, self.n, self.y, rows))
        object.__setattr__(self, "xbar", unit_means(self.codes, self.n, _two_d(self.x), rows))
        object.__setattr__(self, "zbar", unit_means(self.codes, self.n, _two_d(self.z), rows))

    @property
    def nobs(self) -> int:
        """N, the number of the panel's rows (the sum of T_i)."""
        return int(self.y.shape[0]) if self.unit_rows is None else int(round(float(self.counts.sum())))

    @property
    def rows(self) -> int:
        """The number of rows held (N, or fewer equivalent rows)."""
        return int(self.y.shape[0])

    def scaled(self, a: np.ndarray) -> np.ndarray:
        """``a`` (rows, or rows x columns) with each row times the square root of its weight,
        in place; ``a`` itself without weights."""
        if self.weights is None:
            return a
        root = np.sqrt(self.weights)
        a *= root if a.ndim == 1 else root[:, None]
        return a

    @property
    def balanced_counts(self) -> bool:
        """True when every unit has the same number of rows."""
        return bool(self.counts.size == 0 or np.all(self.counts == self.counts[0]))

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

    def select(self, x_cols: list[str] | tuple[str, ...], z_cols: list[str] | tuple[str, ...]) -> PanelArrays:
        """The same panel with only the named X and Z columns (in the given order)."""
        xi = [self.x_names.index(c) for c in x_cols]
        zi = [self.z_names.index(c) for c in z_cols]
        out = object.__new__(PanelArrays)
        values = {
            "codes": self.codes, "n": self.n, "y": self.y, "x": self.x[:, xi], "x_names": tuple(x_cols),
            "z": self.z[:, zi], "z_names": tuple(z_cols), "counts": self.counts, "ybar": self.ybar,
            "xbar": self.xbar[:, xi], "zbar": self.zbar[:, zi], "weights": self.weights, "unit_rows": self.unit_rows,
            "means": None,
        }
        for key, value in values.items():  # the unit means are reused, not recomputed
            object.__setattr__(out, key, value)
        return out

    def within_deviations(self, cols: list[str] | tuple[str, ...]) -> np.ndarray:
        """X - X_bar_i for the named X columns, (N, k) column-major, filled column by column."""
        out = np.empty((self.rows, len(cols)), order="F")
        for k, c in enumerate(cols):  # loop over columns, never over units
            j = self.x_names.index(c)
            np.take(np.ascontiguousarray(self.xbar[:, j]), self.codes, out=out[:, k], mode="clip")
            np.subtract(self.x[:, j], out[:, k], out=out[:, k])
        return out


def _two_d(a: np.ndarray) -> np.ndarray:
    return a.reshape(-1, 1) if a.ndim == 1 else a


# --------------------------------------------------------------------------- numerics


def equilibrated_inv(m: np.ndarray) -> np.ndarray:
    """The inverse of a symmetric positive semi-definite ``m``, computed after scaling it to a
    unit diagonal (so columns in cents or in millions invert alike); a pseudo-inverse when singular."""
    if m.size == 0:
        return m.copy()
    d = np.sqrt(np.clip(np.diag(m), 0.0, None))
    s = np.where(d > 0, 1.0 / np.where(d > 0, d, 1.0), 1.0)
    ms = m * s[:, None] * s[None, :]
    try:
        inv = np.linalg.inv(ms)
    except np.linalg.LinAlgError:
        inv = np.linalg.pinv(ms, hermitian=True)
    return inv * s[:, None] * s[None, :]


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


def orthogonalise(columns: np.ndarray, const: np.ndarray, skip: int | None = None) -> np.ndarray:
    """Subtract from each column of ``columns`` (in place) its projection on ``const``.

    Returns the projection coefficients s (zero at ``skip``, the position of the constant
    column itself, if it is among ``columns``). A column plus 30,000 becomes the same
    numbers as the column alone, so cross-products keep their digits.
    """
    cc = float(const @ const)
    k = columns.shape[1]
    s = np.zeros(k)
    if cc <= 0:
        return s
    for j in range(k):  # loop over columns
        if j == skip:
            continue
        s[j] = float(const @ columns[:, j]) / cc
        if s[j] != 0.0:
            columns[:, j] -= s[j] * const
    return s


def restore_constant(coef: np.ndarray, covs: list[np.ndarray], k: int, shifts: np.ndarray,
                      y_shift: float) -> tuple[np.ndarray, list[np.ndarray]]:
    """Coefficients and covariances of the original design from those of the design whose
    columns were orthogonalised against column ``k`` (the constant) with coefficients
    ``shifts``, the outcome with ``y_shift``: b_k = b_k' + y_shift - shifts . b'."""
    m = np.eye(len(coef))
    m[k, :] -= shifts
    m[k, k] = 1.0
    out = m @ coef
    out[k] += y_shift
    return out, [m @ v @ m.T for v in covs]


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


def ols(
    design: np.ndarray,
    y: np.ndarray,
    names: tuple[str, ...] | list[str],
    codes: np.ndarray,
    n: int,
    *,
    df_resid: int | None = None,
    bread: np.ndarray | None = None,
    const_col: int | None = None,
    overwrite: bool = False,
    nobs: int | None = None,
) -> tuple[Fit, np.ndarray]:
    """Least squares of ``y`` on ``design`` (N, K); returns (Fit, residuals).

    ``df_resid`` overrides N - K (the within fit uses N - n - K); ``bread`` is
    (design' design)^-1 when already known (several outcomes on one design; not with
    ``const_col``). ``const_col`` names the position of the constant (or transformed
    constant) column: the other columns are orthogonalised against it before the
    cross-products, and the constant's coefficient is mapped back. ``overwrite`` lets
    that step work in ``design`` itself. ``nobs``: the panel's rows when ``design`` holds
    weighted equivalent rows (scaled by the square roots of their weights).
    """
    rows, k = design.shape
    nobs = rows if nobs is None else nobs
    if k == 0:
        e = y.copy()
        dfr = nobs if df_resid is None else df_resid
        empty = np.zeros((0, 0))
        return Fit(tuple(names), np.zeros(0), empty, empty, float(e @ e / max(dfr, 1)), dfr, nobs), e
    shifts, y_shift = None, 0.0
    if const_col is not None:
        design = design if overwrite else np.array(design, order="F")
        c = design[:, const_col]
        shifts = orthogonalise(design, c, skip=const_col)
        y_shift = float(c @ y) / float(c @ c) if float(c @ c) > 0 else 0.0
        y = y - y_shift * c
        bread = None
    if bread is None:
        bread = equilibrated_inv(design.T @ design)
    coef = bread @ (design.T @ y)
    e = y - design @ coef
    dfr = nobs - k if df_resid is None else df_resid
    sigma2 = float(e @ e) / max(dfr, 1)
    cov = sigma2 * bread
    cov_cl = _cluster_cov(bread, design, e, codes, n, nobs)
    if shifts is not None:
        coef, (cov, cov_cl) = restore_constant(coef, [cov, cov_cl], const_col, shifts, y_shift)
    return Fit(tuple(names), coef, cov, cov_cl, sigma2, int(dfr), nobs), e


@dataclass(frozen=True)
class GramIV:
    """2SLS pieces from one cross-product matrix of [instruments, design, y]."""

    coef: np.ndarray
    proj: np.ndarray  # instruments -> fitted design (L, K)
    bread: np.ndarray  # (W'P W)^-1
    e_pa_e: float  # e' P_A e
    e_e: float  # e' e


def gram_iv(g: np.ndarray, ia: list[int], iw: list[int], iy: int) -> GramIV:
    saa = g[np.ix_(ia, ia)]
    saw = g[np.ix_(ia, iw)]
    say = g[ia, iy]
    proj = _solve_sym(saa, saw)
    wpw = saw.T @ proj
    wpw = (wpw + wpw.T) / 2.0
    bread = equilibrated_inv(wpw)
    coef = bread @ (proj.T @ say)
    ae = say - saw @ coef
    e_pa_e = float(ae @ _solve_sym(saa, ae))
    sww = g[np.ix_(iw, iw)]
    e_e = float(g[iy, iy] - 2.0 * coef @ g[iw, iy] + coef @ sww @ coef)
    return GramIV(coef, proj, bread, e_pa_e, max(e_e, 0.0))


@dataclass(frozen=True)
class _IVArrays:
    """[instruments, design, y] in one column-major array, the design's and the instruments'
    constants orthogonalised out of their other columns; enough to map the constant back."""

    full: np.ndarray
    n_instr: int
    n_design: int
    design_const: int | None
    shifts: np.ndarray | None
    y_shift: float


def _iv_arrays(full: np.ndarray, n_instr: int, n_design: int, instr_const: int | None,
               design_const: int | None) -> _IVArrays:
    """Orthogonalise, in place, the instruments on their constant column and the design and
    outcome (the last column) on the design's constant column (positions within each block)."""
    if instr_const is not None:
        a = full[:, :n_instr]
        orthogonalise(a, a[:, instr_const].copy(), skip=instr_const)
    shifts, y_shift = None, 0.0
    if design_const is not None:
        block = full[:, n_instr:]
        c = block[:, design_const].copy()
        allshift = orthogonalise(block, c, skip=design_const)
        shifts, y_shift = allshift[:n_design], float(allshift[n_design])
    return _IVArrays(full, n_instr, n_design, design_const, shifts, y_shift)


def tsls(
    design: np.ndarray,
    instruments: np.ndarray,
    y: np.ndarray,
    names: tuple[str, ...] | list[str],
    codes: np.ndarray,
    n: int,
    *,
    instr_const: int | None = None,
    design_const: int | None = None,
) -> tuple[Fit, np.ndarray]:
    """Two-stage least squares of ``y`` on ``design`` with ``instruments``; returns (Fit, residuals).

    ``instr_const`` / ``design_const`` are the positions of the constant columns (the
    other columns are orthogonalised against them first). Residual variance
    e'e / (N - K), e the structural residuals.
    """
    full = np.asfortranarray(np.column_stack([instruments, design, y]))
    prepared = _iv_arrays(full, instruments.shape[1], design.shape[1], instr_const, design_const)
    return _tsls_prepared(prepared, prepared.full.T @ prepared.full, names, codes, n)


def _tsls_prepared(prepared: _IVArrays, gram: np.ndarray, names: tuple[str, ...] | list[str],
                   codes: np.ndarray, n: int, nobs: int | None = None) -> tuple[Fit, np.ndarray]:
    """2SLS from arrays built by :func:`_iv_arrays` and their cross-product matrix ``gram``
    (one pass more for residuals and clustered scores); ``nobs`` as in :func:`ols`."""
    full, L, k = prepared.full, prepared.n_instr, prepared.n_design
    nobs = full.shape[0] if nobs is None else nobs
    piv = gram_iv(gram, list(range(L)), list(range(L, L + k)), L + k)
    coef = piv.coef
    a, w, yy = full[:, :L], full[:, L : L + k], full[:, L + k]
    e = yy - w @ coef
    fitted = a @ piv.proj
    dfr = nobs - k
    sigma2 = float(e @ e) / max(dfr, 1)
    cov = sigma2 * piv.bread
    cov_cl = _cluster_cov(piv.bread, fitted, e, codes, n, nobs)
    if prepared.shifts is not None:
        coef, (cov, cov_cl) = restore_constant(coef, [cov, cov_cl], prepared.design_const, prepared.shifts,
                                                prepared.y_shift)
    return Fit(tuple(names), coef, cov, cov_cl, sigma2, int(dfr), nobs), e


def within(pa: PanelArrays, columns: list[str] | tuple[str, ...] | None = None) -> tuple[Fit, np.ndarray]:
    """The within (fixed-effects) fit on the named time-varying columns (default all of X);
    returns (Fit, residuals).

    sigma2 = e'e / (N - n - K_X) (methods.md section 4).
    """
    cols = list(pa.x_names) if columns is None else list(columns)
    xw = pa.scaled(pa.within_deviations(cols))
    yw = pa.scaled(pa.y - gather(pa.ybar, pa.codes))
    dfr = pa.nobs - pa.n - xw.shape[1]
    return ols(xw, yw, cols, pa.codes, pa.n, df_resid=dfr, nobs=pa.nobs)


def between(pa: PanelArrays, mean_columns: list[str] | None = None,
            z_columns: list[str] | None = None) -> tuple[Fit, np.ndarray]:
    """OLS of the unit means of y on [1, X means, Z] with n rows; returns (Fit, residuals).

    ``mean_columns`` limits the X means to those columns (default every X, period
    effects included when they are in X), ``z_columns`` the Z columns (default all).
    """
    cols = list(pa.x_names) if mean_columns is None else list(mean_columns)
    zcols = list(pa.z_names) if z_columns is None else list(z_columns)
    xi = [pa.x_names.index(c) for c in cols]
    zi = [pa.z_names.index(c) for c in zcols]
    design = np.column_stack([np.ones(pa.n), pa.xbar[:, xi], pa.zbar[:, zi]])
    names = (CONST, *cols, *zcols)
    return ols(design, pa.ybar, names, np.arange(pa.n), pa.n, const_col=0, overwrite=True)


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


def quasi_demean(pa: PanelArrays, theta: np.ndarray, out: np.ndarray | None = None,
                  order: list[int] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """[1, X, Z] and y transformed to w - theta_i w_bar_i, filled column by column.

    ``out`` (N, 1 + kx + kz) receives the design (columns placed at ``order``, default
    in the order const, X, Z) so that no extra N x K copy is made.
    """
    th = np.take(theta, pa.codes, mode="clip")
    kx, kz = pa.x.shape[1], pa.z.shape[1]
    k = 1 + kx + kz
    design = np.empty((pa.rows, k), order="F") if out is None else out  # columns filled one by one
    pos = list(range(k)) if order is None else order
    np.subtract(1.0, th, out=design[:, pos[0]])
    buf = np.empty(pa.rows)
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
    """Swamy-Arora random effects on [1, X, Z] of ``pa`` (select the columns first); returns (Fit, Components).

    sigma2_e from the within fit; sigma2_u = max(0, sigma2_b - sigma2_e * mean_i(1/T_i)),
    sigma2_b the between residual variance with n - K_b degrees of freedom.
    """
    wf = within_fit if within_fit is not None else within(pa)[0]
    bf = between_fit if between_fit is not None else between(pa)[0]
    sigma2_e = wf.sigma2
    sigma2_u = max(0.0, bf.sigma2 - sigma2_e * float(np.mean(1.0 / pa.counts)))
    theta = _theta(sigma2_e, sigma2_u, pa.counts)
    design, ys = quasi_demean(pa, theta)
    fit, _ = ols(pa.scaled(design), pa.scaled(ys), (CONST, *pa.x_names, *pa.z_names), pa.codes, pa.n, const_col=0,
                 overwrite=True, nobs=pa.nobs)
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
    inv = equilibrated_inv(cov)
    stat = float(coef @ inv @ coef)
    return WaldTest(stat, k, float(chi2_sf(stat, k)))


#: eigenvalues of the whitened covariance difference at or below this count as zero
RANK_TOL = 1e-9


def contrast(b_eff: np.ndarray, v_eff: np.ndarray, b_cons: np.ndarray, v_cons: np.ndarray) -> WaldTest:
    """Hausman contrast of a consistent estimate (``b_cons``) against an efficient one.

    H = d' (V_cons - V_eff)^+ d with d = b_cons - b_eff, computed in the coordinates where
    V_cons is the identity: there the difference is I - V_eff~, whose eigenvalues are the
    shares of each direction's variance that the efficient fit removes (scale-free), and
    the degrees of freedom are the number of them above RANK_TOL (the rank of the
    difference). Negative eigenvalues mean the difference is not positive definite: the
    statistic then uses the positive directions only and says so.
    """
    d = b_cons - b_eff
    if d.size == 0:
        return WaldTest(None, 0, None)
    vc = (v_cons + v_cons.T) / 2.0
    vals_c, vecs_c = np.linalg.eigh(vc)
    top = max(float(np.max(vals_c)), 1e-300)
    keep = vals_c > top * 1e-14
    whiten = vecs_c[:, keep] / np.sqrt(vals_c[keep])  # V_cons^(-1/2) on its range
    m = np.eye(int(keep.sum())) - whiten.T @ ((v_eff + v_eff.T) / 2.0) @ whiten
    mu, q = np.linalg.eigh((m + m.T) / 2.0)
    positive = mu > RANK_TOL
    negative = mu < -RANK_TOL
    proj = q[:, positive].T @ (whiten.T @ d)
    stat = float(np.sum(proj**2 / mu[positive])) if positive.any() else 0.0
    rank = int(positive.sum())
    # reported as positive definite unless a direction has a negative eigenvalue: a difference of
    # lower rank (within vs Hausman-Taylor has rank k1 - g2) is what the theory gives, and df says it
    pd = not bool(negative.any())
    note = None
    if negative.any():
        note = (
            f"the difference of the covariance matrices is not positive definite "
            f"({int(negative.sum())} negative, {len(mu) - rank - int(negative.sum())} zero eigenvalues); "
            f"the statistic uses the {rank} positive directions only"
        )
    p = float(chi2_sf(stat, rank)) if rank > 0 else None
    return WaldTest(stat, rank, p, pd, note)


def scaled_cov(fit: Fit, sigma2: float) -> np.ndarray:
    """The classical covariance of ``fit`` rescaled to the residual variance ``sigma2``."""
    return fit.cov * (sigma2 / fit.sigma2) if fit.sigma2 > 0 else fit.cov


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
) -> Mundlak:
    """The Mundlak regression and its joint and per-column tests of the X-mean coefficients.

    Pooled OLS of y on [1, X, Z, X means of ``mean_columns``] (default every X),
    standard errors clustered by unit. ``tested``: the means in the joint test and the
    per-column rows (default every mean that enters); the others (for example the
    means of period dummies in an unbalanced panel) are controls. Per-column
    t = coefficient / clustered se, two-sided normal p.
    """
    cols = list(pa.x_names) if mean_columns is None else list(mean_columns)
    tested_cols = cols if tested is None else [c for c in tested if c in cols]
    kx, kz = len(pa.x_names), len(pa.z_names)
    design = np.empty((pa.rows, 1 + kx + kz + len(cols)), order="F")  # columns filled one by one
    design[:, 0] = 1.0
    design[:, 1 : 1 + kx] = pa.x
    design[:, 1 + kx : 1 + kx + kz] = pa.z
    for k, c in enumerate(cols):  # loop over columns
        np.take(np.ascontiguousarray(pa.xbar[:, pa.x_names.index(c)]), pa.codes,
                out=design[:, 1 + kx + kz + k], mode="clip")
    mean_names = tuple(f"mean({c})" for c in cols)
    fit, _ = ols(pa.scaled(design), pa.scaled(pa.y.copy()), (CONST, *pa.x_names, *pa.z_names, *mean_names),
                 pa.codes, pa.n, const_col=0, overwrite=True, nobs=pa.nobs)
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
    """Hausman test of within against random effects on the named time-varying coefficients
    (default every within coefficient), both covariances at the within fit's sigma2_e."""
    cols = list(wf.names) if columns is None else list(columns)
    i_re, i_w = re.index(cols), wf.index(cols)
    v_re = scaled_cov(re, wf.sigma2)
    return contrast(re.coef[i_re], v_re[np.ix_(i_re, i_re)], wf.coef[i_w], wf.cov[np.ix_(i_w, i_w)])


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
    itself accepted. ``k1`` and ``g2`` are the counts of the order condition.
    """

    fit: Fit
    components: Components
    sargan: WaldTest | None
    hausman_within: WaldTest | None
    c_tests: dict[str, WaldTest | None] = field(default_factory=dict)
    rest_sargan: dict[str, WaldTest] = field(default_factory=dict)
    k1: int = 0
    g2: int = 0
    unit_fit: Fit | None = None


def _reorder(fit: Fit, names: list[str]) -> Fit | None:
    """``fit`` with its coefficients in the order ``names`` (None when the sets differ)."""
    if sorted(fit.names) != sorted(names):
        return None
    i = fit.index(names)
    return Fit(tuple(names), fit.coef[i], fit.cov[np.ix_(i, i)], fit.cov_cluster[np.ix_(i, i)], fit.sigma2,
               fit.df_resid, fit.nobs)


@dataclass(frozen=True)
class HTSpec:
    """The Hausman-Taylor set-up: roles and which columns the within fit identifies.

    ``x1`` exogenous time-varying columns (period effects among them), ``x2`` correlated
    ones, ``z1`` and ``z2`` time-invariant; ``means`` the X1 columns whose unit means are
    instruments (period effects excluded); ``within`` the X columns whose within
    deviations the within fit identifies (they instrument themselves); ``compared`` the
    coefficients in the within vs Hausman-Taylor contrast (period effects excluded).
    An X1 column outside ``within`` is identified through its own unit mean alone (it
    acts as Z1 at the unit level); an X2 column outside it needs an excluded mean like
    a Z2 column.
    """

    x1: tuple[str, ...]
    x2: tuple[str, ...]
    z1: tuple[str, ...]
    z2: tuple[str, ...]
    means: tuple[str, ...]
    within: tuple[str, ...]
    compared: tuple[str, ...]

    @classmethod
    def plain(cls, x1: list[str], x2: list[str], z1: list[str], z2: list[str],
              means: list[str] | None = None) -> HTSpec:
        """Every X identified within, every X1 mean an instrument unless ``means`` says otherwise."""
        m = tuple(x1) if means is None else tuple(means)
        return cls(tuple(x1), tuple(x2), tuple(z1), tuple(z2), m, tuple(x1) + tuple(x2), tuple(x1) + tuple(x2))

    @property
    def x1_between_only(self) -> tuple[str, ...]:
        """X1 columns the within fit cannot identify (identified by their unit means)."""
        return tuple(c for c in self.means if c not in self.within)

    @property
    def x2_between_only(self) -> tuple[str, ...]:
        """X2 columns the within fit cannot identify (they need excluded means, like Z2)."""
        return tuple(c for c in self.x2 if c not in self.within)

    @property
    def k1(self) -> int:
        """Excluded unit means: the X1 means beyond those that identify their own column."""
        return len(self.means) - len(self.x1_between_only)

    @property
    def g2(self) -> int:
        """Unit-level endogenous columns: Z2 and the X2 columns identified between units only."""
        return len(self.z2) + len(self.x2_between_only)


def hausman_taylor(
    pa: PanelArrays,
    x1: list[str],
    x2: list[str],
    z1: list[str],
    z2: list[str],
    within_fit: Fit | None = None,
    mean_instruments: list[str] | None = None,
    spec: HTSpec | None = None,
) -> HausmanTaylor | None:
    """The Hausman-Taylor estimator exactly as methods.md section 4; None when k1 < g2.

    Coefficients are ordered X1, X2, const, Z1, Z2. ``mean_instruments`` names the X1
    columns whose unit means serve as instruments (default all X1; period effects are
    left out by the caller); ``spec`` gives the whole set-up instead (see HTSpec). The
    Sargan statistic (N times the uncentred R2 of the transformed residuals on the
    instruments) and the contrast with the within fit are given when k1 > g2, else None.
    """
    sp = spec if spec is not None else HTSpec.plain(x1, x2, z1, z2, mean_instruments)
    k1, g2 = sp.k1, sp.g2
    if k1 < g2:
        return None
    x1, x2, z1, z2 = list(sp.x1), list(sp.x2), list(sp.z1), list(sp.z2)
    means, wcols = list(sp.means), list(sp.within)
    sub = pa.select(x1 + x2, z1 + z2)
    wf = _reorder(within_fit, wcols) if within_fit is not None else None
    if wf is None:
        wf = within(sub, wcols)[0]
    sigma2_e = wf.sigma2
    unit_fit, theta, sigma2_u = _ht_unit_step(sub, sp, wf)
    nwc = len(wcols)
    L = nwc + len(means) + 1 + len(z1)
    K = 1 + len(x1) + len(x2) + len(z1) + len(z2)
    prepared = _iv_arrays(sub.scaled(_ht_arrays(sub, sp, theta)), L, K, instr_const=nwc + len(means), design_const=0)
    # design order in the arrays: const, X1, X2, Z1, Z2; reported as X1, X2, const, Z1, Z2
    gram = prepared.full.T @ prepared.full
    raw, _ = _tsls_prepared(prepared, gram, (CONST, *x1, *x2, *z1, *z2), sub.codes, sub.n, nobs=sub.nobs)
    fit = _reorder(raw, [*x1, *x2, CONST, *z1, *z2])
    ia, iw, iy = list(range(L)), list(range(L, L + K)), L + K
    base = gram_iv(gram, ia, iw, iy)
    sargan = hw = None
    # an exact fit (no residual variation, e.g. a tiny panel) leaves both statistics undefined
    exact = not base.e_e > 0
    if k1 > g2:
        dof = k1 - g2
        if not exact:
            stat = float(sub.nobs * base.e_pa_e / base.e_e)
            sargan = WaldTest(stat, dof, float(chi2_sf(stat, dof)))
        comp = [c for c in sp.compared if c in wcols]
        if comp:
            i_ht, i_w = fit.index(comp), wf.index(comp)
            v_ht = scaled_cov(fit, sigma2_e)
            hw = contrast(fit.coef[i_ht], v_ht[np.ix_(i_ht, i_ht)], wf.coef[i_w], wf.cov[np.ix_(i_w, i_w)])
    c_tests, rest_sargan = _c_tests(gram, base, sp, L, K, sub.nobs, exact)
    return HausmanTaylor(fit, Components(sigma2_u, sigma2_e, theta), sargan, hw, c_tests, rest_sargan,
                         k1, g2, unit_fit)


def _ht_unit_step(sub: PanelArrays, sp: HTSpec, wf: Fit) -> tuple[Fit, np.ndarray, float]:
    """Step 2: the unit-level 2SLS of d_i = y_bar_i - X_bar_i beta_W on [1, Z1, Z2 and the
    means of X columns the within fit cannot identify] with instruments [1, Z1, X1 means];
    returns (its fit, theta per unit, sigma2_u)."""
    wcols = list(sp.within)
    xw = [sub.x_names.index(c) for c in wcols]
    d = sub.ybar - sub.xbar[:, xw] @ wf.coef if wcols else sub.ybar.copy()
    zi = sub.zbar
    z1n = len(sp.z1)
    b1 = [sub.x_names.index(c) for c in sp.x1_between_only]
    b2 = [sub.x_names.index(c) for c in sp.x2_between_only]
    design_u = np.column_stack([np.ones(sub.n), zi[:, :z1n], sub.xbar[:, b1], zi[:, z1n:], sub.xbar[:, b2]])
    instr_u = np.column_stack([np.ones(sub.n), zi[:, :z1n], sub.xbar[:, [sub.x_names.index(c) for c in sp.means]]])
    names = (CONST, *sp.z1, *sp.x1_between_only, *sp.z2, *sp.x2_between_only)
    unit_fit, r = tsls(design_u, instr_u, d, names, np.arange(sub.n), sub.n, instr_const=0, design_const=0)
    sigma2_u = max(0.0, float(np.mean(r**2)) - wf.sigma2 * float(np.mean(1.0 / sub.counts)))
    return unit_fit, _theta(wf.sigma2, sigma2_u, sub.counts), sigma2_u


def _ht_arrays(sub: PanelArrays, sp: HTSpec, theta: np.ndarray) -> np.ndarray:
    """Steps 3-4 of Hausman-Taylor in one (N, L + K + 1) array: the instruments
    A = [X - X means (within-identified columns), X1 means, 1, Z1], the transformed
    design (const, X1, X2, Z1, Z2) and the transformed outcome, filled column by column."""
    wcols, means, z1 = list(sp.within), list(sp.means), list(sp.z1)
    nwc, nx, nz = len(wcols), len(sp.x1) + len(sp.x2), sub.z.shape[1]
    L = nwc + len(means) + 1 + len(z1)
    K = 1 + nx + nz
    full = np.empty((sub.rows, L + K + 1), order="F")  # columns contiguous: filled one by one
    full[:, :nwc] = sub.within_deviations(wcols)
    for m, c in enumerate(means):
        np.take(np.ascontiguousarray(sub.xbar[:, sub.x_names.index(c)]), sub.codes, out=full[:, nwc + m],
                mode="clip")
    full[:, nwc + len(means)] = 1.0
    for j in range(len(z1)):
        full[:, nwc + len(means) + 1 + j] = sub.z[:, j]
    _, ys = quasi_demean(sub, theta, out=full[:, L : L + K])
    full[:, L + K] = ys
    return full


def _c_tests(gram: np.ndarray, base: GramIV, sp: HTSpec, L: int, K: int, nobs: int,
             exact: bool) -> tuple[dict[str, WaldTest | None], dict[str, WaldTest]]:
    """Difference-in-Sargan test of each excluded X1 mean and the Sargan test of the rest."""
    c_tests: dict[str, WaldTest | None] = {}
    rest_sargan: dict[str, WaldTest] = {}
    ia, iw, iy = list(range(L)), list(range(L, L + K)), L + K
    first_mean = len(sp.within)  # the unit means sit after the within deviations
    scale = base.e_e / nobs
    for j, c in enumerate(sp.means):  # loop over the few X1 means
        if c in sp.x1_between_only:
            continue  # this mean identifies its own column: it is not an excluded instrument
        if sp.k1 - 1 <= sp.g2 or exact:  # the rest just identified: every C would equal the Sargan
            c_tests[c] = None
            continue
        keep = [i for i in ia if i != first_mean + j]
        restricted = gram_iv(gram, keep, iw, iy)
        stat = max(0.0, (base.e_pa_e - restricted.e_pa_e) / scale)
        c_tests[c] = WaldTest(stat, 1, float(chi2_sf(stat, 1)))
        if restricted.e_e > 0:
            rest = float(nobs * restricted.e_pa_e / restricted.e_e)
            dof_r = sp.k1 - 1 - sp.g2
            rest_sargan[c] = WaldTest(rest, dof_r, float(chi2_sf(rest, dof_r)))
    return c_tests, rest_sargan
