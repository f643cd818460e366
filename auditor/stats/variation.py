"""Within / between variation, column kinds and per-column signals.

Every column's statistics come from the moments kernel (:mod:`auditor.stats.moments`),
driven in memory, streaming or on a dask cluster (:mod:`auditor.stats.engines`,
:mod:`auditor.stats.cluster`): a :class:`~auditor.stats.moments.ColumnStats` per column. Kinds,
shares and signals are numpy arithmetic on those (:func:`compute_variation`); the
within / between decomposition itself is :func:`auditor.stats.moments.decompose`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl

from auditor.checks.config import Settings
from auditor.checks.findings import Finding, make
from auditor.dtypes import profile_dtype_name
from auditor.io.load import Panel
from auditor.stats.moments import Passes, SparsePeriods, decompose, is_number

KINDS = ("constant", "period-only", "time-invariant", "nearly-time-invariant", "time-varying")

# Field order of the columns table (the contract's names first).
COLUMN_FIELDS = (
    "name",
    "dtype",
    "kind",
    "missing_share",
    "distinct",
    "units_changing",
    "units_observed_twice",
    "dominant_share",
    "mean",
    "overall_sd",
    "between_sd",
    "within_sd",
    "within_share",
    "absorbed_by_time",
    "time_r2",
    "non_finite",
    "binary",
    "periods_all_missing",
)


@dataclass(frozen=True)
class Variation:
    """The columns table and its side tables.

    ``columns``: one row per non-key column with :data:`COLUMN_FIELDS`.
    ``missing_by_period``: ``column``, ``period`` (label), ``missing_share`` for
    every column and period. ``absorbed_basis``: how ``absorbed_by_time`` was
    computed (all rows, or a fixed subset of units for very large panels).
    ``changing_examples``: per column, a few changing units with their min/max.
    """

    columns: pl.DataFrame
    missing_by_period: pl.DataFrame
    absorbed_basis: dict[str, Any]
    changing_examples: dict[str, tuple[dict[str, Any], ...]]


is_numeric = is_number  # whether the within/between decomposition applies


def run_passes(panel: Panel, settings: Settings) -> Passes:
    """Every column's statistics from the moments kernel, with the panel's engine
    (:mod:`auditor.stats.engines`; the dask engine computes its passes itself)."""
    from auditor.stats import engines

    return engines.passes(panel, settings)


def compute_variation(panel: Panel, settings: Settings, passes: Passes | None = None) -> Variation:
    """Kinds, shares and signals for every non-key column of ``panel``.

    ``passes`` are the statistics from :func:`run_passes` (computed here when None).
    """
    cols = list(panel.columns)
    schema = panel.schema
    n_rows = panel.rows - panel.missing_keys
    if not cols:
        return Variation(
            columns=pl.DataFrame(schema={f: pl.Null for f in COLUMN_FIELDS}),
            missing_by_period=pl.DataFrame(schema={"column": pl.String, "period": pl.String, "missing_share": pl.Float64}),
            absorbed_basis={"rows": 0, "units": 0, "all_units": True},
            changing_examples={},
        )
    numeric = [c for c in cols if is_numeric(schema[c])]
    numeric_set = set(numeric)  # membership per column: a list would be quadratic in columns
    passes = passes if passes is not None else run_passes(panel, settings)

    # --- arithmetic on the small tables ------------------------------------------------
    records: list[dict[str, Any]] = []
    changing_examples: dict[str, tuple[dict[str, Any], ...]] = {}
    period_rows = passes.period_rows.astype(np.float64)
    period_labels = list(panel.grid)
    miss_cols: list[str] = []
    miss_periods: list[Any] = []
    miss_shares: list[float] = []
    for c in cols:
        st = passes.stats[c]
        dt = schema[c]
        present_rows = n_rows - st.nulls
        dominant = (st.top / present_rows) if present_rows and st.distinct and st.top else None
        observed_twice = int((st.n_i >= 2).sum())
        rec: dict[str, Any] = {
            "name": c,
            "dtype": profile_dtype_name(dt),
            "missing_share": st.nulls / n_rows if n_rows else None,
            "distinct": st.distinct,
            "units_observed_twice": observed_twice,
            "dominant_share": dominant,
            "mean": None,
            "overall_sd": None,
            "between_sd": None,
            "within_sd": None,
            "within_share": None,
            "absorbed_by_time": None,
            "time_r2": None,
            "non_finite": st.non_finite,
            "binary": False,
        }
        if c in numeric_set and st.mean_i is not None and st.m2_i is not None:
            if st.n_i.size and int(st.n_i.min()) > 0:  # every unit has a value: no copies
                rec.update(decompose(st.n_i, st.mean_i, st.m2_i))
            else:
                seen = st.n_i > 0
                rec.update(decompose(st.n_i[seen], st.mean_i[seen], st.m2_i[seen]))
            if rec["mean"] is not None:
                rec["mean"] = rec["mean"] + st.shift
            rec["binary"] = bool(st.distinct == 2 and st.vmin == 0.0 and st.vmax == 1.0)
        units_changing = int(st.changing.sum())
        rec["units_changing"] = units_changing
        if st.examples:
            labels = panel.unit_labels([e[0] for e in st.examples])
            changing_examples[c] = tuple(
                {**lab, "distinct_values": hi} if lo is None else {**lab, "min": lo, "max": hi}
                for lab, (_, lo, hi) in zip(labels, st.examples, strict=True)
            )
        # per period: missing data by wave
        n_t = st.n_t.astype(np.float64)
        share_t = 1.0 - n_t / period_rows
        miss_cols += [c] * len(share_t)
        miss_periods += period_labels
        miss_shares += share_t.tolist()
        rec["periods_all_missing"] = [
            period_labels[i] for i in np.flatnonzero(n_t == 0)
        ] if st.distinct else []
        rec["kind"] = classify(
            distinct=st.distinct,
            period_only=bool(st.distinct > 1 and st.one_value),
            units_changing=units_changing,
            units_observed_twice=observed_twice,
            within_share=rec["within_share"],
            settings=settings,
        )
        records.append(rec)

    basis = _absorbed(panel, records, numeric, passes, settings)
    table = _table(records)
    missing = pl.DataFrame(
        {
            "column": pl.Series(miss_cols, dtype=pl.String),
            "period": pl.Series([str(p) for p in miss_periods], dtype=pl.String),
            "missing_share": pl.Series(miss_shares, dtype=pl.Float64),
        }
    )
    return Variation(columns=table, missing_by_period=missing, absorbed_basis=basis, changing_examples=changing_examples)


def _table(records: list[dict[str, Any]]) -> pl.DataFrame:
    data = {f: [r.get(f) for r in records] for f in COLUMN_FIELDS}
    data["periods_all_missing"] = [[str(p) for p in r["periods_all_missing"]] for r in records]
    types: dict[str, Any] = {
        "name": pl.String,
        "dtype": pl.String,
        "kind": pl.String,
        "missing_share": pl.Float64,
        "distinct": pl.Int64,
        "units_changing": pl.Int64,
        "units_observed_twice": pl.Int64,
        "dominant_share": pl.Float64,
        "mean": pl.Float64,
        "overall_sd": pl.Float64,
        "between_sd": pl.Float64,
        "within_sd": pl.Float64,
        "within_share": pl.Float64,
        "absorbed_by_time": pl.Boolean,
        "time_r2": pl.Float64,
        "non_finite": pl.Int64,
        "binary": pl.Boolean,
        "periods_all_missing": pl.List(pl.String),
    }
    return pl.DataFrame({f: pl.Series(f, data[f], dtype=types[f]) for f in COLUMN_FIELDS})


def classify(
    *,
    distinct: int,
    period_only: bool,
    units_changing: int,
    units_observed_twice: int,
    within_share: float | None,
    settings: Settings,
) -> str:
    """The column kind of methods.md section 3 (first rule that applies)."""
    if distinct <= 1:
        return "constant"
    if period_only:
        return "period-only"
    if units_changing == 0:
        return "time-invariant"
    share = settings.profile.nearly_invariant_units_share
    low_within = settings.profile.nearly_invariant_within_share
    if units_changing <= share * units_observed_twice or (
        within_share is not None and within_share < low_within
    ):
        return "nearly-time-invariant"
    return "time-varying"


def _absorbed(
    panel: Panel,
    records: list[dict[str, Any]],
    numeric: list[str],
    passes: Passes,
    settings: Settings,
) -> dict[str, Any]:
    """Fill ``time_r2`` and ``absorbed_by_time`` in ``records``; return the basis used.

    R2_t = 1 - SS(two-way residual) / WSS. The two-way residual is the limit of the
    alternating projections of methods.md; it is computed here directly, from the
    normal equations of period dummies after the unit demeaning
    ((D' M_U D) b = D' M_U x, a P x P system), which gives the same projection
    without iterating. In memory the right-hand sides (per-period sums of the
    within deviations) come from the moments kernel, whatever the engine.
    """
    cut = settings.profile.absorbed_r2
    numeric_set = set(numeric)
    todo = [
        r for r in records
        if r["name"] in numeric_set and r["kind"] in ("time-varying", "nearly-time-invariant")
    ]
    for r in records:
        if r["name"] in numeric_set:
            r["absorbed_by_time"] = r["kind"] == "period-only"
            r["time_r2"] = 1.0 if r["kind"] == "period-only" else None
    n_keyed = panel.rows - panel.missing_keys
    basis = {"rows": n_keyed, "units": panel.n_units, "all_units": True}
    if not todo:
        return basis
    # columns sharing one system (every row has a value) are solved together
    groups: dict[int, tuple[Any, list[dict[str, Any]]]] = {}
    for r in todo:
        st = passes.stats[r["name"]]
        matrix = st.system if st.system is not None else passes.system
        if st.rhs is None or st.wss is None or matrix is None:
            continue
        groups.setdefault(id(matrix), (matrix, []))[1].append(r)
    for matrix, rows in groups.values():
        stats = [passes.stats[r["name"]] for r in rows]
        shares = _explained_shares(
            np.column_stack([st.rhs for st in stats]), [float(st.wss or 0.0) for st in stats], _solver(matrix)
        )
        for r, r2 in zip(rows, shares, strict=True):
            r["time_r2"] = r2
            r["absorbed_by_time"] = bool(r2 is not None and r2 >= cut)
    return basis


def _solver(matrix: np.ndarray | SparsePeriods) -> tuple[np.ndarray, np.ndarray] | SparsePeriods:
    """What :func:`_explained` needs of a period system: the eigen-decomposition of a
    dense one (at most ``moments.DENSE_PERIODS`` periods), a sparse one as it is."""
    return matrix if isinstance(matrix, SparsePeriods) else np.linalg.eigh(matrix)


def _explained(
    rhs: np.ndarray, wss: float, system: tuple[np.ndarray, np.ndarray] | SparsePeriods
) -> float | None:
    """R2 of period effects from the per-period sums of within deviations ``rhs`` and WSS
    (None when WSS is 0, or when a sparse system was not solved)."""
    return _explained_shares(rhs[:, None], [wss], system)[0]


def _explained_shares(
    rhs: np.ndarray, wss: Sequence[float], system: tuple[np.ndarray, np.ndarray] | SparsePeriods
) -> list[float | None]:
    """:func:`_explained` for each column of ``rhs`` (periods x columns)."""
    if isinstance(system, SparsePeriods):
        explained = system.explained(rhs)
    else:
        vals, vecs = system
        keep = vals > max(vals.max(), 0.0) * 1e-12 * vals.size
        basis, kept = vecs[:, keep].T, vals[keep]
        explained = np.array([float(((basis @ rhs[:, j]) ** 2 / kept).sum()) for j in range(rhs.shape[1])])
    out: list[float | None] = []
    for e, w in zip(explained, wss, strict=True):
        ok = w > 0 and np.isfinite(e)
        out.append(float(min(max(float(e) / w, 0.0), 1.0)) if ok else None)
    return out


def variation_findings(panel: Panel, v: Variation, settings: Settings) -> list[Finding]:
    """Findings about columns: constant, nearly invariant, absorbed, near-constant, missing, ..."""
    out: list[Finding] = []
    near = settings.profile.near_constant_share
    few = settings.profile.few_switchers
    high = settings.profile.high_missing_share
    rare = settings.profile.nearly_invariant_units_share
    for r in v.columns.iter_rows(named=True):
        c, kind = r["name"], r["kind"]
        if r["distinct"] == 0:
            out.append(make("column-all-missing", settings, f"'{c}' has no value in any row; it cannot enter any model.", column=c, count=0))
            continue
        switchers = bool(r["binary"]) and 0 < r["units_changing"] < few
        if kind == "constant":
            out.append(make("constant-column", settings, f"'{c}' takes one value everywhere; no model can estimate its effect.", column=c, count=1))
        elif kind == "nearly-time-invariant" and not switchers:  # a 0/1 column's few switchers: one finding below
            changing, twice = r["units_changing"], r["units_observed_twice"]
            share = f" (within share {r['within_share']:.4f})" if r["within_share"] is not None else ""
            if changing <= rare * twice:
                why = (f"'{c}' changes within {changing} of {twice} units seen twice or more{share}; such rare "
                       "changes are often coding errors, and a within estimate of it rests on those units alone.")
            else:
                why = (f"'{c}' changes within {changing} of {twice} units seen twice or more, but only a little: "
                       f"{100 * (r['within_share'] or 0):.2f}% of its variation lies within units, so a within "
                       "estimate of it rests on that small variation and is imprecise.")
            out.append(
                make(
                    "nearly-time-invariant",
                    settings,
                    why,
                    column=c,
                    count=changing,
                    examples=v.changing_examples.get(c, ()),
                )
            )
        elif kind == "period-only":
            out.append(make("period-only", settings, f"'{c}' is the same for every unit within each period; period effects absorb it completely.", column=c, count=r["distinct"]))
        if kind != "period-only" and r["absorbed_by_time"]:
            out.append(
                make(
                    "absorbed-by-time",
                    settings,
                    f"period effects explain {100 * r['time_r2']:.2f}% of the within variation of '{c}'; with unit and period effects in the model its coefficient is not identified.",
                    column=c,
                    count=r["units_changing"],
                )
            )
        if kind != "constant" and r["dominant_share"] is not None and r["dominant_share"] >= near:
            out.append(make("near-constant", settings, f"one value of '{c}' holds {100 * r['dominant_share']:.2f}% of its rows; its effect rests on very few observations.", column=c, count=r["distinct"]))
        if switchers:
            also = " (so it is also nearly time-invariant)" if kind == "nearly-time-invariant" else ""
            out.append(
                make(
                    "few-switchers",
                    settings,
                    f"only {r['units_changing']} {'unit switches' if r['units_changing'] == 1 else 'units switch'} '{c}' between 0 and 1{also}; "
                    "a within estimate of its effect is identified from those units alone.",
                    column=c,
                    count=r["units_changing"],
                    examples=v.changing_examples.get(c, ()),
                )
            )
        if r["periods_all_missing"]:
            ps = r["periods_all_missing"]
            out.append(
                make(
                    "missing-in-period",
                    settings,
                    f"'{c}' is missing for every unit in {len(ps)} period(s) ({', '.join(map(str, ps[:5]))}); the question may not have been asked in that wave.",
                    column=c,
                    count=len(ps),
                    examples=[{"period": p} for p in ps[:5]],
                )
            )
        if r["missing_share"] is not None and r["missing_share"] > high:
            out.append(make("high-missing", settings, f"{100 * r['missing_share']:.1f}% of '{c}' is missing; a model using it drops those rows.", column=c, count=round(r["missing_share"] * (panel.rows - panel.missing_keys))))
        if r["non_finite"]:
            out.append(make("non-finite", settings, f"'{c}' holds {r['non_finite']} infinite values; they are left out of every statistic here but would break an estimator.", column=c, count=r["non_finite"]))
    return out
