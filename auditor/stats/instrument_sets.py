"""Richer instrument sets for the Hausman-Taylor model (methods.md section 6).

Amemiya & MaCurdy (1986) add, beside Hausman-Taylor's instruments, each X1 column's
value in every period (at the unit level); Breusch, Mizon & Schmidt (1989) add, beside
those, the within deviation of each X2 column in every period. Both are fitted exactly
like Hausman-Taylor's step 4 (the same theta, the same transformed design) with the
larger instrument set; each nests the one before, so their Sargan statistics have more
degrees of freedom and a Hausman contrast against Hausman-Taylor tests the extra
restrictions.

Every added instrument is constant within a unit, so the instruments are
A = [W, U_i]: W the within deviations of the columns the within fit identifies (as in
Hausman-Taylor) and U an n x m unit-level matrix. Cross-products with U come from
per-unit sums (W'U from the per-unit sums of W, U'D from those of the design), so the
richer sets cost little more than Hausman-Taylor itself, whatever m is.

Unbalanced panels: a unit's value in a period it is not observed in is set to 0 and an
indicator of observation per period enters the instruments (the unit means of X1 stay
among them, so the sets remain nested); this assumes that who is observed when is
unrelated to the unit effect, as the means of the observed rows already do.
Instrument columns that are exact linear combinations of earlier ones (a period's
indicator beside the constant in a balanced panel, the means beside the period values)
are left out before the fit, and the degrees of freedom count what is kept.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from auditor.stats import models
from auditor.stats.identification import sequential_rank
from auditor.stats.pvalues import chi2_sf

AM = "amemiya_macurdy"
BMS = "breusch_mizon_schmidt"
NAMES = {AM: "Amemiya-MaCurdy", BMS: "Breusch-Mizon-Schmidt"}
UNBALANCED_NOTE = ("unbalanced panel: a unit's value in a period it is not observed in is set to 0, with an "
                   "indicator of observation for each period among the instruments")


@dataclass(frozen=True)
class RicherFit:
    """One richer-instrument fit: coefficients (ordered X1, X2, const, Z1, Z2), its Sargan test,
    the Hausman contrast against Hausman-Taylor, and the number of instruments kept."""

    name: str
    fit: models.Fit
    sargan: models.WaldTest | None
    against_ht: models.WaldTest | None
    instruments: int
    note: str | None

    def estimates(self) -> dict:
        """``estimates.<name>``: like ``estimates.hausman_taylor``, plus the instrument count and a note."""
        out = self.fit.to_dict()
        out["instruments"] = self.instruments
        if self.note:
            out["note"] = self.note
        return out


def _per_period(values: np.ndarray, key: np.ndarray, counts: np.ndarray, n: int, periods: int) -> np.ndarray:
    """(n, periods) of the mean of ``values`` per unit and period (0 where the unit has no row);
    ``counts``: the rows of each (unit, period) cell, as floats."""
    size = n * periods
    sums = np.bincount(key, weights=values, minlength=size)
    out = np.divide(sums, counts, out=np.zeros(size), where=counts > 0)
    return out.reshape(n, periods)


@dataclass(frozen=True)
class _Cells:
    """Each row's (unit, period) cell, the rows per cell, whether every cell is observed."""

    key: np.ndarray
    counts: np.ndarray
    full: bool

    @classmethod
    def of(cls, sub: models.PanelArrays, period: np.ndarray, periods: int) -> _Cells:
        key = sub.codes * periods + period
        counts = np.bincount(key, minlength=sub.n * periods)
        return cls(key, counts.astype(float), bool(counts.min() > 0))


def _am_blocks(sub: models.PanelArrays, sp: models.HTSpec, cells: _Cells, periods: int) -> list[np.ndarray]:
    """Amemiya-MaCurdy's unit-level instrument blocks: [1, Z1, X1 means, each X1 column's value
    in every period, the observation indicators (unbalanced panels)]."""
    n = sub.n
    blocks = [np.ones((n, 1)), sub.zbar[:, [sub.z_names.index(c) for c in sp.z1]],
              sub.xbar[:, [sub.x_names.index(c) for c in sp.means]]]
    for c in sp.means:  # loop over the few X1 columns
        blocks.append(_per_period(sub.x[:, sub.x_names.index(c)], cells.key, cells.counts, n, periods))
    if not sub.balanced_counts or not cells.full:
        blocks.append((cells.counts > 0).astype(float).reshape(n, periods))
    return blocks


def _bms_blocks(sub: models.PanelArrays, sp: models.HTSpec, cells: _Cells, periods: int) -> list[np.ndarray]:
    """The blocks Breusch-Mizon-Schmidt adds: each X2 column's within deviation in every period."""
    blocks = []
    for c in sp.x2:
        j = sub.x_names.index(c)
        dev = sub.x[:, j] - models.gather(sub.xbar[:, j], sub.codes)
        blocks.append(_per_period(dev, cells.key, cells.counts, sub.n, periods))
    return blocks


def _centre_units(u: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """U with every column but the constant (column 0) centred on its row-weighted mean, in
    place (``u`` is a fresh array of the caller's)."""
    out = u
    if out.shape[1] > 1:
        means = weights @ out[:, 1:] / weights.sum()
        out[:, 1:] -= means
    return out


@dataclass(frozen=True)
class Prepared:
    """What both richer fits share on one design: the within deviations W of the columns the
    within fit identifies, the transformed design D = [const, X1, X2, Z1, Z2, y] at
    Hausman-Taylor's theta (constant orthogonalised out, ``shifts``), their per-unit sums, and
    the (unit, period) cells with Amemiya-MaCurdy's unit-level blocks."""

    w: np.ndarray
    d: np.ndarray
    shifts: np.ndarray
    g: models.UnitGrouper
    sums_w: np.ndarray
    sums_d: np.ndarray
    cells: _Cells
    am_blocks: tuple[np.ndarray, ...]


def prepare(sub: models.PanelArrays, sp: models.HTSpec, theta: np.ndarray, period: np.ndarray,
            periods: int) -> Prepared:
    """The arrays :func:`fit` needs for either set (computed once for both)."""
    k = 1 + len(sp.x1) + len(sp.x2) + len(sp.z1) + len(sp.z2)
    w = sub.within_deviations(list(sp.within))
    d = np.empty((sub.nobs, k + 1), order="F")
    _, ys = models.quasi_demean(sub, theta, out=d[:, :k])  # const, X1, X2, Z1, Z2
    d[:, k] = ys
    shifts = models.orthogonalise(d, d[:, 0].copy(), skip=0)
    g = models.grouper(sub.codes, sub.n)
    cells = _Cells.of(sub, period, periods)
    return Prepared(w, d, shifts, g, g.sums(w), g.sums(d), cells, tuple(_am_blocks(sub, sp, cells, periods)))


def fit(sub: models.PanelArrays, sp: models.HTSpec, theta: np.ndarray, period: np.ndarray, periods: int,
        which: str, ht: models.Fit, tol: float = 1e-9, prepared: Prepared | None = None) -> RicherFit:
    """The Amemiya-MaCurdy or Breusch-Mizon-Schmidt fit on ``sub`` (the Hausman-Taylor columns),
    at Hausman-Taylor's ``theta``; ``ht`` is the Hausman-Taylor fit to contrast with;
    ``prepared``: :func:`prepare` of the same arguments, shared by both sets."""
    x1, x2, z1, z2 = list(sp.x1), list(sp.x2), list(sp.z1), list(sp.z2)
    pre = prepared if prepared is not None else prepare(sub, sp, theta, period, periods)
    w, d, shifts, g, sums_w, sums_d = pre.w, pre.d, pre.shifts, pre.g, pre.sums_w, pre.sums_d
    blocks = list(pre.am_blocks) + (_bms_blocks(sub, sp, pre.cells, periods) if which == BMS else [])
    u = _centre_units(np.column_stack(blocks), sub.counts)
    k = 1 + len(x1) + len(x2) + len(z1) + len(z2)
    kw = w.shape[1]
    # cross-products of A = [W, U_i] with itself and with [D, y]
    aa = np.block([[w.T @ w, sums_w.T @ u], [u.T @ sums_w, u.T @ (sub.counts[:, None] * u)]])
    kept, _ = sequential_rank(aa, tol)
    kept_w = [i for i in kept if i < kw]
    kept_u = [i - kw for i in kept if i >= kw]
    wk = w[:, kept_w]  # once for both products (a copy: its layout is the one the sums were checked with)
    ad = np.vstack([wk.T @ d, (u.T @ sums_d)[kept_u]])  # no copy of the n x m instruments
    ll = len(kept)
    gram = np.zeros((ll + k + 1, ll + k + 1))
    gram[:ll, :ll] = aa[np.ix_(kept, kept)]
    gram[:ll, ll:] = ad
    gram[ll:, :ll] = ad.T
    gram[ll:, ll:] = d.T @ d
    piv = models.gram_iv(gram, list(range(ll)), list(range(ll, ll + k)), ll + k)
    e = d[:, k] - d[:, :k] @ piv.coef
    nobs = sub.nobs
    sigma2 = float(e @ e) / max(nobs - k, 1)
    # per-unit scores of the fitted design: sum_t (A_it proj) e_it
    proj_w, proj_u = piv.proj[: len(kept_w)], piv.proj[len(kept_w):]
    # (U_i proj_u) times the unit's sum of residuals: U (n x m) is never copied or scaled
    proj_full = np.zeros((u.shape[1], proj_u.shape[1]))
    proj_full[kept_u] = proj_u
    scores = g.weighted_sums(e, wk) @ proj_w + (u @ proj_full) * g.sums(e)[:, None]
    factor = (sub.n / (sub.n - 1.0)) * ((nobs - 1.0) / max(nobs - k, 1)) if sub.n > 1 else np.nan
    cov_cl = factor * (piv.bread @ (scores.T @ scores) @ piv.bread)
    coef, (cov, cov_cl) = models.restore_constant(piv.coef, [sigma2 * piv.bread, cov_cl], 0, shifts[:k],
                                                  float(shifts[k]))
    raw = models.Fit((models.CONST, *x1, *x2, *z1, *z2), coef, cov, cov_cl, sigma2, nobs - k, nobs)
    order = [*x1, *x2, models.CONST, *z1, *z2]
    i = raw.index(order)
    out = models.Fit(tuple(order), coef[i], cov[np.ix_(i, i)], cov_cl[np.ix_(i, i)], sigma2, nobs - k, nobs)
    dof = ll - k
    sargan = None
    if dof > 0 and piv.e_e > 0:
        stat = float(nobs * piv.e_pa_e / piv.e_e)
        sargan = models.WaldTest(stat, dof, float(chi2_sf(stat, dof)))
    compared = [c for c in order if c != models.CONST and c in ht.names and c not in _periods(sp)]
    against = None
    if compared and dof > 0:
        ih, ir = ht.index(compared), out.index(compared)
        v_eff = models.scaled_cov(out, ht.sigma2)
        against = models.contrast(out.coef[ir], v_eff[np.ix_(ir, ir)], ht.coef[ih], ht.cov[np.ix_(ih, ih)])
    note = UNBALANCED_NOTE if not sub.balanced_counts or not pre.cells.full else None
    if which == BMS and not sp.x2:
        note = "; ".join(filter(None, [note, "no X2 column, so Breusch-Mizon-Schmidt equals Amemiya-MaCurdy"]))
    return RicherFit(which, out, sargan, against, ll, note)


def _periods(sp: models.HTSpec) -> set[str]:
    """The period effects among X1 (in X1 but neither a mean instrument nor X2)."""
    return {c for c in sp.x1 if c not in sp.means}
