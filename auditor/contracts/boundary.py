"""Contract rules across the boundary between the panel so far and a new wave.

``panel-audit check NEW --rules C --against BASE`` judges, beside the delivery's own
rules, the rules that span waves: a value that must stay put (``invariant``), only rise
or fall (``monotone``), or move by a bounded step (``max_change``,
``max_change_per_period``) between a unit's last observation in the base and its first
in the new wave; the ``step`` from the base's last period to the wave's first; and
(unit, period) keys of the wave that the base already holds.

Only what these rules need is read from the base: the key columns and the columns the
rules name (a projection the Parquet and CSV readers apply), so a base kept as a
folder of waves is read once, narrowly. Units are matched by their keys as text and
periods placed on one scale for both inputs, as ``compare`` does
(:func:`auditor.io.waves.key_text`, :func:`auditor.io.waves.period_scale`).
"""

from __future__ import annotations

import dataclasses
from typing import Any

import polars as pl

from auditor.checks.config import Settings
from auditor.checks.contract import ColumnRules, Contract
from auditor.contracts.rules import RuleResult, count, fit_to_type
from auditor.dtypes import type_family
from auditor.io.load import UNIT_ID, Panel, _to_lazy, load_panel

BASE_UNIT = "__pa_base_unit"
POS = "__pa_pos"


def _key(j: int) -> str:
    return f"__pa_k{j}"


def across_waves(
    contract: Contract, new: Panel, base_data: Any, settings: Settings
) -> tuple[tuple[RuleResult, ...], str]:
    """The contract's cross-wave rules for the wave ``new`` against the panel so far ``base_data``.

    Returns (the rule results, each with ``across_waves`` true; a description of the
    base read). Raises AuditError (exit 2) when the base cannot be read or lacks a key.
    """
    from auditor.io.waves import key_text, period_scale

    units, time = new.unit, new.time
    limit = settings.check.examples
    tol = settings.profile.float_tolerance
    spanning = [
        fit_to_type(c, new.schema[c.name])[0]
        for c in contract.columns
        if c.name in new.schema and c.name not in (*units, time)
    ]
    spanning = [c for c in spanning if c.invariant or c.monotone or c.max_change is not None
                or c.max_change_per_period is not None]
    lazy, source, *_ = _to_lazy(base_data, units, settings)
    available = lazy.collect_schema().names()
    wanted = [*units, time, *[c.name for c in spanning if c.name in available]]
    base = load_panel(lazy.select([c for c in dict.fromkeys(wanted) if c in available] or wanted),
                      units, time, settings=settings)
    base = dataclasses.replace(base, source=source)

    scale, bpos, npos = period_scale(base, new, time)
    nkeys = [_key(j) for j in range(len(units))]
    bunits = base.units.with_columns(
        [key_text(u, base.schema[u]).alias(k) for u, k in zip(units, nkeys, strict=True)]
    ).select(UNIT_ID, *nkeys)
    nunits = new.units.with_columns(
        [key_text(u, new.schema[u]).alias(k) for u, k in zip(units, nkeys, strict=True)]
    ).select(UNIT_ID, *nkeys)
    code_map = nunits.join(bunits.rename({UNIT_ID: BASE_UNIT}), on=nkeys, how="left", nulls_equal=True)
    B = base.frame.select(UNIT_ID, bpos, *[c.name for c in spanning if c.name in base.schema])
    N = new.frame.select(UNIT_ID, npos, *[c.name for c in spanning]).join(
        code_map.select(UNIT_ID, BASE_UNIT, *nkeys), on=UNIT_ID, how="left"
    )
    judge = _Judge(contract, base, new, B, N, bunits, nkeys, scale, limit, tol)
    out = [judge.overlapping_keys()]
    if contract.panel.step is not None:
        out.append(judge.step(contract.panel.step))
    for col in spanning:
        out.extend(judge.column(col))
    return tuple(out), source


@dataclasses.dataclass
class _Judge:
    """One run of the cross-wave rules: both sides on one period scale and unit coding."""

    contract: Contract
    base: Panel
    new: Panel
    B: pl.DataFrame  # base rows: base unit code, position, the rules' columns
    N: pl.DataFrame  # new rows: new unit code, position, columns, base unit code (null: entering), text keys
    bunits: pl.DataFrame
    nkeys: list[str]
    scale: Any
    limit: int
    tol: float

    def label(self, pos: int) -> Any:
        from auditor.io.waves import label_at

        return label_at(pos, self.scale.frequency)

    def keys_of(self, row: dict[str, Any]) -> dict[str, Any]:
        return {u: row[k] for u, k in zip(self.new.unit, self.nkeys, strict=True)}

    def result(self, rule: str, column: str | None, failing: int, message: str,
               examples: list[dict[str, Any]] = ()) -> RuleResult:  # type: ignore[assignment]
        from auditor.vocab import clean

        return RuleResult(rule, "panel", column, failing == 0, failing, message,
                          examples=tuple(clean(e) for e in list(examples)[: self.limit]), across_waves=True)

    # -- keys and periods -------------------------------------------------------------
    def overlapping_keys(self) -> RuleResult:
        held = self.B.select(pl.col(UNIT_ID).alias(BASE_UNIT), POS).unique()
        hits = self.N.filter(pl.col(BASE_UNIT).is_not_null()).join(held, on=[BASE_UNIT, POS], how="semi")
        n = hits.height
        examples = [
            {**self.keys_of(r), self.new.time: self.label(r[POS])}
            for r in hits.sort(*self.nkeys, POS).head(self.limit).iter_rows(named=True)
        ]
        periods = sorted(hits.get_column(POS).unique().to_list())
        where = ", ".join(str(self.label(p)) for p in periods[:6])
        msg = (
            f"{count(n, 'row')} of the new wave {'repeats' if n == 1 else 'repeat'} a (unit, period) key the base "
            f"already holds (period {where}); "
            "appending would duplicate them"
            if n else "no (unit, period) key of the new wave is in the base"
        )
        return self.result("overlapping_keys", None, n, msg, examples)

    def step(self, step: int) -> RuleResult:
        """The step from the base's last period to the wave's first later one (rows in periods
        the base already holds are the overlapping-keys rule's business)."""
        last = int(self.B.get_column(POS).max())
        later = self.N.filter(pl.col(POS) > last).get_column(POS)
        lab_last = self.label(last)
        if not later.len():
            return self.result("step", None, 1, f"no period of the new wave comes after the base's last period "
                               f"{lab_last}; the contract expects the next period {self.label(last + step)}",
                               [{"base_last": lab_last, "new_first": None, "step": None}])
        first = int(later.min())
        gap = first - last
        lab_first = self.label(first)
        if gap == step:
            return self.result("step", None, 0, f"the new wave's first period {lab_first} follows the base's last "
                               f"{lab_last} by {step}")
        if gap % step == 0:
            skipped = gap // step - 1
            shown = ", ".join(str(self.label(last + step * k)) for k in range(1, min(skipped, 5) + 1))
            more = f", ... ({skipped:,} in all)" if skipped > 5 else ""
            msg = (f"the new wave's first period {lab_first} skips {skipped:,} "
                   f"period{'s' if skipped != 1 else ''} after the base's last {lab_last} ({shown}{more}); "
                   f"the contract expects a step of {step}")
            failing = skipped
        else:
            msg = (f"the new wave's first period {lab_first} is {gap:,} after the base's last {lab_last}, "
                   f"off the contract's step of {step}")
            failing = 1
        return self.result("step", None, failing, msg,
                           [{"base_last": lab_last, "new_first": lab_first, "step": gap}])

    # -- columns ----------------------------------------------------------------------
    def column(self, col: ColumnRules) -> list[RuleResult]:
        c = col.name
        if c not in self.B.columns:
            rules = [k for k in ("invariant", "monotone", "max_change", "max_change_per_period")
                     if getattr(col, k) not in (None, False)]
            return [RuleResult(k, "panel", c, False, None,
                               f"not evaluated across waves: the base has no column '{c}'",
                               evaluated=False, across_waves=True) for k in rules]
        bt, nt = self.base.schema[c], self.new.schema[c]
        numeric = type_family(bt) in ("integer", "float") and type_family(nt) in ("integer", "float")
        dated = type_family(bt) == type_family(nt) and type_family(bt) in ("date", "datetime")
        out: list[RuleResult] = []
        if col.invariant:
            out.append(self.invariant(c, numeric, same_type=bt == nt))
        if col.monotone or col.max_change is not None or col.max_change_per_period is not None:
            if not (numeric or dated):
                for k in ("monotone", "max_change", "max_change_per_period"):
                    if getattr(col, k) is not None:
                        out.append(RuleResult(
                            k, "panel", c, False, None,
                            f"not evaluated across waves: the column is {bt} in the base and {nt} in the new wave",
                            evaluated=False, across_waves=True))
            else:
                out.extend(self.moves(col))
        return out

    def _values(self, frame: pl.DataFrame, c: str, as_float: bool, as_text: bool) -> pl.Expr:
        e = pl.col(c)
        dt = frame.schema[c]
        if dt.is_float():
            e = pl.when(e.is_finite()).then(e).otherwise(None)
        if as_float:
            if dt == pl.Date:
                return e.cast(pl.Int32).cast(pl.Float64).alias(c)
            if isinstance(dt, pl.Datetime):
                return e.dt.epoch("s").cast(pl.Float64).alias(c)
            return e.cast(pl.Float64).alias(c)
        if as_text:
            return e.cast(pl.String).alias(c)
        return e.alias(c)

    def invariant(self, c: str, numeric: bool, same_type: bool) -> RuleResult:
        as_float = numeric and not same_type
        as_text = not numeric and not same_type
        held = (
            self.B.select(pl.col(UNIT_ID).alias(BASE_UNIT), self._values(self.B, c, as_float, as_text).alias("__pa_b"))
            .drop_nulls()
            .unique()
        )
        fresh = (
            self.N.filter(pl.col(BASE_UNIT).is_not_null())
            .select(BASE_UNIT, POS, *self.nkeys, self._values(self.N, c, as_float, as_text))
            .drop_nulls(c)
        )
        pairs = fresh.join(held, on=BASE_UNIT, how="inner")
        if numeric:
            same = (pl.col(c) - pl.col("__pa_b")).abs() <= self.tol * (1 + pl.col("__pa_b").abs())
        else:
            same = pl.col(c) == pl.col("__pa_b")
        # a new value breaks the rule when it is none of the values the unit holds in the base
        verdict = pairs.group_by(BASE_UNIT, POS, c, maintain_order=True).agg(
            same.any().alias("__pa_seen"), pl.col("__pa_b").first().alias("__pa_b"), *[pl.first(k) for k in self.nkeys]
        )
        broken = verdict.filter(~pl.col("__pa_seen")).sort(*self.nkeys, POS)
        units = broken.get_column(BASE_UNIT).n_unique() if broken.height else 0
        checked = pairs.get_column(BASE_UNIT).n_unique() if pairs.height else 0
        examples = [
            {**self.keys_of(r), self.new.time: self.label(r[POS]), "base": r["__pa_b"], "new": r[c]}
            for r in broken.unique(BASE_UNIT, keep="first", maintain_order=True).head(self.limit).iter_rows(named=True)
        ]
        msg = (
            f"{units} of {checked} returning units report a value the base never holds for them; the contract "
            "says it never changes within a unit"
        )
        return self.result("invariant", c, units, msg, examples)

    def moves(self, col: ColumnRules) -> list[RuleResult]:
        c = col.name
        base_last = (
            self.B.select(UNIT_ID, POS, self._values(self.B, c, True, False))
            .drop_nulls(c)
            .sort(UNIT_ID, POS)
            .group_by(UNIT_ID)
            .agg(pl.col(c).last().alias("__pa_b"), pl.col(POS).last().alias("__pa_bpos"))
            .rename({UNIT_ID: BASE_UNIT})
        )
        new_first = (
            self.N.filter(pl.col(BASE_UNIT).is_not_null())
            .select(BASE_UNIT, POS, *self.nkeys, self._values(self.N, c, True, False))
            .drop_nulls(c)
            .sort(BASE_UNIT, POS)
            .group_by(BASE_UNIT)
            .agg(pl.col(c).first(), pl.col(POS).first(), *[pl.first(k) for k in self.nkeys])
        )
        step = float(self.contract.panel.step or self.base.step or 1)
        pairs = new_first.join(base_last, on=BASE_UNIT, how="inner").with_columns(
            (pl.col(c) - pl.col("__pa_b")).alias("__pa_change"),
            ((pl.col(POS) - pl.col("__pa_bpos")) / step).alias("__pa_periods"),
        ).sort(*self.nkeys)
        n_pairs = pairs.height
        change = pl.col("__pa_change")

        whole = self.base.schema[c].is_integer() and self.new.schema[c].is_integer()

        def shown(v: Any) -> Any:
            return int(v) if whole and v is not None else v

        def examples(frame: pl.DataFrame) -> list[dict[str, Any]]:
            return [
                {**self.keys_of(r), self.new.time: self.label(r[POS]), "base": shown(r["__pa_b"]), "new": shown(r[c]),
                 "periods_between": r["__pa_periods"]}
                for r in frame.head(self.limit).iter_rows(named=True)
            ]

        out = []
        if col.monotone:
            wrong = pairs.filter(change < 0 if col.monotone == "increasing" else change > 0)
            word = "falls" if col.monotone == "increasing" else "rises"
            out.append(self.result(
                "monotone", c, wrong.height,
                f"{wrong.height} of {n_pairs} returning units' values {word} from their last base observation to "
                f"the new wave (the contract says it is {col.monotone})", examples(wrong)))
        if col.max_change is not None:
            big = pairs.filter(change.abs() > col.max_change)
            out.append(self.result(
                "max_change", c, big.height,
                f"{big.height} of {n_pairs} returning units' values move by more than {col.max_change:g} "
                "from their last base observation to the new wave", examples(big)))
        if col.max_change_per_period is not None:
            between = pl.col("__pa_periods")
            big = pairs.filter((between > 0) & ((change / between).abs() > col.max_change_per_period))
            out.append(self.result(
                "max_change_per_period", c, big.height,
                f"{big.height} of {n_pairs} returning units' values move by more than "
                f"{col.max_change_per_period:g} a period from their last base observation to the new wave",
                examples(big)))
        return out
