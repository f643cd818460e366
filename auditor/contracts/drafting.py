"""The drafting of a contract (``panel-audit rules draft``, auditor.commands.draft): a starting contract for the next delivery, learned from the waves so far.

The draft states what a clean next wave of the same panel keeps, and comments each
rule with the evidence it came from:

- periods: the first period and the step, open at the end (a later wave passes), and
  no step rule when the grid itself skips a period;
- units: a floor below the last period's count (``draft_units_slack``), since a
  delivery of one period holds about as many units as one period does;
- ranges: the observed range widened by ``draft_range_slack`` of its width on each side
  (never across zero when the data keep a sign), so that the next sample passes but a
  missed decimal or another unit of measure does not; no upper bound on a column that
  rises with the period (an age, a price: at least ``draft_trend_share`` of its
  within-unit changes are rises) and no lower bound on one that falls, nor either on a
  column all units share within a period: the trend is stated instead (``monotone``,
  ``max_change_per_period``, ``follows_period``);
- code lists (``allowed``) only where the list looks closed: a text, boolean or 0/1
  column with few levels, each held by several units, none of them new in the last
  period;
- missing-share ceilings from the highest share of any one period, plus a margin;
- ``invariant`` for the columns no unit changes, ``follows_period`` for those all units
  share within a period, ``monotone`` for those that only rise (or fall) within units.

The data a draft was learned from always passes it (tests/test_wave_onboarding.py
checks this as a property over column types). Bounds are computed on the values as
``check`` compares them (decimals as float64, integers exactly).
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta
from decimal import Decimal
from typing import Any

import numpy as np
import polars as pl

from auditor.checks.config import Settings
from auditor.contracts.rules import (
    attrition_shares,
    follows_period_rule,
    integer_range,
    invariant_counts,
    missing_as_null,
    step_changes,
    unit_periods,
)
from auditor.dtypes import type_family
from auditor.io.load import PERIOD_ID, UNIT_ID, Panel

COMMENT_AT = 40  # the column where a rule's comment starts, when the rule is shorter


def contract_text(panel: Panel, columns: list[dict[str, Any]], settings: Settings) -> str:
    """The drafted contract of ``panel`` as YAML text, from its profile's ``columns`` (one
    dict per column, the profile's column facts): a ``panel`` part and a ``columns`` part,
    each rule commented with the evidence behind it."""
    from auditor.version import __version__

    facts = {r["name"]: r for r in columns}
    drafter = _Drafter(panel, facts, settings)
    panel_doc, column_doc = drafter.panel_part(), drafter.columns_part()
    head = [
        f"# Panel contract drafted by panel-audit {__version__} from {_plain(panel.source)}",
        f"# ({panel.rows:,} rows, {panel.n_units:,} units, {panel.n_periods:,} periods).",
        "# Written for the next delivery: open-ended periods, floors with slack, no upper bound on",
        "# columns that grow with the period. Each rule says what it was learned from; tighten or",
        "# loosen it to what the delivery must promise, then run `panel-audit check`.",
    ]
    return "\n".join([*head, *emit("panel", panel_doc, 0), *emit("columns", column_doc, 0)]) + "\n"


# --- writing YAML with comments ------------------------------------------------------------


def _plain(text: Any) -> str:
    """Text safe inside a YAML comment: printable characters only, on one line."""
    return "".join(ch if ch.isprintable() else "?" for ch in str(text))


def flow(value: Any) -> str:
    """``value`` in YAML flow style, quoted where YAML needs it (a key or a value)."""
    import yaml

    text = yaml.safe_dump([value], default_flow_style=True, allow_unicode=True, width=10**9).strip()
    return text[1:-1]


def emit(key: str, value: Any, depth: int) -> list[str]:
    """YAML lines for ``key: value`` where ``value`` is a Rules mapping (nested) or a
    (value, comment) pair, indented by ``depth`` levels of two spaces."""
    pad = "  " * depth
    if isinstance(value, Rules):
        lines = [f"{pad}{flow(key)}:" + (f"  # {_plain(value.comment)}" if value.comment else "")]
        for k, v in value.items():
            lines.extend(emit(k, v, depth + 1))
        return lines
    v, comment = value
    text = f"{pad}{flow(key)}: {flow(v)}"
    if comment:
        text = f"{text:<{COMMENT_AT}}  # {_plain(comment)}" if len(text) < COMMENT_AT else f"{text}  # {_plain(comment)}"
    return [text]


class Rules(dict):
    """An ordered mapping of rule -> (value, comment) (or a nested Rules), with its own comment."""

    def __init__(self, comment: str = "") -> None:
        super().__init__()
        self.comment = comment

    def put(self, key: str, value: Any, comment: str = "") -> None:
        """Add the rule ``key`` with ``value``, commented with its evidence."""
        self[key] = (value, comment)

    def plain(self) -> dict[str, Any]:
        """The mapping without comments (what the YAML text loads as)."""
        return {k: (v.plain() if isinstance(v, Rules) else v[0]) for k, v in self.items()}


# --- numbers ----------------------------------------------------------------------------------


def _n(x: int) -> str:
    return f"{x:,}"


def _ceil_share(x: float) -> float:
    return min(1.0, math.ceil(x * 100 - 1e-9) / 100)


def _outward(lo: float, hi: float, slack: float, *, whole: bool) -> tuple[float, float]:
    """[lo, hi] widened by ``slack`` of its width on each side and rounded outward to a
    round number; a side that keeps a sign in the data stays on that side of zero."""
    width = hi - lo
    pad = slack * width
    if not (width > 0 and slack > 0 and math.isfinite(lo - pad) and math.isfinite(hi + pad)):
        return lo, hi
    unit = 10.0 ** math.floor(math.log10(pad))
    if whole:
        unit = max(1.0, unit)
    digits = max(0, -math.floor(math.log10(unit)))
    new_lo = round(math.floor((lo - pad) / unit) * unit, digits)
    new_hi = round(math.ceil((hi + pad) / unit) * unit, digits)
    if lo >= 0:
        new_lo = max(new_lo, 0.0)
    if hi <= 0:
        new_hi = min(new_hi, 0.0)
    return min(new_lo, lo), max(new_hi, hi)


def _number(v: Any, whole: bool) -> Any:
    if v is None:
        return None
    if whole:
        return int(v)
    f = float(v)
    return int(f) if f.is_integer() and abs(f) < 2**53 else f


def _shown(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


# --- the drafter ------------------------------------------------------------------------------


class _Drafter:
    """Computes the evidence once and turns it into commented rules."""

    def __init__(self, panel: Panel, facts: dict[str, dict[str, Any]], settings: Settings) -> None:
        self.panel = panel
        self.facts = facts
        self.s = settings
        self.frame = panel.frame
        self.keys = (*panel.unit, panel.time)
        self.names = [c for c in panel.schema if c not in self.keys]
        self.fams = {c: type_family(panel.schema[c]) for c in self.names}


    # -- panel ------------------------------------------------------------------------------
    def panel_part(self) -> Rules:
        p = self.panel
        doc = Rules()
        doc.put("unit", p.unit[0] if len(p.unit) == 1 else list(p.unit))
        doc.put("time", p.time)
        labels = p.grid
        if p.n_periods >= 2 and not p.irregular:
            doc.put("step", int(p.step or 1), f"each of the {p.n_periods - 1} steps between {labels[0]} and {labels[-1]} is {p.step}")
        doc.put("period_range", {"first": labels[0]},
                f"the first period; open at the end, so later waves pass (last so far: {labels[-1]})")
        per_unit = unit_periods(p)
        present_last = int(self.frame.filter(pl.col(PERIOD_ID) == p.n_periods - 1).select(pl.col(UNIT_ID).n_unique()).item())
        slack = self.s.check.draft_units_slack
        floor = int(math.floor(present_last * (1 - slack)))
        doc.put("min_units", floor, f"{_n(present_last)} units in the last period ({labels[-1]}), less {slack:.0%}")
        if int(per_unit["periods"].min()) == p.n_periods and p.n_periods > 1:
            doc.put("balanced", True, f"every unit in each of the {p.n_periods} periods")
        table = attrition_shares(p, per_unit)
        if table.height:
            margin = self.s.check.draft_attrition_margin
            worst = table.sort("share", descending=True).row(0, named=True)
            doc.put("max_attrition", _ceil_share(worst["share"] + margin),
                    f"at most {worst['share']:.1%} of a period's units never seen again "
                    f"({labels[int(worst['period_index'])]}), plus {margin:g}")
        dup = self.frame.height - int(per_unit["periods"].sum())
        doc.put("max_duplicate_keys", dup, "as found" + (": a clean delivery holds 0" if dup else ""))
        doc.put("max_missing_keys", p.missing_keys, "as found" + (": a clean delivery holds 0" if p.missing_keys else ""))
        doc.put("only_listed_columns", True, f"the {len(self.names)} columns below (and the keys) are all the data holds")
        return doc

    # -- columns ----------------------------------------------------------------------------
    def _stats(self) -> dict[str, Any]:
        """One pass for every column's missing count, finite range and distinct count."""
        aggs: list[pl.Expr] = []
        for c in self.names:
            dt = self.panel.schema[c]
            v = missing_as_null(c, dt)
            aggs.append(v.null_count().alias(f"{c}\x00null"))
            fam = self.fams[c]
            if fam in ("text", "integer", "boolean"):
                aggs.append(v.drop_nulls().n_unique().alias(f"{c}\x00distinct"))
            if fam in ("integer", "float", "date", "datetime"):
                w = v.cast(pl.Float64) if isinstance(dt, pl.Decimal) else v
                if dt.is_float() or isinstance(dt, pl.Decimal):
                    aggs.append((w == math.inf).sum().alias(f"{c}\x00+inf"))
                    aggs.append((w == -math.inf).sum().alias(f"{c}\x00-inf"))
                    w = pl.when(w.is_finite()).then(w).otherwise(None)
                aggs.append(w.min().alias(f"{c}\x00min"))
                aggs.append(w.max().alias(f"{c}\x00max"))
        return self.frame.select(aggs).row(0, named=True) if aggs else {}

    def _by_period(self) -> pl.DataFrame:
        """Per period: the rows and each column's missing count."""
        aggs: list[pl.Expr] = [pl.len().alias("__pa_rows")]
        aggs += [missing_as_null(c, self.panel.schema[c]).null_count().alias(f"{c}\x00null") for c in self.names]
        return self.frame.group_by(PERIOD_ID).agg(aggs).sort(PERIOD_ID)

    def _moves(self, names: list[str]) -> dict[str, dict[str, Any]]:
        """Within-unit steps of ``names``: rises, falls, and the change per period (one sort)."""
        if not names:
            return {}
        steps = step_changes(self.panel, names)
        aggs: list[pl.Expr] = []
        for c in names:
            between = pl.col(f"periods:{c}")
            ch = pl.col(f"change:{c}")
            per = pl.when(between > 0).then(ch / between)  # a repeated key has no periods between
            aggs += [(ch > 0).sum().alias(f"{c}\x00rises"), (ch < 0).sum().alias(f"{c}\x00falls"),
                     per.min().alias(f"{c}\x00lo"), per.max().alias(f"{c}\x00hi"),
                     per.abs().max().alias(f"{c}\x00abs"), per.count().alias(f"{c}\x00n")]
        row = steps.select(aggs).row(0, named=True)
        return {c: {k: row[f"{c}\x00{k}"] for k in ("rises", "falls", "lo", "hi", "abs", "n")} for c in names}

    def _levels(self, c: str) -> pl.DataFrame:
        """Per level of ``c``: the units holding it and the first period it appears in."""
        return (
            self.frame.filter(pl.col(c).is_not_null())
            .group_by(c)
            .agg(pl.col(UNIT_ID).n_unique().alias("units"), pl.col(PERIOD_ID).min().alias("first"))
            .sort(c)
        )

    def columns_part(self) -> Rules:
        p = self.panel
        doc = Rules()
        for k in self.keys:
            fam = type_family(p.schema[k])
            if fam is not None:
                spec = Rules()
                spec.put("type", fam, f"read as {p.schema[k]}; a key")
                doc[k] = spec
        stats = self._stats()
        by_period = self._by_period()
        kinds = {c: (self.facts.get(c) or {}).get("kind") for c in self.names}
        moving = [c for c in self.names if self.fams[c] in ("integer", "float", "date", "datetime")
                  and kinds[c] not in (None, "constant", "time-invariant", "period-only")
                  and not getattr(p.schema[c], "time_zone", None)]
        moves = self._moves(moving)
        rows = self.frame.height
        # the profile's kinds, confirmed by the exact rules the draft states (it must pass its data)
        tol = self.s.profile.float_tolerance
        fixed = [c for c in self.names if kinds[c] in ("constant", "time-invariant")]
        changing = invariant_counts(p, fixed, tol) if fixed else {}
        self.fixed = {c for c in fixed if changing[c] == 0}
        self.shared = {c for c in self.names if kinds[c] == "period-only"
                       and follows_period_rule(c, p, tol, 1).passed}
        for c in self.names:
            doc[c] = self._column(c, stats, by_period, kinds[c], moves.get(c), rows)
        return doc

    def _column(self, c: str, stats: dict[str, Any], by_period: pl.DataFrame,
                kind: str | None, move: dict[str, Any] | None, rows: int) -> Rules:
        p = self.panel
        dt = p.schema[c]
        fam = self.fams[c]
        fact = self.facts.get(c) or {}
        spec = Rules()
        if fam is not None:
            spec.put("type", fam, f"read as {dt}" + (f"; kind {kind}" if kind else ""))
        distinct = int(stats.get(f"{c}\x00distinct") or 0)
        binary = fam == "integer" and bool(fact.get("binary"))
        follows = kind == "period-only"
        direction = None
        share_up = None
        if move is not None and move["n"]:
            if move["falls"] == 0 and move["rises"] > 0:
                direction = "increasing"
            elif move["rises"] == 0 and move["falls"] > 0:
                direction = "decreasing"
            if move["rises"] + move["falls"] >= 5:
                share_up = move["rises"] / (move["rises"] + move["falls"])
        cut = self.s.check.draft_trend_share
        up = not binary and (direction == "increasing" or (share_up is not None and share_up >= cut))
        down = not binary and (direction == "decreasing" or (share_up is not None and 1 - share_up >= cut))
        why_up = ("values only rise within units" if direction == "increasing"
                  else f"it rises in {share_up:.0%} of the within-unit changes" if share_up is not None else "")
        why_down = ("values only fall within units" if direction == "decreasing"
                    else f"it falls in {1 - share_up:.0%} of the within-unit changes" if share_up is not None else "")

        # -- bounds
        if fam in ("integer", "float", "date", "datetime") and not binary and not getattr(dt, "time_zone", None):
            self._bounds(spec, c, dt, fam, stats, follows=follows, up=up, down=down, why_up=why_up, why_down=why_down)

        # -- a closed code list (a 0/1 column's list is its range)
        if fam in ("text", "boolean") or binary:
            self._allowed(spec, c, distinct, follows=follows, trending=up or down)

        # -- missing values
        nulls = int(stats[f"{c}\x00null"])
        if rows and nulls:
            margin = self.s.check.draft_missing_margin
            shares = (by_period[f"{c}\x00null"] / by_period["__pa_rows"]).to_numpy()
            worst = int(np.argmax(shares))
            label = p.grid[int(by_period[PERIOD_ID][worst])]
            spec.put("max_missing", _ceil_share(max(float(shares[worst]), nulls / rows) + margin),
                     f"{nulls / rows:.1%} missing, at most {shares[worst]:.1%} in one period ({label}), plus {margin:g}")
        else:
            spec.put("max_missing", 0.0, f"never missing in {_n(rows)} rows")

        # -- what stays put, follows the period, or only moves one way within units
        twice = fact.get("units_observed_twice") or 0
        changing = fact.get("units_changing") or 0
        if c in self.fixed and twice:
            spec.put("invariant", True, f"no unit of the {_n(twice)} seen twice changes it")
        elif follows and c in self.shared:
            spec.put("follows_period", True, f"every unit holds the same value in each of the {p.n_periods} periods")
        elif direction is not None and move is not None:
            n = move["rises"] if direction == "increasing" else move["falls"]
            verb = "rises" if direction == "increasing" else "falls"
            spec.put("monotone", direction, f"{verb} {_n(n)} times within units, never the other way")
        rare = self.s.profile.nearly_invariant_units_share
        if kind == "nearly-time-invariant" and 0 < changing <= rare * twice:
            spec.comment = (f"changes within {_n(changing)} of {_n(twice)} units: not drafted as invariant; "
                            "if those changes are errors, fix them and add invariant: true")
        if (up or down) and move is not None and move["n"] and fam in ("integer", "float"):
            lo, hi, biggest = move["lo"], move["hi"], move["abs"]
            tol = self.s.profile.float_tolerance
            if hi - lo <= tol * (1 + abs(hi)):
                step = _number(hi, fam == "integer" and float(hi).is_integer())
                spec.put("max_change_per_period", abs(step),
                         f"every change within units is {step:+g} a period ({_n(move['n'])} changes)")
            else:
                slack = self.s.check.draft_change_slack
                limit = _outward(0.0, float(biggest), slack, whole=fam == "integer")[1]
                spec.put("max_change_per_period", _number(limit, fam == "integer"),
                         f"at most {_shown(biggest)} a period within units, plus {slack:.0%}")
        return spec

    def _bounds(self, spec: Rules, c: str, dt: pl.DataType, fam: str, stats: dict[str, Any], *,
                follows: bool, up: bool, down: bool, why_up: str, why_down: str) -> None:
        lo, hi = stats[f"{c}\x00min"], stats[f"{c}\x00max"]
        if lo is None or hi is None:
            return
        if isinstance(lo, Decimal):
            lo, hi = float(lo), float(hi)
        plus_inf = int(stats.get(f"{c}\x00+inf") or 0)
        minus_inf = int(stats.get(f"{c}\x00-inf") or 0)
        slack = self.s.check.draft_range_slack
        seen = f"{_shown(lo)} to {_shown(hi)}"
        keep_lo = not (follows or down) and not minus_inf
        keep_hi = not (follows or up) and not plus_inf
        if fam in ("date", "datetime"):
            new_lo, new_hi = _widen_dates(lo, hi, slack)
        else:
            whole = fam == "integer"
            new_lo, new_hi = _outward(float(lo), float(hi), slack, whole=whole) if lo != hi else (lo, hi)
            if whole:  # exact integers: never inside the data's range, never outside the type's
                low, high = integer_range(dt)
                new_lo = max(low, min(int(lo), math.floor(new_lo)))
                new_hi = min(high, max(int(hi), math.ceil(new_hi)))
            else:
                new_lo, new_hi = _number(new_lo, False), _number(new_hi, False)
        widened = f"widened by {slack:.0%} of the range" if lo != hi else "one value"
        if lo != hi and fam in ("integer", "float") and float(lo) >= 0 and new_lo == 0:
            widened += " (not below 0: no value is negative)"
        if keep_lo:
            spec.put("min", new_lo, f"{seen} in the data, {widened}")
        elif fam in ("integer", "float") and float(lo) >= 0 and not minus_inf:
            reason = "it follows the period" if follows else why_down or why_up
            spec.put("min", 0, f"never below 0 ({seen}); {reason}, so no bound beyond the sign")
        if keep_hi:
            spec.put("max", new_hi, f"{seen} in the data, {widened}" if not keep_lo else "")
        elif fam in ("integer", "float") and float(hi) <= 0 and not plus_inf:
            spec.put("max", 0, f"never above 0 ({seen})")
        notes = []
        if up and not follows:
            notes.append(f"no upper bound: {why_up}")
        if down and not follows:
            notes.append(f"no lower bound: {why_down}")
        if plus_inf or minus_inf:
            notes.append("holds infinite values: no bound on that side")
        if follows:
            notes.append("one value per period: no bound but the sign")
        if notes:
            spec.comment = "; ".join(notes)

    def _allowed(self, spec: Rules, c: str, distinct: int, *, follows: bool, trending: bool) -> None:
        most = self.s.check.draft_max_levels
        need = self.s.check.draft_level_min_units
        if not 0 < distinct <= most or follows or trending:
            return
        levels = self._levels(c)
        thin = levels.filter(pl.col("units") < need)
        last = self.panel.n_periods - 1
        late = levels.filter(pl.col("first") == last) if self.panel.n_periods > 1 else levels.head(0)
        if thin.height or late.height:
            why = (f"level {_plain(thin[c][0])!s} is held by {thin['units'][0]} units only" if thin.height
                   else f"level {_plain(late[c][0])!s} first appears in the last period {self.panel.grid[last]}")
            spec.comment = (spec.comment + "; " if spec.comment else "") + f"no code list: {why} (the list may still grow)"
            return
        values = [v for v in levels[c].to_list()]
        spec.put("allowed", values, f"{len(values)} levels, each held by at least {need} units, none new in the last period")


def _widen_dates(lo: Any, hi: Any, slack: float) -> tuple[Any, Any]:
    """A date or datetime range widened by ``slack`` of its width on each side, to whole days."""
    if lo == hi or slack <= 0:
        return lo, hi
    pad = timedelta(days=math.ceil((hi - lo).total_seconds() * slack / 86400))
    try:
        new_lo = lo - pad
    except OverflowError:
        new_lo = lo
    try:
        new_hi = hi + pad
    except OverflowError:
        new_hi = hi
    if isinstance(lo, datetime):
        new_lo = datetime(new_lo.year, new_lo.month, new_lo.day)
        day_after = datetime(new_hi.year, new_hi.month, new_hi.day)
        new_hi = day_after if day_after >= hi else day_after + timedelta(days=1)
    return new_lo, new_hi
