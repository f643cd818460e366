"""Within / between variation, column kinds and per-column signals.

Every column's statistics come from one of three passes (:func:`run_passes`):

- in memory: the ordered numpy pass of :mod:`auditor.unitpass`;
- streaming, one key column: :func:`_partitioned_passes`, light whole-column
  queries, then ranges of units read one at a time through the same numpy pass;
- streaming otherwise (composite keys, more than 63 periods, list or struct
  columns): polars queries (a scalar pass, grouped passes by unit and by period,
  value tables) with per-unit moments merged across row batches (:func:`unit_moments`).

Each gives a :class:`~auditor.unitpass.ColumnStats` per column; kinds, shares and
signals are numpy arithmetic on those (:func:`compute_variation`).

Numerical stability: numeric columns are shifted by their first finite value,
per-unit sums of squares are centred within the unit (two passes), and totals are
combined as WSS + BSS from unit means (methods.md, section 2).
"""

from __future__ import annotations

from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import polars as pl

from auditor import unitpass
from auditor.config import Settings
from auditor.findings import Finding, make
from auditor.load import PERIOD_ID, UNIT_ID, Panel, integer_codes
from auditor.unitpass import ColumnStats, SparsePeriods, period_matrix

KINDS = ("constant", "period-only", "time-invariant", "nearly-time-invariant", "time-varying")

# Field order of the columns table (the contract's names first).
COLUMN_FIELDS = (
    "name",
    "dtype",
    "kind",
    "missing_share",
    "distinct",
    "units_changing",
    "units_observed_twice",
    "dominant_share",
    "mean",
    "overall_sd",
    "between_sd",
    "within_sd",
    "within_share",
    "absorbed_by_time",
    "time_r2",
    "non_finite",
    "binary",
    "periods_all_missing",
)


@dataclass(frozen=True)
class Variation:
    """The columns table and its side tables.

    ``columns``: one row per non-key column with :data:`COLUMN_FIELDS`.
    ``missing_by_period``: ``column``, ``period`` (label), ``missing_share`` for
    every column and period. ``absorbed_basis``: how ``absorbed_by_time`` was
    computed (all rows, or a fixed subset of units for very large panels).
    ``changing_examples``: per column, a few changing units with their min/max.
    """

    columns: pl.DataFrame
    missing_by_period: pl.DataFrame
    absorbed_basis: dict[str, Any]
    changing_examples: dict[str, tuple[dict[str, Any], ...]]


def dtype_name(dtype: pl.DataType) -> str:
    """A short lower-case name for a polars dtype (``float64``, ``int64``, ``string``, ...)."""
    if isinstance(dtype, pl.Categorical | pl.Enum):
        return "categorical"
    if isinstance(dtype, pl.Datetime):
        return "datetime"
    return str(dtype).lower()


def is_numeric(dtype: pl.DataType) -> bool:
    """Whether the within/between decomposition applies (numbers and booleans)."""
    return dtype.is_numeric() or dtype == pl.Boolean


def _clean(col: str, dtype: pl.DataType) -> pl.Expr:
    """The column as Float64 with NaN and infinities set to missing."""
    e = pl.col(col).cast(pl.Float64)
    if dtype.is_float():
        e = pl.when(e.is_finite()).then(e)
    return e


def column_aliases(panel: Panel) -> dict[str, str]:
    """Safe aliases (``c0``, ``c1``, ...) for every non-key column, whatever its name."""
    return {c: f"c{i}" for i, c in enumerate(panel.columns)}


def _text(col: str, dtype: pl.DataType) -> pl.Expr:
    e = pl.col(col)
    return e.cast(pl.String) if isinstance(dtype, pl.Categorical | pl.Enum) else e


def _orderable(dtype: pl.DataType) -> bool:
    # nested types (lists, arrays, structs, maps) have no order: counted, never compared
    return not (dtype.is_nested() or isinstance(dtype, pl.Object | pl.Null))


def prepared(
    panel: Panel,
    only: Sequence[str] | None = None,
    names: dict[str, str] | None = None,
    source: pl.LazyFrame | None = None,
) -> pl.LazyFrame:
    """The panel with helper columns so every grouped aggregation is a plain one.

    For column alias ``a``: ``a:v`` the values with NaN as missing (infinities kept),
    ``a:x`` the finite values as Float64 (numeric columns), ``a:t`` text for
    categoricals. ``only`` limits the helper columns to those of the named columns
    (a small plan for a one-column query on a wide panel); ``names`` are the
    column aliases when the caller has them already. ``source``: rows holding the
    period code and the columns but no unit code (the result then has none either).
    """
    names = names or column_aliases(panel)
    exprs: list[pl.Expr] = []
    for c in panel.columns if only is None else only:
        a, dt = names[c], panel.schema[c]
        if dt.is_float():
            exprs.append(pl.when(pl.col(c).is_nan()).then(None).otherwise(pl.col(c)).alias(f"{a}:v"))
            exprs.append(pl.when(pl.col(c).is_finite()).then(pl.col(c)).alias(f"{a}:x"))
        elif is_numeric(dt):
            exprs.append(pl.col(c).alias(f"{a}:v"))
            exprs.append(pl.col(c).cast(pl.Float64).alias(f"{a}:x"))
        elif _orderable(dt):
            exprs.append(_text(c, dt).alias(f"{a}:v"))
        else:
            exprs.append(pl.col(c).alias(f"{a}:v"))
    if source is not None:
        return source.select(pl.col(PERIOD_ID), *exprs)
    return panel.lazy.select(pl.col(UNIT_ID), pl.col(PERIOD_ID), *exprs)


def unit_exprs(panel: Panel, columns: Sequence[str] | None = None) -> list[pl.Expr]:
    """Per-unit aggregations on :func:`prepared` columns: count, min and max of each column.

    ``columns``: the columns to aggregate (default every non-key column). The sums
    (means and centred sums of squares) come from :func:`unit_moments`.
    """
    names = column_aliases(panel)
    out: list[pl.Expr] = []
    for c in panel.columns if columns is None else columns:
        a, dt = names[c], panel.schema[c]
        src = f"{a}:x" if is_numeric(dt) else f"{a}:v"
        # integers keep their own type for the extremes: as floats, neighbours beyond
        # 2**53 (int64 and uint64 extremes) would look equal
        ext = f"{a}:v" if dt.is_integer() else src
        if is_numeric(dt) or _orderable(dt):
            out += [
                pl.col(src).count().alias(f"{a}:n"),
                pl.col(ext).min().alias(f"{a}:min" if is_numeric(dt) else f"{a}:tmin"),
                pl.col(ext).max().alias(f"{a}:max" if is_numeric(dt) else f"{a}:tmax"),
            ]
        else:
            out += [pl.col(src).count().alias(f"{a}:n"), pl.col(src).n_unique().alias(f"{a}:nu")]
    return out


MOMENT_BATCH_ROWS = 4_000_000  # rows per batch of the ordered numpy pass in streaming mode


def unit_moments(
    panel: Panel, columns: list[str], shift: dict[str, float]
) -> dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Per-unit (count, mean - shift, centred sum of squares) of each numeric column.

    One ordered pass with numpy's bincount: polars' parallel grouped sums are not
    bit-reproducible from run to run, and the JSON must be. Finite values only. In
    streaming mode the rows come in batches, merged exactly (Chan et al.).
    """
    n_units = panel.n_units
    out: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
    if not columns:
        return out
    if panel.eager is not None:
        batches = [panel.eager]
    else:
        total = panel.rows - panel.missing_keys
        batches = (
            panel.lazy.select(UNIT_ID, *columns).slice(start, MOMENT_BATCH_ROWS).collect(engine="streaming")
            for start in range(0, total, MOMENT_BATCH_ROWS)
        )
    acc: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
    for frame in batches:
        u = frame[UNIT_ID].to_numpy().astype(np.intp)
        full_n = np.bincount(u, minlength=n_units).astype(np.float64)
        for c in columns:
            x = frame[c].cast(pl.Float64).to_numpy()
            keep = np.isfinite(x)
            if keep.all():
                uu, xx, n = u, x - shift[c], full_n
            else:
                uu, xx = u[keep], x[keep] - shift[c]
                n = np.bincount(uu, minlength=n_units).astype(np.float64)
            sums = np.bincount(uu, weights=xx, minlength=n_units).astype(np.float64)
            mean = np.divide(sums, n, out=np.zeros(n_units), where=n > 0)
            dev = xx - mean[uu]
            m2 = np.bincount(uu, weights=dev * dev, minlength=n_units).astype(np.float64)
            acc[c] = (n, mean, m2) if c not in acc else merge_moments(acc[c], (n, mean, m2))
    return acc


def merge_moments(
    a: tuple[np.ndarray, np.ndarray, np.ndarray], b: tuple[np.ndarray, np.ndarray, np.ndarray]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Combine per-unit (count, mean, M2) of two parts exactly (Chan, Golub and LeVeque)."""
    na, ma, qa = a
    nb, mb, qb = b
    n = na + nb
    delta = mb - ma
    w = np.divide(nb, n, out=np.zeros_like(n), where=n > 0)
    mean = ma + delta * w
    m2 = qa + qb + delta * delta * na * w
    return n, mean, m2


SELECT_CHUNK = 400  # expressions per query: polars plans very long selections slowly


def select_row(panel: Panel, exprs: list[pl.Expr]) -> dict[str, Any]:
    """One row of scalar aggregations, in queries of at most SELECT_CHUNK expressions."""
    out: dict[str, Any] = {}
    for start in range(0, len(exprs), SELECT_CHUNK):
        out.update(panel.collect(panel.lazy.select(exprs[start : start + SELECT_CHUNK])).row(0, named=True))
    return out


@dataclass(frozen=True)
class Passes:
    """What the passes over the rows computed.

    ``stats``: column name -> :class:`~auditor.unitpass.ColumnStats`. ``per_unit``:
    the structure's per-unit table sorted by unit code (None when not asked for).
    ``period_rows``: rows per period index. ``system``: the period dummies' matrix
    after unit demeaning over every row (:func:`~auditor.unitpass.period_matrix`).
    ``streaming``: the stats came from the polars tables of a streaming pass (the
    period-effect R2 then reads the rows again). ``duplicate_cells``: the first
    (unit, period) cells holding several rows, when the passes found them.
    """

    stats: dict[str, ColumnStats]
    per_unit: pl.DataFrame | None
    period_rows: np.ndarray
    system: np.ndarray | SparsePeriods | None = None
    streaming: bool = False
    duplicate_cells: pl.DataFrame | None = None
    unit_means: dict[str, np.ndarray] = field(default_factory=dict)


def run_passes(panel: Panel, settings: Settings, extra_unit: list[pl.Expr] | None = None) -> Passes:
    """Every column's statistics, and the per-unit aggregations ``extra_unit`` asks for.

    In memory: the ordered numpy pass of :mod:`auditor.unitpass` (the structure's
    per-unit fields come from its count matrix when the panel has at most 63
    periods). Streaming: a scalar pass, then the grouped passes by unit and by
    period in polars, and the per-unit moments merged across row batches.
    """
    tol = float(settings.get("profile", "float_tolerance"))
    k = int(settings.get("profile", "examples"))
    if not unitpass.feasible(panel):
        if partitioned(panel):
            return _partitioned_passes(panel, tol, k)
        return _polars_passes(panel, list(panel.columns), tol, k, extra_unit)

    def slow(p: Panel, column: str) -> ColumnStats:
        return _polars_passes(p, [column], tol, k, None).stats[column]

    up = unitpass.run(panel, examples=k, tolerance=tol, slow=slow)
    per_unit = up.structure
    if per_unit is None and extra_unit:
        per_unit = panel.collect(panel.lazy.group_by(UNIT_ID).agg(extra_unit)).sort(UNIT_ID)
    return Passes(stats=up.columns, per_unit=per_unit, period_rows=up.period_rows, system=up.system)


def _scalar_exprs(panel: Panel, cols: Sequence[str], *, distinct: bool) -> list[pl.Expr]:
    """Whole-column counts: rows, missing, NaN, infinities, first finite value, extremes
    and (``distinct``) distinct values, aliased ``{alias}:{what}``."""
    names, schema = column_aliases(panel), panel.schema
    scalar: list[pl.Expr] = [pl.len().alias("__rows")]
    for c in cols:
        a, dt = names[c], schema[c]
        if dt.is_float():
            scalar.append(pl.col(c).is_nan().sum().alias(f"{a}:nan"))
            scalar.append(pl.col(c).is_infinite().sum().alias(f"{a}:inf"))
        if is_numeric(dt):
            clean = _clean(c, dt)
            scalar += [
                clean.drop_nulls().first().alias(f"{a}:shift"),
                clean.min().alias(f"{a}:min"),
                clean.max().alias(f"{a}:max"),
            ]
        scalar.append(pl.col(c).null_count().alias(f"{a}:null"))
        if distinct and _orderable(dt):
            v = pl.col(c).fill_nan(None) if dt.is_float() else pl.col(c)
            scalar.append(v.drop_nulls().n_unique().alias(f"{a}:distinct"))
    return scalar


def _period_exprs(panel: Panel, cols: Sequence[str]) -> list[pl.Expr]:
    """Per-period aggregations on :func:`prepared` columns: rows, values, one value or more."""
    names, schema = column_aliases(panel), panel.schema
    per_period: list[pl.Expr] = [pl.len().alias("rows")]
    for c in cols:
        a, dt = names[c], schema[c]
        if not (is_numeric(dt) or _orderable(dt)):
            per_period += [pl.col(f"{a}:v").count().alias(f"{a}:n"), pl.col(f"{a}:v").n_unique().alias(f"{a}:nu")]
            continue
        per_period += [
            pl.col(f"{a}:v").count().alias(f"{a}:n"),
            pl.col(f"{a}:v").min().alias(f"{a}:pmin"),
            pl.col(f"{a}:v").max().alias(f"{a}:pmax"),
        ]
    return per_period


def _polars_passes(
    panel: Panel, cols: list[str], tol: float, k: int, extra_unit: list[pl.Expr] | None
) -> Passes:
    """The statistics of ``cols`` from polars queries (streaming, or columns numpy cannot code)."""
    schema = panel.schema
    names = column_aliases(panel)
    numeric = [c for c in cols if is_numeric(schema[c])]
    g = select_row(panel, _scalar_exprs(panel, cols, distinct=True))
    n_keyed = int(g["__rows"])
    shift = {c: float(g.get(f"{names[c]}:shift") or 0.0) for c in numeric}
    per_period = _period_exprs(panel, cols)
    prep = prepared(panel, cols, names)
    queries = [
        prep.group_by(UNIT_ID).agg([*unit_exprs(panel, cols), *(extra_unit or [])]),
        prep.group_by(PERIOD_ID).agg(per_period),
    ]
    # Distinct values and the most common value's count. When every present value is
    # distinct (continuous columns), the count is 1 and no value table is needed.
    values: dict[str, tuple[int, int]] = {}
    counted: list[str] = []
    for c in cols:
        a, dt = names[c], schema[c]
        v = pl.col(f"{a}:v")
        if not _orderable(dt) and not dt.is_nested():  # objects, nulls: no value table
            counted.append(c)
            queries.append(prepared(panel, [c], names).select(v.n_unique().alias("d"), pl.lit(0).alias("top")))
            continue
        if not _orderable(dt):  # lists, structs, maps: counted by value, as in memory
            counted.append(c)
            queries.append(
                prepared(panel, [c], names).select(v).filter(v.is_not_null()).group_by(v).len()
                .select(pl.len().alias("d"), pl.col("len").max().alias("top"))
            )
            continue
        present = n_keyed - int(g[f"{a}:null"]) - int(g.get(f"{a}:nan") or 0)
        distinct = int(g[f"{a}:distinct"])
        if distinct == present:
            values[a] = (distinct, 1 if distinct else 0)
            continue
        counted.append(c)
        queries.append(
            # a one-column plan: planning the full 'prep' once per column is quadratic in
            # the number of columns (2,000 columns took minutes)
            prepared(panel, [c], names).select(v).filter(v.is_not_null()).group_by(v).len().select(pl.len().alias("d"), pl.col("len").max().alias("top"))
        )
    engine = "streaming" if panel.streaming else "auto"
    results = pl.collect_all(queries, engine=engine)
    pu = results[0].sort(UNIT_ID)
    pp = results[1].sort(PERIOD_ID)
    for c, res in zip(counted, results[2:], strict=True):
        row = res.row(0, named=True) if res.height else {"d": 0, "top": 0}
        values[names[c]] = (int(row["d"] or 0), int(row["top"] or 0))
    moments = unit_moments(panel, numeric, shift)
    codes = pu[UNIT_ID].to_numpy()
    stats = {
        c: _stats_from_tables(c, names[c], schema[c], g, pu, pp, values[names[c]], moments.get(c), shift.get(c, 0.0), codes, tol, k)
        for c in cols
    }
    structure_cols = [c for c in pu.columns if c.startswith("__") and c != UNIT_ID]
    return Passes(
        stats=stats,
        per_unit=pu.select(UNIT_ID, *structure_cols) if extra_unit else None,
        period_rows=pp["rows"].to_numpy(),
        streaming=True,
        unit_means={c: moments[c][1] for c in numeric},
    )


PARTITION_ROWS = 8_000_000  # rows per partition of units in the streaming profile


def _partitioned_passes(panel: Panel, tol: float, k: int) -> Passes:
    """A streaming profile read one partition of units at a time, in bounded memory.

    Each column read whole first, one or two in memory at a time: its missing and
    non-finite counts, first finite value, extremes and distinct values. Then the
    units in contiguous ranges of their sorted key: each range's rows are read,
    coded and run through the in-memory numpy pass, and the per-unit arrays are
    joined in unit order, so every per-unit figure is the one an in-memory profile
    computes. Per-period counts, extremes and sums and the period dummies'
    matrices add up across ranges.
    """
    assert panel.by_period is not None
    cols = list(panel.columns)
    schema, names = panel.schema, column_aliases(panel)
    key = panel.unit[0]
    g: dict[str, Any] = {}
    values: dict[str, tuple[int, int]] = {}
    with ThreadPoolExecutor(max_workers=2) as pool:  # one column is read while another sorts
        for c, (row, counted) in zip(cols, pool.map(lambda c: _whole_column(panel, c), cols), strict=True):
            g.update(row)
            values[c] = counted
    shifts = {c: float(g.get(f"{names[c]}:shift") or 0.0) for c in cols if is_numeric(schema[c])}

    n, n_periods = panel.n_units, panel.n_periods
    keyed_rows = panel.rows - panel.missing_keys
    parts = max(1, int(np.ceil(keyed_rows / PARTITION_ROWS)))
    bounds = np.unique(np.linspace(0, n, parts + 1).round().astype(np.int64))
    unit_keys = panel.units[key]
    pieces: dict[str, list[ColumnStats]] = {c: [] for c in cols}
    structure: list[pl.DataFrame] = []
    duplicates: list[pl.DataFrame] = []
    unit_rows: list[np.ndarray] = []
    partly = dict.fromkeys(cols, False)  # some range has missing values: its own counts
    periods: list[pl.DataFrame] = []
    period_exprs = _period_exprs(panel, cols)
    system = np.zeros((n_periods, n_periods))
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        frame = panel.collect(
            panel.by_period.filter(
                pl.col(key).is_between(
                    pl.lit(unit_keys[int(a)], dtype=unit_keys.dtype), pl.lit(unit_keys[int(b) - 1], dtype=unit_keys.dtype)
                )
            )
            .select(key, PERIOD_ID, *cols)
        )
        fast = integer_codes(frame[key])  # integer keys: one bincount, else a dense rank
        frame = frame.with_columns(
            fast[0] if fast is not None else (pl.col(key).rank("dense") - 1).cast(pl.UInt32).alias(UNIT_ID)
        )
        # per-period counts and extremes of the range (a streaming query over the whole
        # input would hold every row: polars cannot stream text extremes)
        periods.append(
            prepared(panel, cols, names, source=frame.lazy()).group_by(PERIOD_ID).agg(period_exprs).collect()
        )
        up = unitpass.run_frame(
            frame, int(b - a), n_periods, cols, examples=k, tolerance=tol, slow=_no_slow, shifts=shifts
        )
        del frame
        unit_rows.append(up.unit_rows)
        for c in cols:
            st = up.columns[c]
            if st.n_i is up.unit_rows:  # no value missing in the range: share one array
                st = replace(st, n_i=np.empty(0, dtype=np.int64))
            else:
                partly[c] = True
            if st.mean_i is not None and st.system is None:  # every row of the range has a value
                st = replace(st, system=up.system if int(up.unit_rows.sum()) else np.zeros_like(system))
            pieces[c].append(replace(st, examples=tuple((code + int(a), lo, hi) for code, lo, hi in st.examples)))
        assert up.structure is not None and up.counts is not None and up.system is not None
        structure.append(up.structure.with_columns(pl.col(UNIT_ID) + int(a)))
        system += up.system
        cells = np.argwhere(up.counts > 1)[:k]
        duplicates.append(
            pl.DataFrame(
                {
                    UNIT_ID: pl.Series(cells[:, 0] + int(a), dtype=pl.UInt32),
                    PERIOD_ID: pl.Series(cells[:, 1], dtype=pl.UInt32),
                    "n": pl.Series(up.counts[cells[:, 0], cells[:, 1]].astype(np.uint32)),
                }
            )
        )
    all_rows = np.concatenate(unit_rows)
    merged = [pl.col("rows").sum()]
    for c in cols:
        a = names[c]
        merged += [pl.col(f"{a}:n").sum(), pl.col(f"{a}:pmin").min(), pl.col(f"{a}:pmax").max()]
    pp = pl.concat(periods).group_by(PERIOD_ID).agg(merged).sort(PERIOD_ID)
    stats = {}
    for c in cols:
        if partly[c]:  # ranges without missing values get their row counts back
            parts_c = [p if p.n_i.size else replace(p, n_i=r) for p, r in zip(pieces[c], unit_rows, strict=True)]
            stats[c] = _joined(parts_c, names[c], g, pp, values[c], shifts.get(c, 0.0), k)
        else:
            stats[c] = replace(_joined(pieces[c], names[c], g, pp, values[c], shifts.get(c, 0.0), k), n_i=all_rows)
        del pieces[c]
    return Passes(
        stats=stats,
        per_unit=pl.concat(structure),
        period_rows=pp["rows"].to_numpy(),
        system=system,
        duplicate_cells=pl.concat(duplicates),
    )


def _whole_column(panel: Panel, c: str) -> tuple[dict[str, Any], tuple[int, int]]:
    """One column of a streaming panel read whole (one column in memory): the counts
    of :func:`_scalar_exprs` under their aliases, and (distinct values, rows of the
    most common one)."""
    frame = panel.collect(panel.by_period.select(c))
    s = frame.to_series()
    facts = unitpass.column_facts(s)
    if facts is None:  # text, dates, decimals: polars
        return frame.select(_scalar_exprs(panel, [c], distinct=False)).row(0, named=True), unitpass.value_counts(s)
    a = column_aliases(panel)[c]
    row = {
        f"{a}:null": facts.nulls,
        f"{a}:nan": facts.nan,
        f"{a}:inf": facts.inf,
        f"{a}:shift": facts.shift,
        f"{a}:min": facts.vmin,
        f"{a}:max": facts.vmax,
    }
    return row, (facts.distinct, facts.top)


def _no_slow(column: str) -> ColumnStats:
    raise AssertionError(f"column {column!r} cannot be profiled by partitions")


def partitioned(panel: Panel) -> bool:
    """Whether a streaming panel can be profiled a partition of units at a time: one key
    column, at most 63 periods, and every column numbers, text or other orderable values."""
    return (
        panel.by_period is not None
        and len(panel.unit) == 1
        and panel.n_periods <= unitpass.BITMASK_PERIODS
        and all(is_numeric(dt) or _orderable(dt) for dt in panel.schema.values())
    )


def _joined(
    parts: list[ColumnStats], a: str, g: dict[str, Any], pp: pl.DataFrame, values: tuple[int, int], shift: float, k: int
) -> ColumnStats:
    """One column's statistics from its partitions (in unit order) and the whole-column counts."""
    first = parts[0]
    number = first.mean_i is not None

    def cat(field_name: str) -> np.ndarray:
        return np.concatenate([getattr(p, field_name) for p in parts])

    extra: dict[str, Any] = {}
    if number:
        extra = {
            "shift": shift,
            "vmin": g.get(f"{a}:min"),
            "vmax": g.get(f"{a}:max"),
            "mean_i": cat("mean_i"),
            "m2_i": cat("m2_i"),
            "rhs": sum((p.rhs for p in parts if p.rhs is not None), np.zeros(pp.height)),
            "wss": float(sum(p.wss or 0.0 for p in parts)),
            "system": sum((p.system for p in parts if p.system is not None), np.zeros((pp.height, pp.height))),
        }
    return ColumnStats(
        nulls=int(g[f"{a}:null"]) + int(g.get(f"{a}:nan") or 0),
        non_finite=int(g.get(f"{a}:inf") or 0),
        distinct=values[0],
        top=values[1],
        n_i=cat("n_i"),
        changing=cat("changing"),
        n_t=pp[f"{a}:n"].to_numpy(),
        one_value=_one_value_from(pp, a),
        examples=tuple(e for p in parts for e in p.examples)[:k],
        **extra,
    )


def _number_value(v: Any) -> Any:
    """An extreme for an example: integers as they are, other numbers as floats."""
    return v if isinstance(v, int) and not isinstance(v, bool) else float(v)


def _one_value_from(pp: pl.DataFrame, a: str) -> bool:
    """Whether every period holds at most one value, from the per-period table."""
    if f"{a}:pmin" in pp.columns:
        pmin, pmax = pp[f"{a}:pmin"], pp[f"{a}:pmax"]
        return bool((pmin.is_null() | (pmin == pmax)).fill_null(True).all())
    return bool((pp[f"{a}:nu"].to_numpy() <= 1).all())


def _stats_from_tables(
    c: str,
    a: str,
    dt: pl.DataType,
    g: dict[str, Any],
    pu: pl.DataFrame,
    pp: pl.DataFrame,
    values: tuple[int, int],
    moments: tuple[np.ndarray, np.ndarray, np.ndarray] | None,
    shift: float,
    codes: np.ndarray,
    tol: float,
    k: int,
) -> ColumnStats:
    """One column's :class:`ColumnStats` from the polars tables of :func:`_polars_passes`."""
    pu_cols = set(pu.columns)
    n_i = pu[f"{a}:n"].to_numpy()
    extra: dict[str, Any] = {}
    if moments is not None:
        mean_i = moments[1][codes]
        lo_s, hi_s = pu[f"{a}:min"], pu[f"{a}:max"]
        seen = n_i > 0
        if dt.is_float():
            lo, hi = lo_s.to_numpy(), hi_s.to_numpy()
            unit_mean_abs = np.abs(np.where(seen, mean_i, 0.0) + shift)
            changing = seen & ((hi - lo) > tol * (1.0 + unit_mean_abs))
        else:  # integers compared in their own type, booleans as 0/1
            changing = seen & (hi_s != lo_s).fill_null(False).to_numpy()
        idx = np.flatnonzero(changing)[:k]
        examples = tuple((int(codes[i]), _number_value(lo_s[int(i)]), _number_value(hi_s[int(i)])) for i in idx)
        extra = {
            "shift": shift,
            "vmin": g.get(f"{a}:min"),
            "vmax": g.get(f"{a}:max"),
            "mean_i": mean_i,
            "m2_i": moments[2][codes],
        }
    elif f"{a}:tmin" in pu_cols:
        tmin, tmax = pu[f"{a}:tmin"], pu[f"{a}:tmax"]
        changing = (tmin.is_not_null() & (tmin != tmax)).fill_null(False).to_numpy()
        idx = np.flatnonzero(changing)[:k]
        examples = tuple((int(codes[i]), str(tmin[int(i)]), str(tmax[int(i)])) for i in idx)
    else:
        nu = pu[f"{a}:nu"].to_numpy()
        changing = nu >= 2
        idx = np.flatnonzero(changing)[:k]
        examples = tuple((int(codes[i]), None, int(nu[i])) for i in idx)
    one_value = _one_value_from(pp, a)
    return ColumnStats(
        nulls=int(g[f"{a}:null"]) + int(g.get(f"{a}:nan") or 0),
        non_finite=int(g.get(f"{a}:inf") or 0),
        distinct=values[0],
        top=values[1],
        n_i=n_i,
        changing=np.asarray(changing, dtype=bool),
        n_t=pp[f"{a}:n"].to_numpy(),
        one_value=one_value,
        examples=examples,
        **extra,
    )


def compute_variation(panel: Panel, settings: Settings, passes: Passes | None = None) -> Variation:
    """Kinds, shares and signals for every non-key column of ``panel``.

    ``passes`` are the statistics from :func:`run_passes` (computed here when None).
    """
    cols = list(panel.columns)
    schema = panel.schema
    n_rows = panel.rows - panel.missing_keys
    if not cols:
        return Variation(
            columns=pl.DataFrame(schema={f: pl.Null for f in COLUMN_FIELDS}),
            missing_by_period=pl.DataFrame(schema={"column": pl.String, "period": pl.String, "missing_share": pl.Float64}),
            absorbed_basis={"rows": 0, "units": 0, "all_units": True},
            changing_examples={},
        )
    numeric = [c for c in cols if is_numeric(schema[c])]
    numeric_set = set(numeric)  # membership per column: a list would be quadratic in columns
    passes = passes if passes is not None else run_passes(panel, settings)

    # --- arithmetic on the small tables ------------------------------------------------
    records: list[dict[str, Any]] = []
    changing_examples: dict[str, tuple[dict[str, Any], ...]] = {}
    period_rows = passes.period_rows.astype(np.float64)
    period_labels = list(panel.grid)
    miss_cols: list[str] = []
    miss_periods: list[Any] = []
    miss_shares: list[float] = []
    for c in cols:
        st = passes.stats[c]
        dt = schema[c]
        present_rows = n_rows - st.nulls
        dominant = (st.top / present_rows) if present_rows and st.distinct and st.top else None
        observed_twice = int((st.n_i >= 2).sum())
        rec: dict[str, Any] = {
            "name": c,
            "dtype": dtype_name(dt),
            "missing_share": st.nulls / n_rows if n_rows else None,
            "distinct": st.distinct,
            "units_observed_twice": observed_twice,
            "dominant_share": dominant,
            "mean": None,
            "overall_sd": None,
            "between_sd": None,
            "within_sd": None,
            "within_share": None,
            "absorbed_by_time": None,
            "time_r2": None,
            "non_finite": st.non_finite,
            "binary": False,
        }
        if c in numeric_set and st.mean_i is not None and st.m2_i is not None:
            if st.n_i.size and int(st.n_i.min()) > 0:  # every unit has a value: no copies
                rec.update(decompose(st.n_i, st.mean_i, st.m2_i))
            else:
                seen = st.n_i > 0
                rec.update(decompose(st.n_i[seen], st.mean_i[seen], st.m2_i[seen]))
            if rec["mean"] is not None:
                rec["mean"] = rec["mean"] + st.shift
            rec["binary"] = bool(st.distinct == 2 and st.vmin == 0.0 and st.vmax == 1.0)
        units_changing = int(st.changing.sum())
        rec["units_changing"] = units_changing
        if st.examples:
            labels = panel.unit_labels([e[0] for e in st.examples])
            changing_examples[c] = tuple(
                {**lab, "distinct_values": hi} if lo is None else {**lab, "min": lo, "max": hi}
                for lab, (_, lo, hi) in zip(labels, st.examples, strict=True)
            )
        # per period: missing data by wave
        n_t = st.n_t.astype(np.float64)
        share_t = 1.0 - n_t / period_rows
        miss_cols += [c] * len(share_t)
        miss_periods += period_labels
        miss_shares += share_t.tolist()
        rec["periods_all_missing"] = [
            period_labels[i] for i in np.flatnonzero(n_t == 0)
        ] if st.distinct else []
        rec["kind"] = classify(
            distinct=st.distinct,
            period_only=bool(st.distinct > 1 and st.one_value),
            units_changing=units_changing,
            units_observed_twice=observed_twice,
            within_share=rec["within_share"],
            settings=settings,
        )
        records.append(rec)

    basis = _absorbed(panel, records, numeric, passes, settings)
    table = _table(records)
    missing = pl.DataFrame(
        {
            "column": pl.Series(miss_cols, dtype=pl.String),
            "period": pl.Series([str(p) for p in miss_periods], dtype=pl.String),
            "missing_share": pl.Series(miss_shares, dtype=pl.Float64),
        }
    )
    return Variation(columns=table, missing_by_period=missing, absorbed_basis=basis, changing_examples=changing_examples)


def _table(records: list[dict[str, Any]]) -> pl.DataFrame:
    data = {f: [r.get(f) for r in records] for f in COLUMN_FIELDS}
    data["periods_all_missing"] = [[str(p) for p in r["periods_all_missing"]] for r in records]
    types: dict[str, Any] = {
        "name": pl.String,
        "dtype": pl.String,
        "kind": pl.String,
        "missing_share": pl.Float64,
        "distinct": pl.Int64,
        "units_changing": pl.Int64,
        "units_observed_twice": pl.Int64,
        "dominant_share": pl.Float64,
        "mean": pl.Float64,
        "overall_sd": pl.Float64,
        "between_sd": pl.Float64,
        "within_sd": pl.Float64,
        "within_share": pl.Float64,
        "absorbed_by_time": pl.Boolean,
        "time_r2": pl.Float64,
        "non_finite": pl.Int64,
        "binary": pl.Boolean,
        "periods_all_missing": pl.List(pl.String),
    }
    return pl.DataFrame({f: pl.Series(f, data[f], dtype=types[f]) for f in COLUMN_FIELDS})


def decompose(n_i: np.ndarray, mean_i: np.ndarray, m2_i: np.ndarray) -> dict[str, float | None]:
    """Mean, overall / between / within sd and within share from per-unit sufficient statistics.

    ``n_i`` counts, ``mean_i`` means and ``m2_i`` centred sums of squares of the
    units with at least one value. TSS = WSS + BSS exactly (methods.md, section 2).
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


def classify(
    *,
    distinct: int,
    period_only: bool,
    units_changing: int,
    units_observed_twice: int,
    within_share: float | None,
    settings: Settings,
) -> str:
    """The column kind of methods.md section 3 (first rule that applies)."""
    if distinct <= 1:
        return "constant"
    if period_only:
        return "period-only"
    if units_changing == 0:
        return "time-invariant"
    share = float(settings.get("profile", "nearly_invariant_units_share"))
    low_within = float(settings.get("profile", "nearly_invariant_within_share"))
    if units_changing <= share * units_observed_twice or (
        within_share is not None and within_share < low_within
    ):
        return "nearly-time-invariant"
    return "time-varying"


def _absorbed(
    panel: Panel,
    records: list[dict[str, Any]],
    numeric: list[str],
    passes: Passes,
    settings: Settings,
) -> dict[str, Any]:
    """Fill ``time_r2`` and ``absorbed_by_time`` in ``records``; return the basis used.

    R2_t = 1 - SS(two-way residual) / WSS. The two-way residual is the limit of the
    alternating projections of methods.md; it is computed here directly, from the
    normal equations of period dummies after the unit demeaning
    ((D' M_U D) b = D' M_U x, a P x P system), which gives the same projection
    without iterating. In memory the right-hand sides (per-period sums of the
    within deviations) come from the ordered pass; streaming reads the rows again.
    """
    cut = float(settings.get("profile", "absorbed_r2"))
    numeric_set = set(numeric)
    todo = [
        r for r in records
        if r["name"] in numeric_set and r["kind"] in ("time-varying", "nearly-time-invariant")
    ]
    for r in records:
        if r["name"] in numeric_set:
            r["absorbed_by_time"] = r["kind"] == "period-only"
            r["time_r2"] = 1.0 if r["kind"] == "period-only" else None
    n_keyed = panel.rows - panel.missing_keys
    basis = {"rows": n_keyed, "units": panel.n_units, "all_units": True}
    if not todo:
        return basis
    if passes.streaming:
        return _absorbed_streaming(panel, todo, passes, settings, cut)
    # columns sharing one system (every row has a value) are solved together
    groups: dict[int, tuple[Any, list[dict[str, Any]]]] = {}
    for r in todo:
        st = passes.stats[r["name"]]
        matrix = st.system if st.system is not None else passes.system
        if st.rhs is None or st.wss is None or matrix is None:
            continue
        groups.setdefault(id(matrix), (matrix, []))[1].append(r)
    for matrix, rows in groups.values():
        stats = [passes.stats[r["name"]] for r in rows]
        shares = _explained_shares(
            np.column_stack([st.rhs for st in stats]), [float(st.wss or 0.0) for st in stats], _solver(matrix)
        )
        for r, r2 in zip(rows, shares, strict=True):
            r["time_r2"] = r2
            r["absorbed_by_time"] = bool(r2 is not None and r2 >= cut)
    return basis


def _solver(matrix: np.ndarray | SparsePeriods) -> tuple[np.ndarray, np.ndarray] | SparsePeriods:
    """What :func:`_explained` needs of a period system: the eigen-decomposition of a
    dense one (at most ``unitpass.DENSE_PERIODS`` periods), a sparse one as it is."""
    return matrix if isinstance(matrix, SparsePeriods) else np.linalg.eigh(matrix)


def _absorbed_streaming(
    panel: Panel, todo: list[dict[str, Any]], passes: Passes, settings: Settings, cut: float
) -> dict[str, Any]:
    """The period-effect R2 of ``todo`` columns from the rows read again (a fixed subset of
    units when there are more than ``absorbed_max_rows`` rows)."""
    max_rows = int(settings.get("profile", "absorbed_max_rows"))
    n_keyed = panel.rows - panel.missing_keys
    basis: dict[str, Any] = {"rows": n_keyed, "units": panel.n_units, "all_units": True}
    lf = panel.lazy
    if n_keyed > max_rows:
        k = int(np.ceil(n_keyed / max_rows))
        lf = lf.filter((pl.col(UNIT_ID) % k) == 0)
        basis = {"all_units": False, "every_kth_unit": k}
    schema = panel.schema
    shift = {r["name"]: passes.stats[r["name"]].shift for r in todo}
    sub = panel.collect(
        lf.select(
            pl.col(UNIT_ID),
            pl.col(PERIOD_ID),
            *[(_clean(r["name"], schema[r["name"]]) - shift[r["name"]]).alias(f"x{i}") for i, r in enumerate(todo)],
        )
    )
    if not basis["all_units"]:
        basis["rows"] = sub.height
        basis["units"] = int(sub[UNIT_ID].n_unique())
    u = sub[UNIT_ID].to_numpy().astype(np.int64)
    t = sub[PERIOD_ID].to_numpy().astype(np.int64)
    n_units = int(u.max()) + 1 if u.size else 0
    n_periods = panel.n_periods
    cache: dict[bytes, Any] = {}
    for i, r in enumerate(todo):
        x = sub[f"x{i}"].to_numpy()
        mask = np.isfinite(x)
        key = b"all" if mask.all() else np.packbits(mask).tobytes()
        if key not in cache:
            cache[key] = _period_system(u[mask], t[mask], n_units, n_periods)
        uu, tt = (u, t) if key == b"all" else (u[mask], t[mask])
        xm = x[mask] if key != b"all" else x
        means = passes.unit_means.get(r["name"]) if basis["all_units"] else None
        r2 = time_r2(uu, tt, xm, n_units, n_periods, cache[key], means)
        r["time_r2"] = r2
        r["absorbed_by_time"] = bool(r2 is not None and r2 >= cut)
    return basis


def _period_system(
    u: np.ndarray, t: np.ndarray, n_units: int, n_periods: int
) -> tuple[np.ndarray, np.ndarray] | SparsePeriods:
    """D' M_U D, period dummies D after unit demeaning, ready for :func:`_explained`."""
    return _solver(period_matrix(u, t, n_units, n_periods))


def time_r2(
    u: np.ndarray,
    t: np.ndarray,
    x: np.ndarray,
    n_units: int,
    n_periods: int,
    system: tuple[np.ndarray, np.ndarray] | SparsePeriods,
    means: np.ndarray | None = None,
) -> float | None:
    """Share of the within variation of ``x`` explained by period effects (None when WSS = 0).

    ``means`` are the unit means of ``x`` by unit code when already known.
    """
    if means is None:
        t_i = np.bincount(u, minlength=n_units).astype(np.float64)
        sums = np.bincount(u, weights=x, minlength=n_units)
        means = np.divide(sums, t_i, out=np.zeros(sums.shape), where=t_i > 0)
    xt = x - means[u]
    return _explained(np.bincount(t, weights=xt, minlength=n_periods), float(xt @ xt), system)


def _explained(
    rhs: np.ndarray, wss: float, system: tuple[np.ndarray, np.ndarray] | SparsePeriods
) -> float | None:
    """R2 of period effects from the per-period sums of within deviations ``rhs`` and WSS
    (None when WSS is 0, or when a sparse system was not solved)."""
    return _explained_shares(rhs[:, None], [wss], system)[0]


def _explained_shares(
    rhs: np.ndarray, wss: Sequence[float], system: tuple[np.ndarray, np.ndarray] | SparsePeriods
) -> list[float | None]:
    """:func:`_explained` for each column of ``rhs`` (periods x columns)."""
    if isinstance(system, SparsePeriods):
        explained = system.explained(rhs)
    else:
        vals, vecs = system
        keep = vals > max(vals.max(), 0.0) * 1e-12 * vals.size
        basis, kept = vecs[:, keep].T, vals[keep]
        explained = np.array([float(((basis @ rhs[:, j]) ** 2 / kept).sum()) for j in range(rhs.shape[1])])
    out: list[float | None] = []
    for e, w in zip(explained, wss, strict=True):
        ok = w > 0 and np.isfinite(e)
        out.append(float(min(max(float(e) / w, 0.0), 1.0)) if ok else None)
    return out


def variation_findings(panel: Panel, v: Variation, settings: Settings) -> list[Finding]:
    """Findings about columns: constant, nearly invariant, absorbed, near-constant, missing, ..."""
    out: list[Finding] = []
    near = float(settings.get("profile", "near_constant_share"))
    few = int(settings.get("profile", "few_switchers"))
    high = float(settings.get("profile", "high_missing_share"))
    rare = float(settings.get("profile", "nearly_invariant_units_share"))
    for r in v.columns.iter_rows(named=True):
        c, kind = r["name"], r["kind"]
        if r["distinct"] == 0:
            out.append(make("column-all-missing", settings, f"'{c}' has no value in any row; it cannot enter any model.", column=c, count=0))
            continue
        switchers = bool(r["binary"]) and 0 < r["units_changing"] < few
        if kind == "constant":
            out.append(make("constant-column", settings, f"'{c}' takes one value everywhere; no model can estimate its effect.", column=c, count=1))
        elif kind == "nearly-time-invariant" and not switchers:  # a 0/1 column's few switchers: one finding below
            changing, twice = r["units_changing"], r["units_observed_twice"]
            share = f" (within share {r['within_share']:.4f})" if r["within_share"] is not None else ""
            if changing <= rare * twice:
                why = (f"'{c}' changes within {changing} of {twice} units seen twice or more{share}; such rare "
                       "changes are often coding errors, and a within estimate of it rests on those units alone.")
            else:
                why = (f"'{c}' changes within {changing} of {twice} units seen twice or more, but only a little: "
                       f"{100 * (r['within_share'] or 0):.2f}% of its variation lies within units, so a within "
                       "estimate of it rests on that small variation and is imprecise.")
            out.append(
                make(
                    "nearly-time-invariant",
                    settings,
                    why,
                    column=c,
                    count=changing,
                    examples=v.changing_examples.get(c, ()),
                )
            )
        elif kind == "period-only":
            out.append(make("period-only", settings, f"'{c}' is the same for every unit within each period; period effects absorb it completely.", column=c, count=r["distinct"]))
        if kind != "period-only" and r["absorbed_by_time"]:
            out.append(
                make(
                    "absorbed-by-time",
                    settings,
                    f"period effects explain {100 * r['time_r2']:.2f}% of the within variation of '{c}'; with unit and period effects in the model its coefficient is not identified.",
                    column=c,
                    count=r["units_changing"],
                )
            )
        if kind != "constant" and r["dominant_share"] is not None and r["dominant_share"] >= near:
            out.append(make("near-constant", settings, f"one value of '{c}' holds {100 * r['dominant_share']:.2f}% of its rows; its effect rests on very few observations.", column=c, count=r["distinct"]))
        if switchers:
            also = " (so it is also nearly time-invariant)" if kind == "nearly-time-invariant" else ""
            out.append(
                make(
                    "few-switchers",
                    settings,
                    f"only {r['units_changing']} {'unit switches' if r['units_changing'] == 1 else 'units switch'} '{c}' between 0 and 1{also}; "
                    "a within estimate of its effect is identified from those units alone.",
                    column=c,
                    count=r["units_changing"],
                    examples=v.changing_examples.get(c, ()),
                )
            )
        if r["periods_all_missing"]:
            ps = r["periods_all_missing"]
            out.append(
                make(
                    "missing-in-period",
                    settings,
                    f"'{c}' is missing for every unit in {len(ps)} period(s) ({', '.join(map(str, ps[:5]))}); the question may not have been asked in that wave.",
                    column=c,
                    count=len(ps),
                    examples=[{"period": p} for p in ps[:5]],
                )
            )
        if r["missing_share"] is not None and r["missing_share"] > high:
            out.append(make("high-missing", settings, f"{100 * r['missing_share']:.1f}% of '{c}' is missing; a model using it drops those rows.", column=c, count=round(r["missing_share"] * (panel.rows - panel.missing_keys))))
        if r["non_finite"]:
            out.append(make("non-finite", settings, f"'{c}' holds {r['non_finite']} infinite values; they are left out of every statistic here but would break an estimator.", column=c, count=r["non_finite"]))
    return out
