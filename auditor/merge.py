"""Mergeable sufficient statistics: compute per shard, combine exactly, derive the figures.

A panel that arrives in pieces (one file per wave, one shard per worker) is summarised
piece by piece. Each piece gives, per unit and per period and for every numeric column,
the row count, the count of usable values, the missing and non-finite counts, the mean,
the centred sum of squares M2 = sum (x - mean)^2, the minimum and the maximum; plus,
per column, the count of every distinct value (an exact, mergeable sketch that gives
``distinct`` and ``dominant_share``).

Pieces are combined with the update of Chan, Golub and LeVeque (1979, "Updating formulae
and a pairwise algorithm for computing sample variances"): for parts j of one group with
counts n_j, means m_j and centred sums M2_j,

    n = sum n_j,   m = sum n_j m_j / n,   M2 = sum M2_j + sum n_j (m_j - m)^2,

which for two parts is their pairwise formula and for k parts its exact generalisation
(the same value as folding the pairwise formula k - 1 times). Centred sums never square a
raw value, so a column like 1e9 + noise keeps its digits. A unit that appears in several
shards is combined exactly; the column figures computed from the merged table equal those
of the whole panel up to rounding.

Conventions follow methods.md sections 2 and 3: NaN and null are missing, infinite values
are counted and left out of every sum, rows with a missing key are left out.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import polars as pl

# Per (group, column) statistics kept in a GroupStats table, in this order.
STATS: tuple[str, ...] = ("n", "missing", "nonfinite", "mean", "m2", "min", "max")
ROWS = "__pa_rows"


def _field(j: int, stat: str) -> str:
    # Columns of the stats table are named by position, never by the user's column
    # name, so no user name can collide with a key or with another statistic.
    return f"__pa_c{j}_{stat}"


@dataclass(frozen=True)
class GroupStats:
    """Sufficient statistics of ``columns`` for each group of ``by`` (units or periods).

    ``table`` has one row per group: the key columns, ``__pa_rows`` (rows with both
    keys present), then for column j the fields ``__pa_c{j}_n`` (usable values),
    ``_missing`` (null or NaN), ``_nonfinite`` (+-inf), ``_mean`` (the group mean minus
    ``shifts[j]``), ``_m2`` (centred sum of squares), ``_min`` and ``_max`` (all Float64
    except the counts, UInt64). Means are kept relative to a per-column shift, a value
    of the column itself, so that a column like 1e9 + small noise keeps the digits of
    its unit means (methods.md section 2).
    """

    by: tuple[str, ...]
    columns: tuple[str, ...]
    integral: tuple[bool, ...]
    shifts: tuple[float, ...]
    table: pl.DataFrame

    def column_index(self, name: str) -> int:
        """The position j of column ``name`` (its fields are ``__pa_c{j}_*``)."""
        return self.columns.index(name)


@dataclass(frozen=True)
class ShardSummary:
    """Everything a shard contributes: per-unit and per-period statistics and value counts.

    ``values`` maps each column to a two-column DataFrame (``value``, ``count``) of its
    usable values (finite, not null).
    """

    unit: tuple[str, ...]
    time: str
    units: GroupStats
    periods: GroupStats
    values: Mapping[str, pl.DataFrame]


def _is_integral(dtype: pl.DataType) -> bool:
    return dtype.is_integer() or dtype == pl.Boolean


def _numeric_schema(schema: Mapping[str, pl.DataType], columns: Sequence[str]) -> list[bool]:
    out = []
    for c in columns:
        dt = schema.get(c)
        if dt is None:
            out.append(False)  # absent from this shard: all missing, float by convention
        elif dt.is_numeric() or dt == pl.Boolean:
            out.append(_is_integral(dt))
        else:
            raise TypeError(f"column {c!r} is {dt}, not numeric")
    return out


def _shifts(lf: pl.LazyFrame, columns: Sequence[str], present: Sequence[bool]) -> list[float]:
    # Any value of the column near its bulk will do as a shift; the first usable value
    # among the first rows is read cheaply (slice pushdown), the whole column only when
    # those rows hold none.
    names = [c for c, here in zip(columns, present, strict=True) if here]
    found: dict[str, float] = {}
    if names:
        head = lf.head(4096).select(_usable(c, True).drop_nulls().first().alias(c) for c in names)
        row = head.collect().row(0, named=True)
        found = {c: v for c, v in row.items() if v is not None}
        rest = [c for c in names if c not in found]
        if rest:
            row = lf.select(_usable(c, True).drop_nulls().first().alias(c) for c in rest).collect()
            found.update({c: v for c, v in row.row(0, named=True).items() if v is not None})
    return [float(found.get(c, 0.0)) for c in columns]


def _usable(name: str, present: bool) -> pl.Expr:
    if not present:
        return pl.lit(None, dtype=pl.Float64)
    x = pl.col(name).cast(pl.Float64)
    return pl.when(x.is_finite()).then(x)


def group_stats(
    frame: pl.DataFrame | pl.LazyFrame,
    by: Sequence[str],
    columns: Sequence[str],
    *,
    keys: Sequence[str] | None = None,
    integral: Sequence[bool] | None = None,
    shifts: Sequence[float] | None = None,
    engine: str = "auto",
) -> GroupStats:
    """Per-group sufficient statistics of numeric ``columns``, in one grouped pass.

    ``keys`` are the columns whose missing values exclude a row (default ``by``); a
    column of ``columns`` absent from ``frame`` counts as missing in every row (wave
    files whose schemas differ). ``integral`` (default: from the frame's types) says
    which columns change by any difference rather than by the float tolerance;
    ``shifts`` (default: a value of each column read from the first rows) are the
    values the stored means are relative to; ``engine`` is the polars engine of the
    grouped pass ("streaming" keeps memory bounded on large scans). Returns a :class:`GroupStats`; counts are rows, means in the column's units, M2 in
    squared units.
    """
    lf = frame.lazy()
    schema = lf.collect_schema()
    by = list(by)
    keys = list(keys) if keys is not None else by
    flags = list(integral) if integral is not None else _numeric_schema(schema, columns)
    present = [c in schema for c in columns]
    shift = list(shifts) if shifts is not None else _shifts(lf, columns, present)
    lf = lf.filter(pl.all_horizontal([pl.col(k).is_not_null() for k in keys]))
    aggs: list[pl.Expr] = [pl.len().cast(pl.UInt64).alias(ROWS)]
    for j, (c, here) in enumerate(zip(columns, present, strict=True)):
        u = _usable(c, here) - shift[j]
        if here:
            raw = pl.col(c)
            isfloat = schema[c].is_float()
            missing = (raw.is_null() | raw.is_nan()) if isfloat else raw.is_null()
            nonfinite = raw.is_infinite() if isfloat else pl.lit(False)
            missing_n = missing.sum().cast(pl.UInt64)
            nonfinite_n = nonfinite.sum().cast(pl.UInt64)
        else:
            missing_n = pl.len().cast(pl.UInt64)
            nonfinite_n = pl.lit(0, dtype=pl.UInt64)
        aggs += [
            u.count().cast(pl.UInt64).alias(_field(j, "n")),
            missing_n.alias(_field(j, "missing")),
            nonfinite_n.alias(_field(j, "nonfinite")),
            u.mean().alias(_field(j, "mean")),
            # two-pass within the group: centre on the group's own mean before squaring
            ((u - u.mean()) ** 2).sum().alias(_field(j, "m2")),
            _usable(c, here).min().alias(_field(j, "min")),
            _usable(c, here).max().alias(_field(j, "max")),
        ]
    table = lf.group_by(by).agg(aggs).collect(engine=engine)
    table = _null_empty_m2(table, len(columns))
    return GroupStats(tuple(by), tuple(columns), tuple(flags), tuple(shift), table)


def _null_empty_m2(table: pl.DataFrame, k: int) -> pl.DataFrame:
    # A group with no usable value has no mean and no M2 (polars' sum gives 0).
    return table.with_columns(
        pl.when(pl.col(_field(j, "n")) > 0).then(pl.col(_field(j, "m2"))).alias(_field(j, "m2"))
        for j in range(k)
    )


def _align(part: GroupStats, columns: Sequence[str], shifts: Sequence[float]) -> pl.DataFrame:
    # Re-index a part's fields to the merged column order and re-base its means on the
    # merged shifts (the difference of two values of the column is exact or carries an
    # error on the scale of the column's spread, never of its magnitude); a column the
    # part lacks is all missing there (its rows count as missing, nothing else).
    t = part.table
    exprs: list[pl.Expr] = [pl.col(b) for b in part.by] + [pl.col(ROWS)]
    for j, c in enumerate(columns):
        if c in part.columns:
            i = part.columns.index(c)
            rebase = part.shifts[i] - shifts[j]
            exprs += [
                (pl.col(_field(i, s)) + rebase if s == "mean" else pl.col(_field(i, s))).alias(
                    _field(j, s)
                )
                for s in STATS
            ]
        else:
            exprs += [
                pl.lit(0, dtype=pl.UInt64).alias(_field(j, "n")),
                pl.col(ROWS).alias(_field(j, "missing")),
                pl.lit(0, dtype=pl.UInt64).alias(_field(j, "nonfinite")),
            ] + [
                pl.lit(None, dtype=pl.Float64).alias(_field(j, s))
                for s in ("mean", "m2", "min", "max")
            ]
    return t.select(exprs)


def merge_group_stats(parts: Iterable[GroupStats]) -> GroupStats:
    """Combine the statistics of several shards exactly (Chan et al. update, k-way form).

    Groups present in several parts are combined; columns missing from a part count as
    missing in that part's rows. Returns a :class:`GroupStats` over the union of columns
    (in order of first appearance) and the union of groups.
    """
    parts = list(parts)
    if not parts:
        raise ValueError("nothing to merge")
    by = parts[0].by
    if any(p.by != by for p in parts):
        raise ValueError("parts are grouped by different keys")
    columns: list[str] = []
    integral: dict[str, bool] = {}
    shift: dict[str, float] = {}
    for p in parts:
        for c, f, s in zip(p.columns, p.integral, p.shifts, strict=True):
            if c not in integral:
                columns.append(c)
                integral[c] = f
                shift[c] = s
            else:
                integral[c] = integral[c] and f
    shifts = [shift[c] for c in columns]
    stacked = pl.concat([_align(p, columns, shifts) for p in parts], how="vertical_relaxed")
    aggs: list[pl.Expr] = [pl.col(ROWS).sum().alias(ROWS)]
    for j in range(len(columns)):
        n, m = pl.col(_field(j, "n")), pl.col(_field(j, "mean"))
        total = n.sum()
        merged_mean = (n.cast(pl.Float64) * m).sum() / total
        aggs += [
            total.alias(_field(j, "n")),
            pl.col(_field(j, "missing")).sum().alias(_field(j, "missing")),
            pl.col(_field(j, "nonfinite")).sum().alias(_field(j, "nonfinite")),
            pl.when(total > 0).then(merged_mean).alias(_field(j, "mean")),
            pl.when(total > 0)
            .then(
                pl.col(_field(j, "m2")).sum() + (n.cast(pl.Float64) * (m - merged_mean) ** 2).sum()
            )
            .alias(_field(j, "m2")),
            pl.col(_field(j, "min")).min().alias(_field(j, "min")),
            pl.col(_field(j, "max")).max().alias(_field(j, "max")),
        ]
    table = stacked.group_by(list(by)).agg(aggs)
    return GroupStats(by, tuple(columns), tuple(integral[c] for c in columns), tuple(shifts), table)


def value_counts(
    frame: pl.DataFrame | pl.LazyFrame, columns: Sequence[str], *, keys: Sequence[str] = ()
) -> dict[str, pl.DataFrame]:
    """Count of every usable value of each column (rows with a missing key left out).

    Returns ``{column: DataFrame(value Float64, count UInt64)}``; absent columns give an
    empty table. Exact and mergeable by summing counts per value.
    """
    lf = frame.lazy()
    schema = lf.collect_schema()
    if keys:
        lf = lf.filter(pl.all_horizontal([pl.col(k).is_not_null() for k in keys]))
    out: dict[str, pl.DataFrame] = {}
    plans = []
    names = []
    for c in columns:
        if c not in schema:
            out[c] = pl.DataFrame(schema={"value": pl.Float64, "count": pl.UInt64})
            continue
        u = _usable(c, True).alias("value")
        plans.append(
            lf.select(u).drop_nulls().group_by("value").agg(pl.len().cast(pl.UInt64).alias("count"))
        )
        names.append(c)
    for c, df in zip(names, pl.collect_all(plans), strict=True):
        out[c] = df
    return out


def merge_value_counts(parts: Iterable[Mapping[str, pl.DataFrame]]) -> dict[str, pl.DataFrame]:
    """Sum value counts of several shards per column and value."""
    pieces: dict[str, list[pl.DataFrame]] = {}
    for p in parts:
        for c, df in p.items():
            pieces.setdefault(c, []).append(df)
    return {
        c: pl.concat(dfs).group_by("value").agg(pl.col("count").sum()) for c, dfs in pieces.items()
    }


def summarise_shard(
    frame: pl.DataFrame | pl.LazyFrame,
    *,
    unit: str | Sequence[str],
    time: str,
    columns: Sequence[str],
) -> ShardSummary:
    """The mergeable summary of one shard: per-unit and per-period stats and value counts.

    ``columns`` are numeric columns; rows with a missing unit or time key are left out.
    """
    unit_cols = [unit] if isinstance(unit, str) else list(unit)
    keys = [*unit_cols, time]
    lf = frame.lazy()
    units = group_stats(lf, unit_cols, columns, keys=keys)
    periods = group_stats(
        lf, [time], columns, keys=keys, integral=units.integral, shifts=units.shifts
    )
    values = value_counts(lf, columns, keys=keys)
    return ShardSummary(tuple(unit_cols), time, units, periods, values)


def merge_summaries(parts: Iterable[ShardSummary]) -> ShardSummary:
    """Combine shard summaries exactly (units and periods may repeat across shards)."""
    parts = list(parts)
    if not parts:
        raise ValueError("nothing to merge")
    return ShardSummary(
        parts[0].unit,
        parts[0].time,
        merge_group_stats(p.units for p in parts),
        merge_group_stats(p.periods for p in parts),
        merge_value_counts(p.values for p in parts),
    )


FIGURES_SCHEMA: dict[str, Any] = {
    "name": pl.String,
    "observations": pl.UInt64,
    "units": pl.UInt64,
    "missing_share": pl.Float64,
    "non_finite": pl.UInt64,
    "distinct": pl.UInt64,
    "dominant_share": pl.Float64,
    "units_changing": pl.UInt64,
    "units_observed_twice": pl.UInt64,
    "mean": pl.Float64,
    "overall_sd": pl.Float64,
    "between_sd": pl.Float64,
    "within_sd": pl.Float64,
    "within_share": pl.Float64,
    "total_ss": pl.Float64,
    "within_ss": pl.Float64,
    "between_ss": pl.Float64,
    "periods_varying": pl.UInt64,
}


def _changes(stats: GroupStats, j: int, tolerance: float) -> pl.Expr:
    lo, hi, m = (pl.col(_field(j, s)) for s in ("min", "max", "mean"))
    if stats.integral[j]:
        return hi > lo
    return (hi - lo) > tolerance * (1.0 + (m + stats.shifts[j]).abs())


def column_figures(summary: ShardSummary | GroupStats, *, tolerance: float = 1e-9) -> pl.DataFrame:
    """The column-level figures of the profile from (merged) per-unit statistics.

    One row per column: ``observations`` N (usable values), ``units`` n (units with one
    or more), ``missing_share`` (null or NaN over rows with both keys), ``non_finite``,
    ``mean``, ``overall_sd`` sqrt(TSS/(N-1)), ``between_sd`` (sd of unit means, n-1),
    ``within_sd`` sqrt(WSS/(N-n)) (null when N = n), ``within_share`` WSS/TSS (null when
    TSS = 0), ``units_changing`` ((max - min) > tolerance * (1 + |unit mean|) for float
    columns, max > min otherwise), ``units_observed_twice`` (n_i >= 2) and the sums of
    squares (squared units). With a ShardSummary also ``distinct``, ``dominant_share``
    and ``periods_varying`` (periods whose units do not all share one value); these are
    null for a bare GroupStats. Figures follow methods.md section 2.
    """
    if isinstance(summary, ShardSummary):
        stats, periods, values = summary.units, summary.periods, summary.values
    else:
        stats, periods, values = summary, None, None
    t = stats.table
    rows = []
    exprs: list[pl.Expr] = []
    for j, _c in enumerate(stats.columns):
        n, m, m2 = (pl.col(_field(j, s)) for s in ("n", "mean", "m2"))
        nf = n.cast(pl.Float64)
        big_n = n.sum()
        grand = (nf * m).sum() / big_n
        wss = m2.sum()
        bss = (nf * (m - grand) ** 2).sum()
        exprs += [
            big_n.alias(f"{j}_N"),
            (n > 0).sum().cast(pl.UInt64).alias(f"{j}_units"),
            pl.col(_field(j, "missing")).sum().alias(f"{j}_missing"),
            pl.col(_field(j, "nonfinite")).sum().alias(f"{j}_nonfinite"),
            (grand + stats.shifts[j]).alias(f"{j}_mean"),
            wss.alias(f"{j}_wss"),
            bss.alias(f"{j}_bss"),
            m.std(ddof=1).alias(f"{j}_between_sd"),
            _changes(stats, j, tolerance).sum().cast(pl.UInt64).alias(f"{j}_changing"),
            (n >= 2).sum().cast(pl.UInt64).alias(f"{j}_twice"),
        ]
    agg = t.select([pl.col(ROWS).sum().alias("rows"), *exprs]).row(0, named=True)
    pvary: dict[int, int] = {}
    if periods is not None:
        pv = periods.table.select(
            _changes(periods, j, tolerance).sum().cast(pl.UInt64).alias(str(j))
            for j in range(len(periods.columns))
        ).row(0, named=True)
        pvary = {stats.columns.index(c): pv[str(i)] for i, c in enumerate(periods.columns)}
    for j, c in enumerate(stats.columns):
        big_n = int(agg[f"{j}_N"] or 0)
        units = int(agg[f"{j}_units"] or 0)
        wss = agg[f"{j}_wss"] if big_n else None
        bss = agg[f"{j}_bss"] if big_n else None
        tss = (wss + bss) if big_n else None
        distinct = dominant = None
        if values is not None:
            vc = values[c]
            distinct = vc.height
            dominant = (int(vc["count"].max()) / big_n) if big_n else None
        total_rows = int(agg["rows"])
        rows.append(
            {
                "name": c,
                "observations": big_n,
                "units": units,
                "missing_share": (int(agg[f"{j}_missing"]) / total_rows) if total_rows else None,
                "non_finite": int(agg[f"{j}_nonfinite"]),
                "distinct": distinct,
                "dominant_share": dominant,
                "units_changing": int(agg[f"{j}_changing"]),
                "units_observed_twice": int(agg[f"{j}_twice"]),
                "mean": agg[f"{j}_mean"] if big_n else None,
                "overall_sd": (tss / (big_n - 1)) ** 0.5 if big_n > 1 else None,
                "between_sd": agg[f"{j}_between_sd"] if units > 1 else None,
                "within_sd": (wss / (big_n - units)) ** 0.5 if big_n > units else None,
                "within_share": (wss / tss) if tss else None,
                "total_ss": tss,
                "within_ss": wss,
                "between_ss": bss,
                "periods_varying": pvary.get(j),
            }
        )
    return pl.DataFrame(rows, schema=FIGURES_SCHEMA)


# --- column-level moments: merging disjoint groups of units --------------------------------

MOMENTS: tuple[str, ...] = (
    "rows",
    "n",
    "missing",
    "nonfinite",
    "units",
    "twice",
    "changing",
    "mean",
    "tss",
    "wss",
    "umean",
    "um2",
)


@dataclass(frozen=True)
class ColumnMoments:
    """Column-level sufficient statistics of a set of whole units (no unit split across sets).

    ``table`` has one row per column: ``rows`` (keyed rows), ``n`` (usable values),
    ``missing``, ``nonfinite``, ``units`` (units with a value), ``twice`` (units with two
    or more), ``changing`` (units that change), ``mean`` (minus ``shift``), ``tss`` (sum
    of squares about that mean), ``wss`` (within sum of squares), ``umean`` and ``um2``
    (mean, minus ``shift``, and centred sum of squares of the unit means). Two sets of
    distinct units merge exactly by the Chan et al. update applied to (n, mean, tss) and
    to (units, umean, um2).
    """

    columns: tuple[str, ...]
    shifts: tuple[float, ...]
    table: pl.DataFrame


def column_moments(stats: GroupStats, *, tolerance: float = 1e-9) -> ColumnMoments:
    """Reduce per-unit statistics of whole units to column-level moments (one row per column)."""
    t = stats.table
    exprs: list[pl.Expr] = []
    for j, _c in enumerate(stats.columns):
        n, m, m2 = (pl.col(_field(j, s)) for s in ("n", "mean", "m2"))
        nf = n.cast(pl.Float64)
        big_n = n.sum()
        grand = (nf * m).sum() / big_n
        exprs.append(
            pl.struct(
                pl.col(ROWS).sum().alias("rows"),
                big_n.alias("n"),
                pl.col(_field(j, "missing")).sum().alias("missing"),
                pl.col(_field(j, "nonfinite")).sum().alias("nonfinite"),
                (n > 0).sum().cast(pl.UInt64).alias("units"),
                (n >= 2).sum().cast(pl.UInt64).alias("twice"),
                _changes(stats, j, tolerance).sum().cast(pl.UInt64).alias("changing"),
                grand.alias("mean"),
                (m2.sum() + (nf * (m - grand) ** 2).sum()).alias("tss"),
                m2.sum().alias("wss"),
                m.mean().alias("umean"),
                ((m - m.mean()) ** 2).sum().alias("um2"),
            ).alias(str(j))
        )
    row = t.select(exprs).row(0, named=True)
    records = []
    for j, c in enumerate(stats.columns):
        rec = dict(row[str(j)])
        if not rec["n"]:
            rec.update(mean=None, tss=None, wss=None, umean=None, um2=None)
        records.append({"name": c, **rec})
    return ColumnMoments(stats.columns, stats.shifts, pl.DataFrame(records, schema=_MOMENT_SCHEMA))


_MOMENT_SCHEMA: dict[str, Any] = {
    "name": pl.String,
    **{k: pl.UInt64 for k in ("rows", "n", "missing", "nonfinite", "units", "twice", "changing")},
    **{k: pl.Float64 for k in ("mean", "tss", "wss", "umean", "um2")},
}


def _chan(
    parts: list[tuple[float, float | None, float | None]],
) -> tuple[float, float | None, float | None]:
    # (count, mean, centred sum of squares) of several parts -> of their union.
    total = sum(k for k, _, _ in parts)
    live = [(k, m, q) for k, m, q in parts if k and m is not None]
    if not total or not live:
        return total, None, None
    mean = sum(k * m for k, m, _ in live) / total
    m2 = sum(q for _, _, q in live) + sum(k * (m - mean) ** 2 for k, m, _ in live)
    return total, mean, m2


def merge_column_moments(parts: Iterable[ColumnMoments]) -> ColumnMoments:
    """Combine the moments of disjoint sets of units exactly (Chan et al. update).

    Every part must hold the same columns; means are re-based on the first part's shifts.
    """
    parts = list(parts)
    if not parts:
        raise ValueError("nothing to merge")
    columns, shifts = parts[0].columns, parts[0].shifts
    if any(p.columns != columns for p in parts):
        raise ValueError("parts hold different columns")
    records = []
    for j, c in enumerate(columns):
        recs = []
        for p in parts:
            r = p.table.row(j, named=True)
            rebase = p.shifts[j] - shifts[j]
            if r["mean"] is not None:
                r["mean"] += rebase
                r["umean"] += rebase
            recs.append(r)
        n, mean, tss = _chan([(r["n"], r["mean"], r["tss"]) for r in recs])
        units, umean, um2 = _chan([(r["units"], r["umean"], r["um2"]) for r in recs])
        live = [r["wss"] for r in recs if r["wss"] is not None]
        rec = {
            k: sum(r[k] for r in recs)
            for k in ("rows", "missing", "nonfinite", "twice", "changing")
        }
        rec.update(n=n, units=units, mean=mean, tss=tss, wss=sum(live) if live else None)
        rec.update(umean=umean, um2=um2)
        records.append({"name": c, **rec})
    return ColumnMoments(columns, shifts, pl.DataFrame(records, schema=_MOMENT_SCHEMA))


def figures_from_moments(moments: ColumnMoments) -> pl.DataFrame:
    """The column-level figures (as :func:`column_figures`) from merged column moments.

    ``distinct``, ``dominant_share`` and ``periods_varying`` need the whole column or
    the periods and are null here.
    """
    rows = []
    for j, r in enumerate(moments.table.iter_rows(named=True)):
        big_n, units, tss, wss = r["n"], r["units"], r["tss"], r["wss"]
        rows.append(
            {
                "name": r["name"],
                "observations": big_n,
                "units": units,
                "missing_share": r["missing"] / r["rows"] if r["rows"] else None,
                "non_finite": r["nonfinite"],
                "distinct": None,
                "dominant_share": None,
                "units_changing": r["changing"],
                "units_observed_twice": r["twice"],
                "mean": r["mean"] + moments.shifts[j] if big_n else None,
                "overall_sd": (tss / (big_n - 1)) ** 0.5 if big_n > 1 else None,
                "between_sd": (r["um2"] / (units - 1)) ** 0.5 if units > 1 else None,
                "within_sd": (wss / (big_n - units)) ** 0.5 if big_n > units else None,
                "within_share": (wss / tss) if tss else None,
                "total_ss": tss,
                "within_ss": wss,
                "between_ss": (tss - wss) if big_n else None,
                "periods_varying": None,
            }
        )
    return pl.DataFrame(rows, schema=FIGURES_SCHEMA)


def partitioned_figures(
    source: pl.DataFrame | pl.LazyFrame,
    *,
    unit: str | Sequence[str],
    time: str,
    columns: Sequence[str],
    parts: int,
    tolerance: float = 1e-9,
    engine: str = "streaming",
) -> pl.DataFrame:
    """Column figures in ``parts`` passes, each over the units of one hash partition.

    Each pass holds the per-unit statistics of about 1/parts of the units, so memory is
    bounded by the largest partition, at the cost of reading the input ``parts`` times;
    the partitions' column moments are merged exactly. Returns :func:`figures_from_moments`.
    """
    unit_cols = [unit] if isinstance(unit, str) else list(unit)
    keys = [*unit_cols, time]
    lf = source.lazy()
    schema = lf.collect_schema()
    present = [c in schema for c in columns]
    shifts = _shifts(lf, columns, present)
    integral = _numeric_schema(schema, columns)
    key = pl.struct(unit_cols) if len(unit_cols) > 1 else pl.col(unit_cols[0])
    bucket = key.hash(seed=7) % parts
    moments = []
    for k in range(parts):
        stats = group_stats(
            lf.filter(bucket == k),
            unit_cols,
            columns,
            keys=keys,
            integral=integral,
            shifts=shifts,
            engine=engine,
        )
        moments.append(column_moments(stats, tolerance=tolerance))
    return figures_from_moments(merge_column_moments(moments))
