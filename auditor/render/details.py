"""Every offending row or unit behind a finding, as tables (``--details DIR``).

One table per finding code that has rows behind it: the key columns first, then the
period and the values involved. ``profile_tables`` reads the loaded panel,
``compare_tables`` and ``check_tables`` the tables those commands kept while they ran.
``write_details`` writes them as CSV files named after the code, through the run's
OutputSet (never over an input, all or nothing). Nothing here is a sample: a table
holds every row its finding counts.

Example lines in words (``OR-0086: 10 in 2017-2021, 20 in 2022``) come from
:func:`value_runs`.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import polars as pl

from auditor.io.load import PERIOD_ID, UNIT_ID

if TYPE_CHECKING:  # pragma: no cover
    from auditor.commands.profile import ProfileResult
    from auditor.io.load import Panel
    from auditor.io.outputs import OutputSet

ROW = "__pa_row"


# --------------------------------------------------------------------------- helpers


def as_text(expr: pl.Expr, dtype: pl.DataType) -> pl.Expr:
    """A column's values as text for a details file: whole floats without ``.0``."""
    if dtype.is_float():
        whole = expr.is_finite() & (expr == expr.round(0)) & (expr.abs() < 1e15)
        return pl.when(whole).then(expr.cast(pl.Int64, strict=False).cast(pl.String)).otherwise(expr.cast(pl.String))
    return expr.cast(pl.String)


def _labels(panel: Panel, index: pl.Expr) -> pl.Expr:
    """Period labels (as text) for grid indices."""
    grid = [str(v) for v in panel.grid]
    return index.cast(pl.Int64).replace_strict(list(range(len(grid))), grid, return_dtype=pl.String)


def _period_label(panel: Panel) -> pl.Expr:
    """The period label of each row, named like the time key."""
    return _labels(panel, pl.col(PERIOD_ID)).alias(panel.time)


def _keys(panel: Panel) -> list[str]:
    return list(panel.unit)


def _mode_frame(frame: pl.DataFrame, c: str) -> pl.DataFrame:
    """Each unit's most common non-missing value of ``c`` (ties: the smallest) as ``__pa_usual``."""
    return (
        frame.filter(pl.col(c).is_not_null())
        .group_by([UNIT_ID, c]).len()
        .sort([UNIT_ID, "len", c], descending=[False, True, False])
        .group_by(UNIT_ID, maintain_order=True)
        .agg(pl.col(c).first().alias("__pa_usual"))
    )


def _differs(c: str, dtype: pl.DataType, tol: float) -> pl.Expr:
    a, b = pl.col(c), pl.col("__pa_usual")
    if dtype.is_float():
        return (a - b).abs() > tol * (1 + b.abs())
    return a != b


def changed_rows(panel: Panel, columns: Sequence[str], tol: float) -> pl.DataFrame:
    """For each of ``columns``, every row of a changing unit whose value differs from the unit's
    usual (most common) value: keys, period, column, the usual value and the row's value."""
    frame = panel.frame
    parts = []
    for c in columns:  # loop over the few columns with a finding
        dt = panel.schema[c]
        usual = _mode_frame(frame.select(UNIT_ID, c), c)
        rows = (
            frame.select(UNIT_ID, PERIOD_ID, *_keys(panel), c)
            .join(usual, on=UNIT_ID, how="inner")
            .filter(pl.col(c).is_not_null() & _differs(c, dt, tol))
            .sort([UNIT_ID, PERIOD_ID])
        )
        parts.append(rows.select(
            *_keys(panel), _period_label(panel), pl.lit(c).alias("column"),
            as_text(pl.col("__pa_usual"), dt).alias("usual_value"), as_text(pl.col(c), dt).alias("value"),
        ))
    if not parts:
        return pl.DataFrame()
    return pl.concat(parts, how="vertical")


def value_runs(panel: Panel, column: str, unit_codes: Sequence[int]) -> dict[int, str]:
    """Per unit code, its values of ``column`` by period in words: runs of equal values with the
    first and last period of each run (``10 in 2017-2021, 20 in 2022``)."""
    dt = panel.schema[column]
    rows = (
        panel.lazy.filter(pl.col(UNIT_ID).is_in(list(unit_codes)) & pl.col(column).is_not_null())
        .select(UNIT_ID, PERIOD_ID, as_text(pl.col(column), dt).alias("__pa_v"))
        .sort([UNIT_ID, PERIOD_ID, "__pa_v"])  # duplicate keys: by value, whatever the row order
        .collect()
    )
    out: dict[int, list[str]] = {}
    last: dict[int, list[Any]] = {}
    for code, p, v in rows.iter_rows():  # only the few example units' rows
        run = last.get(code)
        if run is not None and run[0] == v:
            run[2] = p
            continue
        if run is not None:
            out.setdefault(code, []).append(_run_text(panel, run))
        last[code] = [v, p, p]
    for code, run in last.items():
        out.setdefault(code, []).append(_run_text(panel, run))
    return {code: ", ".join(parts) for code, parts in out.items()}


def _run_text(panel: Panel, run: list[Any]) -> str:
    v, a, b = run
    span = f"{panel.grid[a]}" if a == b else f"{panel.grid[a]}-{panel.grid[b]}"
    return f"{v} in {span}"


# --------------------------------------------------------------------------- profile


def _duplicates(panel: Panel) -> pl.DataFrame:
    frame = panel.frame
    n = pl.len().over([UNIT_ID, PERIOD_ID])
    dup = frame.filter(n > 1).sort([UNIT_ID, PERIOD_ID, ROW] if ROW in frame.columns else [UNIT_ID, PERIOD_ID])
    copy = (pl.int_range(pl.len()).over([UNIT_ID, PERIOD_ID]) + 1).alias("copy")
    others = [c for c in panel.columns]
    row = [(pl.col(ROW) + 1).alias("input_row")] if ROW in frame.columns else []
    return dup.select(*_keys(panel), _period_label(panel), copy, *row, *others)


def _gaps(panel: Panel) -> pl.DataFrame:
    present = panel.frame.select(UNIT_ID, PERIOD_ID).unique()
    span = present.group_by(UNIT_ID).agg(pl.col(PERIOD_ID).min().alias("__a"), pl.col(PERIOD_ID).max().alias("__b"),
                                        pl.len().alias("__n"))
    gappy = span.filter((pl.col("__b") - pl.col("__a") + 1) > pl.col("__n"))
    if not gappy.height:
        return pl.DataFrame()
    full = gappy.select(UNIT_ID, pl.int_ranges(pl.col("__a"), pl.col("__b") + 1).alias(PERIOD_ID)).explode(PERIOD_ID)
    full = full.with_columns(pl.col(PERIOD_ID).cast(present.schema[PERIOD_ID]))
    absent = full.join(present, on=[UNIT_ID, PERIOD_ID], how="anti").sort([UNIT_ID, PERIOD_ID])
    per_unit = absent.with_columns(_labels(panel, pl.col(PERIOD_ID)).alias("__lab")).group_by(
        UNIT_ID, maintain_order=True).agg(pl.col("__lab").str.join(", ").alias("absent_periods"),
                                          pl.len().alias("absent_count"))
    bounds = gappy.select(UNIT_ID, _labels(panel, pl.col("__a")).alias("first_period"),
                          _labels(panel, pl.col("__b")).alias("last_period"))
    keys = panel.units.select(UNIT_ID, *_keys(panel))
    return (per_unit.join(bounds, on=UNIT_ID).join(keys, on=UNIT_ID).sort(UNIT_ID)
            .select(*_keys(panel), "first_period", "last_period", "absent_count", "absent_periods"))


def _singletons(panel: Panel) -> pl.DataFrame:
    frame = panel.frame
    one = frame.filter(pl.len().over(UNIT_ID) == 1).sort(UNIT_ID)
    return one.select(*_keys(panel), _period_label(panel))


def _non_finite(panel: Panel, columns: Sequence[str]) -> pl.DataFrame:
    parts = []
    for c in columns:
        rows = panel.frame.filter(pl.col(c).is_infinite()).sort([UNIT_ID, PERIOD_ID])
        parts.append(rows.select(*_keys(panel), _period_label(panel), pl.lit(c).alias("column"),
                                 pl.col(c).cast(pl.String).alias("value")))
    return pl.concat(parts) if parts else pl.DataFrame()


def profile_tables(result: ProfileResult) -> dict[str, pl.DataFrame]:
    """Every offending row or unit of the profile's findings, one table per finding code."""
    panel = result.data
    tol = result.settings.profile.float_tolerance
    codes = {f.check for f in result.findings}
    by_code: dict[str, list[str]] = {}
    for f in result.findings:
        if f.column:
            by_code.setdefault(f.check, []).append(f.column)
    out: dict[str, pl.DataFrame] = {}
    if "duplicate-keys" in codes:
        out["duplicate-keys"] = _duplicates(panel)
    if "gaps" in codes:
        out["gaps"] = _gaps(panel)
    if "irregular-periods" in codes:
        out["irregular-periods"] = pl.DataFrame(
            {"after": [str(a) for a, _ in panel.irregular], "before": [str(b) for _, b in panel.irregular]})
    if "singleton-units" in codes:
        out["singleton-units"] = _singletons(panel)
    for code in ("nearly-time-invariant", "few-switchers"):
        if code in by_code:
            out[code] = changed_rows(panel, by_code[code], tol)
    if "non-finite" in by_code:
        out["non-finite"] = _non_finite(panel, by_code["non-finite"])
    if "missing-in-period" in by_code:
        rows = [(f.column, str(e.get("period"))) for f in result.findings if f.check == "missing-in-period"
                for e in _all_missing_periods(panel, f.column)]
        out["missing-in-period"] = pl.DataFrame({"column": [r[0] for r in rows], panel.time: [r[1] for r in rows]})
    return {k: v for k, v in out.items() if v.height}


def _all_missing_periods(panel: Panel, column: str) -> list[dict[str, Any]]:
    frame = panel.frame
    per = frame.group_by(PERIOD_ID).agg(pl.col(column).is_not_null().sum().alias("__n")).filter(pl.col("__n") == 0)
    return [{"period": panel.grid[int(p)]} for p in sorted(per.get_column(PERIOD_ID).to_list())]


def example_runs(result: ProfileResult) -> ProfileResult:
    """The profile with the examples of its changing-unit findings (nearly-time-invariant,
    few-switchers) written as the units' values by period: ``{key: ..., "values": "10 in
    2017-2021, 20 in 2022"}``, the same units as before."""
    import dataclasses

    panel = result.data
    keys = _keys(panel)
    new = []
    for f in result.findings:
        if f.check not in ("nearly-time-invariant", "few-switchers") or not f.column or not f.examples:
            new.append(f)
            continue
        wanted = [tuple(e.get(k) for k in keys) for e in f.examples]
        codes = panel.units.filter(pl.struct(keys).is_in([dict(zip(keys, w, strict=True)) for w in wanted]))
        code_of = {tuple(r[k] for k in keys): r[UNIT_ID] for r in codes.iter_rows(named=True)}
        runs = value_runs(panel, f.column, list(code_of.values()))
        examples = tuple({**{k: v for k, v in zip(keys, w, strict=True)}, "values": runs.get(code_of.get(w), "")}
                         for w in wanted if w in code_of)
        new.append(dataclasses.replace(f, examples=examples))
    return dataclasses.replace(result, findings=tuple(new))


# --------------------------------------------------------------------------- compare and check


def compare_tables(result: Any) -> dict[str, pl.DataFrame]:
    """Every row behind the new wave's findings, one table per finding code (kept by compare)."""
    out = {}
    for code, table in result.detail_tables.items():
        if table.height:
            text = [c for c, dt in table.schema.items() if dt == pl.String]
            out[code] = table.with_columns(pl.col(c).str.replace(r"^(-?\d+)\.0$", "$1") for c in text)
    return out


def check_tables(result: Any) -> dict[str, pl.DataFrame]:
    """Every failing row, unit or period of the contract's broken rules in one ``rule-failed``
    table: the rule and its column first, then what locates each failure (run ``check`` with
    ``keep_all=True`` so that the rules keep every failure, not a few examples)."""
    rows = []
    for r in result.rules:
        if r.passed or not r.evaluated:
            continue
        for e in r.examples:
            rows.append({"rule": r.rule, "column": r.column or "", **{str(k): _cell(v) for k, v in dict(e).items()}})
    if not rows:
        return {}
    keys: list[str] = []
    for row in rows:
        keys += [k for k in row if k not in keys]
    return {"rule-failed": pl.DataFrame([{k: row.get(k) for k in keys} for row in rows],
                                        schema={k: pl.String for k in keys})}


def _cell(v: Any) -> str | None:
    if v is None:
        return None
    if isinstance(v, float) and v.is_integer() and abs(v) < 1e15:
        return str(int(v))
    return str(v)


# --------------------------------------------------------------------------- writing


def write_details(tables: dict[str, pl.DataFrame], folder: str | Path, outputs: OutputSet) -> list[Path]:
    """Stage one CSV per table (``<code>.csv``) in ``folder`` on ``outputs`` (the caller publishes).

    The folder is made when missing. Returns the paths staged, in code order."""
    from auditor.errors import fail

    root = Path(folder)
    if root.exists() and not root.is_dir():
        raise fail("details-not-folder", path=str(folder))
    paths = []
    for code in sorted(tables):
        path = root / f"{code}.csv"
        outputs.claim(path, "a --details file")
        paths.append(path)
    if paths:
        root.mkdir(parents=True, exist_ok=True)
    for code, path in zip(sorted(tables), paths, strict=True):
        outputs.stage(path, tables[code].write_csv())
    return paths
