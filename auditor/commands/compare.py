"""A new wave against the panel so far: schema, units, periods, consistency, distributions.

``compare(base, new, ...)`` answers, before a wave is appended: does it collide with
periods already held, did a time-invariant answer change for returning units, did a
code list or a column type change, did a distribution or a missing share jump, who came
back and who did not. Distributions are compared like with like: the new wave against
the base's last period, never against the whole base.

Conventions (README and rules/defaults.yaml state the same):

- Unit keys are compared as text on both sides (a float key holding whole numbers is
  written without its ``.0``), so integer ids in one file and text ids in the other
  still match; the change of type is itself a finding.
- Periods are placed on one scale built from the time values of both inputs together
  (``auditor.io.periods.scale_for``); the base grid's step is its most common difference.
- Null, NaN and infinite values count as missing in every comparison here; the
  missing shares count null and NaN.
- Population stability index (PSI): numeric columns are cut at the base reference's
  deciles (``numpy.quantile``, linear interpolation; repeated cut points merged), bins
  closed on the right; categorical columns use one bin per level. Each bin's count gets
  ``psi_smoothing`` added before shares are taken, on both sides, so an empty bin keeps
  the index finite: PSI = sum_k (q_k - p_k) * ln(q_k / p_k), p the base reference's
  shares and q the new wave's.
- Implausible jumps: the base's within changes are differences between a unit's
  consecutive rows in period order; their robust scale is 1.4826 times the median
  absolute deviation about their median (the factor makes it the standard deviation
  for normal data, common practice). A returning unit's jump is its first new value
  minus its last base value; it is implausible when it lies more than ``jump_mads``
  scaled deviations from the base's median change.

The work is a row of stages, each a function that takes what it needs and returns a
frozen value, run in order by :func:`_run`: the two schemas (``compare_align.
compare_schemas``), the aligned sides (``compare_align.align``), units and periods
(``compare_keys``), the checks of returning units (``compare_columns``), code lists and
distributions (``compare_shifts``). Findings and the rows behind them go to one
``FindingSink`` per run; the measures (PSI, KS, the change scale) are in
``compare_measures`` and the typed parts of the result in ``compare_values``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import polars as pl

from auditor.checks.config import Settings, load_settings
from auditor.checks.findings import Finding, sort_findings
from auditor.commands.compare_align import FindingSink, align, compare_schemas, level_counts
from auditor.commands.compare_columns import base_kinds, within_checks
from auditor.commands.compare_keys import period_placement, unit_flow
from auditor.commands.compare_measures import (
    change_scale,
    is_numeric,
    ks_two_sample,
    level_psi,
    numeric_psi,
    psi_bins,
    psi_counts,
    significant,
)
from auditor.commands.compare_shifts import column_shifts, level_checks
from auditor.commands.compare_values import (
    ColumnShift,
    FixedValueCheck,
    JumpCheck,
    LevelCheck,
    PeriodLabel,
    PeriodPlacement,
    RowCounts,
    SchemaChanges,
    SharedValueCheck,
    SourceNames,
    TypeChange,
    UnitFlow,
)
from auditor.errors import AuditError, fail, short_list
from auditor.io.load import INTERNAL, Panel, load_panel, parse_unit
from auditor.io.waves import key_text
from auditor.stats.pvalues import preload

__all__ = [
    "ColumnShift", "CompareResult", "FixedValueCheck", "JumpCheck", "LevelCheck", "PeriodPlacement", "RowCounts",
    "SchemaChanges", "SharedValueCheck", "SourceNames", "TypeChange", "UnitFlow", "appended_panel",
    "change_scale", "compare", "ks_two_sample", "level_psi", "numeric_psi", "psi_bins", "psi_counts", "significant",
]


# --- the result ---------------------------------------------------------------------


@dataclass(frozen=True)


class CompareResult:
    """What a new wave would do to the panel held so far.

    ``schema``, ``units``, ``periods``, ``rows`` and ``sources`` are typed parts
    (auditor/commands/compare_values.py); ``columns`` one ColumnShift per compared
    column (KS statistic, PSI, missing shares, as fractions); ``reference`` names the
    base period the distributions are compared with. ``wave_findings`` are this
    command's own findings, ``merged_findings`` those of the profile of base + new
    together (only with ``merged=True``). ``appended`` is the Panel of base + new and
    ``sides`` the base and new Panels (only with ``appended=True``; not part of the JSON).
    """

    schema: SchemaChanges
    units: UnitFlow
    periods: PeriodPlacement
    columns: tuple[ColumnShift, ...]
    reference: str
    reference_period: PeriodLabel
    rows: RowCounts
    unit: tuple[str, ...]
    time: str
    sources: SourceNames
    wave_findings: tuple[Finding, ...]
    merged_findings: tuple[Finding, ...] = ()
    merged_panel: dict[str, Any] | None = None
    settings: Settings | None = field(default=None, repr=False, compare=False)
    appended: Panel | None = field(default=None, repr=False, compare=False)
    sides: tuple[Panel, Panel] | None = field(default=None, repr=False, compare=False)
    detail_tables: dict[str, pl.DataFrame] = field(default_factory=dict, repr=False, compare=False)

    @property
    def findings(self) -> tuple[Finding, ...]:
        """Every finding (the wave's and the merged profile's), in the contract's order."""
        return sort_findings((*self.wave_findings, *self.merged_findings))

    def scope_of(self, finding: Finding) -> str:
        """``"wave"`` for this command's findings, ``"merged"`` for the merged profile's."""
        return "merged" if any(finding is f for f in self.merged_findings) else "wave"

    def _repr_html_(self) -> str:
        """The result as an HTML fragment for notebooks (the report's renderer)."""
        from auditor.render.html import compare_fragment

        return compare_fragment(self)

    def to_dict(self) -> dict[str, Any]:
        """The contract's JSON document (plus ``reference``, ``rows`` and a ``scope`` per finding)."""
        from auditor.version import __version__
        from auditor.vocab import clean

        findings = []
        for f in self.findings:
            d = f.to_dict()
            d["scope"] = self.scope_of(f)
            findings.append(d)
        return clean({
            "tool": {"name": "panel-audit", "version": __version__},
            "unit": list(self.unit),
            "time": self.time,
            "sources": self.sources.to_dict(),
            "reference": self.reference,
            "rows": self.rows.to_dict(),
            "schema": self.schema.to_dict(),
            "units": self.units.to_dict(),
            "periods": self.periods.to_dict(),
            "columns": [c.to_dict() for c in self.columns],
            "merged": None if self.merged_panel is None else {"panel": self.merged_panel},
            "findings": findings,
        })

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> CompareResult:
        """A compare JSON document (``to_dict()``, ``panel-audit compare --json``) typed again,
        for rendering a saved document: ``from_dict(r.to_dict()).to_dict() == r.to_dict()``.

        The Panels, settings and detail tables are not in the document and stay empty;
        ``reference_period`` is the last base period. Raises KeyError or TypeError on a
        document that lacks a part.
        """
        wave, merged = [], []
        for d in doc["findings"]:
            f = Finding(check=d["check"], severity=d["severity"], message=d["message"], column=d.get("column"),
                        count=d.get("count"), examples=tuple(d.get("examples") or ()))
            (merged if d.get("scope") == "merged" else wave).append(f)
        s, u, p, r, src = doc["schema"], doc["units"], doc["periods"], doc["rows"], doc["sources"]
        return cls(
            schema=SchemaChanges(tuple(s["added"]), tuple(s["removed"]),
                                 tuple(TypeChange(**t) for t in s["type_changed"])),
            units=UnitFlow(**u),
            periods=PeriodPlacement(tuple(p["base"]), tuple(p["new"]), tuple(p["overlap"]), p["frequency"],
                                    p["step"], p["colliding_keys"]),
            columns=tuple(ColumnShift.from_dict(c) for c in doc["columns"]),
            reference=doc["reference"],
            reference_period=p["base"][-1],
            rows=RowCounts(**r),
            unit=tuple(doc["unit"]),
            time=doc["time"],
            sources=SourceNames(**src),
            wave_findings=tuple(wave),
            merged_findings=tuple(merged),
            merged_panel=None if doc.get("merged") is None else doc["merged"]["panel"],
        )


# --- loading ------------------------------------------------------------------------------


def _columns_of(data: Any) -> list[str]:
    """The column names of ``data`` (for an error message), or [] when unreadable."""
    try:
        from auditor.io.load import _to_lazy

        lf = _to_lazy(data, ())[0]
        return [c for c in lf.collect_schema().names() if c not in INTERNAL]
    except (AuditError, pl.exceptions.PolarsError, OSError):
        return []


def _load_side(data: Any, units: tuple[str, ...], time: str, which: str, settings: Settings) -> Panel:
    try:
        return load_panel(data, units, time, settings=settings)
    except AuditError as exc:
        if exc.code == "unknown-column":
            cols = _columns_of(data)
            missing = [k for k in (*units, time) if k not in cols]
            if cols and missing:
                raise fail(
                    "compare-key-missing",
                    which=which,
                    missing=", ".join(f"'{m}'" for m in missing),
                    available=short_list(cols),
                ) from None
        if exc.code in ("empty-file", "empty-frame") and which == "new wave":
            raise fail("compare-empty-new", source=_describe(data)) from None
        raise


def _describe(data: Any) -> str:
    if isinstance(data, pl.DataFrame | pl.LazyFrame):
        return "the polars frame"
    if type(data).__name__ == "DataFrame":
        return "the pandas frame"
    if isinstance(data, list | tuple):
        return ", ".join(f"'{d}'" for d in data)
    return f"'{data}'"


def _profile(data: Any, units: tuple[str, ...], time: str, settings: Settings, engine: str = "auto",
             scheduler: str | None = None) -> Any:
    from auditor.commands.profile import profile

    return profile(data, unit=list(units), time=time, settings=settings, engine=engine, scheduler=scheduler)


def compare(
    base: Any,
    new: Any,
    *,
    unit: str | Sequence[str],
    time: str,
    merged: bool = False,
    settings: Settings | None = None,
    rules: Any = None,
    appended: bool = False,
    engine: str = "auto",
    scheduler: str | None = None,
) -> CompareResult:
    """Compare a new wave ``new`` with the panel held so far ``base``.

    Both are paths (any supported format) or pandas/polars frames keyed by ``unit``
    and ``time``. ``merged`` also profiles base + new together and adds that
    profile's findings (scope ``merged``); ``appended`` keeps the Panel of base + new
    on the result (for the report of the appended panel). Returns a CompareResult; shares are
    fractions, the PSI and KS statistic dimensionless. Raises AuditError (exit 2)
    when a side cannot serve (no common keys, an empty new wave, unreadable files).
    ``engine`` and ``scheduler`` as in :func:`auditor.commands.profile.profile`: with ``dask`` the
    base's profile runs on the cluster; the wave-against-base checks still read the
    base's rows on this machine (README, "On a cluster").
    """
    from auditor.stats.engines import resolve_engine

    name = resolve_engine(engine, None, scheduler)
    # scipy.stats (for the KS p-values) takes a second or more to import: in a thread,
    # beside the base profile, whose polars work releases the GIL
    preload("scipy.stats")
    if settings is None:
        settings = load_settings(rules)
    units = parse_unit(unit)
    time = str(time).strip()
    from auditor import progress

    with progress.step("reading the new wave"):
        newp = _load_side(new, units, time, "new wave", settings)
    try:
        prof = _profile(base, units, time, settings, name, scheduler)
    except AuditError as exc:
        if exc.code == "unknown-column":
            _load_side(base, units, time, "base", settings)  # re-raise with the compare wording
        raise
    basep: Panel = prof.data if name != "dask" else _load_side(base, units, time, "base", settings)
    with progress.step(f"comparing {newp.rows:,} new rows with {basep.rows:,} base rows"):
        both = appended_panel(basep, newp, settings) if merged or appended else None
        result = _run(basep, newp, prof, settings, merged, both)
    if appended:
        result = dataclasses.replace(result, appended=both, sides=(basep, newp))
    return result


def _run(basep: Panel, newp: Panel, prof: Any, settings: Settings, merged: bool,
         appended: Panel | None) -> CompareResult:
    """The comparison's stages in their order, each taking what it needs and returning a
    frozen value; the findings and the rows behind them go to one FindingSink. ``appended``
    (base + new) is profiled for ``merged``."""
    sink = FindingSink(settings, basep.unit)
    view = compare_schemas(basep, newp, settings, sink)
    sides = align(basep, newp, view)
    units = unit_flow(sides, sink)
    periods = period_placement(sides, newp, sink)
    kinds = base_kinds(prof)
    within = within_checks(sides, kinds, settings, sink)
    counts = level_counts(sides)
    levels = level_checks(sides, kinds, counts, settings, sink)
    columns = column_shifts(sides, kinds, within, levels, counts, settings, sink)
    merged_findings, merged_panel = _merged_profile(appended, settings) if merged and appended is not None else ((), None)
    ref_label = sides.label(sides.last_pos)
    return CompareResult(
        schema=view.changes,
        units=units,
        periods=periods,
        columns=columns,
        reference=f"base period {ref_label}",
        reference_period=ref_label,
        rows=RowCounts(base=basep.rows, new=newp.rows, base_reference=sides.reference.height,
                       new_missing_keys=newp.missing_keys),
        unit=basep.unit,
        time=basep.time,
        sources=SourceNames(base=basep.source, new=newp.source),
        detail_tables=sink.detail_tables(),
        wave_findings=sort_findings(sink.findings),
        merged_findings=merged_findings,
        merged_panel=merged_panel,
        settings=settings,
    )


def _merged_profile(appended: Panel, settings: Settings) -> tuple[tuple[Finding, ...], dict[str, Any] | None]:
    """The profile of base + new: its findings (marked ``base + new``) and its panel summary."""
    prof = _profile_panel(appended, settings)
    marked = tuple(
        dataclasses.replace(f, message=f"base + new: {f.message}") for f in getattr(prof, "findings", ())
    )
    panel = getattr(prof, "panel", None)
    return marked, (dict(panel) if isinstance(panel, dict) else None)


def _profile_panel(panel: Panel, settings: Settings) -> Any:
    from auditor.commands.profile import profile_panel

    return profile_panel(panel, settings)


def appended_panel(base: Panel, new: Panel, settings: Settings) -> Panel:
    """The panel after appending ``new`` to ``base``: every keyed row of both, the columns
    of either (a column whose type differs is read as their common numeric type, or as
    text; key columns as text), with the rows lacking a key of both counted as its own.

    Returns a Panel whose ``rows`` and ``missing_keys`` add up both inputs' and whose
    ``source`` names both.
    """
    bs, ns = base.schema, new.schema
    keys = (*base.unit, base.time)
    bf = base.frame.drop([c for c in INTERNAL if c in base.frame.columns])
    nf = new.frame.drop([c for c in INTERNAL if c in new.frame.columns])
    bcast, ncast = [], []
    for c in set(bs) & set(ns):
        if bs[c] == ns[c]:
            continue
        if c in keys:
            expr_b = key_text(c, bs[c]).alias(c) if c in base.unit else pl.col(c).cast(pl.String)
            expr_n = key_text(c, ns[c]).alias(c) if c in base.unit else pl.col(c).cast(pl.String)
        elif is_numeric(bs[c]) and is_numeric(ns[c]):
            expr_b, expr_n = pl.col(c).cast(pl.Float64), pl.col(c).cast(pl.Float64)
        else:
            expr_b, expr_n = pl.col(c).cast(pl.String), pl.col(c).cast(pl.String)
        bcast.append(expr_b)
        ncast.append(expr_n)
    if bcast:
        bf, nf = bf.with_columns(bcast), nf.with_columns(ncast)
    both = pl.concat([bf, nf], how="diagonal_relaxed")
    panel = load_panel(both, base.unit, base.time, settings=settings)
    examples = tuple({"in": "base", **e} for e in base.missing_key_examples) + tuple(
        {"in": "new wave", **e} for e in new.missing_key_examples
    )
    return dataclasses.replace(
        panel,
        rows=base.rows + new.rows,
        missing_keys=base.missing_keys + new.missing_keys,
        missing_key_examples=examples[:5],
        source=f"{base.source} + {new.source}",
        inputs=(*base.inputs, *new.inputs),
        load_findings=(*base.load_findings, *new.load_findings),
    )
