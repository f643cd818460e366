"""Per-unit and per-period statistics of every column, in ordered numpy passes.

In memory every row carries a unit code ``u`` (0..n-1) and a period index ``t``
(0..P-1). Each column becomes one numpy array (floats for numbers, dense integer
codes for text, dates and other orderable values) and is reduced with
``np.bincount``, which adds in row order: the sums are bit-reproducible from run
to run, as the JSON must be, where parallel grouped sums are not. The exact
distinct counts of number columns (hashing) run in a background thread meanwhile;
polars releases the interpreter lock while it counts.

What a unit "changes" means (methods.md, section 3) is decided without a per-unit
minimum and maximum of every column:

- integer values (whole-number columns, codes): a unit changes exactly when its
  centred sum of squares is non-zero (all values equal ⇔ every deviation from the
  unit mean is exactly zero; integers below 2**53 are exact in float64);
- floats: the centred sum of squares bounds the range, sqrt(m2 / n) <= range <=
  2 sqrt(m2) (up to rounding, allowed for); only the units between the bounds get
  an exact minimum and maximum.

The structure's per-unit fields (rows, first and last period, participation bit
mask) come from the unit x period count matrix, which also gives the period
dummies' system for ``absorbed_by_time`` (variation.py).
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl

from auditor.load import PERIOD_ID, UNIT_ID, Panel

DENSE_CELLS = 50_000_000  # units x periods up to which the count matrix is held dense
BITMASK_PERIODS = 63  # participation patterns as bit masks up to this many periods
EARLY_ROWS = 65_536  # rows checked first when a one-value-per-period test can fail early
_EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True)
class ColumnStats:
    """What the profile needs of one column, from whichever pass computed it.

    ``nulls`` counts missing values (null or NaN), ``non_finite`` infinities.
    ``distinct`` and ``top`` (rows holding the most common value) count non-missing
    values. ``n_i`` (per unit code) counts usable values (finite, for numbers);
    ``changing`` marks units with two or more different values; ``n_t`` counts
    non-missing values per period; ``one_value`` says every period holds at most one
    value. ``examples`` are the first changing units as (unit code, low, high) or
    (unit code, None, distinct values). Numbers only: ``shift`` (the first finite
    value), ``vmin`` / ``vmax`` (finite extremes), per-unit ``mean_i`` (less
    ``shift``) and ``m2_i`` (centred sum of squares), and, where units change,
    ``rhs`` (per-period sums of the within deviations) and ``wss`` (their sum of
    squares), the inputs of the period-effect R2.
    """

    nulls: int
    non_finite: int
    distinct: int
    top: int
    n_i: np.ndarray
    changing: np.ndarray
    n_t: np.ndarray
    one_value: bool
    examples: tuple[tuple[int, Any, Any], ...] = ()
    shift: float = 0.0
    vmin: float | None = None
    vmax: float | None = None
    mean_i: np.ndarray | None = None
    m2_i: np.ndarray | None = None
    rhs: np.ndarray | None = None
    wss: float | None = None


@dataclass(frozen=True)
class UnitPass:
    """The result of :func:`run`: per-column stats, the count matrix and structure fields.

    ``counts`` is the dense (units x periods) row-count matrix, or None when it
    would exceed :data:`DENSE_CELLS` (callers then use polars for the structure).
    ``structure`` holds the per-unit fields the structure module reads.
    """

    columns: dict[str, ColumnStats]
    period_rows: np.ndarray
    unit_rows: np.ndarray
    counts: np.ndarray | None
    structure: pl.DataFrame | None


def feasible(panel: Panel) -> bool:
    """Whether the in-memory numpy pass applies (the panel is in memory)."""
    return panel.eager is not None


def run(panel: Panel, examples: int, tolerance: float, slow: Callable[[Panel, str], ColumnStats]) -> UnitPass:
    """Statistics of every non-key column of an in-memory ``panel``.

    ``examples``: how many changing units to describe per column; ``tolerance``:
    the relative float tolerance of methods.md; ``slow`` computes a column this pass
    cannot code (lists, structs, objects) with polars.
    """
    frame = panel.eager
    assert frame is not None
    n, n_periods = panel.n_units, panel.n_periods
    u = frame[UNIT_ID].to_numpy().astype(np.intp)
    t = frame[PERIOD_ID].to_numpy().astype(np.intp)
    unit_rows = np.bincount(u, minlength=n)
    period_rows = np.bincount(t, minlength=n_periods)
    counts = None
    if n * n_periods <= DENSE_CELLS:
        counts = np.bincount(u * n_periods + t, minlength=n * n_periods).reshape(n, n_periods)
    structure = _structure(counts, unit_rows) if counts is not None and n_periods <= BITMASK_PERIODS else None

    ctx = _Context(u, t, n, n_periods, unit_rows, period_rows, examples, tolerance)
    # exact distinct counts of number columns: hashing in polars, in a background thread
    numeric = [c for c in panel.columns if _is_number(panel.schema[c])]
    pool = ThreadPoolExecutor(max_workers=1)
    pending: dict[str, Future[tuple[int, int]]] = {
        c: pool.submit(_distinct_numbers, frame[c]) for c in numeric if not _compact_integers(frame[c])
    }
    out: dict[str, ColumnStats] = {}
    try:
        for c in panel.columns:
            dt = panel.schema[c]
            if _is_number(dt):
                out[c] = _number(ctx, frame[c], pending.get(c))
            else:
                codes = _codes(frame[c])
                out[c] = slow(panel, c) if codes is None else _coded(ctx, frame[c], *codes)
    finally:
        pool.shutdown(wait=True)
    return UnitPass(columns=out, period_rows=period_rows, unit_rows=unit_rows, counts=counts, structure=structure)


@dataclass(frozen=True)
class _Context:
    u: np.ndarray
    t: np.ndarray
    n_units: int
    n_periods: int
    unit_rows: np.ndarray
    period_rows: np.ndarray
    examples: int
    tolerance: float


def _is_number(dt: pl.DataType) -> bool:
    return dt.is_numeric() or dt == pl.Boolean


def _structure(counts: np.ndarray, unit_rows: np.ndarray) -> pl.DataFrame:
    """Per-unit structure fields from the count matrix (at most 63 periods)."""
    n, n_periods = counts.shape
    seen = counts > 0
    first = np.argmax(seen, axis=1)
    last = n_periods - 1 - np.argmax(seen[:, ::-1], axis=1)
    bits = np.left_shift(np.uint64(1), np.arange(n_periods, dtype=np.uint64))
    pattern = np.zeros(n, dtype=np.uint64)
    for p in range(n_periods):  # a loop over periods (at most 63), not units
        pattern |= np.where(seen[:, p], bits[p], np.uint64(0))
    return pl.DataFrame(
        {
            UNIT_ID: pl.Series(UNIT_ID, np.arange(n, dtype=np.uint32)),
            "__rows": pl.Series("__rows", unit_rows.astype(np.uint32)),
            "__first": pl.Series("__first", first.astype(np.uint32)),
            "__last": pl.Series("__last", last.astype(np.uint32)),
            "__seen": pl.Series("__seen", [None] * n, dtype=pl.Null),
            "__pattern": pl.Series("__pattern", pattern),
        }
    )


# --- number columns -------------------------------------------------------------------------


def _compact_integers(s: pl.Series) -> bool:
    """Whether an integer column's range is small enough to count its values by bincount."""
    if not (s.dtype.is_integer() or s.dtype == pl.Boolean):
        return False
    if s.null_count() == s.len():
        return True
    lo, hi = s.min(), s.max()
    return int(hi) - int(lo) <= 4 * s.len() + 1024


def _distinct_numbers(s: pl.Series) -> tuple[int, int]:
    """(distinct values, rows of the most common one) of a number column, NaN as missing."""
    v = s.fill_nan(None) if s.dtype.is_float() else s
    v = v.drop_nulls()
    if v.len() == 0:
        return 0, 0
    distinct = v.n_unique()
    if distinct == v.len():  # continuous: every value once, no value table needed
        return distinct, 1
    return distinct, int(v.unique_counts().max())


def _number(ctx: _Context, s: pl.Series, distinct: Future[tuple[int, int]] | None) -> ColumnStats:
    x = s.cast(pl.Float64).to_numpy()
    missing = np.isnan(x)
    nulls = int(missing.sum())
    finite = np.isfinite(x)
    all_finite = bool(finite.all())
    non_finite = 0 if all_finite else int((~finite).sum()) - nulls
    if all_finite:
        uu, tt, xf = ctx.u, ctx.t, x
        n_i = ctx.unit_rows
    else:
        uu, tt, xf = ctx.u[finite], ctx.t[finite], x[finite]
        n_i = np.bincount(uu, minlength=ctx.n_units)
    if xf.size == 0:
        z = np.zeros(ctx.n_units)
        d, top = _count_values(s, distinct)
        return ColumnStats(
            nulls=nulls,
            non_finite=non_finite,
            distinct=d,
            top=top,
            n_i=n_i,
            changing=np.zeros(ctx.n_units, dtype=bool),
            n_t=_per_period(ctx, ~missing, nulls),
            one_value=_one_value(ctx, x, ~missing, nulls),
            mean_i=z,
            m2_i=z,
        )
    shift = float(xf[0])
    vmin, vmax = float(xf.min()), float(xf.max())
    xx = xf - shift
    sums = np.bincount(uu, weights=xx, minlength=ctx.n_units)
    mean_i = np.divide(sums, n_i, out=np.zeros(ctx.n_units), where=n_i > 0)
    dev = xx - mean_i[uu]
    m2_i = np.bincount(uu, weights=dev * dev, minlength=ctx.n_units)

    whole = s.dtype.is_integer() or s.dtype == pl.Boolean
    if whole and max(abs(vmin), abs(vmax)) < 2.0**52:
        changing = m2_i > 0
    else:
        changing = _float_changing(x, finite, all_finite, ctx, n_i, mean_i, m2_i, shift, vmin, vmax)
    rhs = wss = None
    if changing.any():
        rhs = np.bincount(tt, weights=dev, minlength=ctx.n_periods)
        wss = float(dev @ dev)
    present = ~missing
    d, top = _count_values(s, distinct)
    return ColumnStats(
        nulls=nulls,
        non_finite=non_finite,
        distinct=d,
        top=top,
        n_i=n_i,
        changing=changing,
        n_t=_per_period(ctx, present, nulls),
        one_value=_one_value(ctx, x, present, nulls),
        examples=_number_examples(ctx, x, finite, changing),
        shift=shift,
        vmin=vmin,
        vmax=vmax,
        mean_i=mean_i,
        m2_i=m2_i,
        rhs=rhs,
        wss=wss,
    )


def _count_values(s: pl.Series, pending: Future[tuple[int, int]] | None) -> tuple[int, int]:
    if pending is not None:
        return pending.result()
    # integers of a compact range: count every value with bincount
    v = s.drop_nulls()
    if v.len() == 0:
        return 0, 0
    k = v.cast(pl.Int64).to_numpy()
    tally = np.bincount(k - k.min())
    return int(np.count_nonzero(tally)), int(tally.max())


def _float_changing(
    x: np.ndarray,
    finite: np.ndarray,
    all_finite: bool,
    ctx: _Context,
    n_i: np.ndarray,
    mean_i: np.ndarray,
    m2_i: np.ndarray,
    shift: float,
    vmin: float,
    vmax: float,
) -> np.ndarray:
    """Units whose range exceeds tol * (1 + |unit mean|), exact extremes only where needed."""
    threshold = ctx.tolerance * (1.0 + np.abs(mean_i + shift))
    # rounding of x - shift and of the deviations, as an absolute allowance
    slack = 16.0 * _EPS * (max(abs(vmin), abs(vmax)) + abs(shift))
    root = np.sqrt(m2_i)
    low = root / np.sqrt(np.maximum(n_i, 1)) * (1.0 - 1e-9) - slack  # <= range
    high = 2.0 * root * (1.0 + 1e-9) + 2.0 * slack  # >= range
    seen = n_i > 0
    surely = seen & (low > threshold)
    unsure = seen & ~surely & (high > threshold) & (m2_i > 0)
    if not unsure.any():
        return surely
    lo, hi = _unit_extremes(ctx, x, finite, all_finite, unsure)
    exact = (hi - lo) > threshold
    return surely | (unsure & exact)


def _unit_extremes(
    ctx: _Context, x: np.ndarray, finite: np.ndarray, all_finite: bool, units: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Per-unit minimum and maximum of the finite values, for the marked units only."""
    rows = units[ctx.u] if all_finite else (units[ctx.u] & finite)
    uu, xs = ctx.u[rows], x[rows]
    lo = np.full(ctx.n_units, np.inf)
    hi = np.full(ctx.n_units, -np.inf)
    np.minimum.at(lo, uu, xs)
    np.maximum.at(hi, uu, xs)
    return lo, hi


def _first_units(changing: np.ndarray, k: int) -> np.ndarray:
    idx = np.flatnonzero(changing)[:k]
    mark = np.zeros(changing.size, dtype=bool)
    mark[idx] = True
    return mark


def _number_examples(
    ctx: _Context, x: np.ndarray, finite: np.ndarray, changing: np.ndarray
) -> tuple[tuple[int, Any, Any], ...]:
    if ctx.examples <= 0 or not changing.any():
        return ()
    mark = _first_units(changing, ctx.examples)
    lo, hi = _unit_extremes(ctx, x, finite, False, mark)
    return tuple((int(i), float(lo[i]), float(hi[i])) for i in np.flatnonzero(mark))


def _per_period(ctx: _Context, present: np.ndarray, nulls: int) -> np.ndarray:
    if nulls == 0:
        return ctx.period_rows
    return np.bincount(ctx.t[present], minlength=ctx.n_periods)


def _one_value(ctx: _Context, v: np.ndarray, present: np.ndarray, nulls: int) -> bool:
    """Whether every period holds at most one distinct non-missing value of ``v``."""
    if nulls:
        v, tt = v[present], ctx.t[present]
    else:
        tt = ctx.t
    if v.size == 0:
        return True
    head = min(v.size, EARLY_ROWS)
    for stop in (head, v.size):  # most columns fail on the first rows
        rep = np.zeros(ctx.n_periods, dtype=v.dtype)
        rep[tt[:stop]] = v[:stop]
        if not np.array_equal(v[:stop], rep[tt[:stop]]):
            return False
    return True


# --- coded columns (text, categories, dates, ...) -------------------------------------------


def _codes(s: pl.Series) -> tuple[np.ndarray, np.ndarray, int] | None:
    """(dense codes, present mask, number of codes) for a non-number column, or None.

    Text is coded by hashing (codes in order of appearance); categories by their
    physical codes; other orderable values (dates, times, ...) by their dense rank.
    """
    dt = s.dtype
    present = s.is_not_null().to_numpy()
    try:
        if dt == pl.String:
            c = s.cast(pl.Categorical).to_physical()
        elif isinstance(dt, pl.Categorical | pl.Enum):
            c = s.to_physical()
        elif isinstance(dt, pl.List | pl.Array | pl.Struct | pl.Object | pl.Null):
            return None
        else:
            c = s.rank("dense")
    except pl.exceptions.PolarsError:
        return None
    codes = c.fill_null(0).cast(pl.Int64).to_numpy()
    return codes, present, int(codes.max()) + 1 if codes.size else 0


def _coded(ctx: _Context, s: pl.Series, codes: np.ndarray, present: np.ndarray, width: int) -> ColumnStats:
    nulls = int(s.null_count())
    if nulls:
        uu, cc = ctx.u[present], codes[present]
        n_i = np.bincount(uu, minlength=ctx.n_units)
    else:
        uu, cc = ctx.u, codes
        n_i = ctx.unit_rows
    tally = np.bincount(cc, minlength=width)
    distinct = int(np.count_nonzero(tally))
    top = int(tally.max()) if cc.size else 0
    cf = cc.astype(np.float64)
    sums = np.bincount(uu, weights=cf, minlength=ctx.n_units)
    mean_i = np.divide(sums, n_i, out=np.zeros(ctx.n_units), where=n_i > 0)
    dev = cf - mean_i[uu]
    changing = np.bincount(uu, weights=dev * dev, minlength=ctx.n_units) > 0
    return ColumnStats(
        nulls=nulls,
        non_finite=0,
        distinct=distinct,
        top=top,
        n_i=n_i,
        changing=changing,
        n_t=_per_period(ctx, present, nulls),
        one_value=_one_value(ctx, codes, present, nulls),
        examples=_coded_examples(ctx, s, changing),
    )


def _coded_examples(ctx: _Context, s: pl.Series, changing: np.ndarray) -> tuple[tuple[int, Any, Any], ...]:
    if ctx.examples <= 0 or not changing.any():
        return ()
    mark = _first_units(changing, ctx.examples)
    rows = mark[ctx.u]
    v = s.filter(pl.Series(rows))
    if isinstance(v.dtype, pl.Categorical | pl.Enum):
        v = v.cast(pl.String)
    ext = (
        pl.DataFrame({"u": ctx.u[rows], "v": v})
        .group_by("u")
        .agg(pl.col("v").min().alias("lo"), pl.col("v").max().alias("hi"))
        .sort("u")
    )
    return tuple((int(r[0]), str(r[1]), str(r[2])) for r in ext.iter_rows())

