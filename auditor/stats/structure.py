"""Panel structure: balance, duplicate and missing keys, gaps, patterns, attrition.

Everything comes from one row per unit, computed in the profile's shared grouped
pass (rows, first and last period, the participation pattern as a bit mask of
periods), and from the table of patterns. The (unit, period) cells are grouped
only for the units holding duplicate keys, to show examples.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl

from auditor.checks.config import Settings
from auditor.checks.findings import Finding, make
from auditor.io.load import PERIOD_ID, UNIT_ID, Panel


@dataclass(frozen=True)
class Structure:
    """The contract's ``panel`` object (``summary``) and tables for figures and later stages.

    ``per_unit``: one row per unit code with ``rows``, ``periods_seen``, ``first``,
    ``last`` (period indices), ``pattern`` (a key shared by units seen in the same
    periods). ``patterns``: ``periods`` (list of period indices), ``label``,
    ``units``, most common first. ``obs_per_unit``: ``t_i``, ``units``.
    """

    summary: dict[str, Any]
    per_unit: pl.DataFrame
    patterns: pl.DataFrame
    obs_per_unit: pl.DataFrame
    duplicate_examples: tuple[dict[str, Any], ...]
    gap_examples: tuple[dict[str, Any], ...]


def period_ranges(indices: list[int], grid: tuple[Any, ...]) -> str:
    """Period indices written as ranges of labels: ``2011-2015, 2017``."""
    parts: list[str] = []
    start = prev = None
    for i in sorted(indices):
        if start is None:
            start = prev = i
        elif i == prev + 1:
            prev = i
        else:
            parts.append(_range(start, prev, grid))
            start = prev = i
    if start is not None:
        parts.append(_range(start, prev, grid))
    return ", ".join(parts)


def _range(a: int, b: int, grid: tuple[Any, ...]) -> str:
    if a == b:
        return str(grid[a])
    sep = "-" if isinstance(grid[a], int) else " to "
    return f"{grid[a]}{sep}{grid[b]}"


BITMASK_PERIODS = 63  # patterns as bit masks up to this many periods; beyond, as text


def _pattern_expr(n_periods: int) -> pl.Expr:
    if n_periods <= BITMASK_PERIODS:
        bits = pl.lit(2, dtype=pl.UInt64).pow(pl.col(PERIOD_ID).cast(pl.UInt64))
        return bits.bitwise_or().alias("pattern")
    return pl.col(PERIOD_ID).unique().sort().cast(pl.String).str.join(",").alias("pattern")


def unit_exprs(panel: Panel) -> list[pl.Expr]:
    """Per-unit aggregations the structure needs, for the shared grouped pass by unit."""
    return [
        pl.len().alias("__rows"),
        pl.col(PERIOD_ID).min().alias("__first"),
        pl.col(PERIOD_ID).max().alias("__last"),
        pl.col(PERIOD_ID).n_unique().alias("__seen")
        if panel.n_periods > BITMASK_PERIODS
        else pl.lit(None).alias("__seen"),
        _pattern_expr(panel.n_periods).alias("__pattern"),
    ]


def _decode(patterns: pl.Series, n_periods: int) -> np.ndarray:
    """A (patterns x periods) boolean matrix: which periods each pattern holds."""
    if patterns.dtype == pl.UInt64:
        arr = patterns.to_numpy().astype(np.uint64)
        bits = (arr[:, None] >> np.arange(n_periods, dtype=np.uint64)[None, :]) & np.uint64(1)
        return bits.astype(bool)
    seen = np.zeros((patterns.len(), n_periods), dtype=bool)
    for row, text in enumerate(patterns.to_list()):  # beyond 63 periods only: one row per pattern
        seen[row, [int(x) for x in text.split(",")]] = True
    return seen


LABELLED_PATTERNS = 1000  # patterns given a text label; rarer ones keep only their periods


def _per_unit(unit_table: pl.DataFrame, n_periods: int) -> pl.DataFrame:
    """One row per unit: rows, first and last period, participation pattern, periods seen, gaps."""
    per_unit = unit_table.select(
        pl.col(UNIT_ID),
        pl.col("__rows").cast(pl.Int64).alias("rows"),
        pl.col("__first").alias("first"),
        pl.col("__last").alias("last"),
        pl.col("__pattern").alias("pattern"),
        (
            pl.col("__pattern").bitwise_count_ones().cast(pl.Int64)
            if n_periods <= BITMASK_PERIODS
            else pl.col("__seen").cast(pl.Int64)
        ).alias("periods_seen"),
    ).sort(UNIT_ID)
    per_unit = per_unit.with_columns(
        ((pl.col("last") - pl.col("first")).cast(pl.Int64) + 1 - pl.col("periods_seen")).alias("gap_periods")
    )
    return per_unit


def _patterns(per_unit: pl.DataFrame, panel: Panel) -> tuple[pl.DataFrame, np.ndarray, pl.DataFrame]:
    """Participation patterns: (units by pattern, the periods each pattern holds as a boolean
    matrix, the patterns table with period lists and labels), most common first."""
    pat = (
        per_unit.group_by("pattern")
        .agg(pl.len().alias("units"))
        .sort(["units", "pattern"], descending=[True, False])
    )
    seen = _decode(pat["pattern"], panel.n_periods)
    rows_idx, cols_idx = np.nonzero(seen)
    periods_lists = (
        pl.DataFrame({"r": rows_idx.astype(np.int64), "p": cols_idx.astype(np.uint32)})
        .group_by("r")
        .agg(pl.col("p").sort())
        .sort("r")
    )
    labels = [
        period_ranges(list(m), panel.grid) for m in periods_lists["p"].head(LABELLED_PATTERNS).to_list()
    ]
    labels += [None] * (pat.height - len(labels))
    patterns = pl.DataFrame(
        {
            "periods": periods_lists["p"].cast(pl.List(pl.UInt32)).alias("periods"),
            "label": pl.Series("label", labels, dtype=pl.String),
            "units": pat["units"].cast(pl.Int64),
        }
    )
    return pat, seen, patterns


def _attrition(per_unit: pl.DataFrame, pat: pl.DataFrame, seen: np.ndarray, panel: Panel) -> list[dict[str, Any]]:
    """Attrition by period, from the pattern table (a few rows) and each unit's first and last period."""
    n_periods = panel.n_periods
    weights = pat["units"].to_numpy().astype(np.int64)
    present = (seen * weights[:, None]).sum(axis=0)
    before = np.cumsum(seen, axis=1) - seen > 0  # seen in some earlier period
    prev = np.zeros_like(seen)
    prev[:, 1:] = seen[:, :-1]
    returning = ((seen & ~prev & before) * weights[:, None]).sum(axis=0)
    entering = np.bincount(per_unit["first"].to_numpy().astype(np.int64), minlength=n_periods)
    leaving = np.bincount(per_unit["last"].to_numpy().astype(np.int64), minlength=n_periods)
    attrition = [
        {
            "period": panel.grid[t],
            "present": int(present[t]),
            "entering": int(entering[t]),
            # the last period's leavers are not yet known (a unit seen last there may come back)
            "leaving": int(leaving[t]) if t < n_periods - 1 else None,
            "returning": int(returning[t]),
        }
        for t in range(n_periods)
    ]
    return attrition


def _examples(panel: Panel, per_unit: pl.DataFrame, gaps: pl.DataFrame, duplicate_keys: int,
              duplicate_cells: pl.DataFrame | None, settings: Settings) -> tuple[tuple[dict[str, Any], ...], ...]:
    """The first duplicated (unit, period) cells and the first units with gaps, as examples."""
    if duplicate_cells is not None:
        dup_cells = duplicate_cells
    elif duplicate_keys:
        doubled = per_unit.filter(pl.col("rows") > pl.col("periods_seen"))[UNIT_ID]
        dup_cells = panel.collect(
            panel.lazy.filter(pl.col(UNIT_ID).is_in(doubled.implode()))
            .group_by(UNIT_ID, PERIOD_ID)
            .agg(pl.len().alias("n"))
            .filter(pl.col("n") > 1)
        )
    else:
        dup_cells = pl.DataFrame(schema={UNIT_ID: pl.UInt32, PERIOD_ID: pl.UInt32, "n": pl.UInt32})
    k = settings.profile.examples
    dup_ex = dup_cells.sort(UNIT_ID, PERIOD_ID).head(k)
    dup_labels = panel.unit_labels(dup_ex[UNIT_ID].to_list())
    duplicate_examples = tuple(
        {**lab, panel.time: panel.grid[int(p)], "rows": int(c)}
        for lab, p, c in zip(dup_labels, dup_ex[PERIOD_ID].to_list(), dup_ex["n"].to_list(), strict=True)
    )
    gap_ex = gaps.head(k)
    gap_labels = panel.unit_labels(gap_ex[UNIT_ID].to_list())
    gap_examples = tuple(
        {**lab, "absent_periods": int(g)}
        for lab, g in zip(gap_labels, gap_ex["gap_periods"].to_list(), strict=True)
    )
    return duplicate_examples, gap_examples


def compute_structure(
    panel: Panel,
    settings: Settings,
    unit_table: pl.DataFrame | None = None,
    duplicate_cells: pl.DataFrame | None = None,
) -> Structure:
    """Structure of ``panel``: every field of the contract's ``panel`` object.

    ``unit_table`` is the shared grouped pass by unit holding :func:`unit_exprs`
    (computed here when None); ``duplicate_cells`` the first (unit, period, rows)
    cells holding several rows when already known (found here otherwise).
    """
    n_periods = panel.n_periods
    if unit_table is None:
        unit_table = panel.collect(panel.lazy.group_by(UNIT_ID).agg(unit_exprs(panel)))
    per_unit = _per_unit(unit_table, n_periods)
    duplicate_keys = int((per_unit["rows"] - per_unit["periods_seen"]).sum())
    n = per_unit.height
    t_i = per_unit["rows"].to_numpy().astype(np.float64)
    n_rows = float(t_i.sum())
    inv_sum = float((1.0 / t_i).sum())
    harmonic = n / inv_sum
    t_mean = n_rows / n
    unbalancedness = n / (t_mean * inv_sum)

    gaps = per_unit.filter(pl.col("gap_periods") > 0)
    units_with_gaps = gaps.height
    gap_periods = int(gaps["gap_periods"].sum()) if units_with_gaps else 0
    singletons = int((per_unit["rows"] == 1).sum())
    balanced = (
        duplicate_keys == 0
        and bool((per_unit["periods_seen"] == n_periods).all())
        and bool((per_unit["rows"] == n_periods).all())
    )

    pat, seen, patterns = _patterns(per_unit, panel)
    top = settings.profile.patterns

    attrition = _attrition(per_unit, pat, seen, panel)

    duplicate_examples, gap_examples = _examples(panel, per_unit, gaps, duplicate_keys, duplicate_cells, settings)

    obs = per_unit.group_by("rows").agg(pl.len().alias("units")).sort("rows").rename({"rows": "t_i"})
    summary = {
        "unit": list(panel.unit),
        "time": panel.time,
        "rows": panel.rows,
        "units": n,
        "periods": n_periods,
        "period_values": list(panel.grid),
        "frequency": panel.frequency,
        "step": panel.step if not panel.irregular else None,
        "balanced": balanced,
        "duplicate_keys": duplicate_keys,
        "missing_keys": panel.missing_keys,
        "units_with_gaps": units_with_gaps,
        "gap_periods": gap_periods,
        "singleton_units": singletons,
        "obs_per_unit": {
            "min": int(t_i.min()),
            "median": float(np.median(t_i)),
            "mean": t_mean,
            "max": int(t_i.max()),
            "harmonic_mean": harmonic,
        },
        "unbalancedness": unbalancedness,
        "patterns": [
            {"periods": lab, "units": int(u)}
            for lab, u in zip(patterns["label"].head(top).to_list(), patterns["units"].head(top).to_list(), strict=True)
        ],
        "pattern_count": patterns.height,
        "attrition": attrition,
        "missing_periods": [list(pair) for pair in panel.irregular],
        "grid_step": panel.step,
        "engine": panel.engine_name,
    }
    return Structure(
        summary=summary,
        per_unit=per_unit,
        patterns=patterns,
        obs_per_unit=obs,
        duplicate_examples=duplicate_examples,
        gap_examples=gap_examples,
    )


def structure_findings(panel: Panel, s: Structure, settings: Settings) -> list[Finding]:
    """Findings about keys and structure (missing and duplicate keys, gaps, balance, ...)."""
    out: list[Finding] = []
    d = s.summary
    if panel.missing_keys:
        out.append(
            make(
                "missing-keys",
                settings,
                f"{panel.missing_keys} rows have no unit or no period; they are left out of every "
                "statistic and would be dropped by any estimator: fill in or remove them.",
                count=panel.missing_keys,
                examples=panel.missing_key_examples,
            )
        )
    if d["duplicate_keys"]:
        out.append(
            make(
                "duplicate-keys",
                settings,
                f"{d['duplicate_keys']} rows repeat a (unit, period) key already present; a panel "
                "estimator needs one row per unit and period: remove double entries or fix the keys.",
                count=d["duplicate_keys"],
                examples=s.duplicate_examples,
            )
        )
    if d["units_with_gaps"]:
        out.append(
            make(
                "gaps",
                settings,
                f"{d['units_with_gaps']} units are absent in {d['gap_periods']} periods inside their "
                "own span; lags and differences across those gaps are not one period apart.",
                count=d["units_with_gaps"],
                examples=s.gap_examples,
            )
        )
    if panel.irregular:
        missing = [f"{a} to {b}" for a, b in panel.irregular]
        out.append(
            make(
                "irregular-periods",
                settings,
                f"the period grid skips its step of {panel.step} between "
                + ", ".join(missing[:5])
                + "; a whole period is missing for every unit, so period dummies and lags need care.",
                count=len(panel.irregular),
                examples=[{"from": a, "to": b} for a, b in panel.irregular[:5]],
            )
        )
    if not d["balanced"]:
        out.append(
            make(
                "unbalanced",
                settings,
                f"units have {d['obs_per_unit']['min']} to {d['obs_per_unit']['max']} rows each "
                f"(Ahrens-Pincus unbalancedness {d['unbalancedness']:.3f}); estimators weight units "
                "by their number of observations.",
                count=d["units"],
            )
        )
    if d["singleton_units"]:
        out.append(
            make(
                "singleton-units",
                settings,
                f"{d['singleton_units']} units are observed once; they add nothing to a within estimator.",
                count=d["singleton_units"],
            )
        )
    twins = key_twins(panel, settings.profile.examples)
    if twins is not None:
        units, groups, examples = twins
        out.append(
            make(
                "unit-key-twins",
                settings,
                f"{units} units in {groups} groups have ids that differ only by Unicode form (composed or "
                "decomposed accents, full-width letters) or invisible characters (zero-width, "
                "direction marks); they are counted as different units: if they are one unit, "
                "write its id one way.",
                count=units,
                examples=examples,
            )
        )
    return out


_INVISIBLE = r"\p{Cf}"  # format characters: zero-width, direction marks, soft hyphen, ...


def key_twins(panel: Panel, limit: int) -> tuple[int, int, list[dict[str, Any]]] | None:
    """(units, groups, examples) of unit ids that become equal once written in Unicode
    normal form NFKC without format characters, or None when there are none.

    One pass over the units table (one row per unit), in polars; only text key columns
    are compared this way (the other key columns must be equal as they are)."""
    keys = list(panel.unit)
    text = [k for k in keys if panel.units.schema[k] == pl.String]
    if not text or panel.n_units < 2:
        return None
    folded = [pl.col(k).str.normalize("NFKC").str.replace_all(_INVISIBLE, "").alias(f"__pa_fold_{i}")
              for i, k in enumerate(text)]
    table = panel.units.select(keys).with_columns(folded)
    names = [f"__pa_fold_{i}" for i in range(len(text))]
    altered = pl.any_horizontal([pl.col(n) != pl.col(k) for n, k in zip(names, text, strict=True)])
    if not table.select(altered.fill_null(False).any()).item():
        return None
    group = [*names, *(k for k in keys if k not in text)]
    sizes = table.group_by(group).agg(pl.len().alias("__pa_n")).filter(pl.col("__pa_n") > 1)
    if sizes.height == 0:
        return None
    shown = sizes.sort(group).head(limit)
    members = table.join(shown.select(group), on=group, how="semi", nulls_equal=True).sort(group)
    examples = []
    for _, rows in members.group_by(group, maintain_order=True):
        ids = rows.select(keys).to_dicts()
        for other in ids[1:]:
            examples.append({**ids[0], "twin": " ".join(str(other[k]) for k in keys),
                             "differs_by": _difference(ids[0], other, text)})
    return int(sizes["__pa_n"].sum()), sizes.height, examples[:limit]


def _difference(a: dict[str, Any], b: dict[str, Any], text: list[str]) -> str:
    """How two twin ids differ, for an example: invisible characters (listed), or form."""
    import unicodedata

    hidden = sorted({f"U+{ord(ch):04X}" for k in text for ch in str(a[k]) + str(b[k])
                     if unicodedata.category(ch) == "Cf"})
    if hidden:
        return "invisible characters " + " ".join(hidden)

    def wide(v: dict[str, Any]) -> str:
        return " ".join(f"U+{ord(ch):04X}" for k in text for ch in str(v[k]) if not ch.isascii()) or "none"

    return f"Unicode form: non-ASCII characters {wide(a)} here, {wide(b)} in the twin"
