"""compare's stages on columns across the boundary: what returning units did.

What the base profile says of each column (:func:`base_kinds`), which columns are held
fixed within units and which change (:func:`fixed_and_changing`), and the checks of
returning units (:func:`within_checks`): a fixed value reported differently
(invariant-changed), a change far from what the base's own within-unit changes say
(implausible-jump), units disagreeing on a period-only column (period-value-differs).
Conventions: auditor/commands/compare.py's docstring (README, "A new wave").
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import polars as pl

from auditor.checks.config import Settings
from auditor.commands.compare_align import BASE_UNIT, FindingSink, Sides
from auditor.commands.compare_measures import (
    change_scale,
    json_value,
    plural,
    rounded,
    unit_period_order,
    verb,
)
from auditor.commands.compare_values import (
    FixedValueCheck,
    JumpCheck,
    SharedValueCheck,
    WithinCheck,
)
from auditor.io.load import UNIT_ID
from auditor.io.waves import POS


@dataclass(frozen=True)


class BaseKinds:
    """What the base's profile says of each column, by name: its kind (time-varying,
    time-invariant, ...), its distinct values, the units seen twice, those whose value
    changes, and the share of the one among the other (empty without a profile table)."""

    kind: dict[str, str] = field(default_factory=dict)
    distinct: dict[str, int] = field(default_factory=dict)
    observed_twice: dict[str, int] = field(default_factory=dict)
    units_changing: dict[str, int] = field(default_factory=dict)
    changing_share: dict[str, float] = field(default_factory=dict)


def base_kinds(prof: Any) -> BaseKinds:
    """The BaseKinds of a profile result (its ``columns`` table; empty when it has none)."""
    cols = getattr(prof, "columns", None)
    if not isinstance(cols, pl.DataFrame) or "name" not in cols.columns or "kind" not in cols.columns:
        return BaseKinds()
    names = cols["name"].to_list()
    distinct = dict(zip(names, cols["distinct"].to_list(), strict=True)) if "distinct" in cols.columns else {}
    if not {"units_changing", "units_observed_twice"} <= set(cols.columns):
        return BaseKinds(kind=dict(zip(names, cols["kind"].to_list(), strict=True)), distinct=distinct)
    rows = cols.select("name", "units_changing", "units_observed_twice").iter_rows(named=True)
    twice, changing, share = {}, {}, {}
    for r in rows:
        twice[r["name"]] = r["units_observed_twice"] or 0
        changing[r["name"]] = r["units_changing"] or 0
        share[r["name"]] = (r["units_changing"] or 0) / r["units_observed_twice"] if r["units_observed_twice"] else 0.0
    return BaseKinds(kind=dict(zip(names, cols["kind"].to_list(), strict=True)), distinct=distinct,
                     observed_twice=twice, units_changing=changing, changing_share=share)


def fixed_and_changing(sides: Sides, kinds: BaseKinds, settings: Settings) -> tuple[list[str], list[str]]:
    """The compared columns held fixed within units, and the numeric ones checked for jumps.

    Fixed: constant, time-invariant, and nearly-time-invariant columns where few units
    change (at most ``profile.nearly_invariant_units_share``), each seen twice in at least
    ``compare.invariant_min_units`` units. A column nearly invariant only because its
    within share is small still changes for most units: it is checked for jumps instead.
    """
    few = settings.profile.nearly_invariant_units_share
    min_units = settings.compare.invariant_min_units

    def fixed(c: str) -> bool:
        k = kinds.kind.get(c)
        if kinds.observed_twice.get(c, 0) < min_units:  # too few repeat observations to call it fixed
            return False
        if k in ("constant", "time-invariant"):
            return True
        return k == "nearly-time-invariant" and kinds.changing_share.get(c, 0.0) <= few

    inv = [c for c in sides.compared if fixed(c)]
    jump = [
        c for c in sides.numeric
        if kinds.kind.get(c) == "time-varying" or (kinds.kind.get(c) == "nearly-time-invariant" and c not in inv)
    ]
    return inv, jump


@dataclass(frozen=True)


class _Learned:
    """What the base's within-unit changes of one column say: each unit's last value and its
    position (arrays by base unit code, NaN where the unit has none), and either the step a
    period (``step``) or the centre and robust scale of the changes and how it was found."""

    last: np.ndarray
    bpos: np.ndarray
    step: float | None
    centre: float | None
    scale: float | None
    method: str

    def check(self, jumps: int) -> JumpCheck:
        """The column's JumpCheck, with ``jumps`` implausible jumps."""
        if self.step is not None:
            return JumpCheck(change_median=rounded(self.step), change_scale=rounded(abs(self.step)),
                             change_scale_method="step", expected_step=rounded(self.step), implausible_jumps=jumps)
        return JumpCheck(change_median=rounded(self.centre), change_scale=rounded(self.scale),
                         change_scale_method=self.method, expected_step=None, implausible_jumps=jumps)


def within_checks(
    sides: Sides, kinds: BaseKinds, settings: Settings, sink: FindingSink
) -> dict[str, WithinCheck]:
    """What each column's returning units did across the boundary, by column: fixed columns
    (invariant-changed), changing numeric columns (implausible-jump, against what the base's
    own within-unit changes say) and period-only columns (period-value-differs)."""
    tol = settings.profile.float_tolerance
    inv, jump = fixed_and_changing(sides, kinds, settings)
    info: dict[str, WithinCheck] = {}
    if inv or jump:
        learned = _learn_changes(sides, jump, tol, settings) if jump else {}
        both, narrow = _returning_pairs(sides, inv, jump, learned)
        # Invariant columns: a returning unit changes when its first new value is none of the
        # values it ever reported in the base.
        for c in inv:
            info[c] = _invariant_changes(sides, c, kinds, both, narrow, tol, sink)
        if jump:
            info.update(_jumps(sides, jump, both, learned, settings, sink))
    for c in [c for c in sides.compared if kinds.kind.get(c) == "period-only"]:
        info[c] = _period_only(sides, c, tol, sink)
    return info


def _invariant_changes(
    sides: Sides, c: str, kinds: BaseKinds, both: pl.DataFrame, narrow: pl.DataFrame, tol: float, sink: FindingSink
) -> FixedValueCheck:
    """invariant-changed: returning units whose first new value of the fixed column ``c`` is
    none of the values they ever reported in the base (so a one-season typo in the base is
    not held against a correct new value)."""
    a, b = pl.col(f"{c}\x00base"), pl.col(c)
    if c in sides.numeric:
        differs = (b - a).abs() > tol * (1 + a.abs())
    else:
        differs = a != b
    # candidates differ from their last base value; only they need all their base values
    cand = both.select(BASE_UNIT, *sides.nkeys, c, f"{c}\x00base").filter(
        b.is_not_null() & a.is_not_null() & differs
    )
    pairs = (
        narrow.filter(pl.col(UNIT_ID).is_in(cand.get_column(BASE_UNIT).implode()))
        .select(UNIT_ID, pl.col(c).alias("__pa_b"))
        .drop_nulls()
        .unique()
    )
    matched = cand.join(pairs, left_on=BASE_UNIT, right_on=UNIT_ID, how="inner")
    if c in sides.numeric:
        same = (pl.col(c) - pl.col("__pa_b")).abs() <= tol * (1 + pl.col("__pa_b").abs())
    else:
        same = pl.col(c) == pl.col("__pa_b")
    seen = matched.filter(same).select(BASE_UNIT).unique()
    # units with base values for c, none of them equal to the new one
    has_base = matched.select(BASE_UNIT).unique()
    changed = (
        cand.join(has_base, on=BASE_UNIT, how="semi")
        .join(seen, on=BASE_UNIT, how="anti")
        .sort(sides.nkeys)
    )
    n = changed.height
    if not n:
        return FixedValueCheck(n)
    sink.keep("invariant-changed", changed.select(
        *sides.nkeys, pl.lit(c).alias("column"), pl.col(f"{c}\x00base").cast(pl.String).alias("base_value"),
        pl.col(c).cast(pl.String).alias("new_value")))
    examples = [
        {**sides.keys_of(r),
         "base": json_value(r[f"{c}\x00base"]), "new": json_value(r[c])}
        for r in changed.head(sink.examples).iter_rows(named=True)
    ]
    if kinds.kind.get(c) == "nearly-time-invariant":
        moved = kinds.units_changing.get(c, 0)
        seen_twice = kinds.observed_twice.get(c, 0)
        held = (f"'{c}' is nearly time-invariant in the base (it changes within only "
                f"{plural(moved, 'unit')} of the {seen_twice:,} seen twice)")
    else:
        held = f"'{c}' does not change within units in the base"
    sink.add(
        "invariant-changed",
        f"{held}, but {plural(n, 'returning unit')} "
        f"{verb(n, 'reports', 'report')} a value in the new wave {verb(n, 'it', 'they')} never reported before; "
        "a fixed-effects model would read these as real changes: confirm them with the source or keep "
        "the base value",
        column=c,
        count=n,
        examples=examples,
    )
    return FixedValueCheck(n)


def _returning_pairs(
    sides: Sides, inv: Sequence[str], jump: Sequence[str], learned: dict[str, _Learned]
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Per returning unit, its first new value of each checked column beside its last base
    value (``{c}\\x00base``; for a changing column also the positions ``{c}\\x00npos`` and
    ``{c}\\x00bpos``), with its text keys; and the base rows of the fixed columns (unit
    code, position, values), which :func:`_invariant_changes` reads."""
    cols = [*inv, *jump]
    n_units = sides.bunits.height
    base_last = pl.DataFrame({UNIT_ID: pl.Series(UNIT_ID, np.arange(n_units), dtype=pl.UInt32)}).with_columns(
        [pl.Series(name, arr).fill_nan(None)
         for c in jump for name, arr in ((c, learned[c].last), (f"{c}\x00bpos", learned[c].bpos))]
    )
    narrow = sides.base.select(UNIT_ID, POS, *inv).sort(UNIT_ID, POS) if inv else sides.base.head(0)
    if inv:
        fixed = narrow.group_by(UNIT_ID).agg([pl.col(c).drop_nulls().last().alias(c) for c in inv])
        base_last = base_last.join(fixed.with_columns(pl.col(UNIT_ID).cast(pl.UInt32)), on=UNIT_ID, how="left")
    new_first = (
        sides.new.filter(pl.col(BASE_UNIT).is_not_null())
        .select(BASE_UNIT, POS, *cols)
        .sort(BASE_UNIT, POS)
        .group_by(BASE_UNIT)
        .agg(
            [pl.col(c).drop_nulls().first().alias(c) for c in cols]
            + [pl.col(POS).filter(pl.col(c).is_not_null()).first().alias(f"{c}\x00npos") for c in jump]
        )
    )
    both = new_first.with_columns(pl.col(BASE_UNIT).cast(pl.UInt32)).join(
        base_last.rename({c: f"{c}\x00base" for c in cols}), left_on=BASE_UNIT, right_on=UNIT_ID, how="inner"
    ).join(sides.bunits.rename({UNIT_ID: BASE_UNIT}), on=BASE_UNIT, how="left")
    return both, narrow


def _learn_changes(sides: Sides, jump: Sequence[str], tol: float, settings: Settings) -> dict[str, _Learned]:
    """What the base's own within-unit changes say about each column: a step it moves by a
    period for (nearly) every unit (an age), or the centre and robust scale of its changes
    (:func:`change_scale`); and each unit's last value and its position. numpy, one
    column per thread."""
    step_share = settings.compare.step_share
    zero_share = settings.compare.jump_zero_share
    n_units = sides.bunits.height
    # rows in (unit, period) order by one integer sort (numpy's stable sort merges the
    # runs of a file written period by period), then each column's consecutive changes
    units = sides.base.get_column(UNIT_ID).to_numpy()
    pos = sides.base.get_column(POS).to_numpy()
    order = unit_period_order(units, pos)
    units, pos = units[order], pos[order]
    same = units[1:] == units[:-1]
    pairs = np.flatnonzero(same)  # row i and i + 1 are one unit's consecutive rows
    after = pairs + 1
    last_rows = np.flatnonzero(np.r_[~same, True]) if units.size else np.zeros(0, dtype=np.intp)
    k = (pos[after] - pos[pairs]) / float(sides.step or 1)
    one_step = bool(np.all(k == 1))

    def learn(c: str) -> _Learned:
        x = sides.base.get_column(c).to_numpy().astype(float, copy=False)[order]  # null as NaN
        gaps = np.isnan(x)
        if not gaps.any():  # every row has a value: each unit's last row is its last value
            ends = last_rows
        else:
            valid = np.flatnonzero(~gaps)
            ends = valid[np.r_[units[valid[1:]] != units[valid[:-1]], True]] if valid.size else valid
        last, bpos = np.full(n_units, np.nan), np.full(n_units, np.nan)
        last[units[ends]], bpos[units[ends]] = x[ends], pos[ends]
        changes = x[after] - x[pairs]
        seen = ~np.isnan(changes)
        changes = changes[seen]
        per = changes if one_step else changes[k[seen] > 0] / k[seen][k[seen] > 0]
        if per.size:
            # A step needs step_share of the changes on one value, a block of sorted positions
            # that holds every position from (1 - share) n to share n - 1 wherever it starts:
            # quantiles just inside those (one partition, with the median) disagree otherwise.
            inner = min(0.5, 1 - step_share + 0.01) if per.size >= 200 else 0.5
            lo, m, hi = np.quantile(per, [inner, 0.5, 1 - inner])
            if m != 0 and hi - lo <= 2 * tol * (1 + abs(m)):
                if np.mean(np.abs(per - m) <= tol * (1 + abs(m))) >= step_share:
                    return _Learned(last, bpos, step=float(m), centre=None, scale=None, method="step")
        centre, scale, method = change_scale(changes, zero_share=zero_share)
        return _Learned(last, bpos, step=None, centre=centre, scale=scale, method=method)

    from concurrent.futures import ThreadPoolExecutor

    from auditor.stats.moments import workers

    with ThreadPoolExecutor(max_workers=workers()) as pool:  # numpy releases the GIL in these loops
        return dict(zip(jump, pool.map(learn, jump), strict=True))


def _jumps(
    sides: Sides, jump: Sequence[str], both: pl.DataFrame, learned: dict[str, _Learned], settings: Settings,
    sink: FindingSink,
) -> dict[str, JumpCheck]:
    """implausible-jump: each returning unit's change across the boundary against what the
    base's own within-unit changes say (:func:`_learn_changes`): a stepped column is judged
    in steps away from the expected change, the others in robust deviations."""
    cut = settings.compare.jump_mads
    step_cut = settings.compare.jump_steps
    zs = []
    for c in jump:
        entry = learned[c]
        new_change = pl.col(c) - pl.col(f"{c}\x00base")
        step, centre, scale = entry.step, entry.centre, entry.scale
        if step is not None:
            # the change expected across the boundary is the step times the periods between
            expected = step * sides.periods_between(pl.col(f"{c}\x00npos"), pl.col(f"{c}\x00bpos"))
            zs.append(((new_change - expected).abs() / abs(step) * (cut / step_cut)).alias(f"{c}\x00z"))
        elif not scale:
            zs.append(pl.lit(None, dtype=pl.Float64).alias(f"{c}\x00z"))
        else:
            z = (new_change - centre).abs() / scale
            if entry.method.startswith("non-zero"):
                z = pl.when(new_change == 0).then(0.0).otherwise(z)
            zs.append(z.alias(f"{c}\x00z"))
    zed = both.with_columns(zs)
    info: dict[str, JumpCheck] = {}
    for c in jump:
        hit = zed.filter(pl.col(f"{c}\x00z") > cut)
        found = learned[c].check(hit.height)
        info[c] = found
        if not hit.height:
            continue
        sink.keep("implausible-jump", hit.sort(sides.nkeys).select(
            *sides.nkeys, pl.lit(c).alias("column"),
            sides.labels_expr(f"{c}\x00bpos").alias("base_period"),
            pl.col(f"{c}\x00base").cast(pl.String).alias("base_value"),
            sides.labels_expr(f"{c}\x00npos").alias("new_period"),
            pl.col(c).cast(pl.String).alias("new_value"),
            pl.col(f"{c}\x00z").round(3).alias("distance")))
        stepped = found.expected_step is not None
        ex = hit.sort(f"{c}\x00z", descending=True).head(sink.examples)
        examples = []
        for r in ex.iter_rows(named=True):
            e = {**sides.keys_of(r), "base": json_value(r[f"{c}\x00base"]), "new": json_value(r[c])}
            if stepped:
                e["steps_off"] = round(float(r[f"{c}\x00z"]) * step_cut / cut, 2)
            else:
                e["robust_z"] = round(float(r[f"{c}\x00z"]), 2)
            examples.append(e)
        if stepped:
            why = (f"by more than {step_cut:g} steps away from the base's own change of "
                   f"{found.expected_step:+g} a period")
        else:
            why = (f"by more than {cut:g} robust deviations of the base's own period-to-period changes "
                   f"(scale: {found.change_scale_method})")
        sink.add(
            "implausible-jump",
            f"'{c}' jumps for {plural(hit.height, 'returning unit')} {why}; check for a unit or entry "
            "error (a missed decimal, another measure) before appending",
            column=c,
            count=hit.height,
            examples=examples,
        )
    return info


def _period_only(sides: Sides, c: str, tol: float, sink: FindingSink) -> SharedValueCheck:
    """A column all units share within each base period (a price, a national index) must
    again hold one value per period in the new wave: period-value-differs otherwise."""
    v = pl.col(c)
    if c in sides.numeric:
        differs = (v.max() - v.min()) > tol * (1 + v.mean().abs())
    else:
        differs = v.drop_nulls().n_unique() > 1
    per = (
        sides.new.group_by(POS)
        .agg(differs.fill_null(False).alias("__pa_d"), v.drop_nulls().n_unique().alias("__pa_n"),
             v.min().alias("__pa_lo"), v.max().alias("__pa_hi"))
        .filter(pl.col("__pa_d"))
        .sort(POS)
    )
    if per.height:
        first = per.row(0, named=True)
        sink.add(
            "period-value-differs",
            f"'{c}' holds one value for every unit in each base period, but in "
            f"{plural(per.height, 'period')} of the new wave units hold different values "
            f"({first['__pa_n']} values in {sides.label(first[POS])}, {json_value(first['__pa_lo'])} to "
            f"{json_value(first['__pa_hi'])}); a period effect absorbs it only if every unit shares it: "
            "check the wave's values",
            column=c,
            count=per.height,
            examples=[
                {"period": sides.label(r[POS]), "values": int(r["__pa_n"]),
                 "lowest": json_value(r["__pa_lo"]), "highest": json_value(r["__pa_hi"])}
                for r in per.head(sink.examples).iter_rows(named=True)
            ],
        )
    return SharedValueCheck(per.height)
