"""The dask engine: the moments kernel run on the workers of a dask cluster.

Parquet input (a file, a folder of waves, a glob) is cut into partitions of whole row
groups (:func:`partitions`, about :data:`PARTITION_ROWS` rows each); each partition is
one task, read on its worker with polars and aligned to the panel's column types as
the memory engine reads it. Three rounds of tasks, each merged on the workers in a
tree of pairwise merges, only the merged result travelling to the client:

1. the survey: rows, rows with a missing key, the distinct periods and units; the
   client builds the period grid and the unit table from them, as :mod:`auditor.io.load`
   does, and sends the unit table to every worker;
2. the kernel (:func:`auditor.stats.moments.shard`) on each partition, its units coded by the
   unit table; units may have rows in several partitions (one file per wave is the
   normal case) and merge exactly (:func:`auditor.stats.moments.merge`). Value tables are cut
   into buckets by a hash of the value and each bucket counted by its own task, so the
   exact distinct counts never need a column's values in one place;
3. the second pass (:func:`auditor.stats.moments.refine`) with the merged unit means: the
   per-period sums of within deviations and the extremes the figures need.

A worker holds one partition, the unit table and, while merging, two shards' unit
tables; never the whole panel. The client holds the unit-level table (per unit and
column: count, reference value, mean, sum of squares) and the unit x period counts.

dask and distributed are an optional extra (``pip install 'panel-auditor[dask]'``);
they are imported only here, and this module only when ``--engine dask`` asks for it.
"""

from __future__ import annotations

import logging
import operator
import os
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from auditor.checks.config import Settings
from auditor.errors import broken, fail
from auditor.io.load import (
    PERIOD_ID,
    UNIT_ID,
    Panel,
    check_key_counts,
    checked_schema,
    key_counts,
    key_missing,
    open_input,
    parse_keys,
    period_grid,
)
from auditor.stats import moments

PARTITION_ROWS = 2_000_000  # rows per partition (whole row groups; a larger row group is sliced)
MAX_LOCAL_WORKERS = 4  # worker processes of a local cluster, at most (one per core)
CONNECT_TIMEOUT = "5s"  # to reach a scheduler given by --scheduler


@dataclass(frozen=True)
class Partition:
    """One task's rows: ``length`` rows of the Parquet file ``path`` from ``offset``,
    ``row_offset`` rows of the input before them; ``casts`` and ``absent`` align the
    file's columns to the panel's types (a column the file lacks is missing there)."""

    path: str
    offset: int
    length: int
    row_offset: int
    casts: tuple[tuple[str, pl.DataType], ...]
    absent: tuple[tuple[str, pl.DataType], ...]
    columns: tuple[str, ...]


def partitions(paths: Sequence[Path], schema: dict[str, pl.DataType], rows: int | None = None) -> list[Partition]:
    """The partitions of Parquet files ``paths`` read as one panel with ``schema`` (about
    ``rows`` rows each, default :data:`PARTITION_ROWS`)."""
    import pyarrow.parquet as pq

    rows = PARTITION_ROWS if rows is None else rows

    out: list[Partition] = []
    before = 0
    columns = tuple(schema)
    for path in paths:
        own = dict(pl.scan_parquet(path).collect_schema())
        casts = tuple((c, schema[c]) for c, dt in own.items() if c in schema and dt != schema[c])
        absent = tuple((c, schema[c]) for c in columns if c not in own)
        meta = pq.ParquetFile(path).metadata
        sizes = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
        start = 0
        pending = 0
        for size in sizes:
            pending += size
            if pending >= rows:
                out += _slices(path, start, pending, rows, before, casts, absent, columns)
                start, before, pending = start + pending, before + pending, 0
        if pending or not out or out[-1].path != str(path):
            out += _slices(path, start, pending, rows, before, casts, absent, columns)
            before += pending
    return out


def _slices(path: Path, start: int, length: int, rows: int, before: int, casts: Any, absent: Any,
            columns: tuple[str, ...]) -> list[Partition]:
    """Row groups of ``length`` rows as partitions of about ``rows`` rows (a large group in
    equal slices)."""
    pieces = max(1, int(round(length / rows)))
    edges = np.linspace(0, length, pieces + 1).round().astype(np.int64)
    return [
        Partition(str(path), start + int(a), int(b - a), before + int(a), casts, absent, columns)
        for a, b in zip(edges[:-1], edges[1:], strict=True)
    ]


def read_partition(part: Partition, columns: Sequence[str] | None = None) -> pl.DataFrame:
    """A partition's rows with the panel's column types (``columns``: only these)."""
    wanted = list(part.columns if columns is None else columns)
    lf = pl.scan_parquet(part.path).slice(part.offset, part.length)
    casts = [pl.col(c).cast(dt) for c, dt in part.casts if c in wanted]
    absent = [pl.lit(None, dtype=dt).alias(c) for c, dt in part.absent if c in wanted]
    if casts or absent:
        lf = lf.with_columns(*casts, *absent)
    return lf.select(wanted).collect()


# --------------------------------------------------------------------------- tasks


@dataclass(frozen=True)
class Survey:
    """Round 1 of a set of partitions: key counts, the first rows with a missing key,
    the distinct periods and units of the rows with every key."""

    counts: dict[str, int]
    missing_examples: tuple[dict[str, Any], ...]
    times: pl.Series
    units: pl.DataFrame


def _survey(part: Partition, unit: tuple[str, ...], time: str, schema: dict[str, pl.DataType]) -> Survey:
    keys = (*unit, time)
    frame = read_partition(part, keys)
    counts = frame.select(key_counts(keys, schema)).row(0, named=True)
    missing_any = pl.any_horizontal([key_missing(k, schema[k]) for k in keys])
    examples: tuple[dict[str, Any], ...] = ()
    if counts["missing"]:
        ex = frame.with_row_index("__i").filter(missing_any).head(5)
        examples = tuple(
            {"row": int(r["__i"]) + part.row_offset + 1, **{k: r[k] for k in keys}} for r in ex.iter_rows(named=True)
        )
    keyed = frame.filter(~missing_any)
    return Survey(dict(counts), examples, keyed[time].unique(), keyed.select(unit).unique())


def _merge_surveys(a: Survey, b: Survey) -> Survey:
    counts = {k: a.counts[k] + b.counts[k] for k in a.counts}
    return Survey(counts, (a.missing_examples + b.missing_examples)[:5], pl.concat([a.times, b.times]).unique(),
                  pl.concat([a.units, b.units]).unique())


def _coded(part: Partition, unit: tuple[str, ...], time: str, units: pl.DataFrame, time_map: pl.DataFrame,
           schema: dict[str, pl.DataType], columns: Sequence[str]) -> pl.DataFrame:
    """A partition's rows with every key, their unit codes and period indices."""
    from auditor.stats.engines import code_units

    keys = (*unit, time)
    frame = read_partition(part, [*keys, *[c for c in columns if c not in keys]])
    frame = frame.filter(~pl.any_horizontal([key_missing(k, schema[k]) for k in keys]))
    frame = frame.with_columns(
        pl.col(time).replace_strict(time_map[time], time_map[PERIOD_ID], return_dtype=pl.UInt32).alias(PERIOD_ID)
    )
    return code_units(frame, unit, units)


def _shard(part: Partition, unit: tuple[str, ...], time: str, units: pl.DataFrame, time_map: pl.DataFrame,
           schema: dict[str, pl.DataType], columns: tuple[str, ...], n_periods: int, tol: float) -> moments.Shard:
    frame = _coded(part, unit, time, units, time_map, schema, columns)
    return moments.shard(frame, columns, n_units=units.height, n_periods=n_periods, whole=False, count="table",
                         tolerance=tol)


def _buckets(s: moments.Shard, buckets: int) -> list[dict[str, moments.Values]]:
    cut = {c: moments.bucket_values(col.values, buckets) for c, col in s.columns.items()}
    return [{c: parts[b] for c, parts in cut.items()} for b in range(buckets)]


def _count_bucket(*parts: dict[str, moments.Values]) -> dict[str, tuple[int, int]]:
    out: dict[str, tuple[int, int]] = {}
    for c in parts[0]:
        counted = moments.merge_all_values([p[c] for p in parts]).counts()
        if counted is None:
            raise broken("counted is not None")
        out[c] = counted
    return out


def _refine(part: Partition, unit: tuple[str, ...], time: str, units: pl.DataFrame, time_map: pl.DataFrame,
            schema: dict[str, pl.DataType], columns: tuple[str, ...], n_periods: int,
            the_plan: moments.Plan) -> moments.Refinement:
    frame = _coded(part, unit, time, units, time_map, schema, columns)
    return moments.refine(frame, the_plan, n_units=units.height, n_periods=n_periods)


_SHELL = Panel(lazy=pl.LazyFrame(), unit=(), time="", grid=(), grid_position=(), frequency="", step=None,
               irregular=(), rows=0, missing_keys=0, missing_key_examples=(), columns=(), schema={},
               units=pl.DataFrame(), source="")


def _peak_rss() -> int:
    """This process's peak resident set in bytes (Linux reports KiB)."""
    import resource

    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


# --------------------------------------------------------------------------- the client side


def local_workers() -> int:
    """Worker processes of a local cluster: one per core this process may use, 2 to
    :data:`MAX_LOCAL_WORKERS`."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        cores = os.cpu_count() or 1
    return max(2, min(cores, MAX_LOCAL_WORKERS))


@contextmanager
def connect(scheduler: str | None) -> Iterator[Any]:
    """A dask client: of the scheduler at ``scheduler``, or of a local cluster of worker
    processes started for the run and closed after it, whatever happens."""
    try:
        import distributed
    except ImportError:
        raise fail("engine-dask-missing") from None
    if scheduler:
        try:
            client = distributed.Client(scheduler, timeout=CONNECT_TIMEOUT)
        except (OSError, TimeoutError) as exc:
            raise fail("engine-no-scheduler", address=scheduler, reason=str(exc).splitlines()[0][:200]) from None
        try:
            yield client
        finally:
            client.close()
        return
    cluster = distributed.LocalCluster(
        n_workers=local_workers(), threads_per_worker=1, processes=True, dashboard_address=":0",
        silence_logs=logging.ERROR,
    )  # fmt: skip
    try:
        client = distributed.Client(cluster)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


MERGE_PRIORITY = 10  # merges run before new partitions are read, so few shards wait in memory


def _tree(client: Any, futures: list[Any], combine: Callable[..., Any], *extra: Any) -> Any:
    """Futures merged pairwise on the workers, in order; the future of the result. Merges
    have priority over reading new partitions: a shard waits for its partner, not for
    every partition to be read."""
    level = list(futures)
    while len(level) > 1:
        level = [
            client.submit(combine, level[i], level[i + 1], *extra, pure=False, priority=MERGE_PRIORITY)
            if i + 1 < len(level) else level[i]
            for i in range(0, len(level), 2)
        ]
    return level[0]


@dataclass(frozen=True)
class DaskRun:
    """What :func:`profile_passes` computed: the panel (no rows held), the passes, the
    partitions and the workers' peak resident set in bytes (by worker address)."""

    panel: Panel
    passes: moments.Passes
    partitions: int
    worker_peak_rss: dict[str, int]


def load(data: Any, unit: str | Sequence[str], time: str, settings: Settings) -> tuple[Panel, list[Partition]]:
    """The inputs of a dask run, checked: Parquet files, the keys present (no row read yet)."""
    from auditor.io.sources import file_format

    units, time_col = parse_keys(unit, time)
    if isinstance(data, pl.DataFrame | pl.LazyFrame) or type(data).__name__ == "DataFrame":
        raise fail("engine-needs-parquet", found="the input", what="a data frame in memory")
    lf, source, inputs, findings, _ = open_input(data, units, settings)
    for p in inputs:
        fmt = file_format(p)[0]
        if fmt != "parquet":
            raise fail("engine-needs-parquet", found=f"'{p}'", what=f"a {fmt} file")
    keys = (*units, time_col)
    schema = checked_schema(lf, source, keys)
    parts = partitions(inputs, schema)
    shell = Panel(
        lazy=lf, unit=units, time=time_col, grid=(), grid_position=(), frequency="", step=None, irregular=(),
        rows=0, missing_keys=0, missing_key_examples=(), columns=tuple(c for c in schema if c not in keys),
        schema={c: schema[c] for c in schema}, units=pl.DataFrame(), source=source, inputs=tuple(inputs),
        streaming=True, load_findings=tuple(findings), engine="dask",
    )  # fmt: skip
    return shell, parts


class Session:
    """One dask run over the partitions of a panel: the client, the unit table and the
    period grid on every worker once the survey has built them."""

    def __init__(self, client: Any, shell: Panel, parts: list[Partition], settings: Settings) -> None:
        self.client, self.shell, self.parts, self.settings = client, shell, parts, settings
        self.tol = settings.profile.float_tolerance
        self.examples = settings.profile.examples
        self.peaks: dict[str, int] = {}

    def survey(self) -> Panel:
        """Round 1: the panel's rows, missing keys, period grid and unit table."""
        from dataclasses import replace

        from auditor import progress

        shell, client = self.shell, self.client
        with progress.step(f"survey of {len(self.parts)} partitions on the cluster"):
            survey = _tree(client, [client.submit(_survey, p, shell.unit, shell.time, shell.schema, pure=False)
                                    for p in self.parts], _merge_surveys).result()
        rows, missing = check_key_counts(survey.counts, (*shell.unit, shell.time), shell.source, True)
        grid = period_grid(shell.time, survey.times)
        table = survey.units.sort(list(shell.unit)).with_row_index(UNIT_ID)
        table = table.select(pl.col(UNIT_ID).cast(pl.UInt32), *shell.unit)
        self.panel = replace(
            shell, grid=grid.labels, grid_position=grid.positions, frequency=grid.frequency, step=grid.step,
            irregular=grid.irregular, rows=rows, missing_keys=missing,
            missing_key_examples=tuple(sorted(survey.missing_examples, key=lambda e: e["row"])[:5]), units=table,
        )  # fmt: skip
        self.common = (shell.unit, shell.time, client.scatter(table, broadcast=True),
                       client.scatter(grid.time_map, broadcast=True), shell.schema)
        return self.panel

    def passes(self, columns: Sequence[str]) -> moments.Passes:
        """Rounds 2 and 3 for ``columns``: the kernel, value buckets, the second pass."""
        from auditor import progress

        client, parts, cols = self.client, self.parts, tuple(columns)
        n_periods = self.panel.n_periods
        with progress.step(f"moments of {len(parts)} partitions on the cluster"):
            shards = [client.submit(_shard, p, *self.common, cols, n_periods, self.tol, pure=False) for p in parts]
            buckets = max(4, 2 * len(client.scheduler_info().get("workers", {})))
            # a shard's value tables leave it in buckets at once: the shard itself waits for its merge
            urgent = MERGE_PRIORITY + 1
            cut = [client.submit(_buckets, s, buckets, pure=False, priority=urgent) for s in shards]
            picks = [[client.submit(operator.getitem, c, b, pure=False, priority=urgent) for c in cut]
                     for b in range(buckets)]
            counted_f = [client.submit(_count_bucket, *pb, pure=False) for pb in picks]
            stripped = [client.submit(moments.strip_values, s, pure=False, priority=urgent) for s in shards]
            del shards, cut, picks
            merged = _tree(client, stripped, moments.merge).result()
            counted = _combine_counts(client.gather(counted_f))
        with progress.step("second pass on the cluster"):
            the_plan = moments.plan(merged, tolerance=self.tol, examples=self.examples)
            plan_f = client.scatter(the_plan, broadcast=True)
            refined = _tree(
                client, [client.submit(_refine, p, *self.common, cols, n_periods, plan_f, pure=False) for p in parts],
                moments.merge_refinements, plan_f,
            ).result()  # fmt: skip
        self.peaks = dict(client.run(_peak_rss))
        return moments.finish(merged, examples=self.examples, tolerance=self.tol, refinement=refined,
                              the_plan=the_plan, counted=counted)

    def sample(self, outcome: str, regs: list[str], period_effects: bool, invariant: list[str]) -> Any:
        """The instruments command's sample from the partitions: kinds from the kernel's
        passes over the outcome and regressors, --treat-as-invariant modes, complete rows,
        text levels and periods present, then the unit cross-products of the design
        (:func:`auditor.stats.moments.cross_products`), merged exactly; the sample holds their
        equivalent rows (:func:`auditor.stats.moments.equivalent_rows`)."""
        from dataclasses import replace

        from auditor import progress
        from auditor.stats import design as readiness
        from auditor.stats.variation import compute_variation

        client, panel = self.client, self.panel
        used = (outcome, *regs)
        passes = self.passes(used)
        var = compute_variation(replace(panel, columns=used), self.settings, passes)
        info = {r["name"]: r for r in var.columns.to_dicts()}
        kinds = {c: info[c]["kind"] for c in used}
        n_periods = panel.n_periods
        args = (*self.common, used)
        treated, modes = [], {}
        with progress.step("the model sample on the cluster"):
            for c in invariant:
                counts = _tree(client, [client.submit(_unit_values, p, *args, c, pure=False) for p in self.parts],
                               _merge_unit_values, c).result()
                modes[c], changed = readiness.unit_modes(counts, c)
                treated.append((c, kinds[c], changed))
                kinds[c] = "time-invariant"
            modes_f = client.scatter([modes], broadcast=True)[0]  # a dict would scatter item by item
            texts = [c for c in regs if readiness._is_text(panel.schema[c])]
            facts = _tree(client, [client.submit(_complete_facts, p, *args, modes_f, texts, pure=False)
                                   for p in self.parts], _merge_complete_facts).result()
            rows_keyed, miss = facts["rows"], facts["missing"]
            dropped = rows_keyed - facts["complete"]
            if facts["complete"] == 0:
                raise readiness._no_complete_rows(rows_keyed, dropped, miss)
            readiness._check_units(panel, facts["units"])
            periods_present = tuple(sorted(facts["periods"].to_list()))
            limit = self.settings.instruments.max_levels
            design = (facts["levels"], periods_present, period_effects, limit)
            d = readiness.design_columns(panel, outcome, regs, *design)  # refuses too many levels here
            names = ["__pa_y", *[name for name, _ in d.design_cols], *d.added]
            cross = _tree(client, [client.submit(_cross, p, *args, modes_f, outcome, regs, design, names,
                                                 panel.grid, n_periods, pure=False) for p in self.parts],
                          moments.merge_cross).result()
        self.peaks = dict(client.run(_peak_rss))
        num, weights, unit_rows, means = readiness.equivalent_num(cross)
        return readiness.Sample(outcome, kinds, info, num, d.design_cols, d.added, d.base_levels, d.constant_text,
                                periods_present, rows_keyed, dropped, miss, tuple(treated), tuple(invariant),
                                weights=weights, unit_rows=unit_rows, unit_means=means)


@contextmanager
def session(data: Any, unit: str | Sequence[str], time: str, settings: Settings,
            scheduler: str | None) -> Iterator[Session]:
    """A :class:`Session` over Parquet ``data``, surveyed, on the cluster at ``scheduler``
    (or a local one for the run)."""
    shell, parts = load(data, unit, time, settings)
    with connect(scheduler) as client:
        run = Session(client, shell, parts, settings)
        run.survey()
        yield run


def profile_passes(
    data: Any, unit: str | Sequence[str], time: str, settings: Settings, scheduler: str | None = None
) -> DaskRun:
    """The panel and every column's statistics of Parquet ``data``, computed on a dask
    cluster (``scheduler``: its address; None starts a local one for the run)."""
    with session(data, unit, time, settings, scheduler) as run:
        passes = run.passes(run.panel.columns)
    return DaskRun(run.panel, passes, len(run.parts), run.peaks)


def _unit_values(part: Partition, unit: tuple[str, ...], time: str, units: pl.DataFrame, time_map: pl.DataFrame,
                 schema: dict[str, pl.DataType], columns: tuple[str, ...], c: str) -> pl.DataFrame:
    from auditor.stats.design import value_counts_by_unit

    frame = _coded(part, unit, time, units, time_map, schema, columns)
    return value_counts_by_unit(frame, c, schema[c])


def _merge_unit_values(a: pl.DataFrame, b: pl.DataFrame, c: str) -> pl.DataFrame:
    return pl.concat([a, b]).group_by([UNIT_ID, c]).agg(pl.col("len").sum())


def _model_rows(part: Partition, unit: tuple[str, ...], time: str, units: pl.DataFrame, time_map: pl.DataFrame,
                schema: dict[str, pl.DataType], columns: tuple[str, ...], modes: dict[str, pl.DataFrame]) -> pl.DataFrame:
    """A partition's keyed rows of the model's columns, --treat-as-invariant applied."""
    from auditor.stats.design import with_modes

    frame = _coded(part, unit, time, units, time_map, schema, columns)
    frame = frame.select(UNIT_ID, PERIOD_ID, *columns)
    for c, m in modes.items():
        frame = with_modes(frame, c, m)
    return frame


def _complete_facts(part: Partition, unit: tuple[str, ...], time: str, units: pl.DataFrame, time_map: pl.DataFrame,
                    schema: dict[str, pl.DataType], columns: tuple[str, ...], modes: dict[str, pl.DataFrame],
                    texts: list[str]) -> dict[str, Any]:
    from auditor.stats import design as readiness

    frame = _model_rows(part, unit, time, units, time_map, schema, columns, modes)
    full = readiness.complete(frame, columns, schema)
    return {
        "rows": frame.height, "complete": full.height, "missing": readiness.missing_counts(frame, columns, schema),
        "levels": {c: readiness.level_counts(full, c) for c in texts}, "periods": full[PERIOD_ID].unique(),
        "units": full[UNIT_ID].unique(),
    }


def _merge_complete_facts(a: dict[str, Any], b: dict[str, Any]) -> dict[str, Any]:
    return {
        "rows": a["rows"] + b["rows"], "complete": a["complete"] + b["complete"],
        "missing": {c: a["missing"][c] + b["missing"][c] for c in a["missing"]},
        "levels": {c: pl.concat([a["levels"][c], b["levels"][c]]).group_by(c).agg(pl.col("len").sum())
                   for c in a["levels"]},
        "periods": pl.concat([a["periods"], b["periods"]]).unique(),
        "units": pl.concat([a["units"], b["units"]]).unique(),
    }


def _cross(part: Partition, unit: tuple[str, ...], time: str, units: pl.DataFrame, time_map: pl.DataFrame,
           schema: dict[str, pl.DataType], columns: tuple[str, ...], modes: dict[str, pl.DataFrame], outcome: str,
           regs: list[str], design: tuple[Any, ...], names: list[str], grid: tuple[Any, ...],
           n_periods: int) -> moments.CrossProducts:
    from dataclasses import replace

    from auditor.stats import design as readiness

    frame = _model_rows(part, unit, time, units, time_map, schema, columns, modes)
    full = readiness.complete(frame, columns, schema)
    shell = replace(_SHELL, schema=schema, grid=grid)
    d = readiness.design_columns(shell, outcome, regs, *design)
    return moments.cross_products(full.select(d.exprs), names, n_units=units.height)


def _combine_counts(buckets: list[dict[str, tuple[int, int]]]) -> dict[str, tuple[int, int]]:
    """Distinct values add up over buckets; the most common value is the largest bucket top."""
    out: dict[str, tuple[int, int]] = {}
    for c in buckets[0]:
        out[c] = (sum(b[c][0] for b in buckets), max(b[c][1] for b in buckets))
    return out
