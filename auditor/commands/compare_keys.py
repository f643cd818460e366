"""compare's stages on keys: which units come back, and where the new periods fall.

Each stage reads the aligned :class:`~auditor.commands.compare_align.Sides`, adds its
findings to the run's FindingSink and returns the typed part of the result it computes.
"""

from __future__ import annotations

import polars as pl

from auditor.commands.compare_align import BASE_UNIT, FindingSink, Sides
from auditor.commands.compare_measures import labels_text, plural, verb
from auditor.commands.compare_values import PeriodPlacement, UnitFlow
from auditor.io.load import UNIT_ID, Panel
from auditor.io.waves import POS


def unit_flow(sides: Sides, sink: FindingSink) -> UnitFlow:
    """Who came back, who entered, who did not return (returning-after-absence,
    units-not-returning); returns the UnitFlow."""
    last = sides.base.group_by(UNIT_ID).agg(pl.col(POS).max().alias("__pa_last"))
    returning = sides.code_map.filter(pl.col(BASE_UNIT).is_not_null())
    n_ret = returning.height
    entering = sides.code_map.height - n_ret
    not_returning = sides.bunits.join(returning.select(BASE_UNIT), left_on=UNIT_ID, right_on=BASE_UNIT, how="anti")
    after_gap = (
        returning.join(last, left_on=BASE_UNIT, right_on=UNIT_ID, how="inner")
        .filter(pl.col("__pa_last") < sides.last_pos)
        .sort(sides.nkeys)
    )
    if after_gap.height:
        sink.keep("returning-after-absence", after_gap.select(
            *sides.nkeys, sides.labels_expr("__pa_last").alias("last_base_period")))
        examples = [
            {**sides.keys_of(r), "last_base_period": sides.label(int(r["__pa_last"]))}
            for r in after_gap.head(sink.examples).iter_rows(named=True)
        ]
        sink.add(
            "returning-after-absence",
            f"{plural(after_gap.height, 'returning unit')} {'was' if after_gap.height == 1 else 'were'} "
            "absent from the base's last period "
            f"{sides.label(sides.last_pos)}; their gap stays in the panel: check they are the same units "
            "(not re-used ids) before appending",
            count=after_gap.height,
            examples=examples,
        )
    # Of the units the base holds in its last period, those the new wave does not bring back.
    in_last = sides.base.filter(pl.col(POS) == sides.last_pos).select(UNIT_ID).unique()
    left_last = (
        not_returning.join(in_last, on=UNIT_ID, how="semi").sort(sides.nkeys)
    )
    if left_last.height:
        sink.keep("units-not-returning", left_last.select(*sides.nkeys))
        sink.add(
            "units-not-returning",
            f"{plural(left_last.height, 'unit')} of base period {sides.label(sides.last_pos)} "
            f"{'is' if left_last.height == 1 else 'are'} not in the new wave; if they left the survey, "
            "attrition may select the sample: compare their base answers with the stayers'",
            count=left_last.height,
            examples=sides.unit_examples(left_last, sink.examples),
        )
    return UnitFlow(
        base=sides.bunits.height,
        new=sides.code_map.height,
        returning=n_ret,
        entering=entering,
        not_returning=not_returning.height,
        returning_after_absence=after_gap.height,
        last_period=in_last.height,
        not_returning_from_last_period=left_last.height,
    )


def period_placement(sides: Sides, newp: Panel, sink: FindingSink) -> PeriodPlacement:
    """Where the new wave's periods fall: keys the base holds already (overlapping-periods),
    rows backfilling held periods (backfilled-rows), keys repeated inside the wave
    (duplicate-keys), rows without a key (missing-keys) and periods off the base grid
    (unexpected-period); returns the PeriodPlacement."""
    base_set = set(sides.base_pos)
    overlap = [p for p in sides.new_pos if p in base_set]
    keys = [BASE_UNIT, POS]
    colliding = 0
    if overlap:
        held = sides.base.filter(pl.col(POS).is_in(overlap)).select(pl.col(UNIT_ID).alias(BASE_UNIT), POS).unique()
        in_overlap = sides.new.filter(pl.col(POS).is_in(overlap) & pl.col(BASE_UNIT).is_not_null())
        hits = in_overlap.select(keys).unique().join(held, on=keys, how="semi")
        colliding = hits.height
        if colliding:
            sink.keep("overlapping-periods", hits.sort(keys).join(
                sides.bunits.rename({UNIT_ID: BASE_UNIT}), on=BASE_UNIT, how="left").select(
                *sides.nkeys, sides.labels_expr(POS).alias(sides.time)))
            hit_periods = sorted(hits.get_column(POS).unique().to_list())
            labels = [sides.label(p) for p in hit_periods]
            ex = (
                hits.sort(keys)
                .head(sink.examples)
                .join(sides.bunits.rename({UNIT_ID: BASE_UNIT}), on=BASE_UNIT, how="left")
                .sort(keys)
            )
            examples = [
                {**sides.keys_of(r), sides.time: sides.label(r[POS])}
                for r in ex.iter_rows(named=True)
            ]
            sink.add(
                "overlapping-periods",
                f"{plural(colliding, '(unit, period) key')} of the new wave {'is' if colliding == 1 else 'are'} "
            "already in the base "
                f"(period {labels_text(labels)}); appending would duplicate them: drop or re-key the "
                f"{labels_text(labels)} rows of the new wave before appending, or replace the base's "
                "rows on purpose",
                count=colliding,
                examples=examples,
            )
        late = in_overlap.height + sides.new.filter(
            pl.col(POS).is_in(overlap) & pl.col(BASE_UNIT).is_null()
        ).height - in_overlap.join(held, on=keys, how="semi").height
        if late:
            sink.add(
                "backfilled-rows",
                f"{plural(late, 'row')} of the new wave {verb(late, 'falls', 'fall')} in periods the base already holds "
                f"({labels_text([sides.label(p) for p in overlap])}) without colliding with its keys; "
                "appending backfills those periods: check this is intended",
                count=late,
            )
    # duplicates inside the new wave
    dup = sides.new.group_by(UNIT_ID, POS).agg(pl.len().alias("__pa_n")).filter(pl.col("__pa_n") > 1)
    if dup.height:
        extra = int((dup.get_column("__pa_n") - 1).sum())
        sink.keep("duplicate-keys", dup.sort(UNIT_ID, POS).join(sides.nunits, on=UNIT_ID, how="left").select(
            *sides.nkeys, sides.labels_expr(POS).alias(sides.time), pl.col("__pa_n").alias("rows")))
        ex = dup.sort(UNIT_ID, POS).head(sink.examples).join(sides.nunits, on=UNIT_ID, how="left")
        examples = [
            {**sides.keys_of(r), sides.time: sides.label(r[POS]),
             "rows": int(r["__pa_n"])}
            for r in ex.iter_rows(named=True)
        ]
        sink.add(
            "duplicate-keys",
            f"{plural(extra, 'row')} of the new wave {verb(extra, 'repeats', 'repeat')} a (unit, period) key already used in the "
            "wave; keep one row per key before appending",
            count=extra,
            examples=examples,
        )
    if newp.missing_keys:
        sink.add(
            "missing-keys",
            f"{plural(newp.missing_keys, 'row')} of the new wave {verb(newp.missing_keys, 'has', 'have')} no unit or no period; they "
            "cannot be appended: fill in their keys or drop them",
            count=newp.missing_keys,
            examples=newp.missing_key_examples[: sink.examples],
        )
    _unexpected_periods(sides, base_set, sink)
    return PeriodPlacement(
        base=tuple(sides.label(p) for p in sides.base_pos),
        new=tuple(sides.label(p) for p in sides.new_pos),
        overlap=tuple(sides.label(p) for p in overlap),
        frequency=sides.frequency,
        step=sides.step,
        colliding_keys=colliding,
    )


def _unexpected_periods(sides: Sides, base_set: set[int], sink: FindingSink) -> None:
    """unexpected-period: a new period off the base grid's step, before its start, inside
    it, or skipping periods after its end."""
    step = sides.step
    if step is None:
        return
    first, last = sides.base_pos[0], sides.last_pos
    fresh = [p for p in sides.new_pos if p not in base_set]
    later = [p for p in fresh if p > last]
    expected = {last + step * k for k in range(1, len(later) + 1)}
    held = set(sides.new_pos)
    problems = []
    for p in fresh:
        if p > last and p in expected:
            continue
        if (p - first) % step != 0:
            why = f"is not on the base grid's step of {step}"
        elif p < first:
            why = "comes before the base's first period"
        elif p < last:
            why = "fills a period missing inside the base grid"
        else:
            # the periods between, counted (never listed: a mistyped 20190101 on a yearly
            # grid would skip twenty million of them)
            between = (p - last) // step - 1
            covered = sum(1 for q in held if last < q < p and (q - last) % step == 0)
            n_skipped = between - covered
            shown = []
            q = last + step
            while q < p and len(shown) < 3:
                if q not in held:
                    shown.append(str(sides.label(q)))
                q += step
            if n_skipped <= 0:
                why = "does not continue the grid"
            elif n_skipped <= 3:
                why = f"skips {', '.join(shown)}"
            else:
                why = (f"skips {n_skipped:,} periods ({', '.join(shown)}, ...); "
                       "a mistyped period label is more likely than that many missing waves")
        problems.append({"period": sides.label(p), "reason": why})
    if problems:
        labels = [e["period"] for e in problems]
        sink.keep("unexpected-period", pl.DataFrame({"period": [str(e["period"]) for e in problems],
                                                     "reason": [e["reason"] for e in problems]}))
        sink.add(
            "unexpected-period",
            f"new period {labels_text(labels)} does not continue the base grid "
            f"(last {sides.label(last)}, step {step}): {problems[0]['reason']}; check the wave's period "
            "labels before appending",
            count=len(problems),
            examples=problems[: sink.examples],
        )

# -- per column -----------------------------------------------------------------------
