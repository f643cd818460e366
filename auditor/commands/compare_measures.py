"""The measures compare computes and the small value helpers its stages share.

The population stability index on the base's quantile bins or over levels, the
two-sample Kolmogorov-Smirnov test (scipy), the robust scale of within-unit changes,
and how numbers, periods and counts are written into findings. The conventions are
those of auditor/commands/compare.py's docstring (README, "A new wave").
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import date
from typing import Any

import numpy as np
import polars as pl

from auditor.dtypes import compare_dtype_name, type_family
from auditor.errors import short_list

MAD_TO_SD = 1.4826  # 1 / Phi^-1(3/4): the MAD of normal data times this is its sd (common practice)
KS_EXACT_MAX_N = 10_000  # scipy.stats.ks_2samp's method 'auto' computes exactly up to this sample size


# --- stability index and distance ----------------------------------------------------


def _shares(counts: np.ndarray, smoothing: float) -> np.ndarray:
    counts = counts.astype(float) + smoothing
    return counts / counts.sum()


def _psi_from_counts(base_counts: np.ndarray, new_counts: np.ndarray, smoothing: float) -> float:
    p = _shares(base_counts, smoothing)
    q = _shares(new_counts, smoothing)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = (q - p) * np.log(q / p)
    # A bin empty on both sides with no smoothing adds nothing.
    terms = np.where((p == 0) & (q == 0), 0.0, terms)
    return float(terms.sum())


def psi_bins(reference: np.ndarray, bins: int, *, assume_sorted: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """The stability-index cut points of ``reference`` and which of them are bins of their own.

    Cut points are the reference's quantiles at 1/bins, ..., (bins-1)/bins (numpy's
    linear interpolation), repeated ones merged. A cut point on which the reference
    holds a tie of at least one bin's worth (1/bins of its values: a constant or
    discrete reference) is a bin of its own, between the interval below it and the one
    above, so a value can leave it in either direction; other cut points close the
    interval on their left. Returns (cut points, a boolean per cut point).
    """
    ordered = np.asarray(reference, dtype=float)
    if not assume_sorted:
        ordered = np.sort(ordered)
    edges = np.unique(np.quantile(ordered, np.arange(1, bins) / bins))
    ties = np.searchsorted(ordered, edges, side="right") - np.searchsorted(ordered, edges, side="left")
    return edges, ties * bins >= ordered.size


def psi_counts(values: np.ndarray, edges: np.ndarray, point: np.ndarray, *, assume_sorted: bool = False) -> np.ndarray:
    """How many of ``values`` fall in each bin of :func:`psi_bins`: 2m + 1 counts for m cut
    points, the interval below cut point j at 2j and cut point j itself at 2j + 1 (zero
    when it is no bin of its own), the interval above the last at 2m. One sort of the
    values (none when ``assume_sorted``) and two binary searches per cut point."""
    ordered = np.asarray(values, dtype=float)
    if not assume_sorted:
        ordered = np.sort(ordered)
    left = np.searchsorted(ordered, edges, side="left")
    right = np.searchsorted(ordered, edges, side="right")
    upper = np.where(point, left, right)  # where each interval ends: before a point bin, after a cut point
    lower = np.concatenate([[0], right])  # where each starts: after the cut point below
    counts = np.zeros(2 * edges.size + 1, dtype=np.int64)
    counts[0:-1:2] = upper - lower[:-1]
    counts[-1] = ordered.size - lower[-1]
    counts[1::2] = np.where(point, right - left, 0)
    return counts


def numeric_psi(
    base: np.ndarray, new: np.ndarray, *, bins: int = 10, smoothing: float = 0.5, assume_sorted: bool = False
) -> float:
    """Population stability index of ``new`` against ``base`` on the base's quantile bins.

    Bins as :func:`psi_bins` makes them; bins empty on both sides are left out, and
    ``smoothing`` is added to every other bin's count on both sides before shares are
    taken. ``assume_sorted``: both samples are sorted already. Returns the index
    (dimensionless, 0 for identical shares); NaN when either sample is empty.
    """
    base = np.asarray(base, dtype=float)
    new = np.asarray(new, dtype=float)
    if base.size == 0 or new.size == 0:
        return math.nan
    if not assume_sorted:
        base, new = np.sort(base), np.sort(new)
    edges, point = psi_bins(base, bins, assume_sorted=True)
    b = psi_counts(base, edges, point, assume_sorted=True)
    n = psi_counts(new, edges, point, assume_sorted=True)
    used = (b > 0) | (n > 0)
    return _psi_from_counts(b[used], n[used], smoothing)


def level_psi(base_counts: dict[Any, int], new_counts: dict[Any, int], *, smoothing: float = 0.5) -> float:
    """Population stability index over categorical levels (one bin per level of either side).

    Returns the index (dimensionless); NaN when either side has no values.
    """
    levels = sorted(set(base_counts) | set(new_counts), key=str)
    b = np.array([base_counts.get(v, 0) for v in levels], dtype=float)
    n = np.array([new_counts.get(v, 0) for v in levels], dtype=float)
    if b.sum() == 0 or n.sum() == 0:
        return math.nan
    return _psi_from_counts(b, n, smoothing)


def ks_two_sample(base: np.ndarray, new: np.ndarray) -> tuple[float, float, str]:
    """Two-sample Kolmogorov-Smirnov statistic (largest gap between the two empirical
    distribution functions, 0..1), its two-sided p-value (scipy.stats.ks_2samp, method
    'auto') and how the p-value was computed: ``exact``, or ``asymptotic`` (large
    samples, or scipy's exact calculation did not converge; its warning is kept off the
    terminal). NaN, NaN, "" when either sample is empty."""
    if len(base) == 0 or len(new) == 0:
        return math.nan, math.nan, ""
    import warnings

    from scipy.stats import ks_2samp

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = ks_2samp(np.asarray(base, dtype=float), np.asarray(new, dtype=float))
    exact = max(len(base), len(new)) <= KS_EXACT_MAX_N and not any(
        "Exact calculation unsuccessful" in str(w.message) for w in caught
    )
    return float(res.statistic), float(res.pvalue), "exact" if exact else "asymptotic"


def significant(x: Any, digits: int = 6) -> float | None:
    """``x`` rounded to ``digits`` significant digits (a p-value of 2e-36 stays 2e-36);
    None for a missing or non-finite value."""
    if x is None:
        return None
    x = float(x)
    if not math.isfinite(x):
        return None
    return float(f"{x:.{digits}g}")


def unit_period_order(units: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """Row order by unit, then period (stable)."""
    lo, hi = int(pos.min()), int(pos.max())
    span = hi - lo + 1
    if span * (int(units.max()) + 1) < 2**62:
        return np.argsort(units.astype(np.int64) * span + (pos.astype(np.int64) - lo), kind="stable")
    return np.lexsort((pos, units))


def change_scale(changes: np.ndarray, *, zero_share: float) -> tuple[float | None, float | None, str]:
    """The centre and robust scale of a column's within-unit changes, and how it was found.

    In order, the first that is positive: 1.4826 times the median absolute deviation
    about the median ("mad"; the normal-consistency factor, common practice), the
    standard deviation of the changes between their 5% and 95% quantiles
    ("trimmed-sd"), the standard deviation of all ("sd"), and the size of the one
    change they all share ("step"). When at least ``zero_share`` of the changes are
    exactly 0 (a value that often stays put), the scale is that of the non-zero
    changes (the method is prefixed "non-zero ") and a zero change is never a jump.
    Returns (None, None, "none") when there is no change to learn from.
    """
    d = np.asarray(changes, dtype=float)
    finite = np.isfinite(d)
    if not finite.all():
        d = d[finite]
    if d.size == 0:
        return None, None, "none"
    prefix = ""
    zeros = d == 0
    if zeros.mean() >= zero_share and not zeros.all():
        d, prefix = d[~zeros], "non-zero "
    centre = float(np.median(d))
    mad = float(np.median(np.abs(d - centre), overwrite_input=True))  # a temporary: sorted in place
    if mad > 0:
        return centre, MAD_TO_SD * mad, prefix + "mad"
    lo, hi = np.quantile(d, [0.05, 0.95])
    middle = d[(d >= lo) & (d <= hi)]
    if middle.size > 1 and float(np.std(middle, ddof=1)) > 0:
        return centre, float(np.std(middle, ddof=1)), prefix + "trimmed-sd"
    if d.size > 1 and float(np.std(d, ddof=1)) > 0:
        return centre, float(np.std(d, ddof=1)), prefix + "sd"
    if centre != 0:
        return centre, abs(centre), prefix + "step"
    return centre, None, "none"


# --- small helpers ----------------------------------------------------------------------


def family(dt: pl.DataType) -> str:
    """The dtype's family (auditor.dtypes.type_family), or its name when it has none."""
    return type_family(dt) or compare_dtype_name(dt)


def is_numeric(dt: pl.DataType) -> bool:
    """A number type compare measures as numbers (booleans are levels)."""
    return dt.is_numeric() and dt != pl.Boolean


def is_levels(dt: pl.DataType) -> bool:
    """A type compare counts by level: text or boolean."""
    return family(dt) in ("text", "boolean")


def finite_or_null(col: str, dt: pl.DataType) -> pl.Expr:
    """The column with NaN and infinities as null (floats); others unchanged."""
    c = pl.col(col)
    if dt.is_float():
        return pl.when(c.is_finite()).then(c).otherwise(None).alias(col)
    return c


def json_value(v: Any) -> Any:
    """A value as a finding's example holds it: non-finite floats None, dates ISO text."""
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, date):
        return v.isoformat()
    return v


def rounded(v: Any, digits: int = 6) -> float | None:
    """``v`` rounded to ``digits`` decimals; None for a missing or non-finite value."""
    if v is None:
        return None
    v = float(v)
    return None if not math.isfinite(v) else round(v, digits)


def plural(n: int, one: str, many: str | None = None) -> str:
    """``n`` and the noun in its number ("1 unit", "3 units")."""
    return f"{n} {one}" if n == 1 else f"{n} {many or one + 's'}"


def verb(n: int, one: str, many: str) -> str:
    """The verb form for ``n`` subjects ("is" for one, "are" for several)."""
    return one if n == 1 else many


def labels_text(labels: Sequence[Any]) -> str:
    """Period labels for a message: up to six, then "... (N in all)"."""
    return short_list([str(v) for v in labels], 6)
