"""Upper-tail probabilities of the chi-square, F and normal distributions.

They call the scipy.special functions that scipy.stats itself calls (chdtrc, fdtrc,
ndtr), so the values are the same bits, without importing scipy.stats: that import
takes well over a second and would dominate a model-readiness run. scipy.special
itself is imported on first use, or ahead of it by :func:`preload`.
"""

from __future__ import annotations

import math
import sys
import threading


def preload(*modules: str) -> None:
    """Import ``modules`` (default: what this module and the models need) in a
    background thread, so that the import overlaps reading and profiling the panel,
    whose polars and numpy work releases the interpreter lock."""
    for name in modules or ("scipy.special", "scipy.sparse"):
        if name not in sys.modules:
            threading.Thread(target=__import__, args=(name,), daemon=True).start()


def chi2_sf(x: float, dof: float) -> float:
    """P(X > x) for X chi-square with ``dof`` degrees of freedom (1 for x < 0)."""
    from scipy import special

    if x < 0:
        return 1.0
    return float(special.chdtrc(dof, x))


def f_sf(x: float, dfn: float, dfd: float) -> float:
    """P(X > x) for X F-distributed with (``dfn``, ``dfd``) degrees of freedom (1 for x < 0)."""
    from scipy import special

    if x < 0:
        return 1.0
    return float(special.fdtrc(dfn, dfd, x))


def normal_sf(x: float) -> float:
    """P(Z > x) for Z standard normal."""
    from scipy import special

    if math.isnan(x):
        return math.nan
    return float(special.ndtr(-x))


def f_isf(q: float, dfn: float, dfd: float) -> float:
    """The F value with upper-tail probability ``q`` for (``dfn``, ``dfd``) degrees of freedom."""
    from scipy import special

    return float(special.fdtri(dfn, dfd, 1.0 - q))
