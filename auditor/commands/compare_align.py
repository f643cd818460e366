"""The first stages of compare: the two schemas, and the two panels aligned on one scale.

``compare_schemas`` finds the columns added, removed and retyped (and their findings);
``align`` puts the base and the new wave on one period scale with their units matched
by key text and the compared columns cast to one type per column, and returns the
frozen :class:`Sides` every later stage reads. ``FindingSink`` collects the findings
and the rows behind them as the stages run (auditor/commands/compare.py's driver
creates one per run and hands it to each stage).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import polars as pl

from auditor.checks.config import Settings
from auditor.checks.findings import Finding, make
from auditor.commands.compare_measures import family, finite_or_null, is_levels, is_numeric
from auditor.commands.compare_values import PeriodLabel, SchemaChanges, TypeChange
from auditor.dtypes import compare_dtype_name, null_or_nan
from auditor.io.load import UNIT_ID, Panel
from auditor.io.periods import grid_step
from auditor.io.waves import POS, key_text, label_at, period_scale

BASE_UNIT = "__pa_base_unit"  # the base's unit code of a new row's unit (null: entering)


def text_key(j: int) -> str:
    """The name of the ``j``-th unit key column as text, in the aligned frames."""
    return f"__pa_k{j}"


class FindingSink:
    """The findings of one comparison, and every row behind them for ``--details``.

    Stages call :meth:`add` (or :meth:`append` for a finding built by hand) and
    :meth:`keep`; the driver reads ``findings`` and :meth:`detail_tables` at the end.
    """

    def __init__(self, settings: Settings, units: tuple[str, ...]) -> None:
        self.settings = settings
        self.examples = settings.profile.examples  # examples shown per finding
        self.findings: list[Finding] = []
        self._tables: dict[str, list[pl.DataFrame]] = {}
        self._names = {text_key(j): u for j, u in enumerate(units)}

    def add(self, check: str, message: str, **kw: Any) -> Finding:
        """Add a finding of the registered ``check`` (severity from the settings); returns it."""
        f = make(check, self.settings, message, **kw)
        self.findings.append(f)
        return f

    def append(self, finding: Finding) -> None:
        """Add a finding built by the stage (a severity raised for a key column)."""
        self.findings.append(finding)

    def keep(self, code: str, table: pl.DataFrame) -> None:
        """Keep every row behind a finding of ``code`` (the text key columns renamed to the
        user's key names) for ``--details``."""
        self._tables.setdefault(code, []).append(table.rename(self._names, strict=False))

    def detail_tables(self) -> dict[str, pl.DataFrame]:
        """Per finding code, every row kept for it, in one frame."""
        return {k: pl.concat(v, how="diagonal_relaxed") for k, v in self._tables.items()}


# --- schema ----------------------------------------------------------------------------


@dataclass(frozen=True)


class SchemaView:
    """The two schemas compared: the changes, and what the alignment needs of them.

    ``new_schema`` is the new wave's types, a column the wave leaves entirely empty
    taking the base's type (an empty CSV column reads as text); ``empty_new`` names
    those columns; ``common`` the non-key columns of both, in the base's order.
    """

    changes: SchemaChanges
    new_schema: dict[str, pl.DataType]
    empty_new: tuple[str, ...]
    common: tuple[str, ...]


def compare_schemas(basep: Panel, newp: Panel, settings: Settings, sink: FindingSink) -> SchemaView:
    """column-added, column-removed and type-changed (an error for a key column unless the
    settings set its severity); returns the SchemaView."""
    bs = basep.schema
    keys = (*basep.unit, basep.time)
    # An entirely empty new column takes the base's type, and shows up as missing-jump.
    shared = [c for c in newp.columns if c in bs and c not in keys]
    empty = newp.frame.select([pl.col(c).is_null().all().alias(c) for c in shared]).row(0) if shared else ()
    empty_new = tuple(c for c, e in zip(shared, empty, strict=True) if e)
    ns = {**newp.schema, **{c: bs[c] for c in empty_new}}
    bcols = [c for c in bs if c not in keys]
    added = [c for c in ns if c not in keys and c not in bs]
    removed = [c for c in bcols if c not in ns]
    # A width change within one family (int32 vs int64) changes nothing when appending.
    changed = [TypeChange(c, compare_dtype_name(bs[c]), compare_dtype_name(ns[c]), c in keys)
               for c in [*keys, *[c for c in bcols if c in ns]] if family(bs[c]) != family(ns[c])]
    for c in added:
        sink.add(
            "column-added",
            f"column '{c}' ({compare_dtype_name(ns[c])}) is new in this wave; after appending it is "
            "missing for every base period: document it or leave it out of models that span them",
            column=c,
            count=1,
        )
    for c in removed:
        sink.add(
            "column-removed",
            f"column '{c}' is in the base but not in the new wave; appending leaves it missing for "
            "the new periods: ask for it again or plan models without it",
            column=c,
            count=1,
        )
    for ch in changed:
        c = ch.column
        if ch.key:
            what = (
                f"key column '{c}' is {ch.base} in the base and {ch.new} in the new wave; "
                f"keys were compared as text: cast the new wave's '{c}' to {ch.base} before appending"
            )
        else:
            what = (
                f"column '{c}' is {ch.base} in the base and {ch.new} in the new wave; "
                f"cast it to {ch.base} (or fix the source) before appending"
            )
        f = make("type-changed", settings, what, column=c, count=1)
        if ch.key and "type-changed" not in settings.severities:
            f = dataclasses.replace(f, severity="error")
        sink.append(f)
    return SchemaView(
        changes=SchemaChanges(tuple(added), tuple(removed), tuple(changed)),
        new_schema=ns,
        empty_new=empty_new,
        common=tuple(c for c in bcols if c in ns),
    )


# --- the aligned sides -------------------------------------------------------------------


@dataclass(frozen=True)


class Sides:
    """The base and the new wave on one period scale, their units matched by key text.

    ``base`` and ``new`` hold the unit code, the position on the scale (``POS``), each
    compared column cast to one type (numeric: float64 with non-finite values as null;
    others text) and its missing flag ``__pa_miss_{j}``; ``new`` also the base's unit
    code of each row's unit (``BASE_UNIT``, null for an entering unit). ``reference``
    is the base's last period. ``bunits``/``nunits`` map unit codes to the text keys
    (``nkeys``), ``code_map`` each new unit to its base code. ``step`` is the base
    grid's step (1 on a calendar scale with one base period; None: no regular grid).
    """

    units: tuple[str, ...]
    time: str
    nkeys: tuple[str, ...]
    frequency: str
    step: int | None
    bunits: pl.DataFrame
    nunits: pl.DataFrame
    code_map: pl.DataFrame
    numeric: tuple[str, ...]
    levels: tuple[str, ...]
    compared: tuple[str, ...]
    base: pl.DataFrame
    new: pl.DataFrame
    reference: pl.DataFrame
    base_pos: tuple[int, ...]
    new_pos: tuple[int, ...]

    @property
    def last_pos(self) -> int:
        """The position of the base's last period (the reference)."""
        return self.base_pos[-1]

    def label(self, pos: int) -> PeriodLabel:
        """The period label at a position of the scale."""
        return label_at(pos, self.frequency)

    def labels_expr(self, col: str) -> pl.Expr:
        """Period labels of a column of positions on the comparison's scale, as text."""
        return pl.col(col).map_elements(lambda p: str(self.label(int(p))), return_dtype=pl.String)

    def keys_of(self, row: dict[str, Any]) -> dict[str, Any]:
        """The unit key of a row holding the text keys, by the user's column names."""
        return {u: row[k] for u, k in zip(self.units, self.nkeys, strict=True)}

    def unit_examples(self, table: pl.DataFrame, n: int) -> list[dict[str, Any]]:
        """The first ``n`` units of a table holding the text keys, as examples."""
        return [self.keys_of(r) for r in table.head(n).iter_rows(named=True)]

    def periods_between(self, later: pl.Expr, earlier: pl.Expr) -> pl.Expr:
        """Grid steps between two positions on the shared scale (the base grid's step)."""
        return (later - earlier) / float(self.step or 1)


def _unit_keys(panel: Panel, schema: dict[str, pl.DataType], nkeys: tuple[str, ...]) -> pl.DataFrame:
    """One row per unit of ``panel``: its code and its key columns as text."""
    return panel.units.with_columns(
        [key_text(u, schema[u]).alias(k) for u, k in zip(panel.unit, nkeys, strict=True)]
    ).select(UNIT_ID, *nkeys)


def align(basep: Panel, newp: Panel, view: SchemaView) -> Sides:
    """The two panels on one scale (auditor.io.waves.period_scale), units matched by key
    text, the compared columns cast: common columns both sides hold as numbers, as text
    or booleans, or in one other type family."""
    bs, ns = basep.schema, view.new_schema
    scale, bpos, npos = period_scale(basep, newp, basep.time)
    nkeys = tuple(text_key(j) for j in range(len(basep.unit)))
    # Unit tables (one row per unit) carry the text keys; rows carry codes only.
    bunits, nunits = _unit_keys(basep, bs, nkeys), _unit_keys(newp, ns, nkeys)
    code_map = nunits.join(bunits.rename({UNIT_ID: BASE_UNIT}), on=nkeys, how="left", nulls_equal=True)
    numeric = tuple(c for c in view.common if is_numeric(bs[c]) and is_numeric(ns[c]))
    levels = tuple(c for c in view.common if is_levels(bs[c]) and is_levels(ns[c]))
    other = [c for c in view.common if c not in numeric and c not in levels]
    compared = (*numeric, *levels, *[c for c in other if family(bs[c]) == family(ns[c])])

    def cast_expr(c: str, dt: pl.DataType) -> pl.Expr:
        if c in numeric:
            return finite_or_null(c, dt).cast(pl.Float64).alias(c)
        return pl.col(c).cast(pl.String).alias(c)

    miss_b = [null_or_nan(c, bs[c]).alias(f"__pa_miss_{j}") for j, c in enumerate(compared)]
    miss_n = [null_or_nan(c, ns[c]).alias(f"__pa_miss_{j}") for j, c in enumerate(compared)]
    base = basep.frame.select(UNIT_ID, bpos, *[cast_expr(c, bs[c]) for c in compared], *miss_b)
    new = (
        newp.frame.with_columns([pl.col(c).cast(bs[c]) for c in view.empty_new])
        .select(UNIT_ID, npos, *[cast_expr(c, ns[c]) for c in compared], *miss_n)
        .join(code_map.select(UNIT_ID, BASE_UNIT), on=UNIT_ID, how="left")
    )
    base_pos = tuple(sorted(base.get_column(POS).unique().to_list()))
    step, _ = grid_step(list(base_pos))
    if step is None and scale.frequency not in ("integer", "datetime"):
        step = 1  # one base period on a calendar scale: the next period is one step on
    return Sides(
        units=basep.unit, time=basep.time, nkeys=nkeys, frequency=scale.frequency, step=step,
        bunits=bunits, nunits=nunits, code_map=code_map, numeric=numeric, levels=levels, compared=compared,
        base=base, new=new, reference=base.filter(pl.col(POS) == base_pos[-1]),
        base_pos=base_pos, new_pos=tuple(sorted(new.get_column(POS).unique().to_list())),
    )


@dataclass(frozen=True)


class LevelCounts:
    """Rows per non-missing level of each compared non-numeric column, in the base's
    reference period and in the new wave (frames of the level and ``n``)."""

    reference: dict[str, pl.DataFrame]
    new: dict[str, pl.DataFrame]


def level_counts(sides: Sides) -> LevelCounts:
    """The level counts of every compared column that is not numeric (one grouping each)."""

    def counts(frame: pl.DataFrame, c: str) -> pl.DataFrame:
        return frame.group_by(c).agg(pl.len().alias("n")).filter(pl.col(c).is_not_null())

    cols = [c for c in sides.compared if c not in sides.numeric]
    return LevelCounts(reference={c: counts(sides.reference, c) for c in cols},
                       new={c: counts(sides.new, c) for c in cols})
