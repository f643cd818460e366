"""The panel contract: the ``panel`` and ``columns`` parts of a rules file, validated strictly.

A contract file is YAML read by :func:`auditor.checks.config.read_yaml` (tags never
construct objects). :func:`auditor.checks.config.load_settings` reads its
``thresholds`` and ``severities`` parts; this module checks the other two.
Every unknown key, wrong type or impossible value is an error naming the key,
its line and what was expected (exit 2). Nothing is run before the whole file
has passed this check.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any

from auditor.errors import fail

#: Column types a contract can require, and what each accepts (polars dtype families).
TYPES: tuple[str, ...] = ("integer", "float", "number", "text", "boolean", "date", "datetime")
MONOTONE: tuple[str, ...] = ("increasing", "decreasing")

PANEL_KEYS: dict[str, str] = {
    "unit": "a column name or a list of column names",
    "time": "a column name",
    "step": "a whole number of periods, at least 1",
    "periods": "a list of period labels",
    "period_range": "a mapping with 'first' and/or 'last'",
    "min_units": "a whole number, at least 0",
    "balanced": "true or false",
    "max_attrition": "a share between 0 and 1",
    "max_duplicate_keys": "a whole number, at least 0",
    "max_missing_keys": "a whole number, at least 0",
    "only_listed_columns": "true or false",
}

COLUMN_KEYS: dict[str, str] = {
    "type": "one of " + ", ".join(TYPES),
    "required": "true or false",
    "min": "a number or a date",
    "max": "a number or a date",
    "allowed": "a non-empty list of values",
    "max_missing": "a share between 0 and 1",
    "pattern": "a regular expression (text)",
    "unique": "true or false",
    "invariant": "true or false",
    "monotone": "one of " + ", ".join(MONOTONE),
    "max_change": "a number, at least 0",
    "max_change_per_period": "a number, at least 0",
    "follows_period": "true or false",
}

#: The value families each rule can run on (``type_family`` of the column's dtype).
NUMERIC_FAMILIES = ("integer", "float")
DATE_FAMILIES = ("date", "datetime")
#: Declared types and the value families they accept.
TYPE_FAMILIES: dict[str, tuple[str, ...]] = {
    "integer": ("integer",),
    "float": ("float",),
    "number": NUMERIC_FAMILIES,
    "text": ("text",),
    "boolean": ("boolean",),
    "date": ("date",),
    "datetime": ("datetime",),
}

_RANGE_KEYS = {"first": "a period label", "last": "a period label"}


@dataclass(frozen=True)
class PanelRules:
    """The ``panel`` part: keys and the structure the panel must have (None: not required)."""

    unit: tuple[str, ...] | None = None
    time: str | None = None
    step: int | None = None
    periods: tuple[Any, ...] | None = None
    first_period: Any = None
    last_period: Any = None
    min_units: int | None = None
    balanced: bool | None = None
    max_attrition: float | None = None
    max_duplicate_keys: int | None = None
    max_missing_keys: int | None = None
    only_listed_columns: bool = False


@dataclass(frozen=True)
class ColumnRules:
    """The rules for one column of the ``columns`` part (None or False: not required)."""

    name: str
    line: int | str = "?"
    type: str | None = None
    required: bool = True
    min: Any = None
    max: Any = None
    allowed: tuple[Any, ...] | None = None
    max_missing: float | None = None
    pattern: str | None = None
    unique: bool = False
    invariant: bool = False
    monotone: str | None = None
    max_change: float | None = None
    max_change_per_period: float | None = None
    follows_period: bool = False

    def needs(self) -> dict[str, tuple[tuple[str, ...], str]]:
        """Each stated rule that runs only on some value families: rule -> (families, what they are).

        ``min``/``max`` need numbers (or dates, for a date bound), ``pattern`` text,
        ``monotone`` numbers or dates, ``max_change`` and ``max_change_per_period``
        numbers, ``allowed`` the family of its values (numbers, text, booleans or
        dates; a mixed list runs on any column).
        """
        out: dict[str, tuple[tuple[str, ...], str]] = {}
        for key in ("min", "max"):
            v = getattr(self, key)
            if v is not None:
                out[key] = (DATE_FAMILIES, "a date column") if isinstance(v, date) else (NUMERIC_FAMILIES, "a numeric column")
        if self.allowed is not None:
            fam = allowed_family(self.allowed)
            if fam is not None:
                out["allowed"] = fam
        if self.pattern is not None:
            out["pattern"] = (("text",), "a text column")
        if self.monotone is not None:
            out["monotone"] = ((*NUMERIC_FAMILIES, *DATE_FAMILIES), "a numeric or date column")
        for key in ("max_change", "max_change_per_period"):
            if getattr(self, key) is not None:
                out[key] = (NUMERIC_FAMILIES, "a numeric column")
        return out


def allowed_family(values: tuple[Any, ...]) -> tuple[tuple[str, ...], str] | None:
    """The value families an ``allowed`` list can be checked on, or None for a mixed list."""
    if all(isinstance(v, bool) for v in values):
        return ("boolean",), "a boolean column"
    if all(_is_number(v) for v in values):
        return NUMERIC_FAMILIES, "a numeric column"
    if all(isinstance(v, str) for v in values):
        return ("text",), "a text column"
    if all(isinstance(v, date) for v in values):
        return DATE_FAMILIES, "a date column"
    return None


@dataclass(frozen=True)
class Contract:
    """A validated contract: panel rules, column rules in file order, and where it came from."""

    panel: PanelRules
    columns: tuple[ColumnRules, ...] = field(default_factory=tuple)
    source: str | None = None

    @property
    def is_empty(self) -> bool:
        """True when the contract states no rule at all."""
        return self.panel == PanelRules() and not self.columns


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


def _is_finite_number(v: Any) -> bool:
    return _is_number(v) and math.isfinite(v)


def _is_scalar(v: Any) -> bool:
    if isinstance(v, float) and not math.isfinite(v):
        return False  # NaN counts as missing and infinities bound nothing: never a label or a code
    return isinstance(v, str | int | float | bool | date | datetime)


class _Reader:
    """Validates one contract mapping, knowing the file and its YAML tree for line numbers."""

    def __init__(self, path: str | Path, root: Any) -> None:
        self.path = str(path)
        self.root = root

    def line(self, *keys: str) -> int | str:
        from auditor.checks.config import node_line

        return node_line(self.root, *keys)

    def bad(self, keys: tuple[str, ...], expected: str, found: Any) -> Exception:
        return fail(
            "rules-bad-value",
            path=self.path,
            line=self.line(*keys),
            key=".".join(keys),
            expected=expected,
            found=repr(found),
        )

    def unknown(self, keys: tuple[str, ...], where: str, known: dict[str, str]) -> Exception:
        return fail(
            "rules-unknown-key",
            path=self.path,
            line=self.line(*keys),
            key=keys[-1],
            where=where,
            expected=", ".join(known),
        )

    def mapping(self, value: Any, keys: tuple[str, ...], expected: str) -> dict[str, Any]:
        if value is None:
            return {}
        if not isinstance(value, dict):
            raise self.bad(keys, expected, value)
        for k in value:
            if not isinstance(k, str):
                raise self.bad((*keys, str(k)), "a key written as text", k)
        return value

    def whole(self, value: Any, keys: tuple[str, ...], lowest: int) -> int:
        if not _is_int(value) or value < lowest:
            raise self.bad(keys, f"a whole number, at least {lowest}", value)
        return int(value)

    def share(self, value: Any, keys: tuple[str, ...]) -> float:
        if not _is_finite_number(value) or not 0 <= value <= 1:
            raise self.bad(keys, "a share between 0 and 1", value)
        return float(value)

    def flag(self, value: Any, keys: tuple[str, ...]) -> bool:
        if not isinstance(value, bool):
            raise self.bad(keys, "true or false", value)
        return value

    def name(self, value: Any, keys: tuple[str, ...]) -> str:
        if not isinstance(value, str) or not value.strip():
            raise self.bad(keys, "a column name", value)
        return value.strip()

    # --- the two parts -------------------------------------------------------

    def panel(self, value: Any) -> PanelRules:
        part = self.mapping(value, ("panel",), "a mapping of panel rules")
        out: dict[str, Any] = {}
        for key, v in part.items():
            keys = ("panel", key)
            if key not in PANEL_KEYS:
                raise self.unknown(keys, "panel", PANEL_KEYS)
            if key == "unit":
                if isinstance(v, str):
                    names = [p for p in (s.strip() for s in v.split(",")) if p]
                elif isinstance(v, list) and v:
                    names = [self.name(x, keys) for x in v]
                else:
                    raise self.bad(keys, PANEL_KEYS[key], v)
                if not names:
                    raise self.bad(keys, PANEL_KEYS[key], v)
                out["unit"] = tuple(names)
            elif key == "time":
                out["time"] = self.name(v, keys)
            elif key == "step":
                out["step"] = self.whole(v, keys, 1)
            elif key == "periods":
                if not isinstance(v, list) or not v or not all(_is_scalar(x) for x in v):
                    raise self.bad(keys, PANEL_KEYS[key], v)
                if isinstance(v, list) and len({period_text(x) for x in v}) != len(v):
                    raise self.bad(keys, "a list of period labels without repeats", v)
                out["periods"] = tuple(v)
            elif key == "period_range":
                rng = self.mapping(v, keys, PANEL_KEYS[key])
                if not rng:
                    raise self.bad(keys, PANEL_KEYS[key], v)
                for rk, rv in rng.items():
                    if rk not in _RANGE_KEYS:
                        raise self.unknown((*keys, rk), "panel.period_range", _RANGE_KEYS)
                    if not _is_scalar(rv) or isinstance(rv, bool):
                        raise self.bad((*keys, rk), "a period label", rv)
                    out[f"{rk}_period"] = rv
            elif key in ("min_units", "max_duplicate_keys", "max_missing_keys"):
                out[key] = self.whole(v, keys, 0)
            elif key in ("balanced", "only_listed_columns"):
                out[key] = self.flag(v, keys)
            elif key == "max_attrition":
                out[key] = self.share(v, keys)
        if "periods" in out and ("first_period" in out or "last_period" in out):
            raise self.bad(
                ("panel", "period_range"), "absent when 'periods' lists the periods", part["period_range"]
            )
        first, last = out.get("first_period"), out.get("last_period")
        if first is not None and last is not None and period_order(first) > period_order(last):
            raise self.bad(("panel", "period_range"), "a range whose first period comes before its last", part["period_range"])
        return PanelRules(**out)

    def columns(self, value: Any) -> tuple[ColumnRules, ...]:
        part = self.mapping(value, ("columns",), "a mapping of column names to their rules")
        return tuple(self.column(name, spec) for name, spec in part.items())

    def column(self, name: str, value: Any) -> ColumnRules:
        base = ("columns", name)
        spec = self.mapping(value, base, "a mapping of rules for the column")
        out: dict[str, Any] = {"name": name, "line": self.line(*base)}
        for key, v in spec.items():
            keys = (*base, key)
            if key not in COLUMN_KEYS:
                raise self.unknown(keys, f"columns.{name}", COLUMN_KEYS)
            if key == "type":
                if v not in TYPES:
                    raise self.bad(keys, COLUMN_KEYS[key], v)
                out[key] = v
            elif key in ("required", "unique", "invariant", "follows_period"):
                out[key] = self.flag(v, keys)
            elif key in ("min", "max"):
                if not (_is_finite_number(v) or isinstance(v, date | datetime)):
                    expected = "a finite number or a date" if _is_number(v) else COLUMN_KEYS[key]
                    raise self.bad(keys, expected, v)
                out[key] = v
            elif key == "allowed":
                if not isinstance(v, list) or not v or not all(_is_scalar(x) for x in v):
                    raise self.bad(keys, COLUMN_KEYS[key], v)
                out[key] = tuple(v)
            elif key == "max_missing":
                out[key] = self.share(v, keys)
            elif key == "pattern":
                if not isinstance(v, str) or not v:
                    raise self.bad(keys, COLUMN_KEYS[key], v)
                try:
                    re.compile(v)
                except re.error as exc:
                    raise self.bad(keys, f"a valid regular expression ({exc})", v) from None
                out[key] = v
            elif key == "monotone":
                if v not in MONOTONE:
                    raise self.bad(keys, COLUMN_KEYS[key], v)
                out[key] = v
            elif key in ("max_change", "max_change_per_period"):
                if not _is_finite_number(v) or v < 0:
                    raise self.bad(keys, "a finite number, at least 0", v)
                out[key] = float(v)
        lo, hi = out.get("min"), out.get("max")
        if lo is not None and hi is not None:
            if isinstance(lo, date) != isinstance(hi, date):
                raise self.bad((*base, "max"), "of the same kind as 'min' (both numbers or both dates)", hi)
            if _as_comparable(lo) > _as_comparable(hi):
                raise self.bad((*base, "max"), f"at least the minimum {lo!r}", hi)
        rules = ColumnRules(**out)
        self.consistent(rules)
        return rules

    def consistent(self, col: ColumnRules) -> None:
        """Refuse rules of one column that no column could satisfy together: a rule that
        needs another type than the declared one, or two rules that need different types."""
        needs = col.needs()
        declared = TYPE_FAMILIES.get(col.type or "")
        possible: set[str] | None = None
        for key, (families, what) in needs.items():
            if declared is not None and not set(declared) & set(families):
                raise fail("contract-rule-conflict", path=self.path, line=self.line("columns", col.name, key),
                           key=key, column=col.name, expected=what, other=f"'type: {col.type}'")
            if possible is not None and not possible & set(families):
                earlier = next(k for k, (f, _) in needs.items() if not set(f) & set(families))
                raise fail("contract-rule-conflict", path=self.path, line=self.line("columns", col.name, key),
                           key=key, column=col.name, expected=what,
                           other=f"rule '{earlier}' ({needs[earlier][1]})")
            possible = set(families) if possible is None else possible & set(families)


def _as_comparable(v: Any) -> Any:
    if isinstance(v, datetime):
        return v
    if isinstance(v, date):
        return datetime(v.year, v.month, v.day)
    return v


def period_text(v: Any) -> str:
    """A period label as text, for matching contract periods to the panel's grid labels."""
    if isinstance(v, datetime):
        return v.isoformat()
    if isinstance(v, date):
        return v.isoformat()
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v)


def period_order(v: Any) -> tuple[int, Any]:
    """A sort key ordering period labels: numbers numerically, other labels as text."""
    if _is_number(v):
        return (0, float(v))
    if isinstance(v, str) and re.fullmatch(r"[+-]?\d+", v.strip()):
        return (0, float(v))
    return (1, period_text(v))


def _refuse_repeated_keys(root: Any, path: str | Path) -> None:
    """A key written twice in one mapping is an error (YAML loaders silently keep the last)."""
    import yaml

    stack = [(root, "the top level")]
    while stack:
        node, where = stack.pop()
        if isinstance(node, yaml.MappingNode):
            seen: set[str] = set()
            for k, v in node.value:
                key = str(getattr(k, "value", k))
                if key in seen:
                    raise fail("contract-repeated-key", path=path, line=k.start_mark.line + 1, key=key, where=where)
                seen.add(key)
                stack.append((v, key if where == "the top level" else f"{where}.{key}"))
        elif isinstance(node, yaml.SequenceNode):
            stack.extend((v, where) for v in node.value)


def parse_contract(data: dict[str, Any], path: str | Path, root: Any) -> Contract:
    """Validate the ``panel`` and ``columns`` parts of ``data`` (a rules file's top mapping).

    Returns the Contract; raises AuditError (exit 2) naming the key, line and what
    was expected on the first problem. Other top-level parts are left to
    :func:`auditor.checks.config.load_settings`.
    """
    _refuse_repeated_keys(root, path)
    reader = _Reader(path, root)
    panel = reader.panel(data.get("panel"))
    columns = reader.columns(data.get("columns"))
    return Contract(panel=panel, columns=columns, source=str(path))


def read_contract(path: str | Path) -> tuple[Contract, Any]:
    """Read and validate the contract file at ``path``.

    Returns (Contract, Settings): the settings carry the file's threshold and
    severity overrides. Raises AuditError (exit 2) for any problem in the file.
    """
    from auditor.checks.config import load_settings, read_yaml

    settings = load_settings(path)  # checks the top level, thresholds and severities
    data, root = read_yaml(path)
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise fail("rules-not-mapping", path=path, found=type(data).__name__)
    return parse_contract(data, path, root), settings
