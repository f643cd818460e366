"""The drivers of the moments kernel (:mod:`auditor.stats.moments`) on one machine.

- memory: the panel in memory is one shard of whole units (:func:`memory_passes`);
- streaming, one unit key column: ranges of units by their sorted key, each read once
  through a query the key filter reaches the Parquet reader through, each a shard of
  whole units, merged in order (:func:`_unit_ranges`);
- streaming otherwise (composite keys): batches of rows as they come, units split
  across batches, merged exactly and refined by a second read (:func:`split_passes`,
  the same two passes as the dask engine of :mod:`auditor.stats.cluster`).

Streaming reads every column whole once, one or two columns in memory at a time, for
its distinct values and first finite value (the value tables of a continuous column
would be as long as the column).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import polars as pl

from auditor.checks.config import Settings
from auditor.errors import broken
from auditor.io.load import PERIOD_ID, UNIT_ID, Panel, integer_codes
from auditor.stats import moments
from auditor.stats.moments import Facts, Passes

PARTITION_ROWS = 8_000_000  # rows per range of units in the streaming profile
BATCH_ROWS = 4_000_000  # rows per batch when units are split across batches


ENGINES = ("auto", "memory", "streaming", "dask")


def resolve_engine(engine: str | None, streaming: bool | None = None, scheduler: str | None = None) -> str:
    """The engine a run uses: ``engine`` (``auto`` chooses memory or streaming by the
    input's size), with the older ``streaming`` flag (True: streaming, False: memory)
    as a shorthand; ``scheduler`` only with dask."""
    from auditor.errors import fail

    name = (engine or "auto").strip().lower()
    if name not in ENGINES:
        raise fail("bad-argument", detail=f"--engine must be one of {', '.join(ENGINES)}, found '{engine}'")
    if streaming is not None:
        implied = "streaming" if streaming else "memory"
        if name not in ("auto", implied):
            flag = "--streaming" if streaming else "--in-memory"
            raise fail("engine-conflict", detail=f"{flag} contradicts --engine {name}; give one of them")
        name = implied
    if scheduler and name != "dask":
        raise fail("engine-scheduler-without-dask")
    return name


def kernel_settings(settings: Settings) -> tuple[float, int]:
    """(relative float tolerance, examples per column) from the settings."""
    return settings.profile.float_tolerance, settings.profile.examples


def passes(panel: Panel, settings: Settings) -> Passes:
    """Every column's statistics, with the engine the panel was loaded for."""
    if panel.eager is not None:
        return memory_passes(panel, settings)
    return streaming_passes(panel, settings)


def memory_passes(panel: Panel, settings: Settings) -> Passes:
    """The panel in memory as one shard of whole units."""
    if panel.eager is None:
        raise broken("panel.eager is not None")
    tol, k = kernel_settings(settings)
    whole = moments.shard(
        panel.eager, list(panel.columns), n_units=panel.n_units, n_periods=panel.n_periods,
        whole=True, count="final", examples=k, tolerance=tol,
    )  # fmt: skip
    return moments.finish(whole, examples=k, tolerance=tol)


def streaming_passes(panel: Panel, settings: Settings) -> Passes:
    """A streaming panel in bounded memory: ranges of units (one key column) or batches of rows."""
    if panel.by_period is None:
        raise broken("panel.by_period is not None")
    tol, k = kernel_settings(settings)
    facts = whole_column_facts(panel)
    if by_unit_ranges(panel):
        merged = moments.merge_stream(_unit_ranges(panel, tol, k), moments.merge)
        return moments.finish(merged, examples=k, tolerance=tol, facts=facts)
    return split_passes(panel, lambda: _row_batches(panel), tol, k, facts)


def by_unit_ranges(panel: Panel) -> bool:
    """Whether a streaming panel is read by ranges of units (one unit key column, whose
    range filter reaches the Parquet reader) rather than by batches of rows."""
    return len(panel.unit) == 1


def whole_column_facts(panel: Panel) -> dict[str, Facts]:
    """Each column of a streaming panel read whole, one or two at a time (one is read
    while another sorts): its first finite value and its exact value counts."""
    if panel.by_period is None:
        raise broken("panel.by_period is not None")

    def one(c: str) -> Facts:
        s = panel.collect(panel.by_period.select(c)).to_series()
        facts = moments.column_facts(s)
        if facts is not None:
            return Facts(facts.shift, facts.distinct, facts.top)
        return Facts(None, *moments.value_counts(moments.comparable(s)))

    cols = list(panel.columns)
    with ThreadPoolExecutor(max_workers=2) as pool:
        return dict(zip(cols, pool.map(one, cols), strict=True))


def _unit_ranges(panel: Panel, tol: float, k: int) -> Iterable[moments.Shard]:
    """Shards of whole units: contiguous ranges of the sorted unit key, read one at a time."""
    if panel.by_period is None:
        raise broken("panel.by_period is not None")
    key = panel.unit[0]
    n, cols = panel.n_units, list(panel.columns)
    parts = max(1, int(np.ceil((panel.rows - panel.missing_keys) / PARTITION_ROWS)))
    bounds = np.unique(np.linspace(0, n, parts + 1).round().astype(np.int64))
    unit_keys = panel.units[key]
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        low = pl.lit(unit_keys[int(a)], dtype=unit_keys.dtype)
        high = pl.lit(unit_keys[int(b) - 1], dtype=unit_keys.dtype)
        frame = panel.collect(panel.by_period.filter(pl.col(key).is_between(low, high)).select(key, PERIOD_ID, *cols))
        fast = integer_codes(frame[key])  # integer keys: one bincount, else a dense rank
        code = fast[0] if fast is not None else (pl.col(key).rank("dense") - 1).cast(pl.UInt32)
        frame = frame.with_columns(code.alias(UNIT_ID)).with_columns(pl.col(UNIT_ID).cast(pl.Int64) + int(a))
        yield moments.shard(frame, cols, n_units=n, n_periods=panel.n_periods, whole=True, count="none",
                            examples=k, tolerance=tol)


def code_units(frame: pl.DataFrame, unit: Sequence[str], units: pl.DataFrame) -> pl.DataFrame:
    """``frame`` (rows with every key present) with the unit code of each row, from the
    panel's unit table ``units`` (sorted key columns ``unit`` and their ``__pa_unit``)."""
    if len(unit) == 1:
        key = unit[0]
        codes = units[key].search_sorted(frame[key].cast(units[key].dtype))
        return frame.with_columns(pl.Series(UNIT_ID, codes, dtype=pl.Int64))
    table = units.select(*unit, pl.col(UNIT_ID).cast(pl.Int64))
    return frame.join(table, on=list(unit), how="left", maintain_order="left", nulls_equal=False)


def _row_batches(panel: Panel) -> Iterable[pl.DataFrame]:
    if panel.by_period is None:
        raise broken("panel.by_period is not None")
    query = panel.by_period.select(*panel.unit, PERIOD_ID, *panel.columns)
    for batch in query.collect_batches(chunk_size=BATCH_ROWS):
        yield code_units(batch, panel.unit, panel.units)


def split_passes(
    panel: Panel,
    batches: Callable[[], Iterable[pl.DataFrame]],
    tol: float,
    k: int,
    facts: dict[str, Facts] | None,
) -> Passes:
    """Two passes over ``batches`` (a fresh iterable of coded row batches per call) whose
    units may be split across batches: statistics merged exactly, then the second pass
    with the merged unit means (:func:`moments.plan`, :func:`moments.refine`)."""
    cols = list(panel.columns)
    n, p = panel.n_units, panel.n_periods
    count = "none" if facts is not None else "table"
    merged = moments.merge_stream(
        (moments.shard(b, cols, n_units=n, n_periods=p, whole=False, count=count, tolerance=tol) for b in batches()),
        moments.merge,
    )
    the_plan = moments.plan(merged, tolerance=tol, examples=k)
    refined = moments.merge_stream(
        (moments.refine(b, the_plan, n_units=n, n_periods=p) for b in batches()),
        lambda a, b: moments.merge_refinements(a, b, the_plan),
    )
    return moments.finish(merged, examples=k, tolerance=tol, refinement=refined, the_plan=the_plan, facts=facts)
