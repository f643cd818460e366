"""Which columns each fit can identify (methods.md section 4): the one place every fit asks.

Identification is decided per fit, each on its own design:

- within: the within deviations of the period effects, then of the time-varying
  regressors in the order given (so a trend-like regressor beside a full set of period
  effects is the one set aside, as textbooks treat potential experience);
- levels (random effects, Mundlak, Hausman-Taylor): [1, period effects, Z, X] in levels;
- between: the unit means [1, Z, X means, period-effect means]; period-effect means
  that are constant (a balanced panel) or redundant are simply not in that fit;
- Mundlak: the unit-level part [1, Z, means of X the within fit cannot identify,
  means of X it does identify (the tested ones), period-effect means (controls)].

Every rank decision is scale- and shift-free: columns are centred (within deviations
are centred by construction; levels columns on their overall mean, which is the
constant's part) and scaled to unit length, then taken in order; a column is set aside
when the share of its variation that the earlier kept columns leave unexplained is at
most ``tol``. Only that exact dependence sets a column aside; a column whose share is
below ``1 - near_r2`` stays in and is reported as nearly dependent.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from auditor.stats.models import PanelArrays

WITHIN = "within"
BETWEEN = "between"
LEVELS_FITS = ("between", "random", "mundlak", "hausman_taylor")
ALL_FITS = (WITHIN, *LEVELS_FITS)
CONST = "const"

_CHUNK = 1 << 19  # rows per block when cross-products are summed block by block


@dataclass(frozen=True)
class Dependence:
    """A column some fits cannot identify: why, on which kept columns it depends, which fits lose it."""

    column: str
    reason: str
    with_: tuple[str, ...]
    fits: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``not_identified`` entry: column, reason, with, fits."""
        return {"column": self.column, "reason": self.reason, "with": list(self.with_), "fits": list(self.fits)}


@dataclass(frozen=True)
class NearDependence:
    """A kept column that the earlier columns of a fit explain almost entirely."""

    column: str
    fit: str  # "within" or "levels"
    r2: float  # share of its (within or centred) variation explained by the earlier kept columns
    with_: tuple[str, ...]


@dataclass(frozen=True)
class Identification:
    """The columns each fit identifies; see the module docstring for the designs.

    ``within`` and ``levels`` list design columns (period effects among them) in the
    order the fits take them; ``between_means`` the X and period columns whose unit
    means the between fit keeps, ``between_z`` its Z columns; ``mundlak_tested`` the X
    columns whose unit means the Mundlak test examines and ``mundlak_controls`` the
    period columns whose means it keeps as controls.
    """

    periods: tuple[str, ...]
    x: tuple[str, ...]
    z: tuple[str, ...]
    within: tuple[str, ...]
    levels: tuple[str, ...]
    between_means: tuple[str, ...]
    between_z: tuple[str, ...]
    mundlak_tested: tuple[str, ...]
    mundlak_controls: tuple[str, ...]
    set_aside: tuple[Dependence, ...]
    near: tuple[NearDependence, ...]
    within_share: dict[str, float | None]
    moved_to_z: tuple[str, ...] = ()

    def identifies(self, fit: str, column: str) -> bool:
        """True when ``fit`` (a key of the estimates) can estimate ``column``'s coefficient."""
        if fit == WITHIN:
            return column in self.within
        if fit == BETWEEN:
            return column in self.between_means or column in self.between_z
        return column in self.levels

    def levels_x(self, x: Sequence[str]) -> list[str]:
        """The time-varying columns of ``x`` (period effects included) that the levels fits keep."""
        return [c for c in x if c in self.levels]

    def levels_z(self, z: Sequence[str]) -> list[str]:
        """The time-invariant columns of ``z`` that the levels fits keep."""
        return [c for c in z if c in self.levels]


@dataclass(frozen=True)
class _Pass:
    """One rank-revealing pass: kept positions, set-aside positions with what they depend
    on, and the unexplained share of every kept column."""

    kept: list[int]
    dependent: dict[int, list[int]]
    residual_share: dict[int, float]
    coefficients: dict[int, dict[int, float]]  # set-aside column: {kept column: coefficient, in column units}


def sequential_rank(gram: np.ndarray, tol: float) -> tuple[list[int], dict[int, list[int]]]:
    """Columns kept and set aside by a rank-revealing pass in the given column order.

    Equivalent to a QR factorisation with the columns taken in order: column j is set
    aside when its residual sum of squares, after projecting on the columns kept
    before it, is at most ``tol`` times its own. Works on the cross-product matrix of
    centred columns (scaled here to a unit diagonal). Returns (kept indices,
    {set-aside index: indices of the kept columns it depends on}).
    """
    p = _rank_pass(gram, tol)
    return p.kept, p.dependent


def _rank_pass(gram: np.ndarray, tol: float) -> _Pass:
    k = gram.shape[0]
    diag = np.diag(gram).copy()
    scale = np.where(diag > 0, 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0)), 0.0)
    g = gram * scale[:, None] * scale[None, :]
    kept: list[int] = []
    dependent: dict[int, list[int]] = {}
    share: dict[int, float] = {}
    coefficients: dict[int, dict[int, float]] = {}
    r = np.zeros((0, 0))  # Cholesky factor of the kept columns' scaled cross-products
    for j in range(k):  # loop over the few columns
        if diag[j] <= 0:
            dependent[j] = []
            continue
        c = g[kept, j]
        w = np.linalg.solve(r.T, c) if kept else np.zeros(0)
        resid = 1.0 - float(w @ w)
        if resid <= tol:
            coef = np.linalg.solve(r, w) if kept else np.zeros(0)
            dependent[j] = [kept[i] for i in range(len(kept)) if abs(coef[i]) > 1e-6]
            coefficients[j] = {kept[i]: float(coef[i] * scale[kept[i]] / scale[j]) for i in range(len(kept))}
            continue
        top = np.column_stack([r, w]) if kept else np.zeros((0, 1))
        bottom = np.concatenate([np.zeros(len(kept)), [np.sqrt(resid)]])
        r = np.vstack([top, bottom[None, :]])
        kept.append(j)
        share[j] = resid
    return _Pass(kept, dependent, share, coefficients)


def _blocked_gram(block: Callable[[int, int], np.ndarray], nrows: int, k: int,
                  weights: np.ndarray | None = None) -> np.ndarray:
    """sum over row blocks of block' W block (W the row weights, when given), so no
    centred N x k copy is held at once."""
    g = np.zeros((k, k))
    for start in range(0, nrows, _CHUNK):  # loop over row blocks, not rows
        stop = min(nrows, start + _CHUNK)
        b = block(start, stop)
        g += b.T @ (b if weights is None else b * weights[start:stop, None])
    return g


def _within_gram(pa: PanelArrays, cols: list[str]) -> np.ndarray:
    xi = [pa.x_names.index(c) for c in cols]
    xbar = pa.xbar[:, xi]

    def block(a: int, b: int) -> np.ndarray:
        return pa.x[a:b, xi] - xbar[pa.codes[a:b]]

    return _blocked_gram(block, pa.rows, len(cols), pa.weights)


def _levels_gram(pa: PanelArrays, xcols: list[str], zcols: list[str]) -> tuple[np.ndarray, np.ndarray]:
    xi = [pa.x_names.index(c) for c in xcols]
    zi = [pa.z_names.index(c) for c in zcols]
    w = pa.weights
    mx = np.average(pa.x[:, xi], axis=0, weights=w) if xi else np.zeros(0)
    mz = np.average(pa.z[:, zi], axis=0, weights=w) if zi else np.zeros(0)

    def block(a: int, b: int) -> np.ndarray:
        return np.column_stack([pa.x[a:b, xi] - mx, pa.z[a:b, zi] - mz])

    return _blocked_gram(block, pa.rows, len(xcols) + len(zcols), w), np.concatenate([mx, mz])


def _with_constant(p: _Pass, j: int, means: np.ndarray, gram: np.ndarray) -> bool:
    """Whether the dependence of centred column j on the kept columns also needs the constant:
    col_j = c0 + sum_i b_i col_i with c0 = m_j - sum_i b_i m_i away from zero."""
    terms = [b * means[i] for i, b in p.coefficients.get(j, {}).items()]
    c0 = means[j] - sum(terms)
    sd = np.sqrt(max(float(gram[j, j]), 0.0))
    scale = max(abs(float(means[j])), sum(abs(t) for t in terms), sd, 1e-300)
    return abs(c0) > 1e-8 * scale


def _means(pa: PanelArrays, cols: list[str]) -> np.ndarray:
    """Unit means (n, k) of the named columns, from X or from Z whichever holds each."""
    out = np.empty((pa.n, len(cols)))
    for k, c in enumerate(cols):  # loop over columns
        out[:, k] = pa.zbar[:, pa.z_names.index(c)] if c in pa.z_names else pa.xbar[:, pa.x_names.index(c)]
    return out


def _unit_gram(columns: np.ndarray) -> np.ndarray:
    c = columns - columns.mean(axis=0) if columns.size else columns
    return c.T @ c


def decide(pa: PanelArrays, periods: Sequence[str], x: Sequence[str], z: Sequence[str], *,
           tol: float = 1e-9, near_r2: float = 0.999, labels: dict[str, str] | None = None) -> Identification:
    """Identification of every fit for the design columns of ``pa``.

    ``periods`` are the period effects (added dummies first, then the user's period-only
    regressors), ``x`` the other time-varying regressors and ``z`` the time-invariant
    ones (all among ``pa``'s columns). ``labels`` maps a column to the name shown for
    it in ``with`` lists (default the column itself).
    """
    periods, x, z = list(periods), list(x), list(z)
    period_set = set(periods)
    # one pass over the within deviations and one over the centred levels of every column
    tv = periods + x
    wgram = _within_gram(pa, tv) if tv else np.zeros((0, 0))
    lgram, lmeans = _levels_gram(pa, tv, z)
    wss, tss = np.diag(wgram), np.diag(lgram)[: len(tv)]
    share = {c: (float(w / t) if t > 0 else None) for c, w, t in zip(tv, wss, tss, strict=True)}
    # a time-varying column with no within variation to speak of enters as time-invariant
    moved = [c for c, w, t in zip(tv, wss, tss, strict=True) if c in x and t > 0 and w <= tol * t]
    x = [c for c in x if c not in moved]
    z = z + moved
    at = {c: i for i, c in enumerate(tv + z[: len(z) - len(moved)])}

    def shown(cols: list[str], idx: list[int]) -> list[str]:
        return [(labels or {}).get(cols[i], cols[i]) for i in idx]

    wcols = periods + x
    wi = [at[c] for c in wcols]
    within_p = _rank_pass(wgram[np.ix_(wi, wi)], tol) if wcols else _Pass([], {}, {}, {})
    within_kept = [wcols[j] for j in within_p.kept]
    # levels: [1, P, Z, X] centred (the constant is what centring removes)
    lcols = periods + z + x
    li = [at[c] for c in lcols]
    gram, means = lgram[np.ix_(li, li)], lmeans[li]
    levels_p = _rank_pass(gram, tol) if lcols else _Pass([], {}, {}, {})
    levels_kept = [lcols[j] for j in levels_p.kept]
    lost_levels = {lcols[j]: j for j in levels_p.dependent}

    set_aside: list[Dependence] = []
    for j, deps in within_p.dependent.items():
        col = wcols[j]
        members = [wcols[i] for i in deps]
        if col in period_set:
            reason = "period-only"
        elif members and all(m in period_set for m in members):
            reason = "absorbed-by-time"
        else:
            reason = "collinear-within"
        fits = ALL_FITS if col in lost_levels else (WITHIN,)
        set_aside.append(Dependence(col, reason, tuple(shown(wcols, deps)) or ("the unit effects",), fits))
    within_lost = {wcols[j] for j in within_p.dependent}
    for col, j in lost_levels.items():
        if col in within_lost:
            continue
        deps = levels_p.dependent[j]
        const = [CONST] if _with_constant(levels_p, j, means, gram) else []
        reason = "collinear-between" if col in z else "collinear-levels"
        set_aside.append(Dependence(col, reason, tuple(const + shown(lcols, deps)),
                                    ALL_FITS if col in z else LEVELS_FITS))

    near: list[NearDependence] = []
    for p_, fit, cols in ((within_p, "within", wcols), (levels_p, "levels", lcols)):
        for j, resid in p_.residual_share.items():
            if 1.0 - resid >= near_r2:
                earlier = [i for i in p_.kept if i < j]
                near.append(NearDependence(cols[j], fit, 1.0 - resid, tuple(shown(cols, earlier))))

    between_means, between_z, lost_between = _between(pa, periods, z, x, levels_kept, tol)
    for col, deps_ in lost_between:
        set_aside.append(Dependence(col, "collinear-between", deps_, (BETWEEN,)))
    tested, controls = _mundlak(pa, periods, z, x, levels_kept, within_kept, tol)
    position = {c: i for i, c in enumerate(periods + x + z)}
    return Identification(
        periods=tuple(c for c in periods if c in levels_kept),
        x=tuple(x),
        z=tuple(z),
        within=tuple(within_kept),
        levels=tuple(levels_kept),
        between_means=tuple(between_means),
        between_z=tuple(between_z),
        mundlak_tested=tuple(tested),
        mundlak_controls=tuple(controls),
        set_aside=tuple(sorted(set_aside, key=lambda d: position.get(d.column, 0))),
        near=tuple(near),
        within_share=share,
        moved_to_z=tuple(moved),
    )


def _between(pa: PanelArrays, periods: list[str], z: list[str], x: list[str], levels_kept: list[str],
             tol: float) -> tuple[list[str], list[str], list[tuple[str, tuple[str, ...]]]]:
    """The between fit's columns: [1, Z, X means, period means] in that order, so that a
    regressor is never lost to the means of period dummies; returns (kept X and period
    columns whose means enter, kept Z, lost user columns with what they depend on)."""
    zk = [c for c in z if c in levels_kept]
    xk = [c for c in x if c in levels_kept]
    pk = [c for c in periods if c in levels_kept]
    cols = zk + xk + pk
    if not cols:
        return [], [], []
    p = _rank_pass(_unit_gram(_means(pa, cols)), tol)
    kept = [cols[j] for j in p.kept]
    lost = [(cols[j], (CONST, *[cols[i] for i in deps])) for j, deps in p.dependent.items() if cols[j] not in pk]
    return [c for c in xk + pk if c in kept], [c for c in zk if c in kept], lost


def _mundlak(pa: PanelArrays, periods: list[str], z: list[str], x: list[str], levels_kept: list[str],
             within_kept: list[str], tol: float) -> tuple[list[str], list[str]]:
    """The Mundlak regression's unit-level part [1, Z, means of X the within fit cannot
    identify, means of the X it identifies, period means]: returns (X columns whose means
    are tested, period columns whose means are kept as controls)."""
    zk = [c for c in z if c in levels_kept]
    between_only = [c for c in x if c in levels_kept and c not in within_kept]
    tested = [c for c in x if c in within_kept]
    pk = [c for c in periods if c in levels_kept]
    cols = between_only + tested + pk
    if not cols:
        return [], []
    p = _rank_pass(_unit_gram(_means(pa, zk + cols)), tol)
    kept = {cols[j - len(zk)] for j in p.kept if j >= len(zk)}
    return [c for c in tested if c in kept], [c for c in pk if c in kept]
