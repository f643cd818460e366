"""The JSON Schema (draft 2020-12) of each command's ``--json`` document.

``panel-audit schema NAME`` prints one; :func:`schema` returns it as a dict. The schemas
are built here from Python data, so that every field's description sits beside its type:
a new field of a document needs its entry (and its words) here, or the suite's validation
of every document it produces fails (tests/test_schema.py). Objects whose keys are fixed
refuse other keys (``additionalProperties: false``); objects keyed by the data (a fit's
coefficients by column name, a finding's examples by the data's own column names) say
what their values are.

The finding codes and what a finding's ``count`` counts come from
:data:`auditor.checks.findings.CHECKS` and :data:`auditor.checks.explain.EXPLANATIONS`, so the words are
written once. Only light modules are imported: ``--help`` stays fast.
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from typing import Any

DIALECT = "https://json-schema.org/draft/2020-12/schema"
NAMES: tuple[str, ...] = ("profile", "instruments", "compare", "check")

Schema = dict[str, Any]


# --------------------------------------------------------------------------- building blocks


def _typed(kind: str, description: str, null: str | None, **extra: Any) -> Schema:
    """A scalar of JSON type ``kind``; ``null`` says when the value is null (None: never)."""
    if null is None:
        return {"type": kind, "description": description, **extra}
    return {"type": [kind, "null"], "description": f"{description} Null {null}.", **extra}


def _num(description: str, null: str | None = None, **extra: Any) -> Schema:
    return _typed("number", description, null, **extra)


def _share(description: str, null: str | None = None) -> Schema:
    return _num(description, null, minimum=0, maximum=1)


def _p(description: str, null: str | None = None) -> Schema:
    return _num(description, null, minimum=0, maximum=1)


def _int(description: str, null: str | None = None, minimum: int | None = 0) -> Schema:
    extra = {} if minimum is None else {"minimum": minimum}
    return _typed("integer", description, null, **extra)


def _str(description: str, null: str | None = None, **extra: Any) -> Schema:
    return _typed("string", description, null, **extra)


def _bool(description: str, null: str | None = None) -> Schema:
    return _typed("boolean", description, null)


def _const(value: Any, description: str) -> Schema:
    return {"const": value, "description": description}


def _choice(description: str, values: Mapping[Any, str], null: str | None = None) -> Schema:
    """One of ``values`` (each described); ``null`` says when the value is null instead."""
    options = [_const(v, d) for v, d in values.items()]
    if null is not None:
        options.append({"type": "null", "description": f"Null {null}."})
    return {"description": description, "oneOf": options}


def _list(description: str, items: Schema, **extra: Any) -> Schema:
    return {"type": "array", "description": description, "items": items, **extra}


def _names(description: str, item: str = "A column name.") -> Schema:
    return _list(description, _str(item))


def _object(description: str, properties: Mapping[str, Schema], optional: tuple[str, ...] = ()) -> Schema:
    """An object with exactly these keys (those in ``optional`` may be absent)."""
    unknown = set(optional) - set(properties)
    if unknown:
        raise ValueError(f"optional keys without a schema: {sorted(unknown)}")
    return {
        "type": "object",
        "description": description,
        "properties": dict(properties),
        "required": [k for k in properties if k not in optional],
        "additionalProperties": False,
    }


def _or_null(schema: Schema, null: str) -> Schema:
    """``schema`` or null (``null`` says when)."""
    return {
        "description": f"{schema['description']} Null {null}.",
        "anyOf": [schema, {"type": "null", "description": f"Null {null}."}],
    }


def _ref(name: str, description: str) -> Schema:
    return {"$ref": f"#/$defs/{name}", "description": description}


def _document(name: str, description: str, properties: Mapping[str, Schema],
              defs: Mapping[str, Schema]) -> Schema:
    """The schema of command ``name``'s document: the ``tool`` object first, then ``properties``."""
    tool = {"tool": _ref("tool", "The program that wrote the document.")}
    body = _object(description, {**tool, **properties})
    return {"$schema": DIALECT, "$id": f"urn:panel-audit:schema:{name}", "title": f"panel-audit {name} --json",
            **body, "$defs": {"tool": _tool(), **defs}}


# --------------------------------------------------------------------------- shared parts

LABEL = {
    "description": (
        "A period label: a whole number for integer periods and for yearly dates, text for the "
        "others ('2021Q3' for quarters, '2021-07' for months, ISO dates for weeks and days, ISO "
        "date-times)."
    ),
    "type": ["integer", "string"],
}


def _label(description: str) -> Schema:
    return {**LABEL, "description": f"{description} {LABEL['description']}"}


VALUE = {
    "description": (
        "A value from the data (a key, a period label, a column's value) or a number the finding "
        "computed; null for a missing value."
    ),
    "type": ["string", "number", "boolean", "null", "array"],
    "items": {"description": "One element of a list value.", "type": ["string", "number", "boolean", "null"]},
}

FREQUENCIES = {
    "integer": "whole-number periods (1, 2, 3 or 2019, 2020, ...), step in those numbers",
    "year": "dates on 1 January, one period a year",
    "quarter": "dates on the first day of a quarter",
    "month": "dates on the first day of a month",
    "week": "dates all on one weekday, step in weeks",
    "day": "other dates, step in days",
    "datetime": "date-times with a time of day, step in seconds",
}

KINDS = {
    "constant": "one distinct non-missing value in the whole column",
    "period-only": "varies across periods, but within each period every unit holds the same value",
    "time-invariant": "no unit changes",
    "nearly-time-invariant": (
        "some units change, but at most profile.nearly_invariant_units_share (5%) of the units observed "
        "twice or more, or the within share is below profile.nearly_invariant_within_share (1%)"
    ),
    "time-varying": "everything else",
}

FITS = {
    "within": "the within (fixed-effects) fit",
    "between": "the between fit on unit means",
    "random": "the Swamy-Arora random-effects fit",
    "mundlak": "the Mundlak (correlated random effects) fit",
    "hausman_taylor": "the Hausman-Taylor fit",
}


def _tool() -> Schema:
    return _object(
        "The program that wrote the document.",
        {
            "name": _const("panel-audit", "Always 'panel-audit'."),
            "version": _str("Its version (the package version, for example '0.1.0')."),
        },
    )


def _count_description() -> str:
    from auditor.checks.explain import EXPLANATIONS

    counted = [f"{code}: {e.count}" for code, e in EXPLANATIONS.items() if e.count != "not used"]
    unused = [code for code, e in EXPLANATIONS.items() if e.count == "not used"]
    return (
        "How many things the finding concerns, a whole number; what it counts depends on 'check' "
        "(as 'panel-audit explain CODE' says): " + "; ".join(counted) + ". Codes whose count has no "
        "fixed meaning (read the message instead; it may be null or a number the message explains): "
        + ", ".join(unused) + ". Null when the check counts nothing."
    )


def _finding(scope: bool = False) -> Schema:
    from auditor.checks.explain import EXPLANATIONS
    from auditor.checks.findings import CHECKS

    def code(name: str) -> str:
        spec = CHECKS[name]
        meaning = EXPLANATIONS[name].meaning if name in EXPLANATIONS else spec.about
        return f"{meaning} (from {spec.command}; default severity {spec.severity})"

    properties: dict[str, Schema] = {
        "check": _choice(
            "The finding code (one of auditor.checks.findings.CHECKS; 'panel-audit explain CODE' says what it "
            "means and what to do).",
            {name: code(name) for name in CHECKS},
        ),
        "severity": _choice(
            "How serious the finding is: the check's default severity, or the one a rules file sets.",
            {
                "error": "the data cannot be used as it is (exit 1 with the default --fail-on error)",
                "warning": "the data can be used, but an estimate may mislead",
                "note": "worth knowing; nothing to fix as such",
            },
        ),
        "column": _str("The data column the finding is about.", "when it is about the whole panel or input"),
        "count": _int(_count_description(), "when the check counts nothing (for example outcome-time-invariant)"),
        "message": _str("One or two plain sentences: what was found and what it means for the model."),
        "examples": _list(
            "A few cases locating the finding (up to the rules' 'examples' setting, 5 by default; never the "
            "full list): "
            "the unit's key columns by their own names, the period and the values involved.",
            {
                "type": "object",
                "description": (
                    "One case. Keys are the data's key column names (unit keys, the time key) and names "
                    "such as 'rows', 'absent_periods', 'min', 'max', 'base', 'new', 'period', 'level'; "
                    "the message says what they mean."
                ),
                "additionalProperties": VALUE,
            },
        ),
    }
    if scope:
        properties["scope"] = _choice(
            "Which run found it.",
            {"wave": "compare itself (the new wave against the base)",
             "merged": "the profile of base + new appended (--merged); its message starts 'base + new:'"},
        )
    return _object("One finding of a check.", properties)


def _findings() -> Schema:
    return _list(
        "Every finding, sorted by severity (error, warning, note), then check, then column.",
        _ref("finding", "A finding."),
    )


# --------------------------------------------------------------------------- profile


def _panel() -> Schema:
    return _object(
        "Keys and structure of the panel.",
        {
            "unit": _list("The unit key's column names; several columns form one composite key.",
                          _str("A key column name."), minItems=1),
            "time": _str("The period key's column name."),
            "rows": _int("Every row read, rows with a missing key included."),
            "units": _int("Distinct units among the rows with both keys present."),
            "periods": _int("Periods in the grid (the distinct periods present anywhere)."),
            "period_values": _list("The period grid, sorted.", _label("One grid period.")),
            "frequency": _choice("How the period key was read.", FREQUENCIES),
            "step": _int("The grid's step: the most common difference between neighbouring periods, in the "
                         "frequency's units (1 for consecutive years or integers).",
                         "when the grid is irregular (a whole period is missing; see missing_periods) or has "
                         "one period", minimum=None),
            "grid_step": _int("The grid's most common step, also when the grid is irregular.",
                              "when the grid has one period", minimum=None),
            "balanced": _bool("True when every unit is observed in every grid period exactly once."),
            "duplicate_keys": _int("Rows beyond the first that share a (unit, period) key."),
            "missing_keys": _int("Rows with a missing unit or period key (left out of every statistic)."),
            "units_with_gaps": _int("Units absent in at least one grid period between their first and last."),
            "gap_periods": _int("Absent periods inside the units' own spans, summed over units."),
            "singleton_units": _int("Units with a single row."),
            "obs_per_unit": _object(
                "Rows per unit (T_i, duplicates included).",
                {
                    "min": _int("The fewest rows of a unit."),
                    "median": _num("The median rows per unit."),
                    "mean": _num("The mean rows per unit (N / n)."),
                    "max": _int("The most rows of a unit."),
                    "harmonic_mean": _num("n / sum_i 1/T_i, the mean random-effects weights use."),
                },
            ),
            "unbalancedness": _num("Ahrens-Pincus r = n / (T_mean * sum_i 1/T_i) over rows per unit: 1 when "
                                   "every unit has the same number of rows, towards 0 as they spread.",
                                   minimum=0),
            "patterns": _list(
                "The most common participation patterns (the set of periods a unit is seen in), most "
                "common first; at most profile.patterns of them (pattern_count has them all).",
                _object("One pattern.", {
                    "periods": _str("The pattern's periods as ranges of labels, for example "
                                    "'2011-2015, 2017'.", "for a pattern beyond the 1000 most common"),
                    "units": _int("Units seen in exactly these periods."),
                }),
            ),
            "pattern_count": _int("Distinct participation patterns."),
            "attrition": _list(
                "Units by grid period: present, entering, leaving and returning.",
                _object("One grid period.", {
                    "period": _label("The period."),
                    "present": _int("Units with a row in the period."),
                    "entering": _int("Units whose first period this is (every unit of the first period)."),
                    "leaving": _int("Units whose last period this is.",
                                    "in the grid's last period, where leaving is not yet known"),
                    "returning": _int("Units present again after at least one absent period."),
                }),
            ),
            "missing_periods": _list(
                "Where the grid skips its step: pairs of neighbouring grid periods with a whole period "
                "(or more) missing between them; empty for a regular grid.",
                _list("[period before the hole, period after it].", _label("A grid period."),
                      minItems=2, maxItems=2),
            ),
            "engine": _choice("How the statistics were computed.", {
                "in-memory": "the panel was read into memory",
                "streaming": "the panel was streamed (larger than memory)",
                "dask": "the moments kernel ran on the partitions of a dask cluster and the shards were merged "
                        "exactly (--engine dask)",
            }),
        },
    )


def _profile_column() -> Schema:
    numeric = "for a column that is not numeric (numbers and booleans are)"
    return _object(
        "One non-key column. Statistics use the rows with both keys present; n, T_i and N count the units "
        "and rows where the column is not missing (NaN and infinities count as missing).",
        {
            "name": _str("The column's name."),
            "dtype": _str("Its type as read, in lower case ('int64', 'float64', 'string', 'boolean', "
                          "'date', 'datetime', 'categorical', ...)."),
            "kind": _choice("How the column varies (methods.md section 3; the first rule that applies).", KINDS),
            "missing_share": _share("Share of the rows with keys where the column is missing (null or NaN)."),
            "distinct": _int("Distinct non-missing values in the column (0: the column is entirely missing)."),
            "units_changing": _int("Units with at least two distinct non-missing values (floats: a range "
                                   "above profile.float_tolerance * (1 + |mean|)): the units that identify a "
                                   "within estimate; for a 0/1 column the switchers."),
            "units_observed_twice": _int("Units with at least two non-missing values."),
            "dominant_share": _share("Share of the non-missing rows holding the most common value.",
                                     "when the column has no value"),
            "mean": _num("Mean over the non-missing rows.", f"{numeric} or has no value"),
            "overall_sd": _num("sqrt(TSS / (N - 1)).", f"{numeric}, or with fewer than two values", minimum=0),
            "between_sd": _num("Standard deviation of the unit means across units (n - 1 denominator).",
                               f"{numeric}, or with values in fewer than two units", minimum=0),
            "within_sd": _num("sqrt(WSS / (N - n)), WSS the sum of squared deviations from the unit means.",
                              f"{numeric}, or when every unit has at most one value (N = n)", minimum=0),
            "within_share": _share("WSS / TSS: the share of the variation that lies within units.",
                                   f"{numeric}, or when TSS is 0"),
            "absorbed_by_time": _bool("True when period effects explain at least profile.absorbed_r2 (0.999) "
                                      "of the within variation (time_r2), and for a period-only column.",
                                      numeric),
            "time_r2": _share("R2_t = 1 - SS(two-way residual) / WSS: the share of the within variation that "
                              "period effects explain (1 for a period-only column).",
                              f"{numeric}, for a constant or time-invariant column, and when WSS is 0"),
            "non_finite": _int("Rows holding an infinite value (left out of every statistic; 0 unless float)."),
            "binary": _bool("True for a numeric column whose only values are 0 and 1."),
            "periods_all_missing": _list("Periods in which the column is missing for every row (empty when the "
                                         "column has no value at all).",
                                         _str("A period label written as text.")),
        },
    )


def _source(what: str = "") -> Schema:
    return _str(f"What was read{what}: the file's path, 'N files (folder)' for several files, a folder or a "
                "glob, or 'pandas DataFrame' / 'polars DataFrame' for a frame passed in Python.")


def _profile() -> Schema:
    return _document(
        "profile",
        "Keys, structure, within/between variation and findings of one panel.",
        {
            "source": _source(),
            "panel": _ref("panel", "Keys and structure of the panel."),
            "columns": _list("Every non-key column, in the data's order.", _profile_column()),
            "absorbed_basis": _object(
                "The rows the period-effect R2 (time_r2, absorbed_by_time) was computed on: all of them, or "
                "for a very large streamed panel every k-th unit.",
                {
                    "all_units": _bool("True when every unit was used."),
                    "rows": _int("Rows used."),
                    "units": _int("Units used."),
                    "every_kth_unit": _int("k: units whose code is a multiple of k were used "
                                           "(only when all_units is false).", minimum=1),
                },
                optional=("every_kth_unit",),
            ),
            "findings": _findings(),
        },
        {"panel": _panel(), "finding": _finding()},
    )


# --------------------------------------------------------------------------- instruments


def _wald(description: str, named: bool = False) -> Schema:
    properties: dict[str, Schema] = {
        "statistic": _num("The chi-square statistic.", "when it could not be computed", minimum=0),
        "df": _int("Its degrees of freedom (for a Hausman contrast: the rank of the covariance difference)."),
        "p": _p("Upper-tail chi-square p-value.", "when there are no degrees of freedom"),
        "positive_definite": _bool("For a Hausman contrast: false when the covariance difference has "
                                   "negative eigenvalues (the statistic then uses the positive directions)."),
        "note": _str("How the statistic was computed when that needs saying."),
    }
    if named:
        properties["name"] = _const("Sargan", "The test: Sargan's N R2 of the transformed residuals on the "
                                    "instruments.")
    return _object(description, properties, optional=("positive_definite", "note"))


def _map(description: str, what: str) -> Schema:
    return {
        "type": "object",
        "description": f"{description} Keyed by column name ('const' for the intercept, 'period=<value>' "
                       "for an added period dummy, 'mean(x)' for a unit mean, 'x=<level>' for a text "
                       "regressor's indicator).",
        "additionalProperties": _num(what, "when it is not finite"),
    }


def _fit(description: str, richer: bool = False) -> Schema:
    properties: dict[str, Schema] = {
        "coef": _map("Coefficients.", "A coefficient, in units of the outcome per unit of the column."),
        "se": _map("Classical standard errors.", "A standard error, in the coefficient's units."),
        "se_cluster": _map("Standard errors clustered by unit.", "A standard error, in the coefficient's units."),
    }
    optional: tuple[str, ...] = ()
    if richer:
        properties["instruments"] = _int("Unit-level instrument columns used.")
        properties["note"] = _str("How the instruments were built (for example on an unbalanced panel).")
        optional = ("note",)
    return _object(description, properties, optional)


def _components(description: str) -> dict[str, Schema]:
    return {
        "sigma_u": _num(f"Standard deviation of the unit effect u_i{description}, in the outcome's units.",
                        "when it is not finite", minimum=0),
        "sigma_e": _num("Standard deviation of the idiosyncratic error, in the outcome's units (from the "
                        "within fit).", "when it is not finite", minimum=0),
        "theta_mean": _share("Mean over units of theta_i = 1 - sqrt(sigma_e^2 / (sigma_e^2 + T_i sigma_u^2)), "
                             "the share of each unit mean the quasi-demeaning removes.", "with no unit"),
    }


def _strength_row() -> Schema:
    verdicts = {"strong": "the F reaches its critical value (or the rule of thumb without one)",
                "weak": "the F is below it", "not-identified": "no F (no instrument, or the order condition fails)"}
    return _object(
        "First stage of one unit-level endogenous column on the excluded unit means of X1, at the unit "
        "level (n rows).",
        {
            "endogenous": _str("The endogenous column."),
            "role": _choice("Its role.", {"Z2": "a time-invariant column correlated with the unit effect",
                                          "X2 (between units only)": "the unit mean of an X2 column the within "
                                          "fit cannot identify"}),
            "instruments": _names("The X1 columns whose unit means are the excluded instruments."),
            "included": _names("The included instruments besides the constant (Z1, and 'mean(x)' for X1 columns "
                               "identified by their own means).", "A column, or mean(column)."),
            "partial_f": _num("Partial F of the excluded instruments: ((RSS_r - RSS_u) / k1) / (RSS_u / (n - g1 "
                              "- k1)).", "when it cannot be computed", minimum=0),
            "robust_f": _num("Heteroskedasticity-robust (HC1) Wald statistic of the excluded instruments / k1.",
                             "when it cannot be computed", minimum=0),
            "partial_r2": _num("1 - RSS_u / RSS_r.", "when it cannot be computed"),
            "df": _list("[numerator, denominator] degrees of freedom of partial_f.",
                        _int("Degrees of freedom.", minimum=None), minItems=2, maxItems=2),
            "p": _p("p-value of partial_f.", "when partial_f is null or a df is not positive"),
            "critical_value": _num("The Stock-Yogo critical value the verdict uses.",
                                   "when the table has none (the rule of thumb is used)"),
            "critical_size": _int("The Stock-Yogo maximal size, in percent (instruments.stock_yogo_size).",
                                  "without a critical value"),
            "critical_source": _str("Where the cut-off comes from ('Stock-Yogo 2005, 10% maximal size' or "
                                    "'rule of thumb F >= 10')."),
            "conditional_f": _num("Sanderson-Windmeijer conditional F (several endogenous columns).",
                                  "with one endogenous column", minimum=0),
            "verdict_basis": _choice("Which F the verdict compares.", {
                "partial_f": "one endogenous column: partial_f", "conditional_f": "several: conditional_f"}),
            "verdict": _choice("The verdict.", verdicts),
            "at_least_rule_of_thumb": _bool("partial_f >= instruments.rule_of_thumb_f (10).", "without partial_f"),
            "at_least_lee": _bool("partial_f >= instruments.lee_f (104.7: the F at which a 5% t test has its true size, Lee, "
                                  "McCrary, Moreira and Porter 2022).",
                                  "without partial_f"),
            "anderson_rubin": _or_null(_object(
                "The Anderson-Rubin confidence set for the column's coefficient (one Z2 column).",
                {
                    "level": _share("Its confidence level (instruments.anderson_rubin_level)."),
                    "intervals": _list("Its pieces.", _list(
                        "[low, high]; null for an infinite end.",
                        {"type": ["number", "null"], "description": "An end of the piece (null: infinite)."},
                        minItems=2, maxItems=2)),
                    "kind": _choice("The set's shape.", {
                        "interval": "one bounded interval", "two rays": "the line less an interval",
                        "whole line": "every value (no information)", "empty": "no value",
                        "ray": "a half line"}),
                },
            ), "when it is not computed (anderson_rubin_note says why) or has no instrument"),
            "anderson_rubin_note": _str("Why the Anderson-Rubin set is not computed."),
        },
        optional=("anderson_rubin_note",),
    )


def _instrument_columns(roles: dict[str, str], reasons: dict[str, str]) -> dict[str, Schema]:
    """The instruments document's design columns and the columns set aside."""
    return {
        "columns": _list("Every design column: each numeric regressor, each indicator of a text regressor, "
                         "each added period dummy.", _object("One design column.", {
            "column": _str("Its name ('x=<level>' for a text regressor's indicator, 'period=<value>' for an "
                           "added dummy)."),
            "source": _str("The regressor it comes from.", "for an added period dummy"),
            "kind": _choice("Its kind (the profile's; a time-varying column with no within variation to "
                            "speak of counts as time-invariant).", KINDS),
            "role": _choice("Its role.", {**roles, "not-identified": "neither the within nor the "
                                          "Hausman-Taylor fit can identify it"},
                            "when it holds no role although some fit identifies it"),
            "period_effect": _bool("True for a period effect."),
            "identified_by": _list("The fits that identify its coefficient.", _choice("A fit.", FITS)),
            "within_share": _num("Its within share in the sample (WSS / TSS).",
                                   "for a time-invariant column, or when its TSS is 0"),
            "base_level": _str("For a text regressor's indicator: the level left out (the most common).",
                               "for other columns"),
        })),
        "not_identified": _list("Columns some fit cannot identify (never silently dropped).", _object(
            "One column set aside.", {
                "column": _str("The column."),
                "reason": _choice("Why.", reasons),
                "with": _names("The kept columns it depends on ('const', or 'the unit effects').",
                               "A column name."),
                "fits": _list("The fits that set it aside.", _choice("A fit.", FITS)),
            })),
        "near_collinear": _list("Kept columns almost explained by the earlier columns of a fit.", _object(
            "One near dependence.", {
                "column": _str("The column."),
                "fit": _choice("Where.", {"within": "within deviations", "levels": "columns in levels"}),
                "r2": _num("Share of its variation the earlier columns explain (at least "
                           "instruments.near_collinear_r2)."),
                "with": _names("The earlier columns."),
            })),
    }


def _instrument_choices() -> dict[str, Schema]:
    """The instruments document's candidate instruments and suggested sets."""
    return {
        "candidates": _list("For each Z2 column, each X1 unit mean alone as its instrument.", _object(
            "One (Z2, X1) pair.", {
                "endogenous": _str("The Z2 column."),
                "instrument": _str("The X1 column whose unit mean is tried."),
                "partial_f": _num("Partial F of that mean alone.", "when it cannot be computed", minimum=0),
                "mundlak_p": _p("p-value of the X1 column's Mundlak coefficient.", "without a Mundlak fit"),
                "c_p": _p("Difference-in-Sargan p-value of its mean.", "when there is no such test"),
                "usable_basis": _str("What decided the state ('mundlak', 'c-test', 'sargan', or a sentence)."),
                "state": _choice("Its validity.", {
                    "accepted": "accepted by a test", "assumed": "just identified: nothing to test",
                    "invalid": "rejected", "undecided": "the set is rejected and no mean can be blamed"}),
                "usable": _bool("True when accepted or assumed, false when invalid.", "when undecided"),
            })),
        "suggestion": _list("For each Z2 column, the strongest usable set of X1 means.", _object(
            "One suggestion.", {
                "endogenous": _str("The Z2 column."),
                "instruments": _names("The X1 columns of the set (empty: none usable)."),
                "partial_f": _num("The set's joint partial F.", "without a set", minimum=0),
                "critical_value": _num("Stock-Yogo critical value for that many instruments.",
                                       "without one"),
                "critical_source": _str("Where the cut-off comes from."),
                "verdict": _choice("The verdict.", {"strong": "the F reaches the cut-off",
                                                    "weak": "below it", "not-identified": "no set"}),
                "basis": _choice("Where the set comes from.", {
                    "usable": "usable candidates", "undecided": "undecided candidates (none usable)"},
                    "without a set"),
                "set_rejected": _bool("True when drawn from undecided candidates."),
            })),
    }


def _instrument_tests() -> Schema:
    """The instruments document's ``tests`` part."""
    return _object("Specification tests.", {
        "mundlak": _or_null(_object(
            "Mundlak: joint Wald test (clustered by unit) that the unit means of X have no coefficient.",
            {
                **_wald("")["properties"],
                "per_column": _list("Each tested unit mean.", _object("One mean.", {
                    "column": _str("The X column."),
                    "coef": _num("Coefficient of its unit mean.", "when not finite"),
                    "t": _num("coef / clustered se.", "when not finite", ),
                    "p": _p("Two-sided normal p-value.", "when t is null"),
                })),
                "alpha": _share("The level flagged uses (instruments.mundlak_alpha)."),
                "flagged": _names("Columns whose p is below alpha: candidates for X2."),
            },
            optional=("positive_definite", "note"),
        ), "without a Mundlak fit (too few units)"),
        "hausman_within_random": _or_null(_wald("Hausman test, within vs random effects, on the "
                                                "time-varying coefficients both identify."),
                                          "when there is nothing to compare"),
        "overidentification": _or_null(_wald("Sargan test of Hausman-Taylor's over-identifying "
                                             "restrictions.", named=True),
                                       "when just identified or without Hausman-Taylor"),
        "hausman_within_ht": _or_null(_wald("Hausman contrast, within vs Hausman-Taylor "
                                            "(k1 - g2 degrees of freedom)."),
                                      "when just identified or without Hausman-Taylor"),
        "overidentification_by_estimator": _or_null(_object(
            "Sargan test of each estimator's over-identifying restrictions.",
            {
                "hausman_taylor": _or_null(_wald("Hausman-Taylor's.", named=True),
                                           "when just identified"),
                "amemiya_macurdy": _or_null(_wald("Amemiya-MaCurdy's.", named=True), "when not computed"),
                "breusch_mizon_schmidt": _or_null(_wald("Breusch-Mizon-Schmidt's.", named=True),
                                                  "when not computed"),
            },
        ), "without Hausman-Taylor"),
        "hausman_against_ht": _or_null(_object(
            "Hausman contrast of each richer estimator against Hausman-Taylor.",
            {
                "amemiya_macurdy": _or_null(_wald("Amemiya-MaCurdy vs Hausman-Taylor."), "when not computed"),
                "breusch_mizon_schmidt": _or_null(_wald("Breusch-Mizon-Schmidt vs Hausman-Taylor."),
                                                  "when not computed"),
            },
        ), "without Hausman-Taylor"),
        "attrition": _or_null(_object(
            "Nijman-Verbeek variable-addition test: s_i,t+1 added to the within fit, unit-clustered t.",
            {
                "statistic": _num("t squared (chi-square, 1 df).", minimum=0),
                "df": _const(1, "Always 1."),
                "p": _p("Two-sided p-value of t."),
                "variable": _const("next period observed", "The added variable."),
                "t": _num("Clustered t of its coefficient."),
                "coef": _num("Its coefficient, in the outcome's units."),
                "rows": _int("Rows used (those before the grid's last period)."),
                "rows_without_next": _int("Of those, rows whose unit is absent in the next period."),
            },
        ), "when nobody leaves (or leaving is collinear with the regressors within units, or its clustered "
                    "standard error is zero up to rounding)"),
        "attrition_note": _str("Why the attrition test was not computed (present only then: the dask "
                               "engine has no row's period)."),
    }, optional=("attrition_note",))


def _instruments() -> Schema:
    roles = {
        "X1": "time-varying, not correlated with the unit effect (period effects are listed here)",
        "X2": "time-varying, correlated with the unit effect",
        "Z1": "time-invariant, not correlated (the constant is always in Z1 and not listed)",
        "Z2": "time-invariant, correlated",
    }
    reasons = {
        "constant": "one value everywhere",
        "period-only": "a period effect the other period effects span",
        "absorbed-by-time": "within units an exact combination of the period effects",
        "collinear-within": "within units an exact combination of other columns",
        "collinear-between": "across units (time-invariant, or its unit mean) an exact combination of others",
        "collinear-levels": "in levels an exact combination of other columns",
    }
    return _document(
        "instruments",
        "Model readiness: roles, identification, instrument strength, tests and diagnostic fits.",
        {
            "source": _source(),
            "outcome": _str("The outcome column."),
            "sample": _object("The rows every fit uses.", {
                "rows": _int("Complete rows (the outcome and every regressor present)."),
                "units": _int("Units among them."),
                "rows_dropped": _int("Rows with keys left out because the outcome or a regressor is missing."),
                "periods": _int("Periods present among the complete rows."),
                "period_effects": _bool("True when --period-effects added a dummy for each period but the first."),
                "balanced": _bool("True when every unit of the sample has the same number of rows."),
            }),
            "roles": _object("The Hausman-Taylor roles of the regressors (design columns).",
                             {r: _names(f"{r}: {d}.") for r, d in roles.items()}),
            "roles_declared": _bool("False when no --correlated was given and X2 was suggested from the Mundlak "
                                    "evidence."),
            "period_effects": _names("The period effects the fits carry: the added dummies ('period=<value>') "
                                     "and period-only regressors, less those the others span."),
            **_instrument_columns(roles, reasons),
            "order_condition": _object("Hausman-Taylor's order condition k1 >= g2.", {
                "k1": _int("Excluded instruments: X1 columns whose unit means instrument."),
                "g2": _int("Unit-level endogenous columns (Z2, and X2 columns identified between units only)."),
                "met": _bool("True when k1 >= g2."),
            }),
            "strength": _list("Instrument strength for each unit-level endogenous column.", _strength_row()),
            "x2_strength": _list("Observation-level first stage of each X2 column (instrumented by its own "
                                 "within deviation) on the Hausman-Taylor instruments.", _object(
                "One X2 column.", {
                    "endogenous": _str("The X2 column."),
                    "role": _const("X2", "Always 'X2'."),
                    "instruments": _names("The instruments: its within deviation, X1 unit means, Z1.",
                                          "An instrument, as 'x (within deviation)', 'x (unit mean)' or a Z1 "
                                          "column."),
                    "own_f": _num("Squared classical t of its own within deviation.", "when infinite", minimum=0),
                    "other_f_cluster": _num("Unit-clustered Wald F (statistic / df) of the X1 means and Z1.",
                                            "without X1 means or Z1", minimum=0),
                    "r2": _num("R2 of the first stage.", "when the target has no variation"),
                    "within_share": _num("The column's within share in the sample (WSS / TSS).",
                                         "when its TSS is 0"),
                })),
            "cragg_donald": _num("Cragg-Donald minimum eigenvalue statistic.",
                                 "with fewer than two unit-level endogenous columns, or when the order "
                                 "condition fails"),
            "reference_f": _object("Cut-offs beside Stock-Yogo (from the rules).", {
                "rule_of_thumb": _num("instruments.rule_of_thumb_f (10, Staiger and Stock 1997), used where the "
                                      "Stock-Yogo table has no cell."),
                "lee": _num("instruments.lee_f (104.7, Lee, McCrary, Moreira and Porter 2022)."),
            }),
            **_instrument_choices(),
            "tests": _instrument_tests(),
            "estimates": _object("The diagnostic fits.", {
                "within": _or_null(_fit("Within (fixed effects)."), "when the outcome never changes within units"),
                "between": _or_null(_fit("Between (unit means)."), "with too few units"),
                "random": _or_null(_fit("Random effects (Swamy-Arora)."), "with too few units or no within fit"),
                "mundlak": _or_null(_fit("Mundlak: pooled OLS on [1, X, Z, X means]."), "with too few units"),
                "hausman_taylor": _or_null(_fit("Hausman-Taylor."), "when the order condition fails or a fit "
                                           "it needs is missing"),
                "amemiya_macurdy": _or_null(_fit("Amemiya-MaCurdy.", richer=True),
                                            "when not computed (richer-sets-skipped says why)"),
                "breusch_mizon_schmidt": _or_null(_fit("Breusch-Mizon-Schmidt.", richer=True),
                                                  "when not computed (richer-sets-skipped says why)"),
            }),
            "variance_components": _or_null(_object(
                "Variance components of random effects (and of Hausman-Taylor).",
                {
                    **_components(" (Swamy-Arora)"),
                    "hausman_taylor": _object("Hausman-Taylor's components.", _components(" (Hausman-Taylor)")),
                },
                optional=("hausman_taylor",),
            ), "without a random-effects fit"),
            "findings": _findings(),
        },
        {"finding": _finding()},
    )


# --------------------------------------------------------------------------- compare


def _compare_column() -> Schema:
    methods = {m: d for base, d in (
        ("mad", "1.4826 times the median absolute deviation of the changes"),
        ("trimmed-sd", "standard deviation of the middle of the changes"),
        ("sd", "standard deviation of the changes"),
        ("step", "the changes are one step a period; the scale is the step"),
    ) for m in (base, f"non-zero {base}")}
    methods["none"] = "no scale (too few changes); no jump is judged"
    ref = "when the base's reference period has no row"
    return _object(
        "One column both inputs hold, compared between the base's last period (the reference) and the new "
        "wave. Shares are fractions; the fields after missing_new appear for some columns only.",
        {
            "column": _str("The column."),
            "compared_as": _choice("How its distribution is compared.", {
                "numeric": "numbers: Kolmogorov-Smirnov and a binned stability index",
                "levels": "levels (text, categories, booleans): a stability index over levels"}),
            "less_step": _bool("True when the new wave was compared less the base's step per period (an age)."),
            "base_kind": _choice("Its kind in the base's profile.", KINDS, "when the base profile has no kind"),
            "reference": _str("'base period <label>': the base period compared with."),
            "n_base": _int("Non-missing values in the reference period."),
            "n_new": _int("Non-missing values in the new wave."),
            "ks_statistic": _share("Two-sample Kolmogorov-Smirnov statistic.", "for levels or an empty side"),
            "ks_p": _p("Its p-value (6 significant digits).", "for levels or an empty side"),
            "ks_p_method": _choice("How the p-value was computed.", {
                "exact": "exact distribution", "asymptotic": "asymptotic distribution"}, "for levels"),
            "psi": _num("Population stability index against the reference (compare.psi_shift is the cut-off).",
                        "for levels beyond compare.category_max_levels or an empty side", minimum=0),
            "missing_base": _share("Missing share in the reference period.", ref),
            "missing_new": _share("Missing share in the new wave.", "when the new wave has no row"),
            "changed_units": _int("A column fixed within units in the base: returning units whose new value "
                                  "the base never held."),
            "change_median": _num("Median of the base's period-to-period changes within units.",
                                  "without changes"),
            "change_scale": _num("Scale of those changes (see change_scale_method).", "without a scale", minimum=0),
            "change_scale_method": _choice("How the scale was found ('non-zero': from the non-zero changes, "
                                           "most changes being zero).", methods),
            "expected_step": _num("The step a period the column moves by for (nearly) every unit.",
                                  "when not finite"),
            "implausible_jumps": _int("Returning units whose change is an implausible jump."),
            "expected": _const("one value per period", "A period-only column: what the new wave must keep."),
            "periods_with_several_values": _int("New-wave periods in which units hold different values."),
            "levels_checked": _bool("False when the column has too many levels to compare them "
                                    "(compare.category_max_levels)."),
            "new_levels": _int("Levels never seen in the base."),
            "vanished_levels": _int("Levels of the reference period no new-wave row uses."),
        },
        optional=("changed_units", "change_median", "change_scale", "change_scale_method", "expected_step",
                  "implausible_jumps", "expected", "periods_with_several_values", "levels_checked", "new_levels",
                  "vanished_levels"),
    )


def _compare() -> Schema:
    return _document(
        "compare",
        "A new wave (or batch of waves) against the panel held so far.",
        {
            "unit": _list("The unit key's column names.", _str("A key column name."), minItems=1),
            "time": _str("The period key's column name."),
            "sources": _object("What was read.", {"base": _source(" as the base"),
                                                  "new": _source(" as the new wave")}),
            "reference": _str("'base period <label>': the base's last period, the one distributions are "
                              "compared with."),
            "rows": _object("Rows read.", {
                "base": _int("Rows of the base (missing keys included)."),
                "new": _int("Rows of the new wave (missing keys included)."),
                "base_reference": _int("Base rows in the reference period."),
                "new_missing_keys": _int("New-wave rows with a missing unit or period key."),
            }),
            "schema": _object("Columns added, removed, or of another type.", {
                "added": _names("Columns only the new wave holds."),
                "removed": _names("Base columns the new wave lacks."),
                "type_changed": _list("Columns whose type family differs.", _object("One column.", {
                    "column": _str("The column."),
                    "base": _str("Its type in the base."),
                    "new": _str("Its type in the new wave."),
                    "key": _bool("True for a key column (keys were then compared as text)."),
                })),
            }),
            "units": _object("Units of the base and of the new wave.", {
                "base": _int("Units in the base."),
                "new": _int("Units in the new wave."),
                "returning": _int("New-wave units the base holds."),
                "entering": _int("New-wave units the base does not hold."),
                "not_returning": _int("Base units absent from the new wave."),
                "returning_after_absence": _int("Returning units absent from the base's last period."),
                "last_period": _int("Units in the base's last period."),
                "not_returning_from_last_period": _int("Of those, units absent from the new wave."),
            }),
            "periods": _object("Periods of the base and of the new wave, on one scale.", {
                "base": _list("The base's periods.", _label("A period.")),
                "new": _list("The new wave's periods.", _label("A period.")),
                "overlap": _list("New-wave periods the base holds.", _label("A period.")),
                "frequency": _choice("How the period key was read.", FREQUENCIES),
                "step": _int("The base grid's step.", "when the base has no step (one integer period)",
                             minimum=None),
                "colliding_keys": _int("New-wave (unit, period) keys the base already holds."),
            }),
            "columns": _list("Every column both hold (keys excepted).", _compare_column()),
            "merged": _or_null(_object("The profile of base + new appended (--merged).", {
                "panel": _ref("panel", "Keys and structure of the appended panel."),
            }), "without --merged"),
            "findings": _list("Every finding (the wave's and, with --merged, the appended profile's), sorted by "
                              "severity, then check, then column.", _ref("finding", "A finding.")),
        },
        {"panel": _panel(), "finding": _finding(scope=True)},
    )


# --------------------------------------------------------------------------- check

RULES: dict[str, str] = {
    "present": "the column must be in the data (columns.<c>.required)",
    "type": "the column's type family (columns.<c>.type; a failure counts the rows whose value does not fit)",
    "min": "values at or above a bound",
    "max": "values at or below a bound",
    "allowed": "values from a list",
    "max_missing": "at most this share of rows missing",
    "pattern": "text matching a regular expression",
    "unique": "no value repeated",
    "invariant": "no unit changes value",
    "monotone": "each unit's value only rises (or only falls)",
    "max_change": "a unit's value moves by at most this between consecutive observations",
    "max_change_per_period": "at most this per period between consecutive observations",
    "follows_period": "every unit holds the same value within each period",
    "step": "the period grid's step",
    "periods": "the periods the panel must hold",
    "period_range": "the first and last period allowed",
    "min_units": "at least this many units",
    "balanced": "every unit in every period",
    "max_attrition": "at most this share of the units present never seen again after a period",
    "max_duplicate_keys": "at most this many rows repeating a (unit, period) key",
    "max_missing_keys": "at most this many rows without a key",
    "only_listed_columns": "no column the contract does not list",
    "overlapping_keys": "(--against) no new-wave (unit, period) key the base already holds",
}


def rule_names() -> tuple[str, ...]:
    """Every rule name a ``check`` document can hold: the contract's keys (``required`` reported
    as ``present``) and the cross-wave rule ``overlapping_keys``."""
    from auditor.checks.contract import COLUMN_KEYS, PANEL_KEYS

    names = ["present", *(k for k in COLUMN_KEYS if k != "required"),
             *(k for k in PANEL_KEYS if k not in ("unit", "time")), "overlapping_keys"]
    return tuple(dict.fromkeys(names))


def _check() -> Schema:
    missing = [n for n in rule_names() if n not in RULES]
    if missing:
        raise ValueError(f"rules without a description in auditor/schema.py: {missing}")
    return _document(
        "check",
        "A panel checked against a contract (rules file): every rule's result, in contract order.",
        {
            "passed": _bool("True when every rule holds (the exit code is then 0)."),
            "contract": _str("The rules file's path."),
            "source": _source(),
            "against": _str("The panel so far (--against) the cross-wave rules were judged against.",
                            "without --against"),
            "summary": _object("How many rules.", {
                "rules": _int("Rules in the document."),
                "failed": _int("Rules evaluated that do not hold."),
                "not_evaluated": _int("Rules that could not run on the column's type."),
            }),
            "rules": _list("Every rule's result.", _object("One rule.", {
                "rule": _choice("The rule (the contract's key).", {n: RULES[n] for n in rule_names()}),
                "level": _choice("What it looks at.", {"row": "values one row at a time",
                                                       "panel": "keys, periods, units or values across rows"}),
                "column": _str("The column it is about.", "for a rule about the whole panel"),
                "passed": _bool("True when the rule holds (false when it could not be evaluated)."),
                "failing": _int("What the rule counts as failing, as message says: rows for row rules, "
                                "units, periods or key rows for panel rules.", "when not evaluated"),
                "message": _str("What was found, in one sentence."),
                "engine": _choice("What evaluated it.", {"great-expectations": "great-expectations (row rules)",
                                                         "polars": "panel-audit's own polars code"}),
                "evaluated": _bool("False when the rule could not run on the column's type (message says why)."),
                "across_waves": _bool("True when judged across the boundary between --against and the data."),
                "examples": _list("A few failing cases (check.examples of the rules).", {
                    "type": "object",
                    "description": "One case: key columns by their own names, the period, the values involved.",
                    "additionalProperties": VALUE,
                }),
            })),
        },
        {},
    )


_BUILDERS = {"profile": _profile, "instruments": _instruments, "compare": _compare, "check": _check}
_CACHE: dict[str, Schema] = {}


def schema(name: str) -> dict[str, Any]:
    """The JSON Schema (draft 2020-12) of command ``name``'s ``--json`` document, a fresh dict.

    ``name`` is one of :data:`NAMES`; another raises the ``unknown-schema`` AuditError.
    """
    if name not in _BUILDERS:
        from auditor.errors import fail

        raise fail("unknown-schema", name=name, names=", ".join(NAMES))
    if name not in _CACHE:
        _CACHE[name] = _BUILDERS[name]()
    return copy.deepcopy(_CACHE[name])
