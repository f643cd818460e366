"""The moments kernel: mergeable sufficient statistics of every column, per shard of rows.

A shard is any set of a panel's rows: the whole panel (the memory engine), a range of
units (the streaming engine), a Parquet row group on a dask worker (the dask engine), or
a random subset of rows (the tests). Its rows carry a global unit code (0..n-1, the
panel's sorted units) in ``__pa_unit`` and a period index in ``__pa_period``.
:func:`shard` computes, for the units that have rows in the shard (its *local* units):

- number columns: per unit the usable (finite) count, a reference value (one of the
  unit's own values), the mean less that reference and the centred sum of squares;
  the missing and non-finite counts, the first finite value, the finite extremes, and
  the cells (unit, period) of the rows without a usable value;
- other columns (text, dates, categories, lists, ...): per unit the count, one
  representative value and whether the shard saw a value of the unit differ from it;
- every column: non-missing values per period, one representative value per period
  when no period of the shard holds two values, and exact value counts (distinct values
  and the rows of the most common one), as final counts or as a mergeable table;
- the rows per (unit, period) cell, for the structure and the period dummies' system.

:func:`merge` combines two shards exactly. A unit with rows in both combines by the
update of Chan, Golub and LeVeque (1979, "Updating formulae and a pairwise algorithm
for computing sample variances"), written once in :func:`chan`: for counts n_a, n_b,
means m_a, m_b and centred sums of squares M_a, M_b,

    n = n_a + n_b,  d = m_b - m_a,  m = m_a + d n_b / n,  M = M_a + M_b + d^2 n_a n_b / n.

Means are kept relative to a value of the unit itself, so a column like 1e9 + noise
keeps the digits of its within deviations (methods.md, section 2). Counts, cells and
value tables add up; representatives compare.

Two figures depend on every row of a unit: the per-period sums of the within
deviations x_it - x_bar_i (the period-effect R2) and, for floats, the exact extremes of
the units whose range the sum of squares does not settle (and of the units shown as
examples). A shard that holds whole units computes them at once (``whole=True``: the
memory and streaming engines); otherwise the drivers run :func:`refine` on each shard
with the merged unit means (a second pass, :func:`plan`) and merge those by addition,
minimum and maximum. :func:`finish` turns the merged statistics into the
:class:`ColumnStats` of every column and the structure's per-unit table.

What a unit "changes" means (methods.md, section 3) is decided here and only here
(:func:`number_changes`, :func:`exceeds`, and the representatives of other values):
whole numbers change when their centred sum of squares is non-zero (all values equal
exactly when every deviation is zero; integers below 2**52 are exact in float64);
floats when (max - min) > tol * (1 + |unit mean|), the sum of squares bounding the
range, sqrt(M / n) <= range <= 2 sqrt(M), so that only the units between the bounds
need exact extremes; other values when a value differs from the unit's representative.
Infinities are counted (``non_finite``) and left out of every sum and of these tests;
NaN and null are missing.

Columns are independent tasks for a pool of threads (numpy and polars release the
interpreter lock); ``np.bincount`` adds in row order, so every sum is the same bits
from run to run whatever the schedule. Each thread keeps three row-length buffers
from column to column (fresh memory costs a page fault per 4 KiB).
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import polars as pl

from auditor.errors import broken
from auditor.io.load import PERIOD_ID, UNIT_ID

DENSE_CELLS = 50_000_000  # units x periods up to which cell counts are held dense
DENSE_PERIODS = 400  # beyond this many periods cells stay sparse and no P x P period system is formed
BITMASK_PERIODS = 63  # participation patterns as bit masks up to this many periods
MAX_WORKERS = 4  # threads of the column pass, at most
EARLY_ROWS = 65_536  # rows checked first when a one-value-per-period test can fail early
CHUNK_UNITS = 1 << 20  # units per block when the period system is summed block by block
_EPS = float(np.finfo(np.float64).eps)
_EXACT_INTEGERS = 2.0**52  # whole numbers below this are exact in float64


# --------------------------------------------------------------------------- shard statistics


@dataclass(frozen=True)
class Values:
    """Exact counts of a column's non-missing values (NaN is missing, infinities count).

    Final counts (``distinct``, ``top``: rows of the most common value) when one shard
    saw the whole column; otherwise a mergeable ``table``: (sorted unique values as
    float64, their row counts) for numbers, a DataFrame (``value``, ``count``) for
    other values. Both None: not counted (the driver counts the column another way).
    """

    distinct: int | None = None
    top: int | None = None
    table: Any = None

    def counts(self) -> tuple[int, int] | None:
        """(distinct values, rows of the most common one), or None when not counted."""
        if self.table is None:
            return None if self.distinct is None else (self.distinct, int(self.top or 0))
        if isinstance(self.table, tuple):
            _, c = self.table
            return int(c.size), int(c.max()) if c.size else 0
        t = self.table
        return t.height, int(t["count"].max()) if t.height else 0


@dataclass(frozen=True)
class PeriodValues:
    """Whether no period of a shard holds two different non-missing values (``one``),
    and then each period's value (``rep``: floats for numbers, a Series otherwise; only
    meaningful where the period has a value)."""

    one: bool
    rep: Any = None


@dataclass(frozen=True)
class Finals:
    """What a shard of whole units decides at once: ``changing`` per local unit, the
    per-period sums of the within deviations (``rhs``, None when no unit varies) and
    example units as (global code, low, high) or (global code, None, distinct values)."""

    changing: np.ndarray
    rhs: np.ndarray | None
    examples: tuple[tuple[int, Any, Any], ...]


@dataclass(frozen=True)
class Numbers:
    """A number column's statistics in one shard (per local unit where an array is (m,)).

    ``n`` usable values, ``ref`` one of the unit's own values (0 without one), ``local``
    the unit mean less ``ref``, ``m2`` the centred sum of squares; ``nulls`` (null or
    NaN), ``non_finite`` (infinities), ``first`` the first finite value in row order,
    ``vmin`` / ``vmax`` the finite extremes; ``n_t`` non-missing values per period;
    ``unusable`` the cells (global unit * periods + period, rows) of rows without a
    finite value, or None when every row has one. ``exact``: for integers beyond 2**52
    (where neighbouring integers share a float), one value per unit in the column's own
    integer type and whether the shard saw the unit hold another, compared exactly.
    """

    integral: bool
    nulls: int
    non_finite: int
    first: float | None
    vmin: float | None
    vmax: float | None
    n: np.ndarray
    ref: np.ndarray
    local: np.ndarray
    m2: np.ndarray
    n_t: np.ndarray
    periods: PeriodValues
    unusable: tuple[np.ndarray, np.ndarray] | None
    values: Values
    finals: Finals | None = None
    exact: tuple[np.ndarray, np.ndarray] | None = None  # integers beyond 2**52: (value, changed) per unit


@dataclass(frozen=True)
class Coded:
    """A non-number column's statistics in one shard: ``n`` values per local unit,
    ``rep`` one value per unit (null without one), ``changed`` whether the shard saw a
    value of the unit differ from ``rep``; ``nested`` lists, structs and other values
    without an order (examples then count distinct values)."""

    nulls: int
    n: np.ndarray
    rep: pl.Series
    changed: np.ndarray
    n_t: np.ndarray
    periods: PeriodValues
    values: Values
    nested: bool = False
    finals: Finals | None = None


@dataclass(frozen=True)
class Cells:
    """Rows per (unit, period) of a shard's local units: ``dense`` (periods x units,
    int32) or ``sparse`` (a scipy CSR matrix, units x periods)."""

    dense: np.ndarray | None = None
    sparse: Any = None

    @property
    def width(self) -> int:
        """Number of units (columns of the dense form, rows of the sparse one)."""
        return int(self.dense.shape[1]) if self.dense is not None else int(self.sparse.shape[0])


@dataclass(frozen=True)
class Shard:
    """The mergeable statistics of a set of rows.

    ``units`` are the sorted global codes of its local units (every array indexed by
    local unit follows this order); ``whole`` says every row of each of these units is
    in the set (then ``finals`` of each column are known); ``unit_rows`` and
    ``period_rows`` count rows; ``cells`` the rows per (unit, period).
    """

    n_units: int
    n_periods: int
    units: np.ndarray
    whole: bool
    unit_rows: np.ndarray
    period_rows: np.ndarray
    cells: Cells
    columns: dict[str, Numbers | Coded]


@dataclass(frozen=True)
class _Context:
    u: np.ndarray  # local unit index of each row
    t: np.ndarray  # period index of each row
    m: int  # local units
    n_periods: int
    units: np.ndarray  # global code of each local unit
    unit_rows: np.ndarray
    period_rows: np.ndarray
    examples: int
    tolerance: float
    whole: bool
    count: str  # "final", "table" or "none"
    t_sorted: bool = False  # rows ordered by period: per-period sums by segments
    rep_row: Future[tuple[np.ndarray, np.ndarray]] | None = None  # see _representatives
    local: threading.local = field(default_factory=threading.local)  # per-thread buffers


def workers() -> int:
    """Threads for the column tasks: the cores this process may run on, at most
    :data:`MAX_WORKERS` (each holds three row-length work buffers)."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        cores = os.cpu_count() or 1
    return max(1, min(cores, MAX_WORKERS))


def local_units(codes: np.ndarray, n_units: int) -> tuple[np.ndarray, np.ndarray]:
    """(local index of each row, sorted global codes of the local units) for rows with
    global unit ``codes``; the codes themselves when every unit of a range is present."""
    if codes.size == 0:
        return codes.astype(np.intp), np.zeros(0, dtype=np.int64)
    lo, hi = int(codes.min()), int(codes.max())
    if hi - lo <= 4 * codes.size + 1024:
        present = np.bincount(codes - lo if lo else codes, minlength=hi - lo + 1) > 0
        units = np.flatnonzero(present) + lo
        if units.size == hi - lo + 1:  # a whole range of codes: no remapping
            return (codes - lo if lo else codes).astype(np.intp, copy=False), units.astype(np.int64)
        index = np.cumsum(present) - 1
        return np.take(index, codes - lo, mode="clip").astype(np.intp), units.astype(np.int64)
    units, inverse = np.unique(codes, return_inverse=True)
    return inverse.astype(np.intp), units.astype(np.int64)


def shard(
    frame: pl.DataFrame,
    columns: Sequence[str],
    *,
    n_units: int,
    n_periods: int,
    whole: bool,
    count: str = "final",
    examples: int = 0,
    tolerance: float = 1e-9,
) -> Shard:
    """The statistics of ``columns`` over the rows of ``frame`` (global unit codes in
    ``__pa_unit``, period indices in ``__pa_period``).

    ``whole``: the frame holds every row of each of its units (the finals are then
    computed here); ``count``: "final" when the frame is the whole column (distinct
    values counted at once), "table" for a mergeable value table, "none" when the
    driver counts values itself; ``examples``: changing units to describe per column;
    ``tolerance``: the relative float tolerance of methods.md.
    """
    codes = frame[UNIT_ID].to_numpy()
    u, units = local_units(codes, n_units)
    t = frame[PERIOD_ID].to_numpy().astype(np.intp)
    m = int(units.size)
    unit_rows = np.bincount(u, minlength=m)
    t_sorted = bool(t.size < 2 or (t[1:] >= t[:-1]).all())
    period_rows = period_sums(t, n_periods, t_sorted)
    schema = frame.schema
    numbers = {c for c in columns if is_number(schema[c])}
    others = [c for c in columns if c not in numbers]
    # Every column is independent work (numpy and polars release the interpreter lock);
    # each task adds in row order, so results do not depend on the schedule.
    with ThreadPoolExecutor(max_workers=workers()) as pool:
        ctx = _Context(
            u, t, m, n_periods, units, unit_rows, period_rows, examples, tolerance, whole, count,
            t_sorted=t_sorted, rep_row=pool.submit(_representatives, u, m) if others else None,
        )  # fmt: skip
        grid = pool.submit(_cells, u, t, m, n_periods, t_sorted)
        jobs = {c: pool.submit(_number if c in numbers else _coded, ctx, frame[c]) for c in columns}
        out = {c: jobs[c].result() for c in columns}
        cells = grid.result()
    return Shard(n_units, n_periods, units, whole, unit_rows, np.asarray(period_rows), cells, out)


def _representatives(u: np.ndarray, m: int) -> tuple[np.ndarray, np.ndarray]:
    """(one fixed row per local unit, that row for every row): a unit holds one value
    exactly when each row equals its representative's."""
    rep = np.zeros(m, dtype=np.intp)
    rep[u] = np.arange(u.size, dtype=np.intp)
    return rep, rep[u]


def _dense(units: int, n_periods: int) -> bool:
    """Whether (unit, period) cells are held dense: few periods and few cells."""
    return n_periods <= DENSE_PERIODS and units * n_periods <= DENSE_CELLS


def _cells(u: np.ndarray, t: np.ndarray, m: int, n_periods: int, t_sorted: bool) -> Cells:
    if _dense(m, n_periods):
        return Cells(dense=count_matrix(u, t, m, n_periods, t_sorted))
    from scipy import sparse

    return Cells(sparse=sparse.coo_matrix((np.ones(u.size, dtype=np.int32), (u, t)), shape=(m, n_periods)).tocsr())


def count_matrix(u: np.ndarray, t: np.ndarray, n_units: int, n_periods: int, t_sorted: bool = False) -> np.ndarray:
    """Rows per period and unit, as an int32 (periods x units) matrix; rows ordered by
    period are counted one period segment at a time (a loop over periods, not units)."""
    if not t_sorted:
        flat = np.bincount(t * n_units + u, minlength=n_periods * n_units)
        return flat.reshape(n_periods, n_units).astype(np.int32)
    bounds = np.searchsorted(t, np.arange(n_periods + 1))
    counts = np.empty((n_periods, n_units), dtype=np.int32)
    for p in range(n_periods):
        counts[p] = np.bincount(u[bounds[p] : bounds[p + 1]], minlength=n_units)
    return counts


def period_sums(tt: np.ndarray, n_periods: int, t_sorted: bool, w: np.ndarray | None = None) -> np.ndarray:
    """Per-period sums of ``w`` (counts when None) over rows with periods ``tt``; rows
    ordered by period (one file per wave) are summed by contiguous segments."""
    if not t_sorted or tt.size == 0:
        return np.bincount(tt, weights=w, minlength=n_periods)
    bounds = np.searchsorted(tt, np.arange(n_periods + 1))
    if w is None:
        return np.diff(bounds)
    out = np.zeros(n_periods)
    full = bounds[:-1] < bounds[1:]
    out[full] = np.add.reduceat(w, bounds[:-1][full])
    return out


def is_number(dt: pl.DataType) -> bool:
    """Whether the within/between decomposition applies (numbers and booleans)."""
    return dt.is_numeric() or dt == pl.Boolean


def _buffers(ctx: _Context, size: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Three row-length work buffers owned by the calling thread (the first two cut to
    ``size``): fresh memory costs a page fault per 4 KiB, reused memory nothing."""
    loc = ctx.local
    if getattr(loc, "buffers", None) is None:
        loc.buffers = tuple(np.empty(ctx.u.size) for _ in range(3))
    a, b, x = loc.buffers
    return a[:size], b[:size], x


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


def _number(ctx: _Context, s: pl.Series) -> Numbers:
    """A number column's statistics (see :class:`Numbers`)."""
    x = _floats(s, _buffers(ctx, 0)[2])
    integral = not s.dtype.is_float()  # integers and booleans
    extremes = None
    if not integral:
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
    n_t = _per_period(ctx, present)
    big = _big_integers(s)
    periods = _period_values(ctx, x if big is None else big, present)
    if all_finite:
        uu, tt, xf, n_i = ctx.u, ctx.t, x, ctx.unit_rows
        unusable = None
    else:
        uu, tt, xf = ctx.u[finite], ctx.t[finite], x[finite]
        n_i = np.bincount(uu, minlength=ctx.m)
        unusable = _cell_ids(ctx, ~finite)
    if xf.size == 0:
        z = np.zeros(ctx.m)
        finals = Finals(np.zeros(ctx.m, dtype=bool), None, ()) if ctx.whole else None
        values = _number_values(ctx, s, x, present, integral, 0.0, 0.0)
        return Numbers(integral, nulls, non_finite, None, None, None, n_i, z, z, z, n_t, periods, unusable, values, finals)
    vmin, vmax = extremes if all_finite and extremes is not None else (float(xf.min()), float(xf.max()))
    buf_a, buf_b, _ = _buffers(ctx, xf.size)
    # Each unit is centred on one of its own values (the last in row order), never on a
    # value of the column far from it: x - c rounds to eps * |x - c| (methods.md, section 2).
    ref = np.zeros(ctx.m)
    ref[uu] = xf
    local, dev, m2 = _centred(xf, uu, ref, n_i, buf_a, buf_b)
    exact = None
    if big is not None:  # the unit's last value and whether another differs, in the integer type
        rows = np.arange(x.size) if present is None else np.flatnonzero(present)
        last = np.zeros(ctx.m, dtype=np.intp)
        last[ctx.u[rows]] = rows
        differs = big[rows] != big[last[ctx.u[rows]]]
        exact = (big[last], np.bincount(ctx.u[rows], weights=differs, minlength=ctx.m) > 0)
    finals = None
    if ctx.whole:
        mean_abs = ref + local
        changing = number_changes(
            integral, n_i, mean_abs, m2, vmin, vmax, ctx.tolerance,
            lambda units: _extremes_of_rows(ctx, x, units[ctx.u] if all_finite else (units[ctx.u] & finite)),
            None if exact is None else exact[1],
        )  # fmt: skip
        rhs = period_sums(tt, ctx.n_periods, ctx.t_sorted, dev) if bool((m2 > 0).any()) else None
        finals = Finals(changing, rhs, _number_examples(ctx, s, x, finite, all_finite, changing))
    # last: the value count sorts in this thread's work buffers
    values = _number_values(ctx, s, x, present, integral, vmin, vmax)
    return Numbers(
        integral, nulls, non_finite, float(xf[0]), vmin, vmax, n_i, ref, local, m2, n_t, periods, unusable, values,
        finals, exact,
    )  # fmt: skip


_NUMPY_INTEGERS = (pl.Int8, pl.Int16, pl.Int32, pl.Int64, pl.UInt8, pl.UInt16, pl.UInt32, pl.UInt64)


def _big_integers(s: pl.Series) -> np.ndarray | None:
    """The integers of ``s`` in their own numpy type (nulls as 0) when some reach 2**52,
    where neighbouring integers would share a float; None otherwise."""
    if s.dtype not in _NUMPY_INTEGERS or s.len() == 0:
        return None
    lo, hi = s.min(), s.max()
    if lo is None or max(abs(int(lo)), abs(int(hi))) < _EXACT_INTEGERS:
        return None
    return (s.fill_null(0) if s.null_count() else s).to_numpy()


def _centred(
    xf: np.ndarray, uu: np.ndarray, ref: np.ndarray, n_i: np.ndarray, buf_a: np.ndarray, buf_b: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(unit mean less ``ref``, within deviations x - x_bar_i in ``buf_b``, centred sums
    of squares) of values ``xf`` of units ``uu``: two passes, each unit centred on its
    reference value first."""
    m = ref.size
    xx = np.subtract(xf, np.take(ref, uu, out=buf_a, mode="clip"), out=buf_a)  # take: without the GIL
    sums = np.bincount(uu, weights=xx, minlength=m)
    local = np.divide(sums, n_i, out=np.zeros(m), where=n_i > 0)
    dev = np.subtract(xx, np.take(local, uu, out=buf_b, mode="clip"), out=buf_b)
    m2 = np.bincount(uu, weights=np.multiply(dev, dev, out=buf_a), minlength=m)
    return local, dev, m2


def _cell_ids(ctx: _Context, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(global cell ids unit * periods + period, rows) of the marked rows."""
    ids = ctx.units[ctx.u[rows]] * ctx.n_periods + ctx.t[rows]
    cells, counts = np.unique(ids, return_counts=True)
    return cells, counts.astype(np.int64)


def _per_period(ctx: _Context, present: np.ndarray | None) -> np.ndarray:
    """Non-missing values per period (``present`` None: every row has one)."""
    if present is None:
        return np.asarray(ctx.period_rows)
    return np.asarray(period_sums(ctx.t[present], ctx.n_periods, ctx.t_sorted))


def _period_values(ctx: _Context, v: np.ndarray, present: np.ndarray | None, s: pl.Series | None = None) -> PeriodValues:
    """Whether every period holds at most one distinct non-missing value of ``v`` (codes
    or floats), and each period's value then (from ``s`` when given, else ``v``)."""
    rows = None
    if present is not None:
        rows = np.flatnonzero(present)
        v, tt = v[rows], ctx.t[rows]
    else:
        tt = ctx.t
    if v.size == 0:
        return PeriodValues(True, _period_rep(ctx, s, np.zeros(ctx.n_periods, dtype=np.intp), v))
    head = min(v.size, EARLY_ROWS)
    for stop in (head, v.size):  # most columns fail on the first rows
        rep = np.zeros(ctx.n_periods, dtype=v.dtype)
        rep[tt[:stop]] = v[:stop]
        if not np.array_equal(v[:stop], rep[tt[:stop]]):
            return PeriodValues(False)
    if s is None:
        return PeriodValues(True, rep)
    at = np.zeros(ctx.n_periods, dtype=np.intp)
    at[tt] = np.arange(v.size) if rows is None else rows
    return PeriodValues(True, _period_rep(ctx, s, at, v))


def _period_rep(ctx: _Context, s: pl.Series | None, at: np.ndarray, v: np.ndarray) -> Any:
    if s is None:
        return np.zeros(ctx.n_periods)
    if s.len() == 0:
        return pl.Series(s.name, [None] * ctx.n_periods, dtype=s.dtype)
    return s.gather(at)


def value_counts(s: pl.Series) -> tuple[int, int]:
    """(distinct values, rows of the most common one) of a whole column, NaN as missing.

    Floats, integers and booleans are sorted with numpy (:func:`column_facts`); other
    columns (text, dates, decimals, lists) are hashed by polars.
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


def _table_of_sorted(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(unique values, counts) of a sorted array; -0.0 and 0.0 are one value."""
    if x.size == 0:
        return np.zeros(0), np.zeros(0, dtype=np.int64)
    starts = np.flatnonzero(np.r_[True, x[1:] != x[:-1]])
    counts = np.diff(np.r_[starts, x.size]).astype(np.int64)
    return x[starts] + 0.0, counts  # + 0.0: -0.0 becomes 0.0 (one value, one hash bucket)


def _number_values(
    ctx: _Context, s: pl.Series, x: np.ndarray, present: np.ndarray | None, integral: bool, vmin: float, vmax: float
) -> Values:
    """Exact value counts of a number column ``s`` (as floats ``x``; ``vmin`` and
    ``vmax`` its finite extremes): final counts (a tally for integers of a small range,
    a sort otherwise) or a table of the sorted values."""
    if ctx.count == "none":
        return Values()
    v = x if present is None else x[present]
    if ctx.count == "table":
        return Values(table=_table_of_sorted(np.sort(v)))
    if v.size == 0:
        return Values(0, 0)
    if integral:
        if max(abs(vmin), abs(vmax)) >= 2.0**53:
            return Values(*value_counts(s))
        if vmax - vmin <= 4 * v.size + 1024 and s.dtype.is_integer():
            tally = np.zeros(int(vmax - vmin) + 1, dtype=np.int64)
            for chunk in s.drop_nulls().get_chunks():  # the integers themselves, chunk by chunk
                # in int64: an Int8 holding -128 and 0 would wrap around in its own type
                tally += np.bincount(chunk.to_numpy().astype(np.int64, copy=False) - int(vmin), minlength=tally.size)
            return Values(int(np.count_nonzero(tally)), int(tally.max()))
    buf = _buffers(ctx, v.size)[0]
    np.copyto(buf, v)
    buf.sort()
    return Values(*_runs(buf))


# --- what "changes" means (methods.md, section 3), in one place ---------------------------------


def exceeds(lo: np.ndarray, hi: np.ndarray, mean_abs: np.ndarray, tolerance: float) -> np.ndarray:
    """Whether a unit's range ``hi - lo`` exceeds tol * (1 + |unit mean|)."""
    return (hi - lo) > tolerance * (1.0 + np.abs(mean_abs))


def _range_bounds(
    n: np.ndarray, mean_abs: np.ndarray, m2: np.ndarray, vmin: float, vmax: float, tolerance: float
) -> tuple[np.ndarray, np.ndarray]:
    """(units that surely change, units the sum of squares does not settle): the range
    lies between sqrt(m2 / n) and 2 sqrt(m2), up to rounding (allowed for)."""
    threshold = tolerance * (1.0 + np.abs(mean_abs))
    slack = 32.0 * _EPS * max(abs(vmin), abs(vmax))  # rounding of the centred values
    root = np.sqrt(np.maximum(m2, 0.0))
    low = root / np.sqrt(np.maximum(n, 1)) * (1.0 - 1e-9) - slack  # <= range
    high = 2.0 * root * (1.0 + 1e-9) + 2.0 * slack  # >= range
    seen = n > 0
    surely = seen & (low > threshold)
    unsure = seen & ~surely & (high > threshold) & (m2 > 0)
    return surely, unsure


def number_changes(
    integral: bool,
    n: np.ndarray,
    mean_abs: np.ndarray,
    m2: np.ndarray,
    vmin: float | None,
    vmax: float | None,
    tolerance: float,
    extremes: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]],
    exact: np.ndarray | None = None,
) -> np.ndarray:
    """Which units change in a number column (methods.md, section 3).

    Whole numbers below 2**52: exactly when the centred sum of squares is non-zero;
    beyond, ``exact`` (units that hold two integers, compared in their own type).
    Floats: (max - min) > tol * (1 + |unit mean|), with exact extremes asked of
    ``extremes`` (a mask of units -> per-unit minimum and maximum) only for the units
    the sum of squares does not settle.
    """
    if vmin is None or vmax is None:
        return np.zeros(n.size, dtype=bool)
    if integral and max(abs(vmin), abs(vmax)) < _EXACT_INTEGERS:
        return m2 > 0
    if integral and exact is not None:
        return exact
    surely, unsure = _range_bounds(n, mean_abs, m2, vmin, vmax, tolerance)
    if not unsure.any():
        return surely
    lo, hi = extremes(unsure)
    return surely | (unsure & exceeds(lo, hi, mean_abs, tolerance))


def _extremes_of_rows(ctx: _Context, x: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-local-unit minimum and maximum of ``x`` over ``rows`` (a mask or row
    numbers); +inf / -inf for units without such rows."""
    uu, xs = ctx.u[rows], x[rows]
    lo = np.full(ctx.m, np.inf)
    hi = np.full(ctx.m, -np.inf)
    np.minimum.at(lo, uu, xs)
    np.maximum.at(hi, uu, xs)
    return lo, hi


def _example_rows(ctx: _Context, units: np.ndarray) -> np.ndarray:
    """Row numbers of the given local units. Columns often share their first changing
    units, so each thread keeps the rows of the last set it asked for."""
    key = units.tobytes()
    if getattr(ctx.local, "example_key", None) != key:  # a cache per thread
        mark = np.zeros(ctx.m, dtype=bool)
        mark[units] = True
        ctx.local.example_key, ctx.local.example_rows = key, np.flatnonzero(mark[ctx.u])
    return ctx.local.example_rows


def _number_examples(
    ctx: _Context, s: pl.Series, x: np.ndarray, finite: np.ndarray, all_finite: bool, changing: np.ndarray
) -> tuple[tuple[int, Any, Any], ...]:
    if ctx.examples <= 0 or not changing.any():
        return ()
    units = np.flatnonzero(changing)[: ctx.examples]
    rows = _example_rows(ctx, units)
    if s.dtype.is_integer():  # integers as they are (floats cannot hold every int64)
        ext = _unit_value_extremes(ctx.units[ctx.u[rows]], s.gather(rows), False)
        return _examples_from(ext, ctx.units[units], False, text=False)
    if not all_finite:
        rows = rows[finite[rows]]
    lo, hi = _extremes_of_rows(ctx, x, rows)
    return tuple((int(ctx.units[i]), float(lo[i]), float(hi[i])) for i in units)


# --- other columns (text, categories, dates, lists, ...) ---------------------------------------


def comparable(s: pl.Series) -> pl.Series:
    """A non-number column in a form whose values compare across shards: categories as
    text (their codes differ from file to file), other types as they are."""
    if isinstance(s.dtype, pl.Categorical | pl.Enum):
        return s.cast(pl.String)
    return s


def _nested(dt: pl.DataType) -> bool:
    return dt.is_nested() or isinstance(dt, pl.Object)


def _codes(s: pl.Series) -> tuple[np.ndarray, np.ndarray | None, int]:
    """(dense codes, present mask or None without nulls, number of codes) of a non-number
    column: text by hashing (codes in order of appearance), categories by their physical
    codes, orderable values (dates, times, ...) by their dense rank, values without an
    order (lists, structs) by grouping equal values."""
    dt = s.dtype
    nulls = s.null_count()
    present = s.is_not_null().to_numpy() if nulls else None
    if dt == pl.String:
        c = s.cast(pl.Categorical).to_physical()
    elif isinstance(dt, pl.Categorical | pl.Enum):
        c = s.to_physical()
    elif isinstance(dt, pl.Null):
        c = pl.Series(np.zeros(s.len(), dtype=np.uint32))
    elif _nested(dt):
        groups = pl.DataFrame({"v": s}).with_row_index("i").group_by("v", maintain_order=True).agg("i")
        codes = np.zeros(s.len(), dtype=np.int64)
        idx = groups["i"].explode().to_numpy()
        codes[idx] = np.repeat(np.arange(groups.height), groups["i"].list.len().to_numpy())
        c = pl.Series(codes)
    else:
        c = s.rank("dense")
    codes = (c.fill_null(0) if nulls else c).to_numpy()
    return codes, present, int(codes.max()) + 1 if codes.size else 0


def _coded(ctx: _Context, s: pl.Series) -> Coded:
    """A non-number column's statistics (see :class:`Coded`)."""
    codes, present, width = _codes(s)
    nulls = int(s.null_count())
    values_of = comparable(s)
    if present is not None:
        rows = np.flatnonzero(present)
        uu, cc = ctx.u[rows], codes[rows]
        n_i = np.bincount(uu, minlength=ctx.m)
        rep = np.zeros(ctx.m, dtype=np.intp)
        rep[uu] = rows  # one row holding a value, per unit
        ref = np.take(codes, rep[uu], mode="clip")
    else:
        uu, cc = ctx.u, codes
        n_i = ctx.unit_rows
        if ctx.rep_row is None:
            raise broken("ctx.rep_row is not None")
        rep, per_row = ctx.rep_row.result()
        ref = np.take(codes, per_row, mode="clip")
    changed = np.zeros(ctx.m, dtype=bool)
    changed[uu[cc != ref]] = True
    reps = values_of.gather(rep) if values_of.len() else pl.Series(s.name, [None] * ctx.m, dtype=values_of.dtype)
    if present is not None and bool((n_i == 0).any()):
        reps = pl.select(pl.when(pl.Series(n_i > 0)).then(reps)).to_series()
    if ctx.count == "final":
        tally = np.bincount(cc, minlength=width)
        values = Values(int(np.count_nonzero(tally)), int(tally.max()) if cc.size else 0)
    elif ctx.count == "table":
        values = Values(table=_value_table(values_of))
    else:
        values = Values()
    nested = _nested(s.dtype)
    finals = Finals(changed, None, _coded_examples(ctx, values_of, changed, nested)) if ctx.whole else None
    return Coded(
        nulls, n_i, reps, changed, _per_period(ctx, present), _period_values(ctx, codes, present, values_of), values,
        nested, finals,
    )  # fmt: skip


def _value_table(s: pl.Series) -> pl.DataFrame:
    v = s.drop_nulls()
    return pl.DataFrame({"value": v}).group_by("value").agg(pl.len().cast(pl.Int64).alias("count"))


def _coded_examples(ctx: _Context, s: pl.Series, changing: np.ndarray, nested: bool) -> tuple[tuple[int, Any, Any], ...]:
    if ctx.examples <= 0 or not changing.any():
        return ()
    units = np.flatnonzero(changing)[: ctx.examples]
    rows = _example_rows(ctx, units)
    ext = _unit_value_extremes(ctx.units[ctx.u[rows]], s.gather(rows), nested)
    return _examples_from(ext, ctx.units[units], nested)


def _unit_value_extremes(codes: np.ndarray, v: pl.Series, nested: bool) -> pl.DataFrame:
    """Per global unit code: the lowest and highest value (``lo``, ``hi``), or for values
    without an order the distinct values themselves (``v``, one row each)."""
    frame = pl.DataFrame({"u": pl.Series(codes, dtype=pl.Int64), "v": v}).drop_nulls("v")
    if nested:
        return frame.unique(maintain_order=True)
    return frame.group_by("u").agg(pl.col("v").min().alias("lo"), pl.col("v").max().alias("hi"))


def _merge_value_extremes(a: pl.DataFrame, b: pl.DataFrame, nested: bool) -> pl.DataFrame:
    both = pl.concat([a, b])
    if nested:
        return both.unique(maintain_order=True)
    return both.group_by("u").agg(pl.col("lo").min(), pl.col("hi").max())


def _examples_from(ext: pl.DataFrame, units: np.ndarray, nested: bool, text: bool = True) -> tuple[tuple[int, Any, Any], ...]:
    """Examples (global code, low, high) or (global code, None, distinct values) of
    ``units`` from :func:`_unit_value_extremes`, in the order of ``units`` (``text``:
    the extremes as text, else as they are)."""
    if nested:
        counts = ext.group_by("u").len()
        got = dict(zip(counts["u"].to_list(), counts["len"].to_list(), strict=True))
        return tuple((int(c), None, int(got.get(int(c), 0))) for c in units)
    got = {int(r[0]): (r[1], r[2]) for r in ext.iter_rows()}
    shown = str if text else (lambda v: v)
    return tuple((int(c), shown(got[int(c)][0]), shown(got[int(c)][1])) for c in units if int(c) in got)


def changes(frame: pl.DataFrame, columns: Sequence[str], *, n_units: int, n_periods: int, tolerance: float,
            examples: int = 0) -> dict[str, tuple[np.ndarray, tuple[tuple[int, Any, Any], ...]]]:
    """Which units change in each column (methods.md, section 3: the test every command
    uses), from a frame holding every row of its units; per column (a mask by unit code,
    the first ``examples`` changing units as (unit code, low, high))."""
    whole = shard(frame, columns, n_units=n_units, n_periods=n_periods, whole=True, count="none",
                  examples=examples, tolerance=tolerance)
    out = {}
    for c, col in whole.columns.items():
        if col.finals is None:
            raise broken("col.finals is not None")
        changing = np.zeros(n_units, dtype=bool)
        changing[whole.units] = col.finals.changing
        out[c] = (changing, col.finals.examples)
    return out


# --------------------------------------------------------------------------- merging


def chan(
    n_a: np.ndarray, mean_a: np.ndarray, m2_a: np.ndarray, n_b: np.ndarray, mean_b: np.ndarray, m2_b: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(count, mean, centred sum of squares) of the union of two parts, per group
    (Chan, Golub and LeVeque 1979). Means are on one scale; a part with no values
    contributes nothing (its mean is ignored).

    Scalars per group: ``mean`` (g,), ``m2`` (g,). Vectors per group (several columns
    over the same rows): ``mean`` (g, k) and ``m2`` the centred cross-products (g, k, k),
    whose update is M_a + M_b + d d' n_a n_b / n.
    """
    n = n_a + n_b
    nf = n.astype(np.float64)
    delta = mean_b - mean_a
    if delta.ndim == 1 and bool(n_a.all()) and bool(n_b.all()):  # both parts hold values everywhere
        w = n_b / nf
        return n, mean_a + delta * w, m2_a + m2_b + delta * delta * (n_a * w)
    w = np.divide(n_b, nf, out=np.zeros(nf.shape), where=n > 0)
    if delta.ndim == 2:  # vectors: per-group weights broadcast over the columns
        w, only_a, only_b = w[:, None], (n_b == 0)[:, None], (n_a == 0)[:, None]
        outer = delta[:, :, None] * delta[:, None, :]
        cross_w, a3, b3 = (n_a * w[:, 0])[:, None, None], (n_b == 0)[:, None, None], (n_a == 0)[:, None, None]
    else:
        only_a, only_b = n_b == 0, n_a == 0
        outer, cross_w, a3, b3 = delta * delta, n_a * w, only_a, only_b
    mean = np.where(only_b, mean_b, np.where(only_a, mean_a, mean_a + delta * w))
    m2 = np.where(b3, m2_b, np.where(a3, m2_a, m2_a + m2_b + outer * cross_w))
    return n, mean, m2


def _union(a: np.ndarray, b: np.ndarray, n_units: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(sorted union of two sorted arrays of codes below ``n_units``, positions of a in it,
    positions of b): a mark per unit and a running count, no sort."""
    if a.size and b.size and a[-1] < b[0]:  # disjoint and in order (ranges of units)
        units = np.concatenate([a, b])
        return units, np.arange(a.size), np.arange(a.size, units.size)
    mark = np.zeros(n_units, dtype=bool)
    mark[a] = True
    mark[b] = True
    units = np.flatnonzero(mark)
    position = np.cumsum(mark) - 1
    return units, position[a], position[b]


def _spread(arr: np.ndarray, idx: np.ndarray, size: int, fill: Any = 0) -> np.ndarray:
    if idx.size == size:  # idx is increasing positions in 0..size-1: every one of them
        return arr.astype(arr.dtype, copy=True)
    out = np.zeros(size, dtype=arr.dtype) if not fill else np.full(size, fill, dtype=arr.dtype)
    out[idx] = arr
    return out


def _overlap(ia: np.ndarray, ib: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """(positions in a, positions in b) of the units both parts hold."""
    pos_a = np.full(size, -1, dtype=np.intp)
    pos_a[ia] = np.arange(ia.size)
    ka = pos_a[ib]
    kb = np.flatnonzero(ka >= 0)
    return ka[kb], kb


def merge(a: Shard, b: Shard) -> Shard:
    """The statistics of the rows of ``a`` and ``b`` together, exactly (units may have
    rows in both). ``a`` comes first in row order (its first values win)."""
    units, ia, ib = _union(a.units, b.units, a.n_units)
    size = int(units.size)
    ka, kb = _overlap(ia, ib, size)
    whole = a.whole and b.whole and ka.size == 0
    columns: dict[str, Numbers | Coded] = {}
    for c, ca in a.columns.items():
        cb = b.columns[c]
        if isinstance(ca, Numbers):
            if not isinstance(cb, Numbers):
                raise broken("isinstance(cb, Numbers)")
            columns[c] = _merge_numbers(ca, cb, ia, ib, ka, kb, size, whole)
        else:
            if not isinstance(cb, Coded):
                raise broken("isinstance(cb, Coded)")
            columns[c] = _merge_coded(ca, cb, ia, ib, ka, kb, size, whole)
    return Shard(
        a.n_units, a.n_periods, units, whole,
        _spread(a.unit_rows, ia, size) + _spread(b.unit_rows, ib, size),
        a.period_rows + b.period_rows, _merge_cells(a.cells, b.cells, ia, ib, size, a.n_periods), columns,
    )  # fmt: skip


def merge_all(shards: Iterable[Shard]) -> Shard:
    """Every shard merged, in order (pairwise, so rounding does not grow with their number)."""
    level = list(shards)
    if not level:
        raise ValueError("nothing to merge")
    while len(level) > 1:
        level = [merge(level[i], level[i + 1]) if i + 1 < len(level) else level[i] for i in range(0, len(level), 2)]
    return level[0]


def merge_stream(parts: Iterable[Any], combine: Callable[[Any, Any], Any]) -> Any:
    """Parts arriving one at a time, merged pairwise in order (a binary counter): at most
    one pending part per level, so memory holds O(log k) parts and rounding grows like
    log k, not k."""
    stack: list[tuple[int, Any]] = []
    for part in parts:
        level, item = 0, part
        while stack and stack[-1][0] == level:
            _, left = stack.pop()
            item, level = combine(left, item), level + 1
        stack.append((level, item))
    if not stack:
        raise ValueError("nothing to merge")
    item = stack.pop()[1]
    while stack:
        item = combine(stack.pop()[1], item)
    return item


def _merge_cells(a: Cells, b: Cells, ia: np.ndarray, ib: np.ndarray, size: int, n_periods: int) -> Cells:
    if a.dense is not None and b.dense is not None and _dense(size, n_periods):
        out = np.zeros((n_periods, size), dtype=np.int32)
        out[:, ia] = a.dense  # out is zero: an assignment, then an addition where both hold units
        out[:, ib] += b.dense
        return Cells(dense=out)
    from scipy import sparse

    def rows(cells: Cells, idx: np.ndarray) -> Any:
        m = sparse.coo_matrix(cells.dense.T) if cells.dense is not None else cells.sparse.tocoo()
        return sparse.coo_matrix((m.data, (idx[m.row], m.col)), shape=(size, n_periods))

    return Cells(sparse=(rows(a, ia) + rows(b, ib)).tocsr())


def _merge_periods(a: PeriodValues, b: PeriodValues, a_n: np.ndarray, b_n: np.ndarray) -> PeriodValues:
    if not (a.one and b.one):
        return PeriodValues(False)
    both = np.flatnonzero((a_n > 0) & (b_n > 0))
    if isinstance(a.rep, np.ndarray):
        ra, rb = _same_kind(a.rep, b.rep)
        if not np.array_equal(ra[both], rb[both]):
            return PeriodValues(False)
        return PeriodValues(True, np.where(a_n > 0, ra, rb))
    if both.size and bool((a.rep.gather(both) != b.rep.gather(both)).fill_null(False).any()):
        return PeriodValues(False)
    pick = np.where(a_n > 0, np.arange(a_n.size), a_n.size + np.arange(a_n.size))
    return PeriodValues(True, pl.concat([a.rep, b.rep]).gather(pick))


def _same_kind(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two arrays of values in one type: integers beyond 2**52 keep theirs (the other's
    values, below 2**52, are exact whole numbers in float64)."""
    if a.dtype.kind in "iu" and b.dtype.kind == "f":
        return a, b.astype(a.dtype)
    if b.dtype.kind in "iu" and a.dtype.kind == "f":
        return a.astype(b.dtype), b
    return a, b


def merge_values(a: Values, b: Values) -> Values:
    """Value counts of two shards together (a final count does not merge: not counted)."""
    return merge_all_values([a, b])


def merge_all_values(parts: Sequence[Values]) -> Values:
    """Value counts of several shards together, in one sort (a final count does not merge)."""
    if not parts or any(p.table is None for p in parts):
        return Values()
    if isinstance(parts[0].table, tuple):
        v = np.concatenate([p.table[0] for p in parts])
        c = np.concatenate([p.table[1] for p in parts])
        order = np.argsort(v, kind="stable")
        v, c = v[order], c[order]
        if v.size == 0:
            return Values(table=(v, c))
        starts = np.flatnonzero(np.r_[True, v[1:] != v[:-1]])
        return Values(table=(v[starts], np.add.reduceat(c, starts)))
    both = pl.concat([p.table for p in parts])
    return Values(table=both.group_by("value").agg(pl.col("count").sum()))


def _lower(a: float | None, b: float | None, pick: Callable[[float, float], float]) -> float | None:
    return b if a is None else a if b is None else pick(a, b)


def _merge_finals(a: Finals | None, b: Finals | None, ia: np.ndarray, ib: np.ndarray, size: int,
                  whole: bool) -> Finals | None:
    if not whole or a is None or b is None:
        return None
    changing = _spread(a.changing, ia, size, False) | _spread(b.changing, ib, size, False)
    rhs = a.rhs if b.rhs is None else b.rhs if a.rhs is None else a.rhs + b.rhs
    return Finals(changing, rhs, tuple(sorted(a.examples + b.examples, key=lambda e: e[0])))


def _merge_numbers(a: Numbers, b: Numbers, ia: np.ndarray, ib: np.ndarray, ka: np.ndarray, kb: np.ndarray,
                   size: int, whole: bool) -> Numbers:
    n = _spread(a.n, ia, size) + _spread(b.n, ib, size)
    ref = _spread(b.ref, ib, size, 0.0)
    local = _spread(b.local, ib, size, 0.0)
    m2 = _spread(b.m2, ib, size, 0.0)
    keep = a.n > 0  # a's values win where a has any
    if bool(keep.all()):
        ref[ia], local[ia], m2[ia] = a.ref, a.local, a.m2
    else:
        at = ia[keep]
        ref[at], local[at], m2[at] = a.ref[keep], a.local[keep], a.m2[keep]
    if ka.size:
        na, nb = a.n[ka], b.n[kb]
        ra, rb = a.ref[ka], b.ref[kb]
        base = np.where(na > 0, ra, rb)
        # both on the scale of one of the unit's own values: the differences of two of its
        # values are exact or err on the scale of its spread, never of its magnitude
        la = (ra - base) + a.local[ka]
        lb = (rb - base) + b.local[kb]
        _, mean, q = chan(na, la, a.m2[ka], nb, lb, b.m2[kb])
        p = ib[kb]
        ref[p], local[p], m2[p] = base, mean, q
    unusable = a.unusable if b.unusable is None else b.unusable if a.unusable is None else (
        np.concatenate([a.unusable[0], b.unusable[0]]), np.concatenate([a.unusable[1], b.unusable[1]]))
    exact = _merge_exact(a, b, ia, ib, ka, kb, size)
    return Numbers(
        a.integral and b.integral, a.nulls + b.nulls, a.non_finite + b.non_finite,
        a.first if a.first is not None else b.first, _lower(a.vmin, b.vmin, min), _lower(a.vmax, b.vmax, max),
        n, ref, local, m2, a.n_t + b.n_t, _merge_periods(a.periods, b.periods, a.n_t, b.n_t), unusable,
        merge_values(a.values, b.values), _merge_finals(a.finals, b.finals, ia, ib, size, whole), exact,
    )  # fmt: skip


def _exact_of(c: Numbers) -> tuple[np.ndarray, np.ndarray]:
    """A shard's exact integers: its own, or, for values below 2**52, its reference values
    and the units whose sum of squares is non-zero (both exact there)."""
    if c.exact is not None:
        return c.exact
    return c.ref.astype(np.int64), c.m2 > 0


def _merge_exact(a: Numbers, b: Numbers, ia: np.ndarray, ib: np.ndarray, ka: np.ndarray, kb: np.ndarray,
                 size: int) -> tuple[np.ndarray, np.ndarray] | None:
    if a.exact is None and b.exact is None:
        return None
    (va, ca), (vb, cb) = _exact_of(a), _exact_of(b)
    va, vb = _same_kind(va, vb)
    value = _spread(vb, ib, size)
    keep = a.n > 0
    value[ia[keep]] = va[keep]
    changed = _spread(ca, ia, size, False) | _spread(cb, ib, size, False)
    seen = (a.n[ka] > 0) & (b.n[kb] > 0)
    differ = va[ka[seen]] != vb[kb[seen]]
    changed[ib[kb[seen][differ]]] = True
    return value, changed


def _merge_coded(a: Coded, b: Coded, ia: np.ndarray, ib: np.ndarray, ka: np.ndarray, kb: np.ndarray,
                 size: int, whole: bool) -> Coded:
    n = _spread(a.n, ia, size) + _spread(b.n, ib, size)
    changed = _spread(a.changed, ia, size, False) | _spread(b.changed, ib, size, False)
    pick = np.zeros(size, dtype=np.intp)
    pick[ia] = np.arange(ia.size)
    pick[ib] = a.n.size + np.arange(ib.size)
    keep = a.n > 0
    pick[ia[keep]] = np.flatnonzero(keep)
    if ka.size:
        seen = (a.n[ka] > 0) & (b.n[kb] > 0)
        ka_s, kb_s = ka[seen], kb[seen]
        if ka_s.size:
            differ = (a.rep.gather(ka_s) != b.rep.gather(kb_s)).fill_null(False).to_numpy()
            changed[ib[kb_s[differ]]] = True
    rep = pl.concat([a.rep, b.rep]).gather(pick)
    return Coded(
        a.nulls + b.nulls, n, rep, changed, a.n_t + b.n_t, _merge_periods(a.periods, b.periods, a.n_t, b.n_t),
        merge_values(a.values, b.values), a.nested, _merge_finals(a.finals, b.finals, ia, ib, size, whole),
    )  # fmt: skip


# --- value counts in buckets (exact distinct counts in bounded memory) -----------------------


def bucket_values(v: Values, buckets: int) -> list[Values]:
    """A value table cut into ``buckets`` by a hash of the value: equal values fall into
    the same bucket in every shard, so buckets merge and count independently."""
    if v.table is None:
        return [Values() for _ in range(buckets)]
    if isinstance(v.table, tuple):
        vals, counts = v.table
        h = (vals.view(np.uint64) * np.uint64(0x9E3779B97F4A7C15)) >> np.uint64(40)
        b = (h % np.uint64(buckets)).astype(np.intp)
        order = np.argsort(b, kind="stable")  # one sort, then contiguous pieces (each still sorted)
        edges = np.searchsorted(b[order], np.arange(buckets + 1))
        vs, cs = vals[order], counts[order]
        return [Values(table=(vs[edges[k] : edges[k + 1]], cs[edges[k] : edges[k + 1]])) for k in range(buckets)]
    t = v.table.with_columns((pl.col("value").hash(seed=11) % buckets).cast(pl.Int64).alias("__b"))
    parts = {int(key[0]): part.drop("__b") for key, part in t.partition_by("__b", as_dict=True).items()}
    empty = v.table.clear()
    return [Values(table=parts.get(k, empty)) for k in range(buckets)]


def strip_values(s: Shard) -> Shard:
    """The shard without its value tables (they travel in buckets)."""
    return Shard(s.n_units, s.n_periods, s.units, s.whole, s.unit_rows, s.period_rows, s.cells,
                 {c: replace(col, values=Values()) for c, col in s.columns.items()})


# --------------------------------------------------------------------------- the second pass


@dataclass(frozen=True)
class Plan:
    """What a second pass over split units needs, from the merged statistics.

    ``centres``: per number column whose units vary, each unit's reference value and
    mean less it (global code order); ``wanted``: per column, the sorted global codes of
    the units whose exact extremes are needed (floats the sum of squares does not
    settle, and the first changing units, shown as examples).
    """

    centres: dict[str, tuple[np.ndarray, np.ndarray]]
    wanted: dict[str, np.ndarray]
    nested: frozenset[str] = frozenset()


@dataclass(frozen=True)
class Refinement:
    """The second pass of a set of rows: per-period sums of within deviations (``rhs``)
    and the extremes of the wanted units (numbers: arrays ``lo``/``hi`` aligned with
    ``Plan.wanted``; other values: tables from :func:`_unit_value_extremes`)."""

    rhs: dict[str, np.ndarray]
    lo: dict[str, Any]
    hi: dict[str, Any]
    exact: dict[str, pl.DataFrame] = field(default_factory=dict)  # integer columns: their own extremes


def plan(merged: Shard, *, tolerance: float, examples: int) -> Plan:
    """The :class:`Plan` of a merged shard whose units were split across shards."""
    centres: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    wanted: dict[str, np.ndarray] = {}
    nested = set()
    for c, col in merged.columns.items():
        if isinstance(col, Coded):
            wanted[c] = merged.units[np.flatnonzero(col.changed)[:examples]]
            if col.nested:
                nested.add(c)
            continue
        if bool((col.m2 > 0).any()):
            centres[c] = (col.ref, col.local)
        if col.vmin is None or col.vmax is None:
            wanted[c] = np.zeros(0, dtype=np.int64)
        elif col.integral and max(abs(col.vmin), abs(col.vmax)) < _EXACT_INTEGERS:
            wanted[c] = merged.units[np.flatnonzero(col.m2 > 0)[:examples]]
        elif col.integral and col.exact is not None:
            wanted[c] = merged.units[np.flatnonzero(col.exact[1])[:examples]]
        else:
            surely, unsure = _range_bounds(col.n, col.ref + col.local, col.m2, col.vmin, col.vmax, tolerance)
            first = np.flatnonzero(surely)[:examples]
            wanted[c] = merged.units[np.union1d(first, np.flatnonzero(unsure))]
    return Plan(centres, wanted, frozenset(nested))


def refine(frame: pl.DataFrame, the_plan: Plan, *, n_units: int, n_periods: int) -> Refinement:
    """The second pass over one shard's rows (see :class:`Plan`)."""
    codes = frame[UNIT_ID].to_numpy().astype(np.int64)
    t = frame[PERIOD_ID].to_numpy().astype(np.intp)
    rhs: dict[str, np.ndarray] = {}
    lo: dict[str, Any] = {}
    hi: dict[str, Any] = {}
    exact: dict[str, pl.DataFrame] = {}
    for c, want in the_plan.wanted.items():
        s = frame[c]
        if not is_number(s.dtype):
            mark = _mark(codes, want, n_units)
            rows = np.flatnonzero(mark)
            lo[c] = _unit_value_extremes(codes[rows], comparable(s).gather(rows), c in the_plan.nested)
            continue
        x = s.cast(pl.Float64).to_numpy()
        finite = np.isfinite(x)
        if c in the_plan.centres:
            ref, local = the_plan.centres[c]
            cf, xf = codes[finite], x[finite]
            dev = (xf - np.take(ref, cf)) - np.take(local, cf)
            rhs[c] = period_sums(t[finite], n_periods, False, dev)
        rows = np.flatnonzero(_mark(codes, want, n_units) & finite)
        if s.dtype.is_integer():
            exact[c] = _unit_value_extremes(codes[rows], s.gather(rows), False)
        at = np.searchsorted(want, codes[rows])
        low = np.full(want.size, np.inf)
        high = np.full(want.size, -np.inf)
        np.minimum.at(low, at, x[rows])
        np.maximum.at(high, at, x[rows])
        lo[c], hi[c] = low, high
    return Refinement(rhs, lo, hi, exact)


def _mark(codes: np.ndarray, want: np.ndarray, n_units: int) -> np.ndarray:
    """Rows whose unit is among ``want``."""
    if want.size == 0:
        return np.zeros(codes.size, dtype=bool)
    table = np.zeros(n_units, dtype=bool)
    table[want] = True
    return np.take(table, codes, mode="clip")


def merge_refinements(a: Refinement, b: Refinement, the_plan: Plan) -> Refinement:
    """Two second passes together: sums add, extremes take the lower and higher."""
    rhs = {c: a.rhs[c] + b.rhs[c] for c in a.rhs}
    lo: dict[str, Any] = {}
    hi: dict[str, Any] = {}
    for c in a.lo:
        if isinstance(a.lo[c], np.ndarray):
            lo[c], hi[c] = np.minimum(a.lo[c], b.lo[c]), np.maximum(a.hi[c], b.hi[c])
        else:
            lo[c] = _merge_value_extremes(a.lo[c], b.lo[c], c in the_plan.nested)
    exact = {c: _merge_value_extremes(a.exact[c], b.exact[c], False) for c in a.exact}
    return Refinement(rhs, lo, hi, exact)


def merge_all_refinements(parts: Iterable[Refinement], the_plan: Plan) -> Refinement:
    """Every second pass merged (pairwise)."""
    level = list(parts)
    while len(level) > 1:
        level = [
            merge_refinements(level[i], level[i + 1], the_plan) if i + 1 < len(level) else level[i]
            for i in range(0, len(level), 2)
        ]
    return level[0]


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

        return cls.from_counts(sparse.coo_matrix((np.ones(u.size), (u, t)), shape=(n_units, n_periods)))

    @classmethod
    def from_counts(cls, counts: Any) -> SparsePeriods:
        """The system of the rows counted per (unit, period) in ``counts`` (sparse, units x periods)."""
        m = counts.astype(np.float64).tocsr()
        m.sum_duplicates()
        t_i = np.asarray(m.sum(axis=1)).ravel()
        w = np.divide(1.0, t_i, out=np.zeros(t_i.size), where=t_i > 0)
        return cls(m, w, np.asarray(m.sum(axis=0)).ravel())

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


# --------------------------------------------------------------------------- cross-products


@dataclass(frozen=True)
class CrossProducts:
    """Per-unit sufficient statistics of several columns over the same rows (the design
    of a panel model): for each local unit (global codes ``units``) the rows ``n``, a
    reference row ``ref`` (one of the unit's own rows), the sums of the values less it
    (``total``) and the centred cross-products (``cross``, units x k x k). Everything
    the within, between, random-effects, Mundlak and Hausman-Taylor fits need of the rows.

    Sums rather than means are kept and merged: sums of whole numbers (indicators, period
    dummies) stay exact through any merge, so their unit means are the rows' own.
    """

    n_units: int
    columns: tuple[str, ...]
    units: np.ndarray
    n: np.ndarray
    ref: np.ndarray
    total: np.ndarray
    cross: np.ndarray

    @property
    def means(self) -> np.ndarray:
        """The unit means (units x k)."""
        return self.ref + np.divide(self.total, self.n[:, None], out=np.zeros(self.total.shape),
                                    where=self.n[:, None] > 0)


def cross_products(frame: pl.DataFrame, columns: Sequence[str], *, n_units: int) -> CrossProducts:
    """:class:`CrossProducts` of ``columns`` over the rows of ``frame`` (every row used:
    filter incomplete rows first), unit codes in ``__pa_unit``."""
    u, units = local_units(frame[UNIT_ID].to_numpy(), n_units)
    m, k = units.size, len(columns)
    x = frame.select(columns).to_numpy().astype(np.float64) if k else np.zeros((frame.height, 0))
    n = np.bincount(u, minlength=m)
    last = np.zeros(m, dtype=np.intp)
    last[u] = np.arange(u.size)
    ref = x[last] if u.size else np.zeros((m, k))
    dev = x - ref[u]  # centred on one of the unit's own rows first (methods.md, section 2)
    total = np.column_stack([np.bincount(u, weights=dev[:, j], minlength=m) for j in range(k)]) if k else ref[:, :0]
    dev -= np.divide(total, n[:, None], out=np.zeros((m, k)), where=n[:, None] > 0)[u]
    cross = np.zeros((m, k, k))
    for a in range(k):  # loops over the few columns, never over rows or units
        for b in range(a, k):
            cross[:, a, b] = cross[:, b, a] = np.bincount(u, weights=dev[:, a] * dev[:, b], minlength=m)
    return CrossProducts(n_units, tuple(columns), units, n, ref, total, cross)


def merge_cross(a: CrossProducts, b: CrossProducts) -> CrossProducts:
    """Two shards' cross-products together, exactly (:func:`chan`, vector form)."""
    units, ia, ib = _union(a.units, b.units, a.n_units)
    size, k = units.size, len(a.columns)
    n = _spread(a.n, ia, size) + _spread(b.n, ib, size)
    ref, total, cross = np.zeros((size, k)), np.zeros((size, k)), np.zeros((size, k, k))
    ref[ib], total[ib], cross[ib] = b.ref, b.total, b.cross
    keep = a.n > 0
    ref[ia[keep]], total[ia[keep]], cross[ia[keep]] = a.ref[keep], a.total[keep], a.cross[keep]
    ka, kb = _overlap(ia, ib, size)
    if ka.size:
        na, nb = a.n[ka], b.n[kb]
        base = np.where((na > 0)[:, None], a.ref[ka], b.ref[kb])
        # both sums re-based on one of the unit's own rows: exact for whole numbers
        sa = a.total[ka] + na[:, None] * (a.ref[ka] - base)
        sb = b.total[kb] + nb[:, None] * (b.ref[kb] - base)
        la = np.divide(sa, na[:, None], out=np.zeros(sa.shape), where=na[:, None] > 0)
        lb = np.divide(sb, nb[:, None], out=np.zeros(sb.shape), where=nb[:, None] > 0)
        _, _, c = chan(na, la, a.cross[ka], nb, lb, b.cross[kb])
        p = ib[kb]
        ref[p], total[p], cross[p] = base, sa + sb, c
    return CrossProducts(a.n_units, a.columns, units, n, ref, total, cross)


def _helmert(r: int) -> np.ndarray:
    """An r x (r - 1) matrix of orthonormal columns orthogonal to the vector of ones."""
    h = np.zeros((r, r - 1))
    for j in range(1, r):  # loop over the few columns of one small matrix
        h[:j, j - 1] = 1.0
        h[j, j - 1] = -float(j)
        h[:, j - 1] /= np.sqrt(j * (j + 1.0))
    return h


def equivalent_rows(cp: CrossProducts) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows that carry the same sums and cross-products as each unit's own rows.

    Unit i (n_i rows, means m_i, centred cross-products C_i) becomes r_i = min(n_i,
    k + 1) rows m_i + d_ij, each of weight n_i / r_i, with sum_j d_ij = 0 and
    sum_j (n_i / r_i) d_ij d_ij' = C_i (from the eigenvectors of C_i). Every weighted
    sum over these rows of a product of two columns of the form (a unit-level value +
    a column's within deviation) equals the sum over the unit's own rows (the cross
    terms vanish since deviations sum to zero within a unit), so the fits on them are
    the fits on the panel. Returns (unit code per row, values rows x k, weight per row).
    """
    k = len(cp.columns)
    r = np.minimum(cp.n, k + 1).astype(np.int64)
    order = np.argsort(r, kind="stable")
    codes, values, weights = [], [], []
    means = cp.means
    for size in np.unique(r[r > 0]):  # groups of units with the same row count (at most k + 1)
        idx = order[r[order] == size]
        if size == 1:
            d = np.zeros((idx.size, 1, k))
        else:
            vals, vecs = np.linalg.eigh(cp.cross[idx])  # ascending eigenvalues
            top = np.sqrt(np.clip(vals[:, -(size - 1):], 0.0, None))  # (g, size - 1)
            basis = _helmert(int(size))  # (size, size - 1)
            d = np.einsum("rj,gj,gkj->grk", basis, top, vecs[:, :, -(size - 1):])
            d *= np.sqrt(size / cp.n[idx])[:, None, None]
            d[np.diagonal(cp.cross[idx], axis1=1, axis2=2)[:, None, :].repeat(size, 1) <= 0] = 0.0  # constant in the unit
        codes.append(np.repeat(cp.units[idx], size))
        values.append((means[idx][:, None, :] + d).reshape(-1, k))
        weights.append(np.repeat(cp.n[idx] / size, size))
    if not codes:
        return np.zeros(0, dtype=np.int64), np.zeros((0, k)), np.zeros(0)
    return np.concatenate(codes), np.concatenate(values), np.concatenate(weights)


# --------------------------------------------------------------------------- derived figures


@dataclass(frozen=True)
class ColumnStats:
    """What the profile needs of one column, over every unit (global code order).

    ``nulls`` counts missing values (null or NaN), ``non_finite`` infinities.
    ``distinct`` and ``top`` (rows holding the most common value) count non-missing
    values. ``n_i`` counts usable values (finite, for numbers); ``changing`` marks units
    with two or more different values; ``n_t`` counts non-missing values per period;
    ``one_value`` says every period holds at most one value. ``examples`` are the first
    changing units as (unit code, low, high) or (unit code, None, distinct values).
    Numbers only: ``shift`` (the first finite value), ``vmin`` / ``vmax`` (finite
    extremes), per-unit ``mean_i`` (less ``shift``) and ``m2_i`` (centred sum of
    squares), and, where units vary, ``rhs`` (per-period sums of the within deviations)
    and ``wss`` (their sum of squares), the inputs of the period-effect R2, with
    ``system`` the :func:`period_matrix` of the rows holding a value when some rows do
    not.
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
class Passes:
    """What the passes over the rows computed, for the structure and the variation.

    ``stats``: column name -> :class:`ColumnStats`. ``per_unit``: the structure's
    per-unit table sorted by unit code (``__rows``, ``__first``, ``__last``, ``__seen``,
    ``__pattern``). ``period_rows``: rows per period index. ``system``: the period
    dummies' matrix after unit demeaning over every row (:func:`period_matrix`).
    ``duplicate_cells``: the first (unit, period) cells holding several rows.
    """

    stats: dict[str, ColumnStats]
    per_unit: pl.DataFrame | None
    period_rows: np.ndarray
    system: np.ndarray | SparsePeriods | None = None
    duplicate_cells: pl.DataFrame | None = None


@dataclass(frozen=True)
class Facts:
    """Whole-column figures a driver counted itself (the streaming engine reads each
    column whole): ``shift`` (first finite value in row order), ``distinct``, ``top``."""

    shift: float | None
    distinct: int
    top: int


def finish(
    merged: Shard,
    *,
    examples: int,
    tolerance: float,
    refinement: Refinement | None = None,
    the_plan: Plan | None = None,
    facts: dict[str, Facts] | None = None,
    counted: dict[str, tuple[int, int]] | None = None,
) -> Passes:
    """The figures of a panel from its merged statistics (every unit present).

    Units split across shards need the ``refinement`` of :func:`plan` (``the_plan``);
    ``facts`` are whole-column figures the driver counted itself, ``counted`` (distinct,
    top) pairs counted in buckets (:func:`bucket_values`).
    """
    if merged.units.size != merged.n_units:
        raise ValueError("finish needs every unit of the panel")
    if not merged.whole and (refinement is None or the_plan is None):
        raise ValueError("units split across shards need a second pass (plan, refine)")
    per_unit, duplicates, system, counts = _grid(merged, examples)
    stats: dict[str, ColumnStats] = {}
    for c, col in merged.columns.items():
        fact = (facts or {}).get(c)
        values = col.values.counts()
        if fact is not None:
            values = (fact.distinct, fact.top)
        elif counted is not None and c in counted:
            values = counted[c]
        if values is None:
            raise ValueError(f"column {c!r} was not counted")
        if isinstance(col, Numbers):
            stats[c] = _finish_number(c, col, merged, values, fact, counts, refinement, the_plan, tolerance, examples)
        else:
            stats[c] = _finish_coded(c, col, merged, values, refinement, examples)
    return Passes(stats, per_unit, np.asarray(merged.period_rows), system, duplicates)


def _finish_number(c: str, col: Numbers, merged: Shard, values: tuple[int, int], fact: Facts | None, counts: Any,
                   refinement: Refinement | None, the_plan: Plan | None, tolerance: float,
                   examples: int) -> ColumnStats:
    mean_abs = col.ref + col.local
    if col.finals is not None:
        changing, rhs, ex = col.finals.changing, col.finals.rhs, col.finals.examples[:examples]
    else:
        if refinement is None or the_plan is None:
            raise broken("refinement is not None and the_plan is not None")
        want = the_plan.wanted[c]
        lo_w, hi_w = refinement.lo[c], refinement.hi[c]

        def extremes(units: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            lo = np.full(units.size, np.inf)
            hi = np.full(units.size, -np.inf)
            lo[want], hi[want] = lo_w, hi_w
            return lo, hi

        changing = number_changes(col.integral, col.n, mean_abs, col.m2, col.vmin, col.vmax, tolerance, extremes,
                                  None if col.exact is None else col.exact[1])
        rhs = refinement.rhs.get(c)
        shown = np.flatnonzero(changing)[:examples]
        if c in refinement.exact:  # integers as they are
            ex = _examples_from(refinement.exact[c], shown, False, text=False)
        else:
            at = np.searchsorted(want, shown)
            ex = tuple((int(u), float(lo_w[j]), float(hi_w[j])) for u, j in zip(shown, at, strict=True))
    shift = fact.shift if fact is not None and fact.shift is not None else (col.first or 0.0)
    seen = col.n > 0
    mean_i = np.where(seen, (col.ref - shift) + col.local, 0.0)
    system = None
    if rhs is not None and col.unusable is not None and counts is not None:
        system = _column_system(counts, col.unusable, merged.n_periods)
    return ColumnStats(
        nulls=col.nulls, non_finite=col.non_finite, distinct=values[0], top=values[1], n_i=col.n,
        changing=changing, n_t=col.n_t, one_value=col.periods.one, examples=ex, shift=shift,
        vmin=col.vmin, vmax=col.vmax, mean_i=mean_i, m2_i=col.m2, rhs=rhs,
        wss=float(col.m2.sum()) if rhs is not None else None, system=system,
    )  # fmt: skip


def _finish_coded(c: str, col: Coded, merged: Shard, values: tuple[int, int], refinement: Refinement | None,
                  examples: int) -> ColumnStats:
    if col.finals is not None:
        ex = col.finals.examples[:examples]
    else:
        if refinement is None:
            raise broken("refinement is not None")
        ex = _examples_from(refinement.lo[c], np.flatnonzero(col.changed)[:examples], col.nested)
    return ColumnStats(
        nulls=col.nulls, non_finite=0, distinct=values[0], top=values[1], n_i=col.n, changing=col.changed,
        n_t=col.n_t, one_value=col.periods.one, examples=ex,
    )  # fmt: skip


def _column_system(counts: Any, unusable: tuple[np.ndarray, np.ndarray], n_periods: int) -> np.ndarray | SparsePeriods:
    """The period system of the rows holding a usable value: the cell counts less the
    cells of the rows without one."""
    ids, rows = unusable
    n_units = counts.shape[1] if isinstance(counts, np.ndarray) else counts.shape[0]
    if isinstance(counts, np.ndarray):
        missing = np.bincount(ids, weights=rows, minlength=n_units * n_periods).reshape(n_units, n_periods)
        return period_matrix(counts - missing.T.astype(np.int32))
    from scipy import sparse

    m = sparse.coo_matrix((rows, (ids // n_periods, ids % n_periods)), shape=counts.shape).tocsr()
    return period_matrix(counts - m)


def period_matrix(counts: Any) -> np.ndarray | SparsePeriods:
    """D' M_U D (periods x periods): period dummies after unit demeaning, from the rows per
    (unit, period) cell (dense periods x units, or sparse units x periods).

    It is diag(n_t) - C' W C with C the unit x period counts and W = diag(1/T_i): a sum
    over units, computed block by block. Beyond :data:`DENSE_PERIODS` periods it is
    never formed (:class:`SparsePeriods`).
    """
    if not isinstance(counts, np.ndarray) and counts.shape[1] > DENSE_PERIODS:
        return SparsePeriods.from_counts(counts)
    if isinstance(counts, np.ndarray):
        n_periods, n_units = counts.shape
        out = np.zeros((n_periods, n_periods))
        n_t = np.zeros(n_periods)
        for a in range(0, n_units, CHUNK_UNITS):  # blocks of units, not units
            block = counts[:, a : a + CHUNK_UNITS].astype(np.float64)
            t_i = block.sum(axis=0)
            w = np.divide(1.0, t_i, out=np.zeros(t_i.size), where=t_i > 0)
            out -= (block * w) @ block.T
            n_t += block.sum(axis=1)
        return out + np.diag(n_t)
    from scipy import sparse

    m = counts.astype(np.float64)
    t_i = np.asarray(m.sum(axis=1)).ravel()
    w = np.divide(1.0, t_i, out=np.zeros(t_i.size), where=t_i > 0)
    cwc = (m.T @ (sparse.diags(w) @ m)).toarray()
    return np.diag(np.asarray(m.sum(axis=0)).ravel()) - cwc


def _grid(merged: Shard, examples: int) -> tuple[pl.DataFrame, pl.DataFrame, np.ndarray | SparsePeriods, Any]:
    """(structure's per-unit table, first duplicate cells, period system of every row,
    the cell counts) from the merged cells."""
    cells, n_periods = merged.cells, merged.n_periods
    n = merged.n_units
    rows = merged.unit_rows
    if cells.dense is not None:
        counts: Any = cells.dense
        seen = counts > 0
        first = np.argmax(seen, axis=0)
        last = n_periods - 1 - np.argmax(seen[::-1], axis=0)
        n_seen = seen.sum(axis=0)
        dup = np.argwhere(counts.T > 1)[:examples]
        dup_n = counts[dup[:, 1], dup[:, 0]] if dup.size else np.zeros(0)
        if n_periods <= BITMASK_PERIODS:
            pattern: Any = np.zeros(n, dtype=np.uint64)
            for p in range(n_periods):  # a loop over periods (at most 63), not units
                pattern[seen[p]] |= np.uint64(1) << np.uint64(p)
            pattern = pl.Series("__pattern", pattern)
        else:
            pu, pp = np.nonzero(seen.T)
            pattern = _pattern_text(pu, pp, n)
    else:
        csr = cells.sparse.tocsr()
        csr.sort_indices()
        counts = csr
        starts, ends = csr.indptr[:-1], csr.indptr[1:]
        n_seen = np.diff(csr.indptr)
        first = csr.indices[starts]
        last = csr.indices[ends - 1]
        coo = csr.tocoo()
        big = np.flatnonzero(coo.data > 1)
        order = np.lexsort((coo.col[big], coo.row[big]))[:examples]
        dup = np.column_stack([coo.row[big][order], coo.col[big][order]])
        dup_n = coo.data[big][order]
        if n_periods <= BITMASK_PERIODS:
            bits = np.uint64(1) << csr.indices.astype(np.uint64)
            pattern = pl.Series("__pattern", np.bitwise_or.reduceat(bits, starts))
        else:
            pattern = _pattern_text(coo.row, coo.col, n)
    per_unit = pl.DataFrame(
        {
            UNIT_ID: pl.Series(UNIT_ID, np.arange(n, dtype=np.uint32)),
            "__rows": pl.Series("__rows", rows.astype(np.uint32)),
            "__first": pl.Series("__first", first.astype(np.uint32)),
            "__last": pl.Series("__last", last.astype(np.uint32)),
            "__seen": pl.Series("__seen", n_seen.astype(np.uint32)),
            "__pattern": pattern.alias("__pattern"),
        }
    )
    duplicates = pl.DataFrame(
        {
            UNIT_ID: pl.Series(dup[:, 0] if dup.size else [], dtype=pl.UInt32),
            PERIOD_ID: pl.Series(dup[:, 1] if dup.size else [], dtype=pl.UInt32),
            "n": pl.Series(np.asarray(dup_n, dtype=np.uint32)),
        }
    )
    return per_unit, duplicates, period_matrix(counts), counts


def _pattern_text(units: np.ndarray, periods: np.ndarray, n: int) -> pl.Series:
    """Each unit's periods as text ("0,3,5"; more than 63 periods), in one grouped pass."""
    frame = pl.DataFrame({"u": units.astype(np.int64), "p": periods.astype(np.int64)})
    text = frame.sort("u", "p").group_by("u", maintain_order=True).agg(pl.col("p").cast(pl.String).str.join(","))
    out = np.empty(n, dtype=object)
    out[text["u"].to_numpy()] = text["p"].to_numpy()
    return pl.Series("__pattern", out, dtype=pl.String)


def decompose(n_i: np.ndarray, mean_i: np.ndarray, m2_i: np.ndarray) -> dict[str, float | None]:
    """Mean, overall / between / within sd and within share from per-unit sufficient statistics.

    ``n_i`` counts, ``mean_i`` means and ``m2_i`` centred sums of squares of the units
    with at least one value. TSS = WSS + BSS exactly (methods.md, section 2).
    """
    n_i = np.asarray(n_i, dtype=np.float64)
    units = n_i.size
    total = float(n_i.sum())
    if units == 0 or total == 0:
        return {"mean": None, "overall_sd": None, "between_sd": None, "within_sd": None, "within_share": None}
    mean = float((n_i * mean_i).sum() / total)
    wss = float(np.maximum(m2_i, 0.0).sum())
    bss = float((n_i * (mean_i - mean) ** 2).sum())
    tss = wss + bss
    return {
        "mean": mean,
        "overall_sd": float(np.sqrt(tss / (total - 1))) if total > 1 else None,
        "between_sd": float(np.std(mean_i, ddof=1)) if units > 1 else None,
        "within_sd": float(np.sqrt(wss / (total - units))) if total > units else None,
        "within_share": (wss / tss) if tss > 0 else None,
    }
