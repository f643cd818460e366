"""A panel contract's rules judged on a loaded panel (``panel-audit check``, auditor.commands.check),
and the row rules exported as a great-expectations suite (``panel-audit rules export``).

Row-level rules (a column's values one row at a time: range, allowed values,
missing share, text pattern, uniqueness) run through great-expectations: an
ephemeral context, the library's public expectation classes, one pandas batch
converted once from the columns the rules name. Their pass/fail verdicts,
failing counts and failing rows come from that library. The column type is read
from the data's own schema (converting to pandas turns integer columns with
missing values into floats, so the pandas type would not be the data's type).
Panel-level rules (keys, periods, balance, attrition, values that must stay put,
only rise, or change by a bounded step within a unit) run on polars over the
loaded Panel.

great-expectations is imported only inside the functions that need it.
"""

from __future__ import annotations

import contextvars
import math
import time as _time
from dataclasses import dataclass, field, replace
from datetime import date, datetime
from pathlib import Path
from typing import Any

import polars as pl

from auditor.checks.config import Settings
from auditor.checks.contract import (
    ColumnRules,
    Contract,
    PanelRules,
    period_order,
    period_text,
    read_contract,
)
from auditor.dtypes import type_family
from auditor.errors import fail, short_list
from auditor.io.load import PERIOD_ID, UNIT_ID, Panel, parse_unit

ROW_RULES_GX: tuple[str, ...] = ("min", "max", "allowed", "max_missing", "pattern", "unique")
GX_ENGINE = "great-expectations"
POLARS_ENGINE = "polars"


@dataclass(frozen=True)
class RuleResult:
    """The outcome of one rule.

    ``failing`` counts what the rule is about: rows for row rules (values out of
    range, missing values, ...), units, periods or key rows for panel rules, as
    ``message`` says. ``engine`` names what evaluated it; ``examples`` are a few
    JSON-ready dicts locating failures.
    """

    rule: str
    level: str
    column: str | None
    passed: bool
    failing: int | None
    message: str
    engine: str = POLARS_ENGINE
    examples: tuple[dict[str, Any], ...] = field(default_factory=tuple)
    evaluated: bool = True
    across_waves: bool = False

    def to_dict(self) -> dict[str, Any]:
        """The rule's entry in the ``check`` JSON document.

        A rule that could not run on the column's type has ``evaluated: false``,
        ``passed: false`` and ``failing: null``; a rule judged across the boundary
        between the panel so far and the new wave has ``across_waves: true``.
        """
        from auditor.vocab import clean

        return clean(
            {
                "rule": self.rule,
                "level": self.level,
                "column": self.column,
                "passed": self.passed,
                "failing": self.failing,
                "message": self.message,
                "engine": self.engine,
                "evaluated": self.evaluated,
                "across_waves": self.across_waves,
                "examples": [dict(e) for e in self.examples],
            }
        )


#: with keep_all, the number of values a rule's message names (its examples hold every one)
MESSAGE_LIMIT: contextvars.ContextVar[int | None] = contextvars.ContextVar("message_limit", default=None)


def _named(limit: int) -> int:
    """How many values a message names: the configured number of examples."""
    shown = MESSAGE_LIMIT.get()
    return limit if shown is None else shown


def run_contract(
    contract: Contract,
    panel: Panel,
    settings: Settings,
    *,
    timings: dict[str, float] | None = None,
) -> tuple[RuleResult, ...]:
    """Every rule of ``contract`` evaluated on the loaded ``panel``, in contract order.

    A rule that cannot run on the type a column holds (a bound on a column that
    arrived as text) is reported as not evaluated, and the column fails its
    ``type`` rule (stated or implied by the rules); every other rule still runs.
    ``timings`` (if given) receives the seconds spent per stage.
    """
    timings = timings if timings is not None else {}
    schema = panel.schema
    limit = settings.check.examples
    out: list[RuleResult] = []
    present = [c for c in contract.columns if c.name in schema]
    plan = {c.name: fit_to_type(c, schema[c.name]) for c in present}
    runnable = [plan[c.name][0] for c in present]

    clock = _time.perf_counter()
    out.extend(_panel_rules(contract.panel, contract, panel, limit))
    within = _within_rules(runnable, panel, settings, limit)
    exact, for_gx = _exact_integer_bounds(runnable, panel, limit)
    timings["panel_rules"] = _time.perf_counter() - clock

    row = _row_rules_gx(for_gx, panel, limit, timings)
    rows = panel.frame.height
    for col in contract.columns:
        if col.name not in schema:
            if col.required:
                out.append(
                    RuleResult(
                        "present", "row", col.name, False, rows,
                        f"the column is not in the data; the contract requires it (all {rows} rows lack it)",
                    )
                )
            continue
        skipped = plan[col.name][1]
        typed = _type_rule(col, skipped, panel, limit)
        if typed is not None:
            out.append(typed)
        by_rule = {r.rule: r for r in [*row.get(col.name, []), *exact.get(col.name, [])]}
        out.extend(by_rule[k] for k in ROW_RULES_GX if k in by_rule)
        out.extend(within[col.name])
        dtype = schema[col.name]
        out.extend(
            RuleResult(
                key, "row" if key in ROW_RULES_GX else "panel", col.name, False, None,
                f"not evaluated: the rule needs {what}, and the column holds {dtype}",
                evaluated=False,
            )
            for key, what in skipped
        )
    return tuple(out)


def fit_to_type(col: ColumnRules, dtype: pl.DataType) -> tuple[ColumnRules, tuple[tuple[str, str], ...]]:
    """The rules of ``col`` that can run on a column of ``dtype``, and those that cannot.

    Returns (the column's rules with the unrunnable ones removed, ((rule, what it
    needs), ...)).
    """
    fam = type_family(dtype)
    skipped = tuple((key, what) for key, (families, what) in col.needs().items() if fam not in families)
    if not skipped:
        return col, ()
    return replace(col, **{key: None for key, _ in skipped}), skipped


def contract_keys(
    contract: Contract, path: Any, unit: Any, time: str | None
) -> tuple[tuple[str, ...], str]:
    declared_unit, declared_time = contract.panel.unit, contract.panel.time
    given_unit = parse_unit(unit) if unit else None
    if declared_unit and given_unit and tuple(declared_unit) != given_unit:
        raise fail(
            "contract-key-conflict",
            key="unit",
            given=",".join(given_unit),
            declared=",".join(declared_unit),
            path=path,
        )
    if declared_time and time and declared_time != time:
        raise fail("contract-key-conflict", key="time", given=time, declared=declared_time, path=path)
    units = declared_unit or given_unit
    time_key = declared_time or time
    if not units or not time_key:
        raise fail("contract-no-keys", path=path)
    return tuple(units), time_key


# --- column types -----------------------------------------------------------------


def _type_matches(wanted: str, dtype: pl.DataType) -> bool:
    fam = type_family(dtype)
    if wanted == "number":
        return fam in ("integer", "float")
    return fam == wanted


def _type_rule(
    col: ColumnRules, skipped: tuple[tuple[str, str], ...], panel: Panel, limit: int
) -> RuleResult | None:
    """The column's ``type`` rule: the stated type, or (when none is stated) the type its
    other rules need. None when the contract states no type and every rule can run."""
    dtype = panel.schema[col.name]
    if col.type is not None:
        expects = f"the contract expects {col.type} values"
        ok = _type_matches(col.type, dtype)
    elif skipped:
        expects = f"its rules ({', '.join(k for k, _ in skipped)}) need {skipped[0][1]}"
        ok = False
    else:
        return None
    if ok:
        return RuleResult("type", "row", col.name, True, 0, f"values are {col.type} ({dtype})")
    values = int(panel.frame.select(pl.col(col.name).count()).item())
    message = f"{expects} but the column holds {dtype}: all {values} non-missing values break it"
    examples: tuple[dict[str, Any], ...] = ()
    numeric = col.type in ("integer", "float", "number") or (
        col.type is None and any("numeric" in what for _, what in skipped)
    )
    if type_family(dtype) == "text" and numeric:
        # which values keep the column from being read as numbers
        text = pl.col(col.name).str.strip_chars()
        bad = text.is_not_null() & (text != "") & text.cast(pl.Float64, strict=False).is_null()
        rows = panel.frame.select(bad.arg_true()).to_series()
        if rows.len():
            picked = _row_examples(panel, col.name, rows.head(limit).to_list())
            shown = ", ".join(repr(str(e[col.name])) for e in picked[:3])
            message += f"; {rows.len()} of them cannot be read as numbers (such as {shown})"
            examples = picked
        else:
            message += "; every value reads as a number: the file's reader took the column as text"
    if skipped:
        message += "; not evaluated: " + ", ".join(k for k, _ in skipped)
    return RuleResult("type", "row", col.name, False, values, message, examples=examples)


def has_row_rules(contract: Contract) -> bool:
    return any(
        getattr(c, k) is not None and getattr(c, k) is not False for c in contract.columns for k in ROW_RULES_GX
    )


# --- row rules through great-expectations ------------------------------------------


def preload_gx() -> None:
    """Start importing great-expectations in a background thread (it takes seconds), so that
    the import overlaps reading the panel and the polars rules, which release the GIL."""
    import os

    from auditor.stats.pvalues import preload

    os.environ.setdefault("GX_ANALYTICS_ENABLED", "False")
    preload("great_expectations")


def _gx() -> Any:
    """great_expectations, imported quietly (no usage reporting, no progress bars)."""
    import logging
    import os

    os.environ.setdefault("GX_ANALYTICS_ENABLED", "False")
    import great_expectations as gx

    logging.getLogger("great_expectations").setLevel(logging.ERROR)
    return gx


#: Integers beyond this magnitude are not exact as float64, which great-expectations
#: compares bounds in; their ``min``/``max`` rules run on polars, exactly.
FLOAT_EXACT_INTEGERS = 2**53


def integer_range(dtype: pl.DataType) -> tuple[int, int]:
    """The lowest and highest value a polars integer dtype holds (Int8 ... Int128, UInt8 ... UInt64)."""
    name = str(dtype).lower()
    bits = int(name.removeprefix("u").removeprefix("int"))
    if name.startswith("u"):
        return 0, 2**bits - 1
    return -(2 ** (bits - 1)), 2 ** (bits - 1) - 1


def _exact_integer_bounds(
    columns: list[ColumnRules], panel: Panel, limit: int
) -> tuple[dict[str, list[RuleResult]], list[ColumnRules]]:
    """``min``/``max`` of integer columns whose values or bounds lie beyond 2**53, on polars.

    great-expectations compares such bounds as float64, where 2**63 - 1 and 2**63 are one
    number (a column would fail, or pass, its own extremes). Returns (results by column,
    the columns with those rules removed, for great-expectations).
    """
    schema = panel.schema
    bounded = [c for c in columns if (c.min is not None or c.max is not None) and schema[c.name].is_integer()]
    if not bounded:
        return {}, list(columns)
    ext = panel.frame.select(
        *[pl.col(c.name).min().alias(f"{c.name}\x00lo") for c in bounded],
        *[pl.col(c.name).max().alias(f"{c.name}\x00hi") for c in bounded],
    ).row(0, named=True)
    out: dict[str, list[RuleResult]] = {}
    moved: dict[str, ColumnRules] = {}
    rows = panel.frame.height
    for col in bounded:
        lo, hi = ext[f"{col.name}\x00lo"], ext[f"{col.name}\x00hi"]
        magnitudes = [abs(v) for v in (lo, hi, col.min, col.max) if isinstance(v, int | float)]
        if not magnitudes or max(magnitudes) <= FLOAT_EXACT_INTEGERS:
            continue
        dtype = schema[col.name]
        low, high = integer_range(dtype)
        results = []
        for rule, bound in (("min", col.min), ("max", col.max)):
            if bound is None:
                continue
            # an integer is below a bound b exactly when it is below ceil(b) (above: floor(b))
            b = math.ceil(bound) if rule == "min" else math.floor(bound)
            c = pl.col(col.name)
            if b < low or b > high:  # a bound outside the type's range: every value, or none
                every = (rule == "min" and b > high) or (rule == "max" and b < low)
                bad = c.is_not_null() & pl.lit(every)
            else:
                bad = (c < pl.lit(b, dtype=dtype)) if rule == "min" else (c > pl.lit(b, dtype=dtype))
            hits = panel.frame.select(bad.fill_null(False).arg_true()).to_series()
            failing = hits.len()
            results.append(
                RuleResult(
                    rule, "row", col.name, failing == 0, failing,
                    _row_message(col, rule, failing, rows, 0),
                    POLARS_ENGINE,
                    _row_examples(panel, col.name, hits.head(limit).to_list()),
                )
            )
        out[col.name] = results
        moved[col.name] = replace(col, min=None, max=None)
    return out, [moved.get(c.name, c) for c in columns]


def _gx_value(v: Any) -> Any:
    """A contract bound as great-expectations compares it with a pandas datetime column."""
    if isinstance(v, date) and not isinstance(v, datetime):
        return datetime(v.year, v.month, v.day)
    return v


def build_expectations(
    columns: list[ColumnRules] | tuple[ColumnRules, ...], alias: dict[str, str] | None = None
) -> list[Any]:
    """The great-expectations expectation objects for the row rules of ``columns``.

    Each carries ``meta = {"rule": ..., "column": ...}`` naming the contract rule.
    ``alias``: the name each column has in the batch (great-expectations refuses an
    empty column name), when it differs from its own.
    """
    gx = _gx()
    E = gx.expectations
    out: list[Any] = []
    for col in columns:
        def meta(rule: str, col: ColumnRules = col) -> dict[str, str]:
            return {"rule": rule, "column": col.name}

        c = col.name if alias is None else alias[col.name]
        if col.min is not None:
            out.append(E.ExpectColumnValuesToBeBetween(column=c, min_value=_gx_value(col.min), meta=meta("min")))
        if col.max is not None:
            out.append(E.ExpectColumnValuesToBeBetween(column=c, max_value=_gx_value(col.max), meta=meta("max")))
        if col.allowed is not None:
            out.append(
                E.ExpectColumnValuesToBeInSet(
                    column=c, value_set=[_gx_value(v) for v in col.allowed], meta=meta("allowed")
                )
            )
        if col.max_missing is not None:
            if col.max_missing == 0:
                out.append(E.ExpectColumnValuesToNotBeNull(column=c, meta=meta("max_missing")))
            else:
                out.append(
                    E.ExpectColumnValuesToNotBeNull(column=c, mostly=1.0 - col.max_missing, meta=meta("max_missing"))
                )
        if col.pattern is not None:
            # The whole value must match: anchor the pattern.
            out.append(
                E.ExpectColumnValuesToMatchRegex(column=c, regex=f"^(?:{col.pattern})$", meta=meta("pattern"))
            )
        if col.unique:
            out.append(E.ExpectColumnValuesToBeUnique(column=c, meta=meta("unique")))
    return out


def _columnhas_row_rules(col: ColumnRules) -> bool:
    return any(v not in (None, False) for v in (col.min, col.max, col.allowed, col.max_missing, col.pattern, col.unique))


def to_pandas_once(frame: pl.DataFrame) -> Any:
    """``frame`` as a pandas DataFrame in which every value compares as in the data.

    Integers become numpy integers when no value is missing; with missing values,
    float64 (exact up to 2**53; larger magnitudes keep pandas' nullable integer type,
    and their bounds run on polars, see :func:`_exact_integer_bounds`). Booleans
    without missing values stay numpy booleans, with them pandas' nullable boolean;
    decimals become float64 (as ``rules draft`` reads them); categorical columns become
    text and dates datetime64. great-expectations runs about six times slower on
    pandas' nullable integers than on numpy arrays. Row order and the default 0..n-1
    index are kept, so result row positions index ``frame``.
    """
    import pandas as pd

    # 128-bit integers have no pandas or arrow-to-pandas type: exact Python ints (objects)
    wide = [c for c, dt in frame.schema.items() if dt in (pl.Int128, pl.UInt128)]
    if wide:
        order = frame.columns
        out = to_pandas_once(frame.drop(wide))
        for c in wide:
            out[c] = pd.Series(frame[c].to_list(), dtype=object)
        return out[order]
    casts: list[pl.Expr] = []
    nullable: dict[Any, Any] = {}
    counts = frame.null_count().row(0, named=True) if frame.width else {}
    for c, dt in frame.schema.items():
        if isinstance(dt, pl.Categorical | pl.Enum):
            casts.append(pl.col(c).cast(pl.String))
        elif isinstance(dt, pl.Decimal):
            casts.append(pl.col(c).cast(pl.Float64))
        elif dt.is_integer() and counts[c]:
            lo, hi = frame.select(pl.col(c).min().alias("lo"), pl.col(c).max().alias("hi")).row(0)
            if lo is None or max(abs(lo), abs(hi)) <= FLOAT_EXACT_INTEGERS:
                casts.append(pl.col(c).cast(pl.Float64))
            else:
                kind = getattr(pd, f"{dt}Dtype", None)
                nullable[c] = kind() if kind is not None else object
        elif dt == pl.Boolean and counts[c]:
            nullable[c] = pd.BooleanDtype()
    if casts:
        frame = frame.with_columns(casts)
    out = frame.to_arrow().to_pandas(date_as_object=False)
    for c, kind in nullable.items():
        out[c] = pd.array(frame.get_column(c).to_list(), dtype=kind)
    return out


def _row_rules_gx(
    columns: list[ColumnRules], panel: Panel, limit: int, timings: dict[str, float]
) -> dict[str, list[RuleResult]]:
    alias = {c.name: f"c{i}" for i, c in enumerate(columns)}  # the batch's column names
    expectations = build_expectations(columns, alias)
    if not expectations:
        timings.setdefault("conversion", 0.0)
        timings.setdefault("expectations", 0.0)
        return {}
    gx = _gx()
    from great_expectations.data_context.types.base import ProgressBarsConfig

    clock = _time.perf_counter()
    names = sorted({e.meta["column"] for e in expectations}, key=list(panel.schema).index)
    frame = panel.frame
    pdf = to_pandas_once(frame.select(pl.col(n).alias(alias[n]) for n in names))
    timings["conversion"] = _time.perf_counter() - clock

    clock = _time.perf_counter()
    context = gx.get_context(mode="ephemeral")
    context.variables.progress_bars = ProgressBarsConfig(globally=False)
    batch = (
        context.data_sources.add_pandas("panel_audit")
        .add_dataframe_asset("panel")
        .add_batch_definition_whole_dataframe("all_rows")
        .get_batch(batch_parameters={"dataframe": pdf})
    )
    def validate(chosen: list[Any], name: str, result_format: str) -> dict[tuple[str, str], Any]:
        suite = gx.ExpectationSuite(name=name)
        for e in chosen:
            suite.add_expectation(e)
        outcome = batch.validate(
            suite, result_format={"result_format": result_format, "partial_unexpected_count": limit}
        )
        return {(r.expectation_config.meta["column"], r.expectation_config.meta["rule"]): r for r in outcome.results}

    # Counts and verdicts for every rule at the library's BASIC level; the failing rows'
    # positions (SUMMARY, which also tallies unexpected values) only for rules that fail.
    by_rule = validate(expectations, "panel_audit_check", "BASIC")
    failing_keys = {k for k, r in by_rule.items() if int((r.result or {}).get("unexpected_count") or 0) > 0}
    located: dict[tuple[str, str], Any] = {}
    if failing_keys:
        again = [
            e for e in build_expectations(columns, alias)
            if (e.meta["column"], e.meta["rule"]) in failing_keys
        ]
        located = validate(again, "panel_audit_examples", "SUMMARY")
    timings["expectations"] = _time.perf_counter() - clock

    spec = {c.name: c for c in columns}
    out: dict[str, list[RuleResult]] = {}
    rows = frame.height
    for e in expectations:
        col, rule = e.meta["column"], e.meta["rule"]
        res = by_rule[(col, rule)]
        reason = _gx_exception(res.exception_info)
        if reason is not None:
            raise fail("contract-engine", column=col, rule=rule, reason=reason)
        r = res.result
        failing = int(r.get("unexpected_count") or 0)
        detail = located[(col, rule)].result if (col, rule) in located else {}
        where = [int(i) for i in (detail.get("partial_unexpected_index_list") or [])][:limit]
        examples = _row_examples(panel, col, where)
        message = _row_message(spec[col], rule, failing, rows, int(r.get("missing_count") or 0))
        passed = bool(res.success)
        out.setdefault(col, []).append(RuleResult(rule, "row", col, passed, failing, message, GX_ENGINE, examples))
    return out


def _gx_exception(info: Any) -> str | None:
    """The first line of an exception great-expectations reports for a result, or None.

    The library reports either one ``{"raised_exception": ...}`` mapping or one
    such mapping per metric that failed to compute.
    """
    if not isinstance(info, dict):
        return None
    entries = [info] if "raised_exception" in info else [v for v in info.values() if isinstance(v, dict)]
    for entry in entries:
        if entry.get("raised_exception") or entry.get("exception_message"):
            text = str(entry.get("exception_message") or "unknown error").strip()
            return (text.splitlines() or ["unknown error"])[0][:200]
    return None


def _row_examples(panel: Panel, column: str, rows: list[int]) -> tuple[dict[str, Any], ...]:
    if not rows:
        return ()
    from auditor.vocab import clean

    keys = [*panel.unit, panel.time]
    picked = panel.frame.select([*keys, *([column] if column not in keys else [])])[rows]
    return tuple(clean(r) for r in picked.iter_rows(named=True))


def _row_message(col: ColumnRules, rule: str, failing: int, rows: int, missing: int) -> str:
    if rule == "min":
        return f"{count(failing, 'value')} below the minimum {col.min}" if failing else f"no value below {col.min}"
    if rule == "max":
        return f"{count(failing, 'value')} above the maximum {col.max}" if failing else f"no value above {col.max}"
    if rule == "allowed":
        return (
            f"{count(failing, 'value')} outside the {len(col.allowed or ())} allowed"
            if failing
            else f"every value is one of the {len(col.allowed or ())} allowed"
        )
    if rule == "max_missing":
        share = failing / rows if rows else 0.0
        return f"{failing} of {rows} values missing ({share:.2%}); the contract allows at most {col.max_missing:.2%}"
    if rule == "pattern":
        return f"{count(failing, 'value')} {'does' if failing == 1 else 'do'} not match the pattern" if failing else "every value matches the pattern"
    if rule == "unique":
        return f"{count(failing, 'row')} {'shares its' if failing == 1 else 'share their'} value with another row" if failing else "no value repeats"
    return f"{failing} rows fail"  # pragma: no cover - every rule is named above


# --- panel rules on polars --------------------------------------------------------


def _panel_rules(rules: PanelRules, contract: Contract, panel: Panel, limit: int) -> list[RuleResult]:
    """The contract's panel rules on ``panel``: keys, units, then the grid and the columns."""
    out: list[RuleResult] = []
    frame = panel.frame
    grid_text = [period_text(g) for g in panel.grid]

    if rules.max_missing_keys is not None:
        n = panel.missing_keys
        out.append(
            RuleResult(
                "max_missing_keys", "panel", None, n <= rules.max_missing_keys, n,
                f"{count(n, 'row')} {'lacks' if n == 1 else 'lack'} a unit or time key (at most {rules.max_missing_keys} allowed)",
                examples=tuple(panel.missing_key_examples[:limit]),
            )
        )
    per_unit = unit_periods(panel) if (
        rules.max_duplicate_keys is not None or rules.balanced or rules.max_attrition is not None
    ) else None
    if rules.max_duplicate_keys is not None and per_unit is not None:
        pairs = int(per_unit["periods"].sum())
        n = frame.height - pairs
        examples: tuple[dict[str, Any], ...] = ()
        if n > rules.max_duplicate_keys:
            from auditor.vocab import clean

            keys = [*panel.unit, panel.time]
            dup = frame.filter(pl.struct(UNIT_ID, PERIOD_ID).is_duplicated()).select(keys).unique(maintain_order=True)
            examples = tuple(clean(r) for r in dup.head(limit).iter_rows(named=True))
        out.append(
            RuleResult(
                "max_duplicate_keys", "panel", None, n <= rules.max_duplicate_keys, n,
                f"{count(n, 'row')} {'repeats' if n == 1 else 'repeat'} a (unit, time) key already seen (at most {rules.max_duplicate_keys} allowed)",
                examples=examples,
            )
        )
    if rules.min_units is not None:
        n = panel.n_units
        short = max(0, rules.min_units - n)
        out.append(
            RuleResult(
                "min_units", "panel", None, short == 0, short,
                f"{n} units present, the contract asks for at least {rules.min_units}",
            )
        )
    out.extend(_grid_and_column_rules(rules, contract, panel, limit, per_unit, grid_text))
    return out


def _grid_and_column_rules(rules: PanelRules, contract: Contract, panel: Panel, limit: int,
                           per_unit: pl.DataFrame | None, grid_text: list[str]) -> list[RuleResult]:
    """The panel rules on the period grid (step, periods, range, balance, attrition) and on
    the columns present, in the contract's order."""
    out: list[RuleResult] = []
    if rules.step is not None:
        out.append(_step_rule(rules.step, panel, limit))
    if rules.periods is not None:
        expected = {period_text(p) for p in rules.periods}
        observed = set(grid_text)
        missing = [p for p in rules.periods if period_text(p) not in observed]
        extra = [g for g, t in zip(panel.grid, grid_text, strict=True) if t not in expected]
        n = len(missing) + len(extra)
        parts = []
        if missing:
            parts.append("missing " + short_list(missing, _named(limit)))
        if extra:
            parts.append("not in the contract " + short_list(extra, _named(limit)))
        msg = "; ".join(parts) if parts else f"the {len(expected)} periods are the contract's"
        ex = [{"period": p, "problem": "missing"} for p in missing] + [
            {"period": e, "problem": "unexpected"} for e in extra
        ]
        out.append(RuleResult("periods", "panel", None, n == 0, n, msg, examples=tuple(ex[:limit])))
    if rules.first_period is not None or rules.last_period is not None:
        lo = period_order(rules.first_period) if rules.first_period is not None else None
        hi = period_order(rules.last_period) if rules.last_period is not None else None
        outside = [
            g for g in panel.grid
            if (lo is not None and period_order(g) < lo) or (hi is not None and period_order(g) > hi)
        ]
        span = f"{rules.first_period if rules.first_period is not None else '...'} to {rules.last_period if rules.last_period is not None else '...'}"
        msg = (
            f"{len(outside)} periods outside {span}: " + ", ".join(str(o) for o in outside[:_named(limit)])
            if outside
            else f"every period lies in {span}"
        )
        out.append(
            RuleResult(
                "period_range", "panel", None, not outside, len(outside), msg,
                examples=tuple({"period": o} for o in outside[:limit]),
            )
        )
    if rules.balanced and per_unit is not None:
        short = per_unit.filter(pl.col("periods") < panel.n_periods).sort(UNIT_ID)
        n = short.height
        out.append(
            RuleResult(
                "balanced", "panel", None, n == 0, n,
                f"{n} of {panel.n_units} units miss at least one of the {panel.n_periods} periods",
                examples=tuple(panel.unit_labels(short[UNIT_ID].head(limit).to_list())),
            )
        )
    if rules.max_attrition is not None and per_unit is not None:
        out.append(_attrition_rule(rules.max_attrition, panel, limit, per_unit))
    if rules.only_listed_columns:
        listed = {c.name for c in contract.columns}
        extra_cols = [c for c in panel.columns if c not in listed]
        out.append(
            RuleResult(
                "only_listed_columns", "panel", None, not extra_cols, len(extra_cols),
                (
                    f"{count(len(extra_cols), 'column')} the contract does not list: " + ", ".join(extra_cols[:_named(limit)])
                    if extra_cols
                    else "every column is listed in the contract"
                ),
                examples=tuple({"column": c} for c in extra_cols[:limit]),
            )
        )
    return out


def _step_rule(step: int, panel: Panel, limit: int) -> RuleResult:
    """Neighbouring periods of the grid ``step`` apart (a delivery of one period has no step)."""
    pos, grid = panel.grid_position, panel.grid
    if len(pos) < 2:
        return RuleResult(
            "step", "panel", None, True, 0,
            f"one period ({grid[0]}): no step between periods within the data "
            "(check --against BASE judges the step from the base's last period)",
        )
    uneven = [(grid[i], grid[i + 1], pos[i + 1] - pos[i]) for i in range(len(pos) - 1) if pos[i + 1] - pos[i] != step]
    n = len(uneven)
    if not n:
        msg = f"each of the {len(pos) - 1} steps between neighbouring periods is {step}"
    else:
        first = uneven[0]
        msg = (
            f"{n} of {len(pos) - 1} steps between neighbouring periods differ from the contract's {step} "
            f"({first[0]} to {first[1]} is {first[2]}"
            + ("; periods are missing in between)" if first[2] > step and first[2] % step == 0 else ")")
        )
    examples = tuple({"from": a, "to": b, "step": d} for a, b, d in uneven[:limit])
    return RuleResult("step", "panel", None, n == 0, n, msg, examples=examples)


def unit_periods(panel: Panel) -> pl.DataFrame:
    """One row per unit code: ``periods`` (distinct periods observed) and ``last`` (last period index).

    By a units x periods presence table in numpy (a polars grouped distinct count is
    several times slower), or polars when that table would be large.
    """
    import numpy as np

    n_units, n_periods = panel.n_units, panel.n_periods
    if n_units * n_periods > 50_000_000:
        return panel.frame.group_by(UNIT_ID).agg(
            pl.col(PERIOD_ID).n_unique().alias("periods"), pl.col(PERIOD_ID).max().alias("last")
        )
    units = panel.frame.get_column(UNIT_ID).to_numpy().astype(np.int64)
    present = np.zeros(n_units * n_periods, dtype=bool)
    present[units * n_periods + panel.frame.get_column(PERIOD_ID).to_numpy()] = True
    present = present.reshape(n_units, n_periods)
    periods = present.sum(axis=1)
    last = n_periods - 1 - np.argmax(present[:, ::-1], axis=1)
    seen = periods > 0
    return pl.DataFrame({
        UNIT_ID: pl.Series(UNIT_ID, np.nonzero(seen)[0], dtype=pl.UInt32),
        "periods": pl.Series("periods", periods[seen], dtype=pl.UInt32),
        "last": pl.Series("last", last[seen], dtype=pl.UInt32),
    })


def attrition_shares(panel: Panel, per_unit: pl.DataFrame | None = None) -> pl.DataFrame:
    """Per period but the last: ``present`` units, ``leaving`` (last seen there) and their ``share``.

    Columns ``period_index`` (UInt32), ``present``, ``leaving`` (counts of units),
    ``share`` (leaving / present, a fraction).
    """
    frame = panel.frame
    last = per_unit if per_unit is not None else unit_periods(panel)
    present = frame.group_by(PERIOD_ID).agg(pl.col(UNIT_ID).n_unique().alias("present"))
    leaving = last.group_by("last").agg(pl.len().alias("leaving")).rename({"last": PERIOD_ID})
    final = panel.n_periods - 1
    return (
        present.join(leaving, on=PERIOD_ID, how="left")
        .with_columns(pl.col("leaving").fill_null(0))
        .filter(pl.col(PERIOD_ID) < final)
        .with_columns((pl.col("leaving") / pl.col("present")).alias("share"))
        .rename({PERIOD_ID: "period_index"})
        .sort("period_index")
    )


def _attrition_rule(limit_share: float, panel: Panel, limit: int, per_unit: pl.DataFrame) -> RuleResult:
    table = attrition_shares(panel, per_unit)
    bad = table.filter(pl.col("share") > limit_share)
    examples = tuple(
        {"period": panel.grid[int(r["period_index"])], "present": int(r["present"]),
         "leaving": int(r["leaving"]), "share": round(float(r["share"]), 4)}
        for r in bad.head(limit).iter_rows(named=True)
    )
    worst = float(table["share"].max()) if table.height else 0.0
    return RuleResult(
        "max_attrition", "panel", None, bad.height == 0, bad.height,
        f"{count(bad.height, 'period')} after which more than {limit_share:.1%} of the units present are never seen again"
        f" (highest {worst:.1%})",
        examples=examples,
    )


def missing_as_null(column: str, dtype: pl.DataType) -> pl.Expr:
    """The column with NaN read as missing, as the row rules read it."""
    e = pl.col(column)
    if dtype.is_float():
        e = e.fill_nan(None)
    return e


def _within_rules(
    columns: list[ColumnRules], panel: Panel, settings: Settings, limit: int
) -> dict[str, list[RuleResult]]:
    """The invariant, monotone and max_change rules of ``columns``: one grouped pass for every
    invariant column, one sort for every monotone or change-limited column."""
    from auditor.vocab import clean

    out: dict[str, list[RuleResult]] = {c.name: [] for c in columns}
    tol = settings.profile.float_tolerance
    inv = [c for c in columns if c.invariant]
    if inv:
        counts = invariant_counts(panel, [c.name for c in inv], tol)
        for col in inv:
            n = counts[col.name]
            examples: tuple[dict[str, Any], ...] = ()
            if n:
                per_unit = changing_units(panel, col.name, tol, limit)
                labels = panel.unit_labels(per_unit[UNIT_ID].to_list())
                examples = tuple(
                    clean({**lab, "values": [a, b]})
                    for lab, a, b in zip(labels, per_unit["first"].to_list(), per_unit["other"].to_list(), strict=True)
                )
            out[col.name].append(
                RuleResult(
                    "invariant", "panel", col.name, n == 0, n,
                    f"{n} of {panel.n_units} units change value over time; the contract says it never changes within a unit",
                    examples=examples,
                )
            )
    moving = [c for c in columns if c.monotone or c.max_change is not None or c.max_change_per_period is not None]
    if moving:
        steps = step_changes(panel, [c.name for c in moving])
        keys = [*panel.unit, panel.time]
        for col in moving:
            change = pl.col(f"change:{col.name}")
            shown = [*keys, pl.col(f"previous:{col.name}").alias("previous"), *([col.name] if col.name not in keys else [])]

            def located(frame: pl.DataFrame, extra: tuple[Any, ...] = (), shown: list[Any] = shown) -> tuple[dict[str, Any], ...]:
                picked = frame.select(*shown, *extra).head(limit)
                return tuple(clean(r) for r in picked.iter_rows(named=True))

            if col.monotone:
                wrong = steps.filter(change < 0 if col.monotone == "increasing" else change > 0)
                word = "falls" if col.monotone == "increasing" else "rises"
                out[col.name].append(
                    RuleResult(
                        "monotone", "panel", col.name, wrong.height == 0, wrong.height,
                        f"{_times(wrong.height)} a unit's value {word} from one observation to its next"
                        f" (the contract says it is {col.monotone})",
                        examples=located(wrong),
                    )
                )
            if col.max_change is not None:
                big = steps.filter(change.abs() > col.max_change)
                out[col.name].append(
                    RuleResult(
                        "max_change", "panel", col.name, big.height == 0, big.height,
                        f"{_times(big.height)} a unit's value moves by more than {col.max_change:g} between consecutive observations",
                        examples=located(big),
                    )
                )
            if col.max_change_per_period is not None:
                # a repeated (unit, period) key has no periods between: max_duplicate_keys' business
                between = pl.col(f"periods:{col.name}")
                per = (change / between).abs()
                big = steps.filter((between > 0) & (per > col.max_change_per_period))
                out[col.name].append(
                    RuleResult(
                        "max_change_per_period", "panel", col.name, big.height == 0, big.height,
                        f"{_times(big.height)} a unit's value moves by more than {col.max_change_per_period:g} a period "
                        "(its change divided by the periods between the two observations)",
                        examples=located(big, (pl.col(f"periods:{col.name}").alias("periods_between"),)),
                    )
                )
    for col in columns:
        if col.follows_period:
            out[col.name].append(follows_period_rule(col.name, panel, tol, limit))
    return out


def count(n: int, one: str, many: str | None = None) -> str:
    """``n`` with its noun, singular for one: "1 value", "3 values"."""
    return f"{n:,} {one}" if n == 1 else f"{n:,} {many or one + 's'}"


def _times(n: int) -> str:
    return "once" if n == 1 else f"{n} times"


def follows_period_rule(column: str, panel: Panel, tolerance: float, limit: int) -> RuleResult:
    """Every unit holds the same value in a period (a price, a national index): the periods
    where the non-missing values differ (floats: by more than the profile's tolerance)."""
    from auditor.vocab import clean

    dtype = panel.schema[column]
    v = missing_as_null(column, dtype)
    if dtype.is_float():
        differs = (v.max() - v.min()) > tolerance * (1 + v.mean().abs())
    else:
        differs = v.drop_nulls().n_unique() > 1
    per = (
        panel.frame.group_by(PERIOD_ID)
        .agg(differs.fill_null(False).alias("differs"), v.min().alias("lowest"), v.max().alias("highest"),
             v.drop_nulls().n_unique().alias("values"))
        .filter(pl.col("differs"))
        .sort(PERIOD_ID)
    )
    n = per.height
    examples = tuple(
        clean({"period": panel.grid[int(r[PERIOD_ID])], "values": int(r["values"]),
               "lowest": r["lowest"], "highest": r["highest"]})
        for r in per.head(limit).iter_rows(named=True)
    )
    return RuleResult(
        "follows_period", "panel", column, n == 0, n,
        f"in {n} of {panel.n_periods} periods the units hold different values; the contract says every unit "
        "shares one value in a period",
        examples=examples,
    )


def _changes(dtype: pl.DataType, values: pl.Expr) -> pl.Expr:
    """Values as float64 so that differences are numbers (days for dates, seconds for datetimes)."""
    if dtype == pl.Date:
        return values.cast(pl.Int32).cast(pl.Float64)
    if isinstance(dtype, pl.Datetime):
        return values.dt.epoch("s").cast(pl.Float64)
    return values.cast(pl.Float64)


def invariant_counts(panel: Panel, columns: list[str], tolerance: float) -> dict[str, int]:
    """For each column, the number of units whose usable values differ: the moments
    kernel's test (methods.md, section 3; floats by the tolerance, infinities left out,
    integers compared exactly), the one the profile's ``units_changing`` counts."""
    found = _units_changing(panel, columns, tolerance, 0)
    return {c: int(found[c][0].sum()) for c in columns}


def changing_units(panel: Panel, column: str, tolerance: float, limit: int | None = None) -> pl.DataFrame:
    """Units whose usable values of ``column`` differ (:func:`invariant_counts`), the first
    ``limit`` of them (all by default), with their lowest and highest value: columns
    ``__pa_unit``, ``first`` and ``other``, sorted by unit code."""
    _, shown = _units_changing(panel, [column], tolerance, panel.n_units if limit is None else limit)[column]
    return pl.DataFrame(
        {UNIT_ID: pl.Series(UNIT_ID, [e[0] for e in shown], dtype=pl.UInt32),
         "first": [e[1] for e in shown], "other": [e[2] for e in shown]},
        strict=False,
    )


def _units_changing(panel: Panel, columns: list[str], tolerance: float, examples: int) -> dict[str, Any]:
    from auditor.stats.moments import changes

    frame = panel.frame.select(UNIT_ID, PERIOD_ID, *columns)
    return changes(frame, columns, n_units=panel.n_units, n_periods=panel.n_periods, tolerance=tolerance,
                   examples=examples)


def step_changes(panel: Panel, columns: list[str]) -> pl.DataFrame:
    """Each unit's steps between consecutive non-missing observations of each column.

    One sort by (unit, period) for all columns. Returns the rows in that order
    with the key columns, each column, ``previous:<col>`` (the unit's previous
    non-missing value), ``change:<col>`` (now - previous as a float: days for
    dates; null on a unit's first observation and where the value is missing) and
    ``periods:<col>`` (the grid steps between the two observations: 1 for
    neighbouring periods, 0 for a repeated key; the grid's step is its most common
    difference).
    """
    keys = [*panel.unit, panel.time]
    positions = pl.Series("pos", list(panel.grid_position), dtype=pl.Int64)
    frame = panel.frame.select(
        UNIT_ID, PERIOD_ID, *[k for k in keys if k not in columns],
        *[missing_as_null(c, panel.schema[c]).alias(c) for c in columns],
    ).sort(UNIT_ID, PERIOD_ID, maintain_order=True)
    frame = frame.with_columns(pl.lit(positions).gather(pl.col(PERIOD_ID)).alias("__pa_pos"))
    step = float(panel.step or 1)
    exprs: list[pl.Expr] = []
    for c in columns:
        v = pl.col(c)
        # the previous non-missing value and the unit it belongs to, without a window per unit
        previous = v.shift(1).forward_fill()
        owner = pl.when(v.is_not_null()).then(pl.col(UNIT_ID)).shift(1).forward_fill()
        at = pl.when(v.is_not_null()).then(pl.col("__pa_pos")).shift(1).forward_fill()
        same = v.is_not_null() & (owner == pl.col(UNIT_ID))
        num = _changes(panel.schema[c], v)
        prev_num = _changes(panel.schema[c], previous)
        exprs.append(pl.when(same).then(previous).otherwise(None).alias(f"previous:{c}"))
        exprs.append(pl.when(same).then(num - prev_num).otherwise(None).alias(f"change:{c}"))
        exprs.append(pl.when(same).then((pl.col("__pa_pos") - at) / step).otherwise(None).alias(f"periods:{c}"))
    return frame.with_columns(exprs).drop("__pa_pos")


# --- export ----------------------------------------------------------------------


def export_suite(rules_path: str | Path) -> dict[str, Any]:
    """The row rules of the contract at ``rules_path`` as a great-expectations suite (a JSON-ready dict).

    Panel rules and column types, which need the panel or the data's own schema,
    are listed in the suite's ``meta`` as not exported.
    """
    from auditor.version import __version__

    contract, _ = read_contract(rules_path)
    if contract.is_empty:
        raise fail("contract-empty", path=rules_path)
    gx = _gx()
    gx.get_context(mode="ephemeral")  # suites need an active context
    suite = gx.ExpectationSuite(name=Path(rules_path).stem)
    for col in contract.columns:
        if not col.name.strip() and _columnhas_row_rules(col):
            raise fail(
                "contract-engine", rule="(any)", column=col.name,
                reason="an expectation suite needs a column name; name the column in the data and the contract",
            )  # fmt: skip
    for e in build_expectations(contract.columns):
        suite.add_expectation(e)
    doc = suite.to_json_dict()
    left = [f"panel.{k}" for k, v in vars(contract.panel).items() if v not in (None, False) and k not in ("unit", "time")]
    for col in contract.columns:
        for key in ("type", "invariant", "monotone", "max_change", "max_change_per_period", "follows_period"):
            if getattr(col, key) not in (None, False):
                left.append(f"columns.{col.name}.{key}")
    meta = dict(doc.get("meta") or {})
    meta["panel_audit"] = {
        "name": "panel-audit",
        "version": __version__,
        "contract": str(rules_path),
        "not_exported": left,
    }
    doc["meta"] = meta
    return doc
