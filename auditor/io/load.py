"""Any input (paths, pandas or polars frames) becomes one validated Panel.

Validation happens here, once: key columns exist and are usable, the period
grid is known, every row carries a unit code and a period index. Every later
stage trusts the Panel.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from auditor.errors import fail, short_list
from auditor.io.periods import grid_step, scale_for

UNIT_ID = "__pa_unit"
PERIOD_ID = "__pa_period"
ROW_ID = "__pa_row"
INTERNAL = (UNIT_ID, PERIOD_ID, ROW_ID)
RESERVED_PREFIX = "__pa_"  # every helper column of the tool starts so; data columns may not


@dataclass(frozen=True)
class Panel:
    """A validated panel.

    ``lazy`` (and ``frame``, its collected form) holds the rows whose keys are all
    present: every original column plus ``__pa_unit`` (UInt32 unit code 0..n-1,
    units in sorted key order), ``__pa_period`` (UInt32 index into ``grid``) and
    ``__pa_row`` (UInt64 row number in the input). ``units`` maps unit codes to
    key values. Streaming panels also keep ``by_period``: the same rows with
    ``__pa_period`` but no unit code or row number (so that a filter on the key reaches
    the file reader), to be read a partition of units at a time.
    ``grid`` holds the period labels (JSON values) and ``grid_position`` their
    positions on the ``frequency`` scale.
    """

    lazy: pl.LazyFrame
    unit: tuple[str, ...]
    time: str
    grid: tuple[Any, ...]
    grid_position: tuple[int, ...]
    frequency: str
    step: int | None
    irregular: tuple[tuple[Any, Any], ...]
    rows: int
    missing_keys: int
    missing_key_examples: tuple[dict[str, Any], ...]
    columns: tuple[str, ...]
    schema: dict[str, pl.DataType]
    units: pl.DataFrame
    source: str
    inputs: tuple[Path, ...] = ()
    streaming: bool = False
    load_findings: tuple[Any, ...] = field(default_factory=tuple)
    eager: pl.DataFrame | None = None
    by_period: pl.LazyFrame | None = None
    engine: str = ""  # the engine that computes the statistics ("" : memory or streaming, as loaded)

    @property
    def engine_name(self) -> str:
        """``in-memory``, ``streaming`` or ``dask``: the engine of the profile's ``panel.engine``."""
        return self.engine or ("streaming" if self.streaming else "in-memory")

    @property
    def n_units(self) -> int:
        """Number of distinct units with complete keys."""
        return self.units.height

    @property
    def n_periods(self) -> int:
        """Number of periods on the grid."""
        return len(self.grid)

    @cached_property
    def frame(self) -> pl.DataFrame:
        """The rows with complete keys, in input order, in memory."""
        if self.eager is not None:
            return self.eager
        return self.lazy.collect(engine="streaming")

    def collect(self, query: pl.LazyFrame) -> pl.DataFrame:
        """Run ``query`` with the engine this panel was loaded for."""
        return query.collect(engine="streaming" if self.streaming else "auto")

    def unit_labels(self, codes: Sequence[int]) -> list[dict[str, Any]]:
        """Key values of the units with the given codes, as dicts (for examples)."""
        # ``units`` holds one row per code, sorted, so a code is its row number.
        return [{k: v for k, v in self.units.row(int(c), named=True).items() if k in self.unit} for c in codes]


def panel_units(coded: pl.LazyFrame, units: Sequence[str], engine: str) -> pl.DataFrame:
    """One row per unit code with its key values, sorted by code."""
    return (
        coded.select(UNIT_ID, *units)
        .unique(subset=[UNIT_ID], keep="any")
        .sort(UNIT_ID)
        .collect(engine=engine)
    )


def integer_codes(key: pl.Series) -> tuple[pl.Series, pl.Series] | None:
    """Dense 0-based codes of an integer unit key, and the keys in code order, or None.

    The same codes as a dense rank, found by one bincount over the key's range when
    that range is at most a few times the number of rows (household or firm ids);
    None for other keys, which are ranked.
    """
    if key.dtype not in _NUMPY_INTEGERS or key.len() == 0 or key.null_count():
        return None  # 128-bit integers have no numpy type: ranked
    lo, hi = int(key.min()), int(key.max())
    if hi - lo > 4 * key.len() + 1024:
        return None
    offset = _offsets(key, lo)
    present = np.zeros(hi - lo + 1, dtype=bool)
    present[offset] = True
    code_of = np.cumsum(present, dtype=np.uint32)  # 1-based at the keys present
    codes = np.take(code_of, offset, mode="clip")
    codes -= np.uint32(1)
    # in the key's own type: lo + offset never leaves it (a uint64 near 2**64 included)
    kind = _NUMPY_INTEGERS.get(key.dtype, np.int64)
    keys = pl.Series(key.name, np.flatnonzero(present).astype(kind) + kind(lo)).cast(key.dtype)
    return pl.Series(UNIT_ID, codes), keys


_NUMPY_INTEGERS: dict[Any, Any] = {
    pl.Int8: np.int8, pl.Int16: np.int16, pl.Int32: np.int32, pl.Int64: np.int64,
    pl.UInt8: np.uint8, pl.UInt16: np.uint16, pl.UInt32: np.uint32, pl.UInt64: np.uint64,
}  # fmt: skip


def _offsets(values: pl.Series, lo: int) -> np.ndarray:
    """``values - lo`` as row indices (intp), computed in the values' own type (no
    overflow: every value is at least ``lo``) and in place where the array is ours."""
    raw = values.to_numpy()
    if lo:
        if raw.flags.writeable:
            np.subtract(raw, raw.dtype.type(lo), out=raw)
        else:
            raw = raw - raw.dtype.type(lo)
    return raw.astype(np.intp, copy=False)


def _integer_lookup(values: pl.Series, keys: pl.Series, codes: pl.Series) -> pl.Series | None:
    """``values`` replaced by ``codes`` through a table indexed by the integer ``keys``
    (one gather, for integer periods), or None when the keys are not compact integers."""
    if values.dtype not in _NUMPY_INTEGERS or values.null_count() or keys.len() == 0:
        return None
    lo, hi = int(keys.min()), int(keys.max())
    if hi - lo > 4 * values.len() + 1024:
        return None
    table = np.zeros(hi - lo + 1, dtype=np.uint32)
    table[_offsets(keys, lo)] = codes.to_numpy()
    return pl.Series(codes.name, np.take(table, _offsets(values, lo), mode="clip"))


def parse_unit(unit: str | Sequence[str]) -> tuple[str, ...]:
    """``"a,b"`` or ``["a", "b"]`` as a tuple of column names."""
    if isinstance(unit, str):
        parts = [u.strip() for u in unit.split(",")]
    else:
        parts = [str(u).strip() for u in unit]
    parts = [p for p in parts if p]
    if not parts:
        raise fail("bad-argument", detail="--unit needs at least one column name")
    return tuple(parts)


def open_input(
    data: Any, text_columns: Sequence[str], settings: Any = None
) -> tuple[pl.LazyFrame, str, tuple[Path, ...], list[Any], bool]:
    """(lazy frame over every input, description, input paths, load findings, whether
    every input is a binary file); text columns of text files are read as text."""
    return _to_lazy(data, text_columns, settings)


def _to_lazy(
    data: Any, text_columns: Sequence[str], settings: Any = None
) -> tuple[pl.LazyFrame, str, tuple[Path, ...], list[Any], bool]:
    """(lazy frame, description, input paths, load findings, scanned binary file)."""
    import sys
    from collections import Counter

    if isinstance(data, pl.LazyFrame):
        return data, "polars LazyFrame", (), [], False
    if isinstance(data, pl.DataFrame):
        if data.height == 0:
            raise fail("empty-frame")
        return data.lazy(), "polars DataFrame", (), [], False
    pd = sys.modules.get("pandas")  # a pandas frame can only exist once pandas is imported
    if pd is not None and isinstance(data, pd.DataFrame):
        if len(data) == 0:
            raise fail("empty-frame")
        dup = sorted(name for name, k in Counter(map(str, data.columns)).items() if k > 1)
        if dup:
            raise fail("duplicate-column-names", names=", ".join(f"'{d}'" for d in dup))
        frame = data.reset_index(drop=True)
        frame.columns = [str(c) for c in frame.columns]
        return pl.from_pandas(frame).lazy(), "pandas DataFrame", (), [], False
    from auditor.io.sources import expand_inputs, scan_inputs

    paths, skipped = expand_inputs(data)
    lf, findings, binary = scan_inputs(paths, text_columns, settings)
    if skipped:
        from auditor.checks.findings import make

        names = short_list(p.name for p in skipped)
        findings = [
            *findings,
            make(
                "files-skipped",
                settings,
                f"{len(skipped)} {'file' if len(skipped) == 1 else 'files'} beside the data "
                f"({names}) {'is' if len(skipped) == 1 else 'are'} not read: a folder or glob takes only "
                ".csv, .tsv, .parquet, .arrow/.feather/.ipc and .jsonl/.ndjson files; "
                "name a file explicitly to read it (.txt as delimited text)",
                count=len(skipped),
                examples=[{"file": str(p)} for p in skipped[:5]],
            ),
        ]
    desc = str(paths[0]) if len(paths) == 1 else f"{len(paths)} files ({paths[0].parent})"
    return lf, desc, tuple(paths), findings, binary


def parse_keys(unit: str | Sequence[str], time: str) -> tuple[tuple[str, ...], str]:
    """The unit key columns and the time column, checked: named, and none twice."""
    units = parse_unit(unit)
    time = str(time).strip()
    if not time:
        raise fail("bad-argument", detail="--time needs a column name")
    keys = (*units, time)
    for k in keys:
        if keys.count(k) > 1:
            if k == time and k in units:
                raise fail("unit-is-time", column=k)
            raise fail("key-repeated", column=k)
    return units, time


def checked_schema(lf: pl.LazyFrame, source: str, keys: Sequence[str]) -> dict[str, pl.DataType]:
    """The schema of ``lf``, every key column present in it."""
    try:
        schema = dict(lf.collect_schema())
    except pl.exceptions.PolarsError as exc:
        raise fail("corrupt-file", path=source, format="data", reason=str(exc).splitlines()[0][:200]) from None
    reserved = [c for c in schema if c.startswith(RESERVED_PREFIX)]
    if reserved:
        raise fail("reserved-column-name", column=reserved[0], prefix=RESERVED_PREFIX)
    for k in keys:
        if k not in schema:
            raise fail("unknown-column", column=k, available=short_list(c for c in schema if c not in INTERNAL))
    return schema


def key_missing(col: str, dtype: pl.DataType) -> pl.Expr:
    """Whether a key value is missing (null, or NaN for a float key)."""
    e = pl.col(col).is_null()
    return e | pl.col(col).is_nan() if dtype.is_float() else e


def key_counts(keys: Sequence[str], schema: dict[str, pl.DataType]) -> list[pl.Expr]:
    """Rows, rows with a missing key, and missing values per key column (one row)."""
    missing_any = pl.any_horizontal([key_missing(k, schema[k]) for k in keys])
    return [
        pl.len().alias("rows"),
        missing_any.sum().alias("missing"),
        *[key_missing(k, schema[k]).sum().alias(f"null:{k}") for k in keys],
    ]


def check_key_counts(counts: dict[str, Any], keys: Sequence[str], source: str, from_files: bool) -> tuple[int, int]:
    """(rows, rows with a missing key) from :func:`key_counts`, refusing an empty input or
    a key column without any value."""
    rows = int(counts["rows"])
    if rows == 0:
        raise fail("empty-file", path=source) if from_files else fail("empty-frame")
    for k in keys:
        if int(counts[f"null:{k}"]) == rows:
            raise fail("key-all-null", column=k, rows=rows)
    return rows, int(counts["missing"])


@dataclass(frozen=True)
class PeriodGrid:
    """The period grid of a panel: ``labels`` (JSON values) at ``positions`` on the
    ``frequency`` scale, ``step`` and ``irregular`` neighbours, and ``time_map`` (each raw
    time value and its period index ``__pa_period``)."""

    labels: tuple[Any, ...]
    positions: tuple[int, ...]
    frequency: str
    step: int | None
    irregular: tuple[tuple[Any, Any], ...]
    time_map: pl.DataFrame


def period_grid(time: str, distinct_times: pl.Series) -> PeriodGrid:
    """The grid of the distinct time values present (methods.md, section 1)."""
    scale = scale_for(time, distinct_times)
    order = sorted(range(len(scale.positions)), key=lambda i: scale.positions[i])
    # Several raw values may share one position (e.g. "2019" and 2019 as text): one period.
    positions_sorted: list[int] = []
    labels_sorted: list[Any] = []
    for i in order:
        if not positions_sorted or positions_sorted[-1] != scale.positions[i]:
            positions_sorted.append(scale.positions[i])
            labels_sorted.append(scale.labels[i])
    index_of = {p: j for j, p in enumerate(positions_sorted)}
    time_map = pl.DataFrame(
        {
            time: pl.Series(time, list(scale.values), dtype=distinct_times.dtype),
            PERIOD_ID: pl.Series(PERIOD_ID, [index_of[p] for p in scale.positions], dtype=pl.UInt32),
        }
    )
    step, irregular_pairs = grid_step(positions_sorted)
    label_at = dict(zip(positions_sorted, labels_sorted, strict=True))
    irregular = tuple((label_at[a], label_at[b]) for a, b in irregular_pairs)
    return PeriodGrid(tuple(labels_sorted), tuple(positions_sorted), scale.frequency, step, irregular, time_map)


def _streams_by_size(binary_inputs: Sequence[Path], settings: Any) -> bool:
    """Whether binary inputs this large take the streaming engine: their size on disk above
    ``profile.streaming_memory_share`` of the machine's memory."""
    if not binary_inputs:
        return False
    share = 0.25
    if settings is not None:
        share = settings.profile.streaming_memory_share
    total = sum(p.stat().st_size for p in binary_inputs)
    from auditor.io.sources import memory_bytes  # looked up here: tests replace it

    mem = memory_bytes()
    return bool(mem) and total > share * mem


def _unit_codes(
    lf: pl.LazyFrame, unnumbered: pl.LazyFrame, keyed: pl.LazyFrame, missing_any: pl.Expr, missing: bool,
    units: tuple[str, ...], time: str, time_map: pl.DataFrame, streaming: bool, engine: str,
) -> tuple[pl.LazyFrame, pl.DataFrame, pl.DataFrame | None, pl.LazyFrame | None]:
    """The rows with unit and period codes, the unit table, and (in memory) the coded frame or
    (streaming) the rows by period: (coded, unit_table, eager, by_period)."""
    # Unit codes: dense ranks of the key (composite keys rank as a struct), 0-based, in key order.
    key = pl.col(units[0]) if len(units) == 1 else pl.struct(list(units))
    period_code = (
        pl.col(time).replace_strict(time_map[time], time_map[PERIOD_ID], return_dtype=pl.UInt32).alias(PERIOD_ID)
    )
    eager = None
    by_period = None
    if streaming:
        # codes by a dense rank of the whole column only when a query needs them; the
        # profile reads partitions of units from ``by_period`` and codes them there
        by_period = unnumbered.filter(~missing_any).with_columns(period_code)
        coded = keyed.with_columns((key.rank("dense") - 1).cast(pl.UInt32).alias(UNIT_ID), period_code)
        unit_table = (
            by_period.select(*units).unique().sort(list(units)).collect(engine=engine).with_row_index(UNIT_ID)
        ).with_columns(pl.col(UNIT_ID).cast(pl.UInt32))
    else:
        frame = lf.collect() if not missing else keyed.collect()  # no copy when no key is missing
        fast = integer_codes(frame[units[0]]) if len(units) == 1 else None
        looked_up = _integer_lookup(frame[time], time_map[time], time_map[PERIOD_ID])
        period = period_code if looked_up is None else looked_up
        if fast is not None:
            codes, unit_keys = fast
            eager = frame.with_columns(codes, period)
            unit_table = pl.DataFrame(
                {UNIT_ID: pl.Series(UNIT_ID, np.arange(unit_keys.len(), dtype=np.uint32)), units[0]: unit_keys}
            )
        else:
            eager = frame.with_columns((key.rank("dense") - 1).cast(pl.UInt32).alias(UNIT_ID), period)
            unit_table = panel_units(eager.lazy(), units, engine)
        coded = eager.lazy()
    return coded, unit_table, eager, by_period


def load_panel(
    data: Any,
    unit: str | Sequence[str],
    time: str,
    *,
    streaming: bool | None = None,
    settings: Any = None,
) -> Panel:
    """Validate ``data`` as a panel keyed by ``unit`` (one or more columns) and ``time``.

    ``data`` is a path, a list of paths, a folder, a glob, or a pandas/polars frame.
    ``streaming`` forces (True) or forbids (False) the polars streaming engine;
    None chooses it for binary inputs larger than the configured memory share.
    Raises AuditError (exit 2) naming what was found.
    """
    units, time = parse_keys(unit, time)
    keys = (*units, time)
    lf, source, inputs, load_findings, binary = _to_lazy(data, units, settings)
    schema = checked_schema(lf, source, keys)

    if streaming is None:
        streaming = _streams_by_size(inputs if binary else [], settings)
    engine = "streaming" if streaming else "auto"
    if not streaming:  # read once; every later query runs on the frame in memory
        try:
            lf = lf.collect().lazy()
        except pl.exceptions.PolarsError as exc:
            raise fail("corrupt-file", path=source, format="data", reason=str(exc).splitlines()[0][:200]) from None

    unnumbered = lf  # without row numbers: filters on it reach the file reader
    lf = lf.with_row_index(ROW_ID)
    missing_any = pl.any_horizontal([key_missing(k, schema[k]) for k in keys])
    summary = lf.select(key_counts(keys, schema)).collect(engine=engine)
    rows, missing = check_key_counts(summary.row(0, named=True), keys, source, bool(inputs))
    missing_examples: tuple[dict[str, Any], ...] = ()
    if missing:
        ex = lf.filter(missing_any).select(ROW_ID, *keys).head(5).collect(engine=engine)
        missing_examples = tuple(
            {"row": int(r[ROW_ID]) + 1, **{k: r[k] for k in keys}} for r in ex.iter_rows(named=True)
        )

    keyed = lf.filter(~missing_any)
    distinct_times = keyed.select(pl.col(time).unique()).collect(engine=engine).to_series()
    grid_ = period_grid(time, distinct_times)
    time_map, step, irregular = grid_.time_map, grid_.step, grid_.irregular
    labels_sorted, positions_sorted = list(grid_.labels), list(grid_.positions)

    coded, unit_table, eager, by_period = _unit_codes(
        lf, unnumbered, keyed, missing_any, bool(missing), units, time, time_map, bool(streaming), engine)
    columns = tuple(c for c in schema if c not in keys and c not in INTERNAL)
    return Panel(
        lazy=coded,
        unit=units,
        time=time,
        grid=tuple(labels_sorted),
        grid_position=tuple(positions_sorted),
        frequency=grid_.frequency,
        step=step,
        irregular=irregular,
        rows=rows,
        missing_keys=missing,
        missing_key_examples=missing_examples,
        columns=columns,
        schema={c: schema[c] for c in schema if c not in INTERNAL},
        units=unit_table,
        source=source,
        inputs=inputs,
        streaming=bool(streaming),
        load_findings=tuple(load_findings),
        eager=eager,
        by_period=by_period,
    )
