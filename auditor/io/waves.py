"""Two waves of one panel on common ground: one period scale for both, unit keys as text.

``compare`` (auditor.commands.compare) and the rules that span waves
(auditor.contracts.boundary) both place the base and the new wave on one scale and
match their units by key text.
"""

from __future__ import annotations

from datetime import date, timedelta
from typing import Any

import polars as pl

from auditor.errors import AuditError, fail, short_list
from auditor.io.load import Panel
from auditor.io.periods import scale_for

POS = "__pa_pos"  # the period's position on the scale shared by base and new


def key_text(col: str, dt: pl.DataType) -> pl.Expr:
    """A unit key column as text for matching across files (a float key holding whole
    numbers loses its ``.0``, so 7.0 and 7 are one unit)."""
    c = pl.col(col)
    if dt.is_float():
        whole = c.is_finite() & (c == c.round(0))
        return pl.when(whole).then(c.cast(pl.Int64, strict=False).cast(pl.String)).otherwise(c.cast(pl.String))
    return c.cast(pl.String)


def label_at(pos: int, freq: str) -> Any:
    """The period label of a position on the scale (also for periods nobody holds)."""
    if freq in ("integer", "year"):
        return int(pos)
    if freq == "quarter":
        return f"{pos // 4}Q{pos % 4 + 1}"
    if freq == "month":
        return f"{pos // 12:04d}-{pos % 12 + 1:02d}"
    if freq == "week":
        return (date(1970, 1, 1) + timedelta(days=7 * pos)).isoformat()
    if freq == "day":
        return (date(1970, 1, 1) + timedelta(days=pos)).isoformat()
    return int(pos)


def period_scale(
    base: Panel, new: Panel, time: str
) -> tuple[Any, pl.Expr, pl.Expr]:
    """One period scale for both sides; expressions giving each side's row position."""
    bt = base.frame.select(pl.col(time).unique()).to_series()
    nt = new.frame.select(pl.col(time).unique()).to_series()
    same = bt.dtype == nt.dtype
    bj = bt if same else bt.cast(pl.String)
    nj = nt if same else nt.cast(pl.String)
    union = pl.concat([bj, nj]).unique()
    try:
        scale = scale_for(time, union)
    except AuditError as exc:
        if exc.code != "time-unorderable":
            raise
        raise fail(
            "compare-time-mismatch",
            column=time,
            base=short_list([str(v) for v in bt.head(3).to_list()], 3),
            new=short_list([str(v) for v in nt.head(3).to_list()], 3),
        ) from None
    pos_of = dict(zip(scale.values, scale.positions, strict=True))

    def mapping(raw: pl.Series, joined: pl.Series) -> pl.Expr:
        return pl.col(time).replace_strict(
            old=raw, new=[pos_of[v] for v in joined.to_list()], return_dtype=pl.Int64
        ).alias(POS)

    return scale, mapping(bt, bj), mapping(nt, nj)


# --- the comparison ---------------------------------------------------------------------
