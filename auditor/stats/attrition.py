"""Selective attrition: the variable-addition test of Nijman & Verbeek (1992), as Wooldridge
(Econometric Analysis of Cross Section and Panel Data, 2nd ed., section 19.9) presents it
(methods.md section 7).

On the rows before the last grid period, s_i,t+1 (1 when the unit is observed in the
next grid period) is added to the within regression, and its coefficient is tested with
a t statistic clustered by unit. Under the null that leaving the panel is unrelated to
the idiosyncratic error, the coefficient is zero; a rejection says that the within
estimates on the observed rows may be inconsistent.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from auditor.stats import models
from auditor.stats.identification import sequential_rank
from auditor.stats.pvalues import normal_sf

VARIABLE = "next period observed"
#: a clustered standard error at most this share of the coefficient is rounding, not
#: information: the clustered scores vanish in exact arithmetic (the indicator varies within
#: units only where the within residuals are zero), and t would be ~1e15, differing with
#: the order of the rows; sqrt of the float64 epsilon, the usual threshold for "zero up to
#: rounding" (common practice)
ROUNDING_SE = float(np.sqrt(np.finfo(np.float64).eps))


def nijman_verbeek(pa: models.PanelArrays, columns: list[str], period: np.ndarray, tol: float = 1e-9
                   ) -> dict[str, Any] | None:
    """The attrition test on the within fit of ``columns`` (X columns of ``pa``, period effects
    among them), ``period`` the grid index of each row. Returns the contract's
    ``tests.attrition`` (statistic = t squared, chi-square 1 df; ``t``, ``coef`` and the rows used
    beside it), or None when nobody leaves (the indicator has no within variation, or it is
    collinear with the other columns within units), or when its clustered standard error is
    zero up to rounding (:data:`ROUNDING_SE`): the test has no information then."""
    last = int(period.max())
    periods = last + 1
    present = np.bincount(pa.codes * periods + period, minlength=pa.n * periods) > 0
    rows = period < last
    if not rows.any():
        return None
    codes_sub = pa.codes[rows]
    nxt = present[codes_sub * periods + period[rows] + 1].astype(float)
    xi = [pa.x_names.index(c) for c in columns]
    sub = models.PanelArrays.build(codes_sub, pa.y[rows], np.column_stack([pa.x[rows][:, xi], nxt]),
                                   [*columns, VARIABLE], None, [])
    w = sub.within_deviations(list(sub.x_names))
    gram = w.T @ w
    kept, _ = sequential_rank(gram, tol)
    if len(columns) not in kept or gram[-1, -1] <= 0:
        return None
    cols = [sub.x_names[j] for j in kept]
    fit, _ = models.within(sub, cols)
    j = fit.names.index(VARIABLE)
    se = float(fit.se_cluster[j])
    if not se > ROUNDING_SE * abs(float(fit.coef[j])):
        return None
    t = float(fit.coef[j]) / se
    return {"statistic": t * t, "df": 1, "p": 2.0 * normal_sf(abs(t)), "variable": VARIABLE, "t": t,
            "coef": float(fit.coef[j]), "rows": int(sub.nobs), "rows_without_next": int(np.sum(nxt == 0.0))}
