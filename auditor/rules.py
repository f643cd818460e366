"""Running a panel contract (``panel-audit check``), drafting one and exporting its row rules.

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

import math
import time as _time
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any

import polars as pl

from auditor.config import Settings, default_settings
from auditor.contract import (
    ColumnRules,
    Contract,
    PanelRules,
    period_order,
    period_text,
    read_contract,
)
from auditor.errors import fail, short_list
from auditor.findings import Finding, make
from auditor.load import PERIOD_ID, UNIT_ID, Panel, load_panel, parse_unit

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
    failing: int
    message: str
    engine: str = POLARS_ENGINE
    examples: tuple[dict[str, Any], ...] = field(default_factory=tuple)

    def to_dict(self) -> dict[str, Any]:
        """The rule's entry in the ``check`` JSON document."""
        from auditor.report.jsonout import clean

        return clean(
            {
                "rule": self.rule,
                "level": self.level,
                "column": self.column,
                "passed": self.passed,
                "failing": self.failing,
                "message": self.message,
                "engine": self.engine,
                "examples": [dict(e) for e in self.examples],
            }
        )


@dataclass(frozen=True)
class CheckResult:
    """A contract run on a panel: every rule's result, in contract order.

    ``timings`` holds seconds spent loading, converting to pandas, in
    great-expectations and in the polars panel rules (not part of the JSON).
    """

    rules: tuple[RuleResult, ...]
    contract: str
    source: str
    findings: tuple[Finding, ...]
    timings: dict[str, float] = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        """True when every rule holds."""
        return all(r.passed for r in self.rules)

    @property
    def failed(self) -> tuple[RuleResult, ...]:
        """The rules that do not hold."""
        return tuple(r for r in self.rules if not r.passed)

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``check`` JSON document."""
        from auditor.profile import tool_info

        return {
            "tool": tool_info(),
            "passed": self.passed,
            "contract": self.contract,
            "source": self.source,
            "summary": {"rules": len(self.rules), "failed": len(self.failed)},
            "rules": [r.to_dict() for r in self.rules],
        }


# --- the entry points -------------------------------------------------------------


def check(
    data: Any,
    *,
    rules: str | Path,
    unit: str | list[str] | None = None,
    time: str | None = None,
) -> CheckResult:
    """Run the contract in the file ``rules`` on ``data`` (path(s) or a pandas/polars frame).

    The unit and time keys come from the contract's ``panel`` part, or from
    ``unit``/``time`` when the contract leaves them out. Returns a CheckResult;
    raises AuditError (exit 2) when the file or the data cannot be used.
    """
    clock = _time.perf_counter()
    contract, settings = read_contract(rules)
    if contract.is_empty:
        raise fail("contract-empty", path=rules)
    units, time_key = _keys(contract, rules, unit, time)
    panel = load_panel(data, units, time_key, settings=settings)
    timings = {"load": _time.perf_counter() - clock}
    results = run_contract(contract, panel, settings, timings=timings)
    findings = tuple(
        make(
            "rule-failed",
            settings,
            f"contract rule '{r.rule}' does not hold: {r.message}",
            column=r.column,
            count=r.failing,
            examples=r.examples,
        )
        for r in results
        if not r.passed
    )
    return CheckResult(
        rules=results,
        contract=str(rules),
        source=panel.source,
        findings=findings,
        timings=timings,
    )


def run_contract(
    contract: Contract,
    panel: Panel,
    settings: Settings,
    *,
    timings: dict[str, float] | None = None,
) -> tuple[RuleResult, ...]:
    """Every rule of ``contract`` evaluated on the loaded ``panel``, in contract order.

    ``timings`` (if given) receives the seconds spent per stage.
    """
    timings = timings if timings is not None else {}
    schema = panel.schema
    _check_rule_kinds(contract, schema)
    limit = int(settings.get("check", "examples"))
    out: list[RuleResult] = []

    clock = _time.perf_counter()
    out.extend(_panel_rules(contract.panel, contract, panel, limit))
    present = [c for c in contract.columns if c.name in schema]
    within = _within_rules(present, panel, settings, limit)
    timings["panel_rules"] = _time.perf_counter() - clock

    row = _row_rules_gx(present, panel, limit, timings)
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
        if col.type is not None:
            out.append(_type_rule(col, panel))
        out.extend(row.get(col.name, []))
        out.extend(within[col.name])
    return tuple(out)


def _keys(
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


def type_family(dtype: pl.DataType) -> str | None:
    """The contract type name for a polars dtype (None when the contract has none for it)."""
    if dtype == pl.Boolean:
        return "boolean"
    if dtype.is_integer():
        return "integer"
    if dtype.is_float() or isinstance(dtype, pl.Decimal):
        return "float"
    if dtype in (pl.String, pl.Categorical) or isinstance(dtype, pl.Categorical | pl.Enum):
        return "text"
    if dtype == pl.Date:
        return "date"
    if isinstance(dtype, pl.Datetime):
        return "datetime"
    return None


def _type_matches(wanted: str, dtype: pl.DataType) -> bool:
    fam = type_family(dtype)
    if wanted == "number":
        return fam in ("integer", "float")
    return fam == wanted


def _type_rule(col: ColumnRules, panel: Panel) -> RuleResult:
    dtype = panel.schema[col.name]
    ok = _type_matches(col.type or "", dtype)
    if ok:
        return RuleResult("type", "row", col.name, True, 0, f"values are {col.type} ({dtype})")
    values = int(panel.frame.select(pl.col(col.name).count()).item())
    return RuleResult(
        "type",
        "row",
        col.name,
        False,
        values,
        f"the contract expects {col.type} values but the column holds {dtype}: all {values} non-missing values break it",
    )


def _check_rule_kinds(contract: Contract, schema: dict[str, pl.DataType]) -> None:
    """Refuse (exit 2) rules that cannot apply to a column's type, before anything runs."""
    path = contract.source
    for col in contract.columns:
        if col.name not in schema:
            continue
        fam = type_family(schema[col.name])
        numeric = fam in ("integer", "float")
        dated = fam in ("date", "datetime")
        for key in ("min", "max"):
            v = getattr(col, key)
            if v is None:
                continue
            if isinstance(v, date) and not dated:
                raise fail("contract-rule-kind", path=path, line=col.line, column=col.name, key=key,
                           dtype=schema[col.name], expected="a date column")
            if not isinstance(v, date) and not numeric:
                raise fail("contract-rule-kind", path=path, line=col.line, column=col.name, key=key,
                           dtype=schema[col.name], expected="a numeric column (or a date bound for a date column)")
        if col.pattern is not None and fam != "text":
            raise fail("contract-rule-kind", path=path, line=col.line, column=col.name, key="pattern",
                       dtype=schema[col.name], expected="a text column")
        if col.max_change is not None and not numeric:
            raise fail("contract-rule-kind", path=path, line=col.line, column=col.name, key="max_change",
                       dtype=schema[col.name], expected="a numeric column")
        if col.monotone is not None and not (numeric or dated):
            raise fail("contract-rule-kind", path=path, line=col.line, column=col.name, key="monotone",
                       dtype=schema[col.name], expected="a numeric or date column")


# --- row rules through great-expectations ------------------------------------------


def _gx() -> Any:
    """great_expectations, imported quietly (no usage reporting, no progress bars)."""
    import logging
    import os

    os.environ.setdefault("GX_ANALYTICS_ENABLED", "False")
    import great_expectations as gx

    logging.getLogger("great_expectations").setLevel(logging.ERROR)
    return gx


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


def _has_row_rules(col: ColumnRules) -> bool:
    return any(v not in (None, False) for v in (col.min, col.max, col.allowed, col.max_missing, col.pattern, col.unique))


def to_pandas_once(frame: pl.DataFrame) -> Any:
    """``frame`` as a pandas DataFrame that keeps integer and boolean columns with gaps exact.

    Integers and booleans become pandas nullable types (not floats or objects),
    categorical columns become text, dates become datetime64; row order and the
    default 0..n-1 index are kept, so result row positions index ``frame``.
    """
    import pandas as pd
    import pyarrow as pa

    casts = [
        pl.col(c).cast(pl.String)
        for c, dt in frame.schema.items()
        if isinstance(dt, pl.Categorical | pl.Enum)
    ]
    casts += [pl.col(c).cast(pl.Float64) for c, dt in frame.schema.items() if isinstance(dt, pl.Decimal)]
    if casts:
        frame = frame.with_columns(casts)
    # 128-bit integers have no pandas or arrow-to-pandas type: exact Python ints (objects)
    wide = [c for c, dt in frame.schema.items() if dt in (pl.Int128, pl.UInt128)]
    if wide:
        order = frame.columns
        out = to_pandas_once(frame.drop(wide))
        for c in wide:
            out[c] = pd.Series(frame[c].to_list(), dtype=object)
        return out[order]
    nullable = {
        pa.int8(): pd.Int8Dtype(), pa.int16(): pd.Int16Dtype(), pa.int32(): pd.Int32Dtype(),
        pa.int64(): pd.Int64Dtype(), pa.uint8(): pd.UInt8Dtype(), pa.uint16(): pd.UInt16Dtype(),
        pa.uint32(): pd.UInt32Dtype(), pa.uint64(): pd.UInt64Dtype(), pa.bool_(): pd.BooleanDtype(),
    }
    return frame.to_arrow().to_pandas(types_mapper=nullable.get, date_as_object=False)


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
    from auditor.report.jsonout import clean

    keys = [*panel.unit, panel.time]
    picked = panel.frame.select([*keys, column])[rows]
    return tuple(clean(r) for r in picked.iter_rows(named=True))


def _row_message(col: ColumnRules, rule: str, failing: int, rows: int, missing: int) -> str:
    if rule == "min":
        return f"{failing} values below the minimum {col.min}" if failing else f"no value below {col.min}"
    if rule == "max":
        return f"{failing} values above the maximum {col.max}" if failing else f"no value above {col.max}"
    if rule == "allowed":
        return (
            f"{failing} values outside the {len(col.allowed or ())} allowed"
            if failing
            else f"every value is one of the {len(col.allowed or ())} allowed"
        )
    if rule == "max_missing":
        share = failing / rows if rows else 0.0
        return f"{failing} of {rows} values missing ({share:.2%}); the contract allows at most {col.max_missing:.2%}"
    if rule == "pattern":
        return f"{failing} values do not match the pattern" if failing else "every value matches the pattern"
    if rule == "unique":
        return f"{failing} rows share their value with another row" if failing else "no value repeats"
    return f"{failing} rows fail"  # pragma: no cover - every rule is named above


# --- panel rules on polars --------------------------------------------------------


def _panel_rules(rules: PanelRules, contract: Contract, panel: Panel, limit: int) -> list[RuleResult]:
    out: list[RuleResult] = []
    frame = panel.frame
    grid_text = [period_text(g) for g in panel.grid]

    if rules.max_missing_keys is not None:
        n = panel.missing_keys
        out.append(
            RuleResult(
                "max_missing_keys", "panel", None, n <= rules.max_missing_keys, n,
                f"{n} rows lack a unit or time key (at most {rules.max_missing_keys} allowed)",
                examples=tuple(panel.missing_key_examples[:limit]),
            )
        )
    per_unit = _per_unit(panel) if (
        rules.max_duplicate_keys is not None or rules.balanced or rules.max_attrition is not None
    ) else None
    if rules.max_duplicate_keys is not None and per_unit is not None:
        pairs = int(per_unit["periods"].sum())
        n = frame.height - pairs
        examples: tuple[dict[str, Any], ...] = ()
        if n > rules.max_duplicate_keys:
            from auditor.report.jsonout import clean

            keys = [*panel.unit, panel.time]
            dup = frame.filter(pl.struct(UNIT_ID, PERIOD_ID).is_duplicated()).select(keys).unique(maintain_order=True)
            examples = tuple(clean(r) for r in dup.head(limit).iter_rows(named=True))
        out.append(
            RuleResult(
                "max_duplicate_keys", "panel", None, n <= rules.max_duplicate_keys, n,
                f"{n} rows repeat a (unit, time) key already seen (at most {rules.max_duplicate_keys} allowed)",
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
    if rules.step is not None:
        ok = panel.step == rules.step
        if panel.step is None:
            bad = [{"from": a, "to": b} for a, b in panel.irregular[:limit]]
            msg = f"the periods are irregularly spaced ({len(panel.irregular)} uneven steps); the contract expects a step of {rules.step}"
            n = len(panel.irregular)
        else:
            bad = []
            msg = f"the periods advance by {panel.step}; the contract expects {rules.step}"
            n = 0 if ok else panel.n_periods - 1
        out.append(RuleResult("step", "panel", None, ok, n, msg, examples=tuple(bad)))
    if rules.periods is not None:
        expected = {period_text(p) for p in rules.periods}
        observed = set(grid_text)
        missing = [p for p in rules.periods if period_text(p) not in observed]
        extra = [g for g, t in zip(panel.grid, grid_text, strict=True) if t not in expected]
        n = len(missing) + len(extra)
        parts = []
        if missing:
            parts.append("missing " + short_list(missing, limit))
        if extra:
            parts.append("not in the contract " + short_list(extra, limit))
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
            f"{len(outside)} periods outside {span}: " + ", ".join(str(o) for o in outside[:limit])
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
                    f"{len(extra_cols)} columns the contract does not list: " + ", ".join(extra_cols[:limit])
                    if extra_cols
                    else "every column is listed in the contract"
                ),
                examples=tuple({"column": c} for c in extra_cols[:limit]),
            )
        )
    return out


def _per_unit(panel: Panel) -> pl.DataFrame:
    """One row per unit code: ``periods`` (distinct periods observed) and ``last`` (last period index)."""
    return panel.frame.group_by(UNIT_ID).agg(
        pl.col(PERIOD_ID).n_unique().alias("periods"), pl.col(PERIOD_ID).max().alias("last")
    )


def attrition_shares(panel: Panel, per_unit: pl.DataFrame | None = None) -> pl.DataFrame:
    """Per period but the last: ``present`` units, ``leaving`` (last seen there) and their ``share``.

    Columns ``period_index`` (UInt32), ``present``, ``leaving`` (counts of units),
    ``share`` (leaving / present, a fraction).
    """
    frame = panel.frame
    last = per_unit if per_unit is not None else _per_unit(panel)
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
        f"{bad.height} periods after which more than {limit_share:.1%} of the units present are never seen again"
        f" (highest {worst:.1%})",
        examples=examples,
    )


def _values(column: str, dtype: pl.DataType) -> pl.Expr:
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
    from auditor.report.jsonout import clean

    out: dict[str, list[RuleResult]] = {c.name: [] for c in columns}
    tol = float(settings.get("profile", "float_tolerance"))
    inv = [c for c in columns if c.invariant]
    if inv:
        counts = invariant_counts(panel, [c.name for c in inv], tol)
        for col in inv:
            n = counts[col.name]
            examples: tuple[dict[str, Any], ...] = ()
            if n:
                per_unit = changing_units(panel, col.name, tol).head(limit)
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
    moving = [c for c in columns if c.monotone or c.max_change is not None]
    if moving:
        steps = step_changes(panel, [c.name for c in moving])
        keys = [*panel.unit, panel.time]
        for col in moving:
            change = pl.col(f"change:{col.name}")
            shown = [*keys, pl.col(f"previous:{col.name}").alias("previous"), col.name]
            if col.monotone:
                wrong = steps.filter(change < 0 if col.monotone == "increasing" else change > 0)
                word = "falls" if col.monotone == "increasing" else "rises"
                out[col.name].append(
                    RuleResult(
                        "monotone", "panel", col.name, wrong.height == 0, wrong.height,
                        f"{wrong.height} times a unit's value {word} from one observation to its next"
                        f" (the contract says it is {col.monotone})",
                        examples=tuple(clean(r) for r in wrong.select(shown).head(limit).iter_rows(named=True)),
                    )
                )
            if col.max_change is not None:
                big = steps.filter(change.abs() > col.max_change)
                out[col.name].append(
                    RuleResult(
                        "max_change", "panel", col.name, big.height == 0, big.height,
                        f"{big.height} times a unit's value moves by more than {col.max_change:g} between consecutive observations",
                        examples=tuple(clean(r) for r in big.select(shown).head(limit).iter_rows(named=True)),
                    )
                )
    return out


def _changes(dtype: pl.DataType, values: pl.Expr) -> pl.Expr:
    """Values as float64 so that differences are numbers (days for dates, seconds for datetimes)."""
    if dtype == pl.Date:
        return values.cast(pl.Int32).cast(pl.Float64)
    if isinstance(dtype, pl.Datetime):
        return values.dt.epoch("s").cast(pl.Float64)
    return values.cast(pl.Float64)


def invariant_counts(panel: Panel, columns: list[str], tolerance: float) -> dict[str, int]:
    """For each column, the number of units whose non-missing values differ (one grouped pass).

    Floats differ when (max - min) > tolerance * (1 + |unit mean|) (methods.md);
    other types when a unit holds more than one distinct value.
    """
    aggs: list[pl.Expr] = []
    for c in columns:
        dtype = panel.schema[c]
        v = _values(c, dtype)
        if dtype.is_float():
            aggs.append(((v.max() - v.min()) > tolerance * (1 + v.mean().abs())).alias(c))
        else:
            aggs.append((v.drop_nulls().n_unique() > 1).alias(c))
    per_unit = panel.frame.group_by(UNIT_ID).agg(aggs)
    sums = per_unit.select([pl.col(c).fill_null(False).sum() for c in columns]).row(0, named=True)
    return {c: int(sums[c]) for c in columns}


def changing_units(panel: Panel, column: str, tolerance: float) -> pl.DataFrame:
    """Units whose non-missing values of ``column`` differ, with two of their values.

    The same test as :func:`invariant_counts`. Returns columns ``__pa_unit``,
    ``first`` and ``other`` (for floats the unit's lowest and highest value; else
    its first value by period and one that differs from it), sorted by unit code.
    """
    dtype = panel.schema[column]
    v = _values(column, dtype)
    base = panel.frame.select(UNIT_ID, PERIOD_ID, v.alias("v")).drop_nulls("v")
    if dtype.is_float():
        stats = base.group_by(UNIT_ID).agg(
            pl.col("v").min().alias("lo"), pl.col("v").max().alias("hi"), pl.col("v").mean().alias("mean")
        )
        bad = stats.filter((pl.col("hi") - pl.col("lo")) > tolerance * (1 + pl.col("mean").abs()))
        return bad.select(UNIT_ID, pl.col("lo").alias("first"), pl.col("hi").alias("other")).sort(UNIT_ID)
    stats = base.sort(UNIT_ID, PERIOD_ID).group_by(UNIT_ID).agg(
        pl.col("v").n_unique().alias("n"),
        pl.col("v").first().alias("first"),
        pl.col("v").filter(pl.col("v") != pl.col("v").first()).first().alias("other"),
    )
    return stats.filter(pl.col("n") > 1).select(UNIT_ID, "first", "other").sort(UNIT_ID)


def step_changes(panel: Panel, columns: list[str]) -> pl.DataFrame:
    """Each unit's steps between consecutive non-missing observations of each column.

    One sort by (unit, period) for all columns. Returns the rows in that order
    with the key columns, each column, ``previous:<col>`` (the unit's previous
    non-missing value) and ``change:<col>`` (now - previous as a float: days for
    dates; null on a unit's first observation and where the value is missing).
    """
    keys = [*panel.unit, panel.time]
    frame = panel.frame.select(
        UNIT_ID, PERIOD_ID, *[k for k in keys if k not in columns],
        *[_values(c, panel.schema[c]).alias(c) for c in columns],
    ).sort(UNIT_ID, PERIOD_ID, maintain_order=True)
    exprs: list[pl.Expr] = []
    for c in columns:
        v = pl.col(c)
        # the previous non-missing value and the unit it belongs to, without a window per unit
        previous = v.shift(1).forward_fill()
        owner = pl.when(v.is_not_null()).then(pl.col(UNIT_ID)).shift(1).forward_fill()
        same = v.is_not_null() & (owner == pl.col(UNIT_ID))
        num = _changes(panel.schema[c], v)
        prev_num = _changes(panel.schema[c], previous)
        exprs.append(pl.when(same).then(previous).otherwise(None).alias(f"previous:{c}"))
        exprs.append(pl.when(same).then(num - prev_num).otherwise(None).alias(f"change:{c}"))
    return frame.with_columns(exprs)


# --- drafting --------------------------------------------------------------------


def draft(
    data: Any,
    *,
    unit: str | list[str],
    time: str,
    settings: Settings | None = None,
) -> str:
    """A starting contract learned from ``data`` (meant to be a clean panel), as YAML text.

    It records the keys, the period grid, the types, observed ranges, code lists
    of columns with few levels, missing-share ceilings, the time-invariant
    columns (from the profile) and columns that never fall within a unit. The
    data it was drafted from passes it.
    """
    import yaml

    from auditor import __version__
    from auditor.profile import profile_panel

    settings = settings or default_settings()
    panel = load_panel(data, unit, time, settings=settings)
    prof = profile_panel(panel, settings)
    kinds = dict(zip(prof.columns["name"].to_list(), prof.columns["kind"].to_list(), strict=True))
    doc_panel = _draft_panel(panel, settings)
    doc_columns = _draft_columns(panel, kinds, settings)
    head = (
        f"# Panel contract drafted by panel-audit {__version__} from {panel.source}\n"
        f"# ({panel.rows} rows, {panel.n_units} units, {panel.n_periods} periods).\n"
        "# A starting point: it states what this data looks like. Loosen or tighten\n"
        "# each rule to what the delivery must promise, then run `panel-audit check`.\n"
    )
    body = yaml.safe_dump(
        {"panel": doc_panel, "columns": doc_columns},
        sort_keys=False,
        default_flow_style=None,
        allow_unicode=True,
        width=100,
    )
    return head + body


def _ceil(x: float, digits: int = 2) -> float:
    scale = 10**digits
    return min(1.0, math.ceil(x * scale - 1e-9) / scale)


def _draft_panel(panel: Panel, settings: Settings) -> dict[str, Any]:
    listed = int(settings.get("check", "draft_periods_listed"))
    margin = float(settings.get("check", "draft_attrition_margin"))
    doc: dict[str, Any] = {
        "unit": panel.unit[0] if len(panel.unit) == 1 else list(panel.unit),
        "time": panel.time,
    }
    if panel.step is not None:
        doc["step"] = panel.step
    if panel.n_periods <= listed:
        doc["periods"] = list(panel.grid)
    else:
        doc["period_range"] = {"first": panel.grid[0], "last": panel.grid[-1]}
    doc["min_units"] = panel.n_units
    per_unit = _per_unit(panel)
    if int(per_unit["periods"].min()) == panel.n_periods:
        doc["balanced"] = True
    table = attrition_shares(panel, per_unit)
    if table.height:
        worst = float(table["share"].max())
        doc["max_attrition"] = _ceil(max(worst, worst + margin))
    doc["max_duplicate_keys"] = panel.frame.height - int(per_unit["periods"].sum())
    doc["max_missing_keys"] = panel.missing_keys
    doc["only_listed_columns"] = True
    return doc


def _scalar(v: Any) -> Any:
    if isinstance(v, datetime | date | bool | int | str):
        return v
    if isinstance(v, float):
        return v
    return str(v)


def _draft_columns(panel: Panel, kinds: dict[str, str], settings: Settings) -> dict[str, Any]:
    max_levels = int(settings.get("check", "draft_max_levels"))
    margin = float(settings.get("check", "draft_missing_margin"))
    frame = panel.frame
    rows = frame.height
    names = [c for c in panel.schema if c not in (*panel.unit, panel.time)]
    fams = {c: type_family(panel.schema[c]) for c in names}
    # one pass over the frame for every column's missing count, range and distinct count
    aggs: list[pl.Expr] = []
    for c in names:
        v = _values(c, panel.schema[c])
        aggs.append(v.null_count().alias(f"{c}\x00null"))
        if fams[c] in ("text", "integer", "boolean"):
            aggs.append(v.drop_nulls().n_unique().alias(f"{c}\x00distinct"))
        if fams[c] in ("integer", "float", "date", "datetime"):
            aggs.append(v.min().alias(f"{c}\x00min"))
            aggs.append(v.max().alias(f"{c}\x00max"))
    stats = frame.select(aggs).row(0, named=True) if aggs else {}
    # columns that change within units: do they only rise (or only fall)? one sort for all
    moving = [
        c for c in names
        if fams[c] in ("integer", "float", "date")
        and kinds.get(c) not in (None, "constant", "time-invariant")
    ]
    direction: dict[str, str] = {}
    if moving:
        steps = step_changes(panel, moving)
        counts = steps.select(
            [(pl.col(f"change:{c}") < 0).sum().alias(f"{c}\x00falls") for c in moving]
            + [(pl.col(f"change:{c}") > 0).sum().alias(f"{c}\x00rises") for c in moving]
        ).row(0, named=True)
        for c in moving:
            falls, rises = int(counts[f"{c}\x00falls"]), int(counts[f"{c}\x00rises"])
            if falls == 0 and rises > 0:
                direction[c] = "increasing"
            elif rises == 0 and falls > 0:
                direction[c] = "decreasing"
    doc: dict[str, Any] = {}
    for c in [*panel.unit, panel.time]:
        fam = type_family(panel.schema[c])
        if fam is not None:
            doc[c] = {"type": fam}
    for c in names:
        spec: dict[str, Any] = {}
        fam = fams[c]
        if fam is not None:
            spec["type"] = fam
        if fam in ("integer", "float", "date", "datetime"):
            lo, hi = stats[f"{c}\x00min"], stats[f"{c}\x00max"]
            if lo is not None and hi is not None:
                spec["min"], spec["max"] = _scalar(lo), _scalar(hi)
        distinct = int(stats.get(f"{c}\x00distinct") or 0)
        if 0 < distinct <= max_levels:
            levels = frame.select(pl.col(c).drop_nulls().unique().sort()).to_series().to_list()
            spec["allowed"] = [_scalar(x) for x in levels]
        share = int(stats[f"{c}\x00null"]) / rows if rows else 0.0
        spec["max_missing"] = 0.0 if share == 0 else _ceil(share + margin)
        if kinds.get(c) in ("constant", "time-invariant"):
            spec["invariant"] = True
        elif c in direction:
            spec["monotone"] = direction[c]
        doc[c] = spec
    return doc


# --- export ----------------------------------------------------------------------


def export_suite(rules_path: str | Path) -> dict[str, Any]:
    """The row rules of the contract at ``rules_path`` as a great-expectations suite (a JSON-ready dict).

    Panel rules and column types, which need the panel or the data's own schema,
    are listed in the suite's ``meta`` as not exported.
    """
    from auditor import __version__

    contract, _ = read_contract(rules_path)
    if contract.is_empty:
        raise fail("contract-empty", path=rules_path)
    gx = _gx()
    gx.get_context(mode="ephemeral")  # suites need an active context
    suite = gx.ExpectationSuite(name=Path(rules_path).stem)
    for col in contract.columns:
        if not col.name.strip() and _has_row_rules(col):
            raise fail(
                "contract-engine", rule="(any)", column=col.name,
                reason="an expectation suite needs a column name; name the column in the data and the contract",
            )  # fmt: skip
    for e in build_expectations(contract.columns):
        suite.add_expectation(e)
    doc = suite.to_json_dict()
    left = [f"panel.{k}" for k, v in vars(contract.panel).items() if v not in (None, False) and k not in ("unit", "time")]
    for col in contract.columns:
        for key in ("type", "invariant", "monotone", "max_change"):
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
