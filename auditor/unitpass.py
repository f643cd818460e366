"""Per-unit and per-period statistics of every column, in ordered numpy passes.

In memory every row carries a unit code ``u`` (0..n-1) and a period index ``t``
(0..P-1). Each column becomes one numpy array (floats for numbers, dense integer
codes for text, dates and other orderable values) and is reduced with
``np.bincount``, which adds in row order: the sums are bit-reproducible from run
to run, as the JSON must be, where parallel grouped sums are not. Columns are
independent tasks for a small pool of threads (numpy and polars release the
interpreter lock); each task's result does not depend on the schedule. The exact
distinct count of a number column sorts it (or tallies a small integer range).

What a unit "changes" means (methods.md, section 3) is decided without a per-unit
minimum and maximum of every column:

- integer values (whole-number columns): a unit changes exactly when its centred
  sum of squares is non-zero (all values equal ⇔ every deviation from the unit
  mean is exactly zero; integers below 2**52 are exact in float64);
- codes (text, dates, ...): a unit changes when some row's code differs from the
  code of one fixed row of the unit;
- floats: the centred sum of squares bounds the range, sqrt(m2 / n) <= range <=
  2 sqrt(m2) (up to rounding, allowed for); only the units between the bounds get
  an exact minimum and maximum.

The structure's per-unit fields (rows, first and last period, participation bit
mask) come from the period x unit count matrix, which also gives the period
dummies' system for ``absorbed_by_time`` (variation.py).

Fresh memory costs a page fault per 4 KiB, so each thread keeps its row-length work
buffers from column to column.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import polars as pl

from auditor.load import PERIOD_ID, UNIT_ID, Panel

DENSE_CELLS = 50_000_000  # units x periods up to which the count matrix is held dense
DENSE_PERIODS = 400  # beyond this many periods the period system stays sparse (no P x P matrix)
BITMASK_PERIODS = 63  # participation patterns as bit masks up to this many periods
MAX_WORKERS = 4  # threads of the column pass, at most
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
    squares), the inputs of the period-effect R2, with ``system`` the
    :func:`period_matrix` of the rows holding a value when some rows do not.
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
    system: np.ndarray | SparsePeriods | None = None


@dataclass(frozen=True)
class UnitPass:
    """The result of :func:`run`: per-column stats, the count matrix and structure fields.

    ``counts`` is the dense (units x periods) row-count matrix, or None when it
    would exceed :data:`DENSE_CELLS` (callers then use polars for the structure).
    ``structure`` holds the per-unit fields the structure module reads; ``system``
    the :func:`period_matrix` of every row.
    """

    columns: dict[str, ColumnStats]
    period_rows: np.ndarray
    unit_rows: np.ndarray
    counts: np.ndarray | None
    structure: pl.DataFrame | None
    system: np.ndarray | SparsePeriods | None = None


def feasible(panel: Panel) -> bool:
    """Whether the in-memory numpy pass applies (the panel is in memory)."""
    return panel.eager is not None


def run(panel: Panel, examples: int, tolerance: float, slow: Callable[[Panel, str], ColumnStats]) -> UnitPass:
    """Statistics of every non-key column of an in-memory ``panel``.

    ``examples``: how many changing units to describe per column; ``tolerance``:
    the relative float tolerance of methods.md; ``slow`` computes a column this pass
    cannot code (lists, structs, objects) with polars.
    """
    assert panel.eager is not None
    return run_frame(
        panel.eager,
        panel.n_units,
        panel.n_periods,
        list(panel.columns),
        examples=examples,
        tolerance=tolerance,
        slow=lambda c: slow(panel, c),
    )


def run_frame(
    frame: pl.DataFrame,
    n_units: int,
    n_periods: int,
    columns: list[str],
    *,
    examples: int,
    tolerance: float,
    slow: Callable[[str], ColumnStats],
    shifts: dict[str, float] | None = None,
) -> UnitPass:
    """Statistics of ``columns`` of ``frame``, whose rows carry unit codes 0..n_units-1.

    ``frame`` holds every row of each of its units: the whole panel, or, when
    ``shifts`` (each number column's first finite value in the whole panel) is
    given, a partition of its units. A partition's results add up with the
    others': ``distinct`` and ``top`` are left at 0 (values are counted over the
    whole panel) and the inputs of the period-effect R2 are always filled in.
    """
    count_values = shifts is None
    n = n_units
    u = frame[UNIT_ID].to_numpy().astype(np.intp)
    t = frame[PERIOD_ID].to_numpy().astype(np.intp)
    unit_rows = np.bincount(u, minlength=n)
    t_sorted = bool(t.size < 2 or (t[1:] >= t[:-1]).all())
    period_rows = period_sums(t, n_periods, t_sorted)

    schema = frame.schema
    numbers = [c for c in columns if _is_number(schema[c])]
    number_set = set(numbers)  # a set built per column made 100,000 columns quadratic
    others = [c for c in columns if c not in number_set]
    # Every column is independent work: text coding and coded statistics, and the
    # number pass with its exact value count, are tasks for a pool of threads (numpy
    # and polars release the interpreter lock), beside the count matrix's structure
    # and period system. Each task adds in row order: results do not depend on the
    # schedule.
    with ThreadPoolExecutor(max_workers=workers()) as pool:
        ctx = _Context(
            u, t, n, n_periods, unit_rows, period_rows, examples, tolerance, t_sorted=t_sorted,
            rep_row=pool.submit(_representatives, u, n) if others else None,
        )  # fmt: skip
        grid = pool.submit(_grid, u, t, n, n_periods, unit_rows, period_rows, t_sorted)
        jobs = {c: pool.submit(_other_column, ctx, frame[c], slow, count_values) for c in others}
        for c in numbers:
            jobs[c] = pool.submit(_number, ctx, frame[c], None if shifts is None else shifts[c], count_values)
        out = {c: jobs[c].result() for c in columns}
        counts, structure, system = grid.result()
    return UnitPass(
        columns=out,
        period_rows=period_rows,
        unit_rows=unit_rows,
        counts=counts,
        structure=structure,
        system=system,
    )


def _grid(
    u: np.ndarray,
    t: np.ndarray,
    n: int,
    n_periods: int,
    unit_rows: np.ndarray,
    period_rows: np.ndarray,
    t_sorted: bool,
) -> tuple[np.ndarray | None, pl.DataFrame | None, np.ndarray]:
    """(unit x period count matrix or None when too large, per-unit structure fields
    or None, :func:`period_matrix` of every row)."""
    if n * n_periods > DENSE_CELLS:
        return None, None, period_matrix(u, t, n, n_periods)
    counts = count_matrix(u, t, n, n_periods, t_sorted)
    structure = _structure(counts, unit_rows) if n_periods <= BITMASK_PERIODS else None
    system = period_matrix(u, t, n, n_periods, counts, unit_rows=unit_rows, period_rows=period_rows)
    return counts.T, structure, system


def workers() -> int:
    """Threads for the column tasks: the cores this process may run on, at most
    :data:`MAX_WORKERS` (each holds three row-length work buffers)."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        cores = os.cpu_count() or 1
    return max(1, min(cores, MAX_WORKERS))


def _representatives(u: np.ndarray, n_units: int) -> np.ndarray:
    """For every row, the row number of one fixed row of its unit (the same for all
    rows of a unit): a unit holds one value exactly when each row equals its
    representative's."""
    rep = np.zeros(n_units, dtype=np.intp)
    rep[u] = np.arange(u.size, dtype=np.intp)
    return rep[u]


def count_matrix(u: np.ndarray, t: np.ndarray, n_units: int, n_periods: int, t_sorted: bool = False) -> np.ndarray:
    """Rows per period and unit, as a float (periods x units) matrix.

    Rows ordered by period are counted one period segment at a time (a loop over
    periods, not units), without a row-length index array.
    """
    if not t_sorted:
        flat = np.bincount(t * n_units + u, minlength=n_periods * n_units)
        return flat.reshape(n_periods, n_units).astype(np.float64)
    bounds = np.searchsorted(t, np.arange(n_periods + 1))
    counts = np.empty((n_periods, n_units))
    for p in range(n_periods):
        counts[p] = np.bincount(u[bounds[p] : bounds[p + 1]], minlength=n_units)
    return counts


def period_matrix(
    u: np.ndarray,
    t: np.ndarray,
    n_units: int,
    n_periods: int,
    counts: np.ndarray | None = None,
    *,
    unit_rows: np.ndarray | None = None,
    period_rows: np.ndarray | None = None,
) -> np.ndarray:
    """D' M_U D (periods x periods): period dummies after unit demeaning, from row codes.

    It is diag(n_t) - C' W C with C the unit x period row counts and W = diag(1/T_i);
    a sum over units, so the matrices of disjoint sets of units add up. ``counts``:
    the :func:`count_matrix` of these rows, when known; ``unit_rows`` and
    ``period_rows`` its sums, when known.
    """
    if n_periods > DENSE_PERIODS:
        return SparsePeriods.from_rows(u, t, n_units, n_periods)
    if counts is None and n_units * n_periods <= DENSE_CELLS:
        counts = count_matrix(u, t, n_units, n_periods)
    if counts is not None:
        t_i = counts.sum(axis=0) if unit_rows is None else unit_rows
        n_t = counts.sum(axis=1) if period_rows is None else period_rows
        w = np.divide(1.0, t_i, out=np.zeros(n_units), where=t_i > 0)
        return np.diag(n_t.astype(np.float64)) - (counts * w) @ counts.T
    from scipy import sparse

    m = sparse.coo_matrix((np.ones(u.size), (u, t)), shape=(n_units, n_periods)).tocsr()
    t_i = np.asarray(m.sum(axis=1)).ravel()
    w = np.divide(1.0, t_i, out=np.zeros(n_units), where=t_i > 0)
    cwc = (m.T @ (sparse.diags(w) @ m)).toarray()
    return np.diag(np.asarray(m.sum(axis=0)).ravel()) - cwc


@dataclass(frozen=True)
class SparsePeriods:
    """D' M_U D of many periods, never formed: the unit x period row counts C (sparse),
    the weights 1/T_i and the period row counts n_t, so that D' M_U D v =
    n_t v - C' (w * (C v)). Memory grows with the rows, not with P x P; the normal
    equations are solved by conjugate gradients (:meth:`explained`)."""

    counts: Any  # scipy.sparse CSR matrix, units x periods
    w: np.ndarray
    n_t: np.ndarray

    @classmethod
    def from_rows(cls, u: np.ndarray, t: np.ndarray, n_units: int, n_periods: int) -> SparsePeriods:
        """The system of rows with unit codes ``u`` and period indices ``t``."""
        from scipy import sparse

        m = sparse.coo_matrix((np.ones(u.size), (u, t)), shape=(n_units, n_periods)).tocsr()
        m.sum_duplicates()
        t_i = np.asarray(m.sum(axis=1)).ravel()
        w = np.divide(1.0, t_i, out=np.zeros(n_units), where=t_i > 0)
        return cls(m, w, np.asarray(m.sum(axis=0)).ravel())

    def __add__(self, other: SparsePeriods) -> SparsePeriods:
        """The system of two disjoint sets of units (partitions of a panel)."""
        from scipy import sparse

        return SparsePeriods(
            sparse.vstack([self.counts, other.counts]).tocsr(), np.concatenate([self.w, other.w]), self.n_t + other.n_t
        )

    def times(self, v: np.ndarray) -> np.ndarray:
        """(D' M_U D) v for a vector or a matrix of columns ``v``."""
        cv = self.counts @ v
        cv *= self.w if v.ndim == 1 else self.w[:, None]
        out = self.counts.T @ cv
        nv = self.n_t * v if v.ndim == 1 else self.n_t[:, None] * v
        return nv - out

    def explained(self, rhs: np.ndarray, *, tolerance: float = 1e-11, most: int | None = None) -> np.ndarray:
        """rhs' (D' M_U D)^+ rhs for each column of ``rhs`` (periods x columns): the sum
        of squares that period effects explain, NaN for a column not solved.

        Jacobi-preconditioned conjugate gradients from zero: the system is singular
        (constant on each connected set of periods) but consistent, since each column
        of ``rhs`` sums to zero over every such set, so the iterates stay in its range
        and converge to the explained sum of squares. A column is solved when its
        residual is below ``tolerance`` times its right-hand side; ``most`` iterations
        (default 4 P + 100) at most."""
        b = rhs if rhs.ndim == 2 else rhs[:, None]
        diag = self.n_t - np.asarray(self.counts.multiply(self.counts).T @ self.w).ravel()
        d = np.where(diag > 1e-12 * max(float(self.n_t.max(initial=0.0)), 1.0), diag, 1.0)[:, None]
        x = np.zeros_like(b)
        r = b.copy()
        z = r / d
        p = z.copy()
        rz = (r * z).sum(axis=0)
        bound = tolerance * np.linalg.norm(b, axis=0)
        active = np.linalg.norm(r, axis=0) > bound
        for _ in range(most if most is not None else 4 * b.shape[0] + 100):
            if not active.any():
                break
            ap = self.times(p)
            pap = (p * ap).sum(axis=0)
            alpha = np.divide(rz, pap, out=np.zeros_like(rz), where=active & (pap > 0))
            x += alpha * p
            r -= alpha * ap
            active &= np.linalg.norm(r, axis=0) > bound
            z = r / d
            rz_new = (r * z).sum(axis=0)
            beta = np.divide(rz_new, rz, out=np.zeros_like(rz), where=rz > 0)
            p = z + beta * p
            rz = rz_new
        out = (b * x).sum(axis=0)
        out[active] = np.nan
        return out


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
    t_sorted: bool = False  # rows ordered by period: per-period sums by segments
    rep_row: Future[np.ndarray] | None = None  # see _representatives (when text columns exist)
    local: threading.local = field(default_factory=threading.local)  # per-thread buffers


def _buffers(ctx: _Context, size: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Three row-length work buffers owned by the calling thread (the first two cut to
    ``size``): fresh memory costs a page fault per 4 KiB, reused memory nothing."""
    loc = ctx.local
    if getattr(loc, "buffers", None) is None:
        loc.buffers = tuple(np.empty(ctx.u.size) for _ in range(3))
    a, b, x = loc.buffers
    return a[:size], b[:size], x


def period_sums(tt: np.ndarray, n_periods: int, t_sorted: bool, w: np.ndarray | None = None) -> np.ndarray:
    """Per-period sums of ``w`` (counts when None) over rows with periods ``tt``.

    Rows ordered by period (``t_sorted``: one file per wave) are summed by contiguous
    segments: bincount over a few bins that repeat row after row waits on its own
    stores.
    """
    if not t_sorted or tt.size == 0:
        return np.bincount(tt, weights=w, minlength=n_periods)
    bounds = np.searchsorted(tt, np.arange(n_periods + 1))
    if w is None:
        return np.diff(bounds)
    out = np.zeros(n_periods)
    full = bounds[:-1] < bounds[1:]
    out[full] = np.add.reduceat(w, bounds[:-1][full])
    return out


def _is_number(dt: pl.DataType) -> bool:
    return dt.is_numeric() or dt == pl.Boolean


def _structure(counts: np.ndarray, unit_rows: np.ndarray) -> pl.DataFrame:
    """Per-unit structure fields from the (periods x units) count matrix (at most 63
    periods)."""
    n_periods, n = counts.shape
    seen = counts > 0
    first = np.argmax(seen, axis=0)
    last = n_periods - 1 - np.argmax(seen[::-1], axis=0)
    pattern = np.zeros(n, dtype=np.uint64)
    for p in range(n_periods):  # a loop over periods (at most 63), not units
        pattern[seen[p]] |= np.uint64(1) << np.uint64(p)
    return pl.DataFrame(
        {
            UNIT_ID: pl.Series(UNIT_ID, np.arange(n, dtype=np.uint32)),
            "__rows": pl.Series("__rows", unit_rows.astype(np.uint32)),
            "__first": pl.Series("__first", first.astype(np.uint32)),
            "__last": pl.Series("__last", last.astype(np.uint32)),
            "__seen": pl.repeat(None, n, dtype=pl.Null, eager=True),
            "__pattern": pl.Series("__pattern", pattern),
        }
    )


# --- number columns -------------------------------------------------------------------------


def value_counts(s: pl.Series) -> tuple[int, int]:
    """(distinct values, rows of the most common one) of a column, NaN as missing.

    Floats, integers and booleans are sorted with numpy (:func:`column_facts`:
    equal neighbours are one value, the longest run is the most common value);
    other columns (text, dates, decimals) are hashed by polars.
    """
    facts = column_facts(s)
    if facts is not None:
        return facts.distinct, facts.top
    v = s.drop_nulls()
    if v.len() == 0:
        return 0, 0
    distinct = v.n_unique()
    return (distinct, 1) if distinct == v.len() else (distinct, int(v.unique_counts().max()))


@dataclass(frozen=True)
class ColumnFacts:
    """Whole-column counts of one number column: ``nulls`` (null values), ``nan``,
    ``inf``, ``shift`` (the first finite value in row order), ``vmin`` and ``vmax``
    (finite extremes; None without finite values), ``distinct`` values and ``top``
    (rows of the most common one), NaN and null counted as missing."""

    nulls: int
    nan: int
    inf: int
    shift: float | None
    vmin: float | None
    vmax: float | None
    distinct: int
    top: int


def column_facts(s: pl.Series) -> ColumnFacts | None:
    """:class:`ColumnFacts` of a float, integer or boolean column held in memory, by one
    sort of a copy in place (NaN sorts last); None for other types."""
    nulls = int(s.null_count())
    if s.dtype.is_float():
        x = s.to_numpy()  # nulls as NaN
        x = x.copy() if not x.flags.writeable else x
        shift = _first_finite(x)
        x.sort()
        missing = int(np.count_nonzero(np.isnan(x)))
        valid = x[: x.size - missing]
        lo = int(np.searchsorted(valid, -np.inf, side="right"))
        hi = int(np.searchsorted(valid, np.inf, side="left"))
        runs = _runs(valid) if valid.size else (0, 0)
        extremes = (float(valid[lo]), float(valid[hi - 1])) if hi > lo else (None, None)
        return ColumnFacts(nulls, missing - nulls, lo + valid.size - hi, shift, *extremes, *runs)
    if s.dtype.is_integer() and s.dtype not in (pl.Int128, pl.UInt128) or s.dtype == pl.Boolean:
        v = (s.cast(pl.Int8) if s.dtype == pl.Boolean else s).drop_nulls().to_numpy()
        v = v.copy() if not v.flags.writeable else v
        if v.size == 0:
            return ColumnFacts(nulls, 0, 0, None, None, None, 0, 0)
        shift = float(v[0])
        v.sort()
        return ColumnFacts(nulls, 0, 0, shift, float(v[0]), float(v[-1]), *_runs(v))
    return None


def _first_finite(x: np.ndarray, block: int = 65_536) -> float | None:
    """The first finite value of ``x`` in order, looked for a block at a time."""
    for start in range(0, x.size, block):
        part = np.isfinite(x[start : start + block])
        if part.any():
            return float(x[start + int(np.argmax(part))])
    return None


def _runs(x: np.ndarray) -> tuple[int, int]:
    """(distinct values, length of the longest run) of a sorted, non-empty array."""
    change = x[1:] != x[:-1]
    distinct = int(np.count_nonzero(change)) + 1
    if distinct == x.size:  # continuous: every value once
        return distinct, 1
    edges = np.flatnonzero(change)
    return distinct, int(np.diff(edges, prepend=-1, append=x.size - 1).max())


def _number(ctx: _Context, s: pl.Series, shift: float | None = None, count_values: bool = True) -> ColumnStats:
    """A number column's statistics.

    ``count_values``: also count its distinct values and the rows of the most common
    one (a tally for integers of a small range, a sort otherwise); a partition of
    the units leaves them at 0. ``shift``: the value the unit means are reported
    relative to (default: the first finite value); given, the column is part of a
    partition and the R2 inputs are always computed.
    """
    x = _floats(s, _buffers(ctx, 0)[2])
    whole = not s.dtype.is_float()  # integers and booleans
    extremes = None
    if not whole:
        # NaN propagates through min and max: finite extremes mean every value is finite
        extremes = (float(x.min()), float(x.max())) if x.size else None
        all_finite = extremes is None or bool(np.isfinite(extremes[0]) and np.isfinite(extremes[1]))
        finite = np.ones(0, dtype=bool) if all_finite else np.isfinite(x)
        nulls = 0 if all_finite else int(np.isnan(x).sum())
    else:  # only nulls (NaN after the cast) are not finite
        nulls = int(s.null_count())
        all_finite = nulls == 0
        finite = np.ones(0, dtype=bool) if all_finite else ~np.isnan(x)
    non_finite = 0 if all_finite else int(finite.size - finite.sum()) - nulls
    present = None if nulls == 0 else ~np.isnan(x)
    if all_finite:
        uu, tt, xf = ctx.u, ctx.t, x
        n_i = ctx.unit_rows
    else:
        uu, tt, xf = ctx.u[finite], ctx.t[finite], x[finite]
        n_i = np.bincount(uu, minlength=ctx.n_units)
    buf_a, buf_b, _ = _buffers(ctx, xf.size)
    common = {
        "nulls": nulls,
        "non_finite": non_finite,
        "n_i": n_i,
        "n_t": _per_period(ctx, present),
        "one_value": _one_value(ctx, x, present),
    }
    if xf.size == 0:
        z = np.zeros(ctx.n_units)
        counted = _number_values(ctx, s, x, present, whole, 0.0, 0.0) if count_values else (0, 0)
        return ColumnStats(
            changing=np.zeros(ctx.n_units, dtype=bool), mean_i=z, m2_i=z, distinct=counted[0], top=counted[1], **common
        )
    partial = shift is not None
    shift = float(xf[0]) if shift is None else shift
    vmin, vmax = extremes if all_finite and extremes is not None else (float(xf.min()), float(xf.max()))
    # Each unit is centred on one of its own values (the last in row order), not on
    # the column's shift: x - shift rounds to eps * |x - shift|, which for a unit far
    # from the shift would swamp its within deviations (methods.md, section 2).
    ref = np.zeros(ctx.n_units)
    ref[uu] = xf
    xx = np.subtract(xf, np.take(ref, uu, out=buf_a, mode="clip"), out=buf_a)  # take: without the GIL
    sums = np.bincount(uu, weights=xx, minlength=ctx.n_units)
    local = np.divide(sums, n_i, out=np.zeros(ctx.n_units), where=n_i > 0)
    dev = np.subtract(xx, np.take(local, uu, out=buf_b, mode="clip"), out=buf_b)
    m2_i = np.bincount(uu, weights=np.multiply(dev, dev, out=buf_a), minlength=ctx.n_units)
    mean_i = np.where(n_i > 0, (ref - shift) + local, 0.0)  # relative to the column's shift

    if whole and max(abs(vmin), abs(vmax)) < 2.0**52:
        changing = m2_i > 0
    elif whole and s.dtype.is_integer():  # beyond 2**52 floats cannot tell neighbours apart
        changing = _integer_changing(ctx, s)
        common["one_value"] = _integer_one_value(ctx, s)
    else:
        changing = _float_changing(x, finite, all_finite, ctx, n_i, mean_i, m2_i, shift, vmin, vmax)
    rhs = wss = system = None
    if partial or changing.any():
        rhs = period_sums(tt, ctx.n_periods, ctx.t_sorted, dev)
        wss = float(m2_i.sum())
        if not all_finite:
            system = period_matrix(uu, tt, ctx.n_units, ctx.n_periods)
    # last: the value count sorts in this thread's work buffers
    distinct, top = _number_values(ctx, s, x, present, whole, vmin, vmax) if count_values else (0, 0)
    return ColumnStats(
        distinct=distinct,
        top=top,
        changing=changing,
        examples=_number_examples(ctx, x, finite, all_finite, changing),
        shift=shift,
        vmin=vmin,
        vmax=vmax,
        mean_i=mean_i,
        m2_i=m2_i,
        rhs=rhs,
        wss=wss,
        system=system,
        **common,
    )


_CHUNKED = (pl.Float64, pl.Float32, pl.Int64, pl.Int32, pl.Int16, pl.Int8, pl.UInt64, pl.UInt32, pl.UInt16, pl.UInt8)


def _floats(s: pl.Series, out: np.ndarray) -> np.ndarray:
    """``s`` as float64, nulls as NaN: written into ``out`` (row length) chunk by chunk
    for floats and integers, a new array for other types (booleans, decimals)."""
    if s.dtype not in _CHUNKED:
        return s.cast(pl.Float64).to_numpy()
    i = 0
    for chunk in s.get_chunks():
        a = chunk.to_numpy()  # no copy for a chunk without nulls
        np.copyto(out[i : i + a.size], a, casting="unsafe")
        i += a.size
    return out[:i]


def _number_values(
    ctx: _Context, s: pl.Series, x: np.ndarray, present: np.ndarray | None, whole: bool, vmin: float, vmax: float
) -> tuple[int, int]:
    """(distinct values, rows of the most common one) of a number column ``s`` (as
    floats ``x``; ``vmin`` and ``vmax`` its finite extremes).

    Integers of a small range are tallied by bincount; integers beyond exact floats
    are sorted as integers; others are sorted as floats in a work buffer.
    """
    v = x if present is None else x[present]
    if v.size == 0:
        return 0, 0
    if whole:
        if max(abs(vmin), abs(vmax)) >= 2.0**53:
            return value_counts(s)
        if vmax - vmin <= 4 * v.size + 1024 and s.dtype.is_integer():
            tally = np.zeros(int(vmax - vmin) + 1, dtype=np.int64)
            for chunk in s.drop_nulls().get_chunks():  # the integers themselves, chunk by chunk
                # in int64: an Int8 holding -128 and 0 would wrap around in its own type
                tally += np.bincount(chunk.to_numpy().astype(np.int64, copy=False) - int(vmin), minlength=tally.size)
            return int(np.count_nonzero(tally)), int(tally.max())
    buf = _buffers(ctx, v.size)[0]
    np.copyto(buf, v)
    buf.sort()
    return _runs(buf)


def _integer_one_value(ctx: _Context, s: pl.Series) -> bool:
    """Whether every period holds at most one distinct integer of ``s``, compared exactly."""
    per_period = pl.DataFrame({"t": ctx.t, "v": s}).group_by("t").agg(pl.col("v").drop_nulls().n_unique())
    return bool(per_period["v"].max() <= 1) if per_period.height else True


def _integer_changing(ctx: _Context, s: pl.Series) -> np.ndarray:
    """Units holding two different integers, compared exactly in the column's own type
    (int64 and uint64 extremes, 128-bit integers): a unit changes when its minimum and
    maximum differ (methods.md, section 3: at least two distinct values)."""
    per_unit = (
        pl.DataFrame({"u": ctx.u, "v": s})
        .group_by("u")
        .agg((pl.col("v").max() != pl.col("v").min()).fill_null(False).alias("changes"))
    )
    out = np.zeros(ctx.n_units, dtype=bool)
    out[per_unit["u"].to_numpy()] = per_unit["changes"].to_numpy()
    return out


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
    return _extremes_of_rows(ctx, x, units[ctx.u] if all_finite else (units[ctx.u] & finite))


def _extremes_of_rows(ctx: _Context, x: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-unit minimum and maximum of ``x`` over ``rows`` (a mask or row numbers);
    +inf / -inf for units without such rows."""
    uu, xs = ctx.u[rows], x[rows]
    lo = np.full(ctx.n_units, np.inf)
    hi = np.full(ctx.n_units, -np.inf)
    np.minimum.at(lo, uu, xs)
    np.maximum.at(hi, uu, xs)
    return lo, hi


def _example_rows(ctx: _Context, changing: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(unit codes, row numbers) of the first ``ctx.examples`` changing units.

    Columns often share their first changing units, so each thread keeps the rows of
    the last set it asked for.
    """
    units = np.flatnonzero(changing)[: ctx.examples]
    key = units.tobytes()
    if getattr(ctx.local, "example_key", None) != key:  # a cache per thread
        mark = np.zeros(changing.size, dtype=bool)
        mark[units] = True
        ctx.local.example_key, ctx.local.example_rows = key, np.flatnonzero(mark[ctx.u])
    return units, ctx.local.example_rows


def _number_examples(
    ctx: _Context, x: np.ndarray, finite: np.ndarray, all_finite: bool, changing: np.ndarray
) -> tuple[tuple[int, Any, Any], ...]:
    if ctx.examples <= 0 or not changing.any():
        return ()
    units, rows = _example_rows(ctx, changing)
    if not all_finite:
        rows = rows[finite[rows]]
    lo, hi = _extremes_of_rows(ctx, x, rows)
    return tuple((int(i), float(lo[i]), float(hi[i])) for i in units)


def _per_period(ctx: _Context, present: np.ndarray | None) -> np.ndarray:
    """Non-missing values per period (``present`` None: every row has one)."""
    if present is None:
        return ctx.period_rows
    return period_sums(ctx.t[present], ctx.n_periods, ctx.t_sorted)


def _one_value(ctx: _Context, v: np.ndarray, present: np.ndarray | None) -> bool:
    """Whether every period holds at most one distinct non-missing value of ``v``."""
    if present is not None:
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


def _codes(s: pl.Series) -> tuple[np.ndarray, np.ndarray | None, int] | None:
    """(dense codes, present mask or None without nulls, number of codes) for a
    non-number column, or None.

    Text is coded by hashing (codes in order of appearance); categories by their
    physical codes; other orderable values (dates, times, ...) by their dense rank.
    """
    dt = s.dtype
    nulls = s.null_count()
    present = s.is_not_null().to_numpy() if nulls else None
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
    codes = (c.fill_null(0) if nulls else c).to_numpy()
    return codes, present, int(codes.max()) + 1 if codes.size else 0


def _other_column(
    ctx: _Context, s: pl.Series, slow: Callable[[str], ColumnStats], count_values: bool
) -> ColumnStats:
    """A text, categorical, date or other non-number column: coded, then counted (or
    handed to ``slow`` when it has no codes: lists, structs, objects)."""
    codes = _codes(s)
    if codes is None:
        return slow(s.name)
    return _coded(ctx, s, *codes, count_values=count_values)


def _coded(
    ctx: _Context,
    s: pl.Series,
    codes: np.ndarray,
    present: np.ndarray | None,
    width: int,
    *,
    count_values: bool = True,
) -> ColumnStats:
    nulls = int(s.null_count())
    if present is not None:
        rows = np.flatnonzero(present)
        uu, cc = ctx.u[rows], codes[rows]
        n_i = np.bincount(uu, minlength=ctx.n_units)
        rep = np.zeros(ctx.n_units, dtype=np.intp)
        rep[uu] = rows  # one row holding a value, per unit
        ref = np.take(codes, rep[uu], mode="clip")
    else:
        uu, cc = ctx.u, codes
        n_i = ctx.unit_rows
        assert ctx.rep_row is not None
        ref = np.take(codes, ctx.rep_row.result(), mode="clip")
    distinct = top = 0
    if count_values:
        tally = np.bincount(cc, minlength=width)
        distinct = int(np.count_nonzero(tally))
        top = int(tally.max()) if cc.size else 0
    changing = np.zeros(ctx.n_units, dtype=bool)
    changing[uu[cc != ref]] = True
    return ColumnStats(
        nulls=nulls,
        non_finite=0,
        distinct=distinct,
        top=top,
        n_i=n_i,
        changing=changing,
        n_t=_per_period(ctx, present),
        one_value=_one_value(ctx, codes, present),
        examples=_coded_examples(ctx, s, changing),
    )


def _coded_examples(ctx: _Context, s: pl.Series, changing: np.ndarray) -> tuple[tuple[int, Any, Any], ...]:
    if ctx.examples <= 0 or not changing.any():
        return ()
    _, rows = _example_rows(ctx, changing)
    v = s.gather(rows)
    if isinstance(v.dtype, pl.Categorical | pl.Enum):
        v = v.cast(pl.String)
    ext = (
        pl.DataFrame({"u": ctx.u[rows], "v": v})
        .group_by("u")
        .agg(pl.col("v").min().alias("lo"), pl.col("v").max().alias("hi"))
        .sort("u")
    )
    return tuple((int(r[0]), str(r[1]), str(r[2])) for r in ext.iter_rows())

