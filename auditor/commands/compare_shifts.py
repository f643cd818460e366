"""compare's stages on distributions: code lists, and each column's shift against the base.

:func:`level_checks` compares code lists (new-categories, vanished-categories);
:func:`column_shifts` compares each column's distribution in the new wave with the
base's last period (distribution-shift, missing-jump) and returns the per-column rows
of the result. Conventions: auditor/commands/compare.py's docstring.
"""

from __future__ import annotations

import math

import numpy as np
import polars as pl

from auditor.checks.config import Settings
from auditor.commands.compare_align import FindingSink, LevelCounts, Sides
from auditor.commands.compare_columns import BaseKinds
from auditor.commands.compare_measures import (
    ks_two_sample,
    level_psi,
    numeric_psi,
    plural,
    rounded,
    significant,
)
from auditor.commands.compare_values import ColumnShift, JumpCheck, LevelCheck, WithinCheck
from auditor.errors import short_list
from auditor.io.waves import POS


def level_checks(sides: Sides, kinds: BaseKinds, counts: LevelCounts, settings: Settings,
                 sink: FindingSink) -> dict[str, LevelCheck]:
    """new-categories and vanished-categories of each text or boolean column whose base holds
    at most ``compare.category_max_levels`` levels; returns the LevelCheck by column."""
    max_levels = settings.compare.category_max_levels
    min_expected = settings.compare.vanished_min_expected
    distinct = kinds.distinct
    info: dict[str, LevelCheck] = {}
    n_new = sides.new.height
    for c in sides.levels:
        nb = distinct.get(c)
        base_levels = sides.base.select(pl.col(c).drop_nulls().unique()).to_series()
        if nb is None:
            nb = base_levels.len()
        if nb > max_levels:
            info[c] = LevelCheck(checked=False)
            continue
        new_counts = counts.new[c]
        fresh = new_counts.filter(~pl.col(c).is_in(base_levels.implode())).sort("n", c, descending=[True, False])
        ref_counts = counts.reference[c]
        ref_total = max(int(ref_counts.get_column("n").sum()), 1)
        gone = (
            ref_counts.filter(~pl.col(c).is_in(new_counts.get_column(c).implode()))
            .with_columns((pl.col("n") / ref_total * n_new).alias("expected"))
            .filter(pl.col("expected") >= min_expected)
            .sort("n", c, descending=[True, False])
        )
        info[c] = LevelCheck(checked=True, new_levels=fresh.height, vanished_levels=gone.height)
        if fresh.height:
            rows = int(fresh.get_column("n").sum())
            sink.keep("new-categories", fresh.select(pl.lit(c).alias("column"), pl.col(c).cast(pl.String)
                                                      .alias("level"), pl.col("n").alias("rows")))
            sink.add(
                "new-categories",
                f"'{c}' has {plural(fresh.height, 'level')} never seen in the base "
                f"({short_list(fresh.get_column(c).head(6).to_list(), 6)}; {plural(rows, 'row')}); "
                "map them to the base's code list or document the new codes before appending",
                column=c,
                count=fresh.height,
                examples=[{"level": r[c], "rows": int(r["n"])} for r in fresh.head(sink.examples).iter_rows(named=True)],
            )
        if gone.height:
            sink.add(
                "vanished-categories",
                f"'{c}' has {plural(gone.height, 'level')} of base period {sides.label(sides.last_pos)} that no "
                f"row of the new wave uses ({short_list(gone.get_column(c).head(6).to_list(), 6)}); check "
                "whether the code list was changed or merged",
                column=c,
                count=gone.height,
                examples=[
                    {"level": r[c], "rows_in_reference": int(r["n"]), "expected_new_rows": round(float(r["expected"]), 1)}
                    for r in gone.head(sink.examples).iter_rows(named=True)
                ],
            )
    return info


def _numeric_samples(
    sides: Sides, jump_info: dict[str, WithinCheck], settings: Settings
) -> dict[str, tuple[np.ndarray, np.ndarray, float]]:
    """Per numeric column: the reference sample and the new wave's (less the base's step
    for a stepped column), sorted, and their stability index; one column per thread."""
    bins = settings.compare.psi_bins
    smoothing = settings.compare.psi_smoothing
    new_values = []
    for c in sides.numeric:
        values = pl.col(c)
        within = jump_info.get(c)
        step = within.expected_step if isinstance(within, JumpCheck) else None
        if step is not None:
            # like with like: the new wave less the base's step times the periods since the reference
            values = values - step * sides.periods_between(pl.col(POS), pl.lit(sides.last_pos))
        new_values.append(values.alias(c))
    shifted = sides.new.select(new_values) if new_values else None

    def prepare(c: str) -> tuple[np.ndarray, np.ndarray, float]:
        a = np.sort(sides.reference.get_column(c).drop_nulls().to_numpy().astype(float, copy=False))
        b = np.sort(shifted.get_column(c).drop_nulls().to_numpy().astype(float, copy=False))
        return a, b, numeric_psi(a, b, bins=bins, smoothing=smoothing, assume_sorted=True)

    from concurrent.futures import ThreadPoolExecutor

    from auditor.stats.moments import workers

    with ThreadPoolExecutor(max_workers=workers()) as pool:  # numpy's sorts release the GIL
        return dict(zip(sides.numeric, pool.map(prepare, sides.numeric), strict=True))


def _distribution(
    sides: Sides, j: int, c: str, kind: str | None, within: WithinCheck | None, levels: LevelCheck | None,
    sample: tuple[np.ndarray, np.ndarray, float] | None, counts: LevelCounts, settings: Settings, sink: FindingSink,
) -> ColumnShift:
    """distribution-shift and missing-jump of column ``c`` (the ``j``-th compared), and its
    ColumnShift: KS and quantile-bin PSI for a numeric column (``sample``: the sorted
    reference and new values and their PSI), PSI over levels for the others."""
    smoothing = settings.compare.psi_smoothing
    miss = f"__pa_miss_{j}"
    ref_rows, new_rows = sides.reference.height, sides.new.height
    mb = float(sides.reference.get_column(miss).mean()) if ref_rows else math.nan
    mn = float(sides.new.get_column(miss).mean()) if new_rows else math.nan
    ks_stat = ks_p = math.nan
    ks_method = ""
    if c in sides.numeric:
        if sample is None:
            raise RuntimeError(f"no numeric sample of '{c}'")  # the stages prepare one per numeric column
        a, b, psi = sample
        kind_cmp = "numeric"
        ks_stat, ks_p, ks_method = ks_two_sample(a, b)
        nb, nn = a.size, b.size
    else:
        bc, nc = counts.reference[c], counts.new[c]
        bd = dict(zip(bc[c].to_list(), bc["n"].to_list(), strict=True))
        nd = dict(zip(nc[c].to_list(), nc["n"].to_list(), strict=True))
        max_levels = settings.compare.category_max_levels
        if len(bd) > max_levels:
            psi = math.nan
        else:
            psi = level_psi(bd, nd, smoothing=smoothing)
        kind_cmp = "levels"
        nb, nn = sum(bd.values()), sum(nd.values())
    ref = f"base period {sides.label(sides.last_pos)}"
    cut = settings.compare.psi_shift
    # A period-only column changes with the period by definition: its shift is no alarm
    # (period-value-differs judges it); a stepped column was compared less its step.
    if math.isfinite(psi) and psi > cut and kind != "period-only":
        sink.add(
            "distribution-shift",
            f"the distribution of '{c}' in the new wave differs from {ref} (stability index "
            f"{psi:.2f} > {cut:g}); check for a changed question, unit of measure or coding before "
            "appending",
            column=c,
            count=nn,
        )
    jump_amount = settings.compare.missing_jump
    if math.isfinite(mb) and math.isfinite(mn) and mn - mb > jump_amount:
        sink.add(
            "missing-jump",
            f"'{c}' is missing in {mn:.1%} of the new wave's rows against {mb:.1%} in {ref}; find out "
            "why (a skipped question, a broken export) before appending",
            column=c,
            count=int(round(mn * new_rows)),
        )
    return ColumnShift(
        column=c,
        compared_as=kind_cmp,
        base_kind=kind,
        reference=ref,
        n_base=int(nb),
        n_new=int(nn),
        ks_statistic=rounded(ks_stat),
        ks_p=significant(ks_p),
        ks_p_method=ks_method or None,
        psi=rounded(psi),
        missing_base=rounded(mb),
        missing_new=rounded(mn),
        within=within,
        levels=levels,
    )

# -- merged ---------------------------------------------------------------------------


def column_shifts(
    sides: Sides, kinds: BaseKinds, within: dict[str, WithinCheck], levels: dict[str, LevelCheck],
    counts: LevelCounts, settings: Settings, sink: FindingSink,
) -> tuple[ColumnShift, ...]:
    """One ColumnShift per compared column, new wave against the base's last period (a
    stepped column less its step), with the check each column had."""
    samples = _numeric_samples(sides, within, settings)
    return tuple(
        _distribution(sides, j, c, kinds.kind.get(c), within.get(c), levels.get(c), samples.get(c), counts,
                      settings, sink)
        for j, c in enumerate(sides.compared)
    )
