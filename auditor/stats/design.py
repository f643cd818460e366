"""The model-readiness sample and design (``panel-audit instruments``, auditor.commands.instruments).

- :class:`Sample`: the complete rows, the numeric design columns (text columns become
  indicators ``col=value`` with the most common level as base; ``--period-effects``
  adds ``period=<value>``), each regressor's kind from the profile's variation pass;
- :class:`Design`: which design column is a period effect (added dummies, then the
  user's own period-only regressors), time-varying (X) or time-invariant (Z).

The dask engine (auditor.stats.cluster) builds the same Sample from its partitions with
the helpers here.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl

from auditor.checks.config import Settings
from auditor.dtypes import null_or_non_finite
from auditor.errors import fail, short_list
from auditor.io.load import INTERNAL, PERIOD_ID, UNIT_ID, Panel
from auditor.stats import models

_TEXT_TYPES = (pl.String, pl.Categorical, pl.Enum)


def _is_text(dtype: pl.DataType) -> bool:
    return isinstance(dtype, _TEXT_TYPES) or dtype == pl.String


def _usable(dtype: pl.DataType) -> bool:
    return dtype.is_numeric() or dtype == pl.Boolean or _is_text(dtype)


def _validate(panel: Panel, outcome: str, regs: list[str], correlated: list[str] | None,
              invariant: list[str]) -> None:
    available = short_list(c for c in panel.schema if c not in INTERNAL)
    keys = {**{u: "unit key" for u in panel.unit}, panel.time: "time key"}
    if outcome in keys:
        raise fail("instruments-key-as-regressor", column=outcome, role=keys[outcome])
    if outcome not in panel.schema:
        raise fail("instruments-unknown-outcome", column=outcome, available=available)
    dt = panel.schema[outcome]
    if not (dt.is_numeric() or dt == pl.Boolean):
        raise fail("instruments-outcome-not-numeric", column=outcome, dtype=str(dt).lower())
    if not regs:
        raise fail("instruments-no-regressors")
    seen: set[str] = set()
    for r in regs:
        if r in seen:
            raise fail("instruments-regressor-repeated", column=r)
        seen.add(r)
        if r == outcome:
            raise fail("instruments-regressor-is-outcome", column=r)
        if r in keys:
            raise fail("instruments-key-as-regressor", column=r, role=keys[r])
        if r not in panel.schema:
            raise fail("instruments-unknown-regressor", column=r, available=available)
        if not _usable(panel.schema[r]):
            raise fail("instruments-regressor-unusable", column=r, dtype=str(panel.schema[r]).lower())
    for option, names in (("--correlated", correlated or []), ("--treat-as-invariant", invariant)):
        for c in names:
            parent = c.split("=", 1)[0] if c not in regs else c
            if parent not in regs:
                raise fail("instruments-not-a-regressor", option=option, column=c, regressors=", ".join(regs))


# --------------------------------------------------------------------------- stage 1: the sample


@dataclass(frozen=True)
class Sample:
    """The complete rows and their numeric design columns.

    ``design_cols`` pairs each design column with the regressor it comes from;
    ``added_periods`` are the dummies ``--period-effects`` added (every period present
    but the first); ``num`` holds unit codes, the outcome as ``__pa_y`` and every design
    column as Float64: the complete rows themselves (with their period codes), or, from
    the dask engine or :func:`equivalent_sample`, the equivalent rows of the unit
    moments with their ``weights`` and each unit's ``unit_rows`` (T_i, by sorted unit code).
    """

    outcome: str
    kinds: dict[str, str]
    info: dict[str, dict[str, Any]]
    num: pl.DataFrame
    design_cols: tuple[tuple[str, str], ...]
    added_periods: tuple[str, ...]
    base_levels: dict[str, Any]
    constant_text: tuple[str, ...]
    periods_present: tuple[int, ...]
    rows_keyed: int
    dropped: int
    miss_counts: dict[str, int]
    treated: tuple[tuple[str, str, int], ...]  # (column, its kind before, units changed)
    invariant: tuple[str, ...]
    weights: np.ndarray | None = None
    unit_rows: np.ndarray | None = None
    unit_means: pl.DataFrame | None = None  # with equivalent rows: each unit's means (sorted unit order)


def unit_modes(counts: pl.DataFrame, c: str) -> tuple[pl.DataFrame, int]:
    """Each unit's most common value of ``c`` (ties: the smallest) from (unit, value, len)
    counts; returns (unit, ``__pa_mode``) and the number of units with more than one value."""
    modes = (
        counts.sort([UNIT_ID, "len", c], descending=[False, True, False])
        .group_by(UNIT_ID, maintain_order=True)
        .agg(pl.col(c).first().alias("__pa_mode"), pl.len().alias("__pa_values"))
    )
    return modes.select(UNIT_ID, "__pa_mode"), int((modes["__pa_values"] > 1).sum())


def value_counts_by_unit(frame: pl.DataFrame, c: str, dtype: pl.DataType) -> pl.DataFrame:
    """(unit, value, len): how often each unit holds each non-missing value of ``c``."""
    return frame.filter(~null_or_non_finite(c, dtype)).group_by([UNIT_ID, c]).len()


def with_modes(frame: pl.DataFrame, c: str, modes: pl.DataFrame) -> pl.DataFrame:
    """``frame`` with ``c`` replaced by each unit's mode (--treat-as-invariant)."""
    return frame.join(modes, on=UNIT_ID, how="left", maintain_order="left").with_columns(
        pl.col("__pa_mode").alias(c)
    ).drop("__pa_mode")


def _treat_as_invariant(frame: pl.DataFrame, c: str, dtype: pl.DataType) -> tuple[pl.DataFrame, int]:
    """Replace ``c`` by each unit's most common value (ties: the smallest); returns the frame and
    the number of units that had more than one value."""
    modes, changed = unit_modes(value_counts_by_unit(frame, c, dtype), c)
    return with_modes(frame, c, modes), changed


def complete(frame: pl.DataFrame, used: Sequence[str], schema: dict[str, pl.DataType]) -> pl.DataFrame:
    """The rows with every used column present (finite, for floats)."""
    return frame.filter(~pl.any_horizontal([null_or_non_finite(c, schema[c]) for c in used]))


def missing_counts(frame: pl.DataFrame, used: Sequence[str], schema: dict[str, pl.DataType]) -> dict[str, int]:
    """Missing (null, NaN or infinite) values of each used column."""
    return frame.select([null_or_non_finite(c, schema[c]).sum().alias(c) for c in used]).row(0, named=True)


def level_counts(frame: pl.DataFrame, c: str) -> pl.DataFrame:
    """(``c`` as text, len) over the rows of ``frame``."""
    return frame.group_by(pl.col(c).cast(pl.String)).len()


@dataclass(frozen=True)
class DesignColumns:
    """The numeric design: one expression per column of ``num`` and what they are."""

    exprs: tuple[pl.Expr, ...]
    design_cols: tuple[tuple[str, str], ...]
    added: tuple[str, ...]
    base_levels: dict[str, Any]
    constant_text: tuple[str, ...]


def design_columns(panel: Panel, outcome: str, regs: list[str], levels: dict[str, pl.DataFrame],
                   periods_present: Sequence[int], period_effects: bool, limit: int) -> DesignColumns:
    """The outcome as ``__pa_y`` and the design columns as Float64: numbers as they are,
    text as indicators ``col=value`` (the most common level the base; ``levels`` holds
    each text regressor's level counts on the complete rows), ``period=<value>`` for
    every period present but the first with ``period_effects``."""
    schema = panel.schema
    exprs: list[pl.Expr] = [pl.col(UNIT_ID), pl.col(PERIOD_ID), pl.col(outcome).cast(pl.Float64).alias("__pa_y")]
    design_cols: list[tuple[str, str]] = []
    base_levels: dict[str, Any] = {}
    constant_text: list[str] = []
    for c in regs:
        if not _is_text(schema[c]):
            exprs.append(pl.col(c).cast(pl.Float64).alias(c))
            design_cols.append((c, c))
            continue
        counts = levels[c].sort(["len", c], descending=[True, False])
        if counts.height > limit:
            raise fail("instruments-too-many-levels", column=c, levels=counts.height, limit=limit)
        names = counts[c].to_list()
        base_levels[c] = names[0]
        if len(names) == 1:
            constant_text.append(c)
        for lev in names[1:]:
            name = f"{c}={lev}"
            exprs.append((pl.col(c).cast(pl.String) == lev).cast(pl.Float64).alias(name))
            design_cols.append((name, c))
    added: list[str] = []
    if period_effects:
        for p in list(periods_present)[1:]:  # loop over periods, not rows
            name = f"period={panel.grid[p]}"
            exprs.append((pl.col(PERIOD_ID) == p).cast(pl.Float64).alias(name))
            added.append(name)
    return DesignColumns(tuple(exprs), tuple(design_cols), tuple(added), base_levels, tuple(constant_text))


def _check_units(panel: Panel, units: pl.Series) -> None:
    """At least two units with complete rows."""
    if units.n_unique() < 2:
        label = panel.unit_labels([int(units[0])])
        raise fail("instruments-one-unit", unit=", ".join(str(v) for v in label[0].values()) if label else "?")


def _no_complete_rows(rows_keyed: int, dropped: int, miss_counts: dict[str, int]) -> Exception:
    worst = sorted(miss_counts, key=lambda c: -miss_counts[c])[:3]
    return fail("instruments-no-complete-rows", rows=rows_keyed, dropped=dropped,
                worst=", ".join(f"'{c}' ({miss_counts[c]} missing)" for c in worst))


def _sample(panel: Panel, outcome: str, regs: list[str], period_effects: bool, invariant: list[str],
            settings: Settings) -> Sample:
    """Stage 1: kinds, --treat-as-invariant, complete cases and the numeric design columns."""
    from auditor.stats.variation import compute_variation

    var = compute_variation(dataclasses.replace(panel, columns=(outcome, *regs)), settings)
    info = {r["name"]: r for r in var.columns.to_dicts()}
    kinds = {c: info[c]["kind"] for c in (outcome, *regs)}
    schema = panel.schema
    frame = panel.frame.select([UNIT_ID, PERIOD_ID, outcome, *regs])
    treated = []
    for c in invariant:
        frame, changed = _treat_as_invariant(frame, c, schema[c])
        treated.append((c, kinds[c], changed))
        kinds[c] = "time-invariant"

    rows_keyed = frame.height
    used = (outcome, *regs)
    miss_counts = missing_counts(frame, used, schema)
    frame = complete(frame, used, schema)
    dropped = rows_keyed - frame.height
    if frame.height == 0:
        raise _no_complete_rows(rows_keyed, dropped, miss_counts)
    _check_units(panel, frame[UNIT_ID])
    periods_present = tuple(sorted(frame[PERIOD_ID].unique().to_list()))
    levels = {c: level_counts(frame, c) for c in regs if _is_text(schema[c])}
    d = design_columns(panel, outcome, regs, levels, periods_present, period_effects,
                       settings.instruments.max_levels)
    return Sample(outcome, kinds, info, frame.select(d.exprs), d.design_cols, d.added, d.base_levels,
                  d.constant_text, periods_present, rows_keyed, dropped, miss_counts, tuple(treated),
                  tuple(invariant))


def design_names(sample: Sample) -> list[str]:
    """The numeric columns of a sample's ``num``: the outcome, then the design columns."""
    return ["__pa_y", *[name for name, _ in sample.design_cols], *sample.added_periods]


def equivalent_num(cp: Any) -> tuple[pl.DataFrame, np.ndarray, np.ndarray, pl.DataFrame]:
    """(``num`` frame, row weights, T_i by sorted unit, unit means by sorted unit) of the
    equivalent rows of merged unit moments (:func:`auditor.stats.moments.equivalent_rows`)."""
    from auditor.stats.moments import equivalent_rows

    codes, values, weights = equivalent_rows(cp)
    num = pl.DataFrame({UNIT_ID: pl.Series(UNIT_ID, codes, dtype=pl.Int64),
                        **{c: values[:, j] for j, c in enumerate(cp.columns)}})
    seen = cp.n > 0
    means = pl.DataFrame({c: cp.means[seen, j] for j, c in enumerate(cp.columns)})
    return num, weights, cp.n[seen].astype(np.float64), means


def equivalent_sample(sample: Sample, shards: int = 1, seed: int = 0) -> Sample:
    """The sample with its rows replaced by the equivalent rows of their unit moments,
    computed over ``shards`` random shards of the rows and merged (as the dask engine
    does across partitions): the fits on it equal the fits on the rows."""
    from auditor.stats import moments

    cols = design_names(sample)
    num = sample.num
    n_units = int(num[UNIT_ID].max()) + 1
    deal = np.random.default_rng(seed).integers(0, shards, num.height)
    parts = [moments.cross_products(num.filter(pl.Series(deal == k)), cols, n_units=n_units) for k in range(shards)]
    merged = moments.merge_stream(parts, moments.merge_cross)
    eq, weights, unit_rows, means = equivalent_num(merged)
    return dataclasses.replace(sample, num=eq, weights=weights, unit_rows=unit_rows, unit_means=means)


# --------------------------------------------------------------------------- stage 2: the design


@dataclass(frozen=True)
class Design:
    """Each design column's class and the numeric panel the fits see.

    ``periods`` are the period effects (the added dummies first, then the user's
    period-only regressors), ``x`` the other time-varying columns (nearly-time-invariant
    ones included), ``z`` the time-invariant ones, ``constant`` columns with one value.
    ``pa`` holds every column of ``periods + x`` in X and of ``z`` in Z.
    """

    periods: tuple[str, ...]
    x: tuple[str, ...]
    z: tuple[str, ...]
    constant: tuple[str, ...]
    col_kind: dict[str, str]
    pa: models.PanelArrays
    unbalanced: bool
    period: np.ndarray | None  # each row's index in the period grid (None for equivalent rows)


def _design(sample: Sample) -> Design:
    """Stage 2: period effects, X and Z from the kinds, and the numeric arrays."""
    periods, x, z, constant = list(sample.added_periods), [], [], list(sample.constant_text)
    col_kind: dict[str, str] = {p: "period-only" for p in sample.added_periods}
    for name, parent in sample.design_cols:
        k = sample.kinds[parent]
        col_kind[name] = k
        if k == "constant":
            constant.append(name)
        elif k == "time-invariant":
            z.append(name)
        elif k == "period-only":
            periods.append(name)
        else:
            x.append(name)
    num = sample.num
    codes_raw = num[UNIT_ID].to_numpy().astype(np.int64)
    _, codes = np.unique(codes_raw, return_inverse=True)

    def matrix(cols: list[str]) -> np.ndarray:
        if not cols:
            return np.zeros((num.height, 0))
        return np.asfortranarray(num.select(cols).to_numpy().astype(float))

    y = num["__pa_y"].to_numpy().astype(float)
    xcols = periods + x
    means = None
    if sample.unit_means is not None:
        means = sample.unit_means.select(["__pa_y", *xcols, *z]).to_numpy().astype(float)
    pa = models.PanelArrays(codes=codes.astype(np.int64), n=int(codes.max()) + 1, y=y, x=matrix(xcols),
                            x_names=tuple(xcols), z=matrix(z), z_names=tuple(z), weights=sample.weights,
                            unit_rows=sample.unit_rows, means=means)
    # the rows' periods (None for the equivalent rows of unit moments, which have none)
    period = num[PERIOD_ID].to_numpy().astype(np.int64) if PERIOD_ID in num.columns else None
    return Design(tuple(periods), tuple(x), tuple(z), tuple(constant), col_kind, pa, not pa.balanced_counts, period)


def _moved_to_z(design: Design, moved: tuple[str, ...]) -> Design:
    """The design with time-varying columns that have no within variation to speak of moved to Z."""
    pa = design.pa
    keep = [c for c in pa.x_names if c not in moved]
    xi = [pa.x_names.index(c) for c in keep]
    mi = [pa.x_names.index(c) for c in moved]
    new = models.PanelArrays(codes=pa.codes, n=pa.n, y=pa.y, x=np.asfortranarray(pa.x[:, xi]), x_names=tuple(keep),
                             z=np.asfortranarray(np.column_stack([pa.z, pa.x[:, mi]])),
                             z_names=(*pa.z_names, *moved), weights=pa.weights, unit_rows=pa.unit_rows,
                             means=None if pa.weights is None else np.column_stack([pa.ybar, pa.xbar[:, xi], pa.zbar,
                                                                                    pa.xbar[:, mi]]))
    return dataclasses.replace(design, x=tuple(c for c in design.x if c not in moved), z=(*design.z, *moved),
                               col_kind={**design.col_kind, **{c: "time-invariant" for c in moved}}, pa=new)


# --------------------------------------------------------------------------- stage 4: roles
