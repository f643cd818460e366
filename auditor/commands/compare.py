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
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date
from typing import Any

import numpy as np
import polars as pl

from auditor.checks.config import Settings, load_settings
from auditor.checks.findings import Finding, make, sort_findings
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
    WithinCheck,
)
from auditor.dtypes import compare_dtype_name, null_or_nan, type_family
from auditor.errors import AuditError, fail, short_list
from auditor.io.load import INTERNAL, UNIT_ID, Panel, load_panel, parse_unit
from auditor.io.periods import grid_step
from auditor.io.waves import POS, key_text, label_at, period_scale
from auditor.stats.pvalues import preload

BASE_UNIT = "__pa_base_unit"  # the base's unit code of a new row's unit (null: entering)
MAD_TO_SD = 1.4826  # 1 / Phi^-1(3/4): the MAD of normal data times this is its sd (common practice)
KS_EXACT_MAX_N = 10_000  # scipy.stats.ks_2samp's method 'auto' computes exactly up to this sample size


def _key(j: int) -> str:
    return f"__pa_k{j}"


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


# --- stability index and distance ----------------------------------------------------


def _shares(counts: np.ndarray, smoothing: float) -> np.ndarray:
    counts = counts.astype(float) + smoothing
    return counts / counts.sum()


def _psi_from_counts(base_counts: np.ndarray, new_counts: np.ndarray, smoothing: float) -> float:
    p = _shares(base_counts, smoothing)
    q = _shares(new_counts, smoothing)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = (q - p) * np.log(q / p)
    # A bin empty on both sides with no smoothing adds nothing.
    terms = np.where((p == 0) & (q == 0), 0.0, terms)
    return float(terms.sum())


def psi_bins(reference: np.ndarray, bins: int, *, assume_sorted: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """The stability-index cut points of ``reference`` and which of them are bins of their own.

    Cut points are the reference's quantiles at 1/bins, ..., (bins-1)/bins (numpy's
    linear interpolation), repeated ones merged. A cut point on which the reference
    holds a tie of at least one bin's worth (1/bins of its values: a constant or
    discrete reference) is a bin of its own, between the interval below it and the one
    above, so a value can leave it in either direction; other cut points close the
    interval on their left. Returns (cut points, a boolean per cut point).
    """
    ordered = np.asarray(reference, dtype=float)
    if not assume_sorted:
        ordered = np.sort(ordered)
    edges = np.unique(np.quantile(ordered, np.arange(1, bins) / bins))
    ties = np.searchsorted(ordered, edges, side="right") - np.searchsorted(ordered, edges, side="left")
    return edges, ties * bins >= ordered.size


def psi_counts(values: np.ndarray, edges: np.ndarray, point: np.ndarray, *, assume_sorted: bool = False) -> np.ndarray:
    """How many of ``values`` fall in each bin of :func:`psi_bins`: 2m + 1 counts for m cut
    points, the interval below cut point j at 2j and cut point j itself at 2j + 1 (zero
    when it is no bin of its own), the interval above the last at 2m. One sort of the
    values (none when ``assume_sorted``) and two binary searches per cut point."""
    ordered = np.asarray(values, dtype=float)
    if not assume_sorted:
        ordered = np.sort(ordered)
    left = np.searchsorted(ordered, edges, side="left")
    right = np.searchsorted(ordered, edges, side="right")
    upper = np.where(point, left, right)  # where each interval ends: before a point bin, after a cut point
    lower = np.concatenate([[0], right])  # where each starts: after the cut point below
    counts = np.zeros(2 * edges.size + 1, dtype=np.int64)
    counts[0:-1:2] = upper - lower[:-1]
    counts[-1] = ordered.size - lower[-1]
    counts[1::2] = np.where(point, right - left, 0)
    return counts


def numeric_psi(
    base: np.ndarray, new: np.ndarray, *, bins: int = 10, smoothing: float = 0.5, assume_sorted: bool = False
) -> float:
    """Population stability index of ``new`` against ``base`` on the base's quantile bins.

    Bins as :func:`psi_bins` makes them; bins empty on both sides are left out, and
    ``smoothing`` is added to every other bin's count on both sides before shares are
    taken. ``assume_sorted``: both samples are sorted already. Returns the index
    (dimensionless, 0 for identical shares); NaN when either sample is empty.
    """
    base = np.asarray(base, dtype=float)
    new = np.asarray(new, dtype=float)
    if base.size == 0 or new.size == 0:
        return math.nan
    if not assume_sorted:
        base, new = np.sort(base), np.sort(new)
    edges, point = psi_bins(base, bins, assume_sorted=True)
    b = psi_counts(base, edges, point, assume_sorted=True)
    n = psi_counts(new, edges, point, assume_sorted=True)
    used = (b > 0) | (n > 0)
    return _psi_from_counts(b[used], n[used], smoothing)


def level_psi(base_counts: dict[Any, int], new_counts: dict[Any, int], *, smoothing: float = 0.5) -> float:
    """Population stability index over categorical levels (one bin per level of either side).

    Returns the index (dimensionless); NaN when either side has no values.
    """
    levels = sorted(set(base_counts) | set(new_counts), key=str)
    b = np.array([base_counts.get(v, 0) for v in levels], dtype=float)
    n = np.array([new_counts.get(v, 0) for v in levels], dtype=float)
    if b.sum() == 0 or n.sum() == 0:
        return math.nan
    return _psi_from_counts(b, n, smoothing)


def ks_two_sample(base: np.ndarray, new: np.ndarray) -> tuple[float, float, str]:
    """Two-sample Kolmogorov-Smirnov statistic (largest gap between the two empirical
    distribution functions, 0..1), its two-sided p-value (scipy.stats.ks_2samp, method
    'auto') and how the p-value was computed: ``exact``, or ``asymptotic`` (large
    samples, or scipy's exact calculation did not converge; its warning is kept off the
    terminal). NaN, NaN, "" when either sample is empty."""
    if len(base) == 0 or len(new) == 0:
        return math.nan, math.nan, ""
    import warnings

    from scipy.stats import ks_2samp

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = ks_2samp(np.asarray(base, dtype=float), np.asarray(new, dtype=float))
    exact = max(len(base), len(new)) <= KS_EXACT_MAX_N and not any(
        "Exact calculation unsuccessful" in str(w.message) for w in caught
    )
    return float(res.statistic), float(res.pvalue), "exact" if exact else "asymptotic"


def significant(x: Any, digits: int = 6) -> float | None:
    """``x`` rounded to ``digits`` significant digits (a p-value of 2e-36 stays 2e-36);
    None for a missing or non-finite value."""
    if x is None:
        return None
    x = float(x)
    if not math.isfinite(x):
        return None
    return float(f"{x:.{digits}g}")


def _unit_period_order(units: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """Row order by unit, then period (stable)."""
    lo, hi = int(pos.min()), int(pos.max())
    span = hi - lo + 1
    if span * (int(units.max()) + 1) < 2**62:
        return np.argsort(units.astype(np.int64) * span + (pos.astype(np.int64) - lo), kind="stable")
    return np.lexsort((pos, units))


def change_scale(changes: np.ndarray, *, zero_share: float) -> tuple[float | None, float | None, str]:
    """The centre and robust scale of a column's within-unit changes, and how it was found.

    In order, the first that is positive: 1.4826 times the median absolute deviation
    about the median ("mad"; the normal-consistency factor, common practice), the
    standard deviation of the changes between their 5% and 95% quantiles
    ("trimmed-sd"), the standard deviation of all ("sd"), and the size of the one
    change they all share ("step"). When at least ``zero_share`` of the changes are
    exactly 0 (a value that often stays put), the scale is that of the non-zero
    changes (the method is prefixed "non-zero ") and a zero change is never a jump.
    Returns (None, None, "none") when there is no change to learn from.
    """
    d = np.asarray(changes, dtype=float)
    finite = np.isfinite(d)
    if not finite.all():
        d = d[finite]
    if d.size == 0:
        return None, None, "none"
    prefix = ""
    zeros = d == 0
    if zeros.mean() >= zero_share and not zeros.all():
        d, prefix = d[~zeros], "non-zero "
    centre = float(np.median(d))
    mad = float(np.median(np.abs(d - centre), overwrite_input=True))  # a temporary: sorted in place
    if mad > 0:
        return centre, MAD_TO_SD * mad, prefix + "mad"
    lo, hi = np.quantile(d, [0.05, 0.95])
    middle = d[(d >= lo) & (d <= hi)]
    if middle.size > 1 and float(np.std(middle, ddof=1)) > 0:
        return centre, float(np.std(middle, ddof=1)), prefix + "trimmed-sd"
    if d.size > 1 and float(np.std(d, ddof=1)) > 0:
        return centre, float(np.std(d, ddof=1)), prefix + "sd"
    if centre != 0:
        return centre, abs(centre), prefix + "step"
    return centre, None, "none"


# --- small helpers ----------------------------------------------------------------------


def _median_and_mad(s: pl.Series) -> tuple[float | None, float | None]:
    """The median of the non-null values of ``s`` and the median absolute deviation
    from it (None without values). numpy's selection (np.median) gives the same
    values as polars' median, in about half the time; a column holding NaN goes to
    polars, which orders NaN differently."""
    v = s.drop_nulls().to_numpy()
    if v.size == 0:
        return None, None
    if np.isnan(v).any():
        m = s.median()
        return m, (s - m).abs().median()
    m = float(np.median(v))
    return m, float(np.median(np.abs(v - m)))


def _family(dt: pl.DataType) -> str:
    """The dtype's family (auditor.dtypes.type_family), or its name when it has none."""
    return type_family(dt) or compare_dtype_name(dt)


def _is_numeric(dt: pl.DataType) -> bool:
    return dt.is_numeric() and dt != pl.Boolean


def _is_levels(dt: pl.DataType) -> bool:
    return _family(dt) in ("text", "boolean")


def _clean(col: str, dt: pl.DataType) -> pl.Expr:
    """The column with NaN and infinities as null (floats); others unchanged."""
    c = pl.col(col)
    if dt.is_float():
        return pl.when(c.is_finite()).then(c).otherwise(None).alias(col)
    return c


def _json_value(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, date):
        return v.isoformat()
    return v


def _num(v: Any, digits: int = 6) -> float | None:
    if v is None:
        return None
    v = float(v)
    return None if not math.isfinite(v) else round(v, digits)


def _plural(n: int, one: str, many: str | None = None) -> str:
    return f"{n} {one}" if n == 1 else f"{n} {many or one + 's'}"


def _verb(n: int, one: str, many: str) -> str:
    return one if n == 1 else many


def _labels_text(labels: Sequence[Any]) -> str:
    return short_list([str(v) for v in labels], 6)


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
    run = _Comparison(basep, newp, prof, settings, merged, base, new)
    with progress.step(f"comparing {newp.rows:,} new rows with {basep.rows:,} base rows"):
        result = run.run()
    if appended:
        result = dataclasses.replace(result, appended=run.appended(), sides=(basep, newp))
    return result


class _Comparison:
    """One run of compare: the two panels, their aligned frames, the findings so far."""

    def __init__(
        self, basep: Panel, newp: Panel, prof: Any, settings: Settings, merged: bool, base_data: Any, new_data: Any
    ) -> None:
        self.bp = basep
        self.np = newp
        self.prof = prof
        self.s = settings
        self.merged = merged
        self.base_data = base_data
        self.new_data = new_data
        self.units = basep.unit
        self.time = basep.time
        self.nkeys = [_key(j) for j in range(len(self.units))]
        self.examples = settings.profile.examples
        self.findings: list[Finding] = []
        self._counts: dict[tuple[str, str], pl.DataFrame] = {}
        self._appended: Panel | None = None
        self.tables: dict[str, list[pl.DataFrame]] = {}  # every row behind a finding, for --details

    def add(self, check: str, message: str, **kw: Any) -> Finding:
        f = make(check, self.s, message, **kw)
        self.findings.append(f)
        return f

    # -- run ------------------------------------------------------------------------------
    def run(self) -> CompareResult:
        schema = self._schema()
        self._align()
        units = self._units()
        periods = self._periods()
        columns = self._columns()
        merged_findings: tuple[Finding, ...] = ()
        merged_panel = None
        if self.merged:
            merged_findings, merged_panel = self._merged_profile()
        ref_label = label_at(self.last_pos, self.scale.frequency)
        return CompareResult(
            schema=schema,
            units=units,
            periods=periods,
            columns=tuple(columns),
            reference=f"base period {ref_label}",
            reference_period=ref_label,
            rows=RowCounts(base=self.bp.rows, new=self.np.rows, base_reference=self.ref.height,
                           new_missing_keys=self.np.missing_keys),
            unit=self.units,
            time=self.time,
            sources=SourceNames(base=self.bp.source, new=self.np.source),
            detail_tables={k: pl.concat(v, how="diagonal_relaxed") for k, v in self.tables.items()},
            wave_findings=sort_findings(self.findings),
            merged_findings=merged_findings,
            merged_panel=merged_panel,
            settings=self.s,
        )

    # -- schema ---------------------------------------------------------------------------
    def _schema(self) -> SchemaChanges:
        bs = self.bp.schema
        # A column the new wave leaves entirely empty has no type of its own (an empty CSV
        # column reads as text): it takes the base's type, and shows up as missing-jump.
        shared = [c for c in self.np.columns if c in bs and c not in (*self.units, self.time)]
        empty = self.np.frame.select([pl.col(c).is_null().all().alias(c) for c in shared]).row(0) if shared else ()
        self.empty_new = [c for c, e in zip(shared, empty, strict=True) if e]
        self.ns = {**self.np.schema, **{c: bs[c] for c in self.empty_new}}
        ns = self.ns
        keys = (*self.units, self.time)
        bcols = [c for c in bs if c not in keys]
        ncols = [c for c in ns if c not in keys]
        added = [c for c in ncols if c not in bs]
        removed = [c for c in bcols if c not in ns]
        changed = []
        for c in [*keys, *[c for c in bcols if c in ns]]:
            # A width change within one family (int32 vs int64) changes nothing when appending.
            if _family(bs[c]) != _family(ns[c]):
                changed.append(TypeChange(c, compare_dtype_name(bs[c]), compare_dtype_name(ns[c]), c in keys))
        for c in added:
            self.add(
                "column-added",
                f"column '{c}' ({compare_dtype_name(ns[c])}) is new in this wave; after appending it is "
                "missing for every base period: document it or leave it out of models that span them",
                column=c,
                count=1,
            )
        for c in removed:
            self.add(
                "column-removed",
                f"column '{c}' is in the base but not in the new wave; appending leaves it missing for "
                "the new periods: ask for it again or plan models without it",
                column=c,
                count=1,
            )
        for ch in changed:
            c = ch.column
            severe = ch.key
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
            f = make("type-changed", self.s, what, column=c, count=1)
            if severe and "type-changed" not in self.s.severities:
                f = dataclasses.replace(f, severity="error")
            self.findings.append(f)
        self.common = [c for c in bcols if c in ns]
        return SchemaChanges(tuple(added), tuple(removed), tuple(changed))

    # -- aligned frames -------------------------------------------------------------------
    def _align(self) -> None:
        bs, ns = self.bp.schema, self.ns
        self.scale, bpos, npos = period_scale(self.bp, self.np, self.time)
        # Unit tables (one row per unit) carry the text keys; rows carry codes only.
        bunits = self.bp.units.with_columns(
            [key_text(u, bs[u]).alias(k) for u, k in zip(self.units, self.nkeys, strict=True)]
        ).select(UNIT_ID, *self.nkeys)
        nunits = self.np.units.with_columns(
            [key_text(u, ns[u]).alias(k) for u, k in zip(self.units, self.nkeys, strict=True)]
        ).select(UNIT_ID, *self.nkeys)
        code_map = nunits.join(
            bunits.rename({UNIT_ID: BASE_UNIT}), on=self.nkeys, how="left", nulls_equal=True
        )
        self.bunits, self.nunits, self.code_map = bunits, nunits, code_map

        # Columns compared: common ones that both sides can hold in one type.
        self.numeric = [c for c in self.common if _is_numeric(bs[c]) and _is_numeric(ns[c])]
        self.levels = [c for c in self.common if _is_levels(bs[c]) and _is_levels(ns[c])]
        self.other = [c for c in self.common if c not in self.numeric and c not in self.levels]

        def cast_expr(c: str, dt: pl.DataType) -> pl.Expr:
            if c in self.numeric:
                return _clean(c, dt).cast(pl.Float64).alias(c)
            return pl.col(c).cast(pl.String).alias(c)

        compared = [*self.numeric, *self.levels, *[c for c in self.other if _family(bs[c]) == _family(ns[c])]]
        self.compared = compared
        miss_b = [null_or_nan(c, bs[c]).alias(f"__pa_miss_{j}") for j, c in enumerate(compared)]
        miss_n = [null_or_nan(c, ns[c]).alias(f"__pa_miss_{j}") for j, c in enumerate(compared)]
        self.B = self.bp.frame.select(
            UNIT_ID, bpos, *[cast_expr(c, bs[c]) for c in compared], *miss_b
        )
        self.N = (
            self.np.frame.with_columns([pl.col(c).cast(bs[c]) for c in self.empty_new])
            .select(UNIT_ID, npos, *[cast_expr(c, ns[c]) for c in compared], *miss_n)
            .join(code_map.select(UNIT_ID, BASE_UNIT), on=UNIT_ID, how="left")
        )
        self.base_pos = sorted(self.B.get_column(POS).unique().to_list())
        self.new_pos = sorted(self.N.get_column(POS).unique().to_list())
        self.last_pos = self.base_pos[-1]
        self.ref = self.B.filter(pl.col(POS) == self.last_pos)

    def _lab(self, pos: int) -> Any:
        return label_at(pos, self.scale.frequency)

    def keep(self, code: str, table: pl.DataFrame) -> None:
        """Keep every row behind a finding of ``code`` (the text key columns renamed to the
        user's key names) for ``--details``."""
        self.tables.setdefault(code, []).append(table.rename(dict(zip(self.nkeys, self.units, strict=True)),
                                                             strict=False))

    def _labels_expr(self, col: str) -> pl.Expr:
        """Period labels of a column of positions on the comparison's scale, as text."""
        return pl.col(col).map_elements(lambda p: str(self._lab(int(p))), return_dtype=pl.String)

    def _keys_of(self, row: dict[str, Any]) -> dict[str, Any]:
        """The unit key of a row holding the text keys, by the user's column names."""
        return {u: row[k] for u, k in zip(self.units, self.nkeys, strict=True)}

    def _unit_examples(self, table: pl.DataFrame) -> list[dict[str, Any]]:
        """The first units of a table holding the text keys, as examples."""
        return [self._keys_of(r) for r in table.head(self.examples).iter_rows(named=True)]

    def _level_counts(self, side: str, c: str) -> pl.DataFrame:
        """Rows per non-missing level of ``c`` in the base reference (``ref``) or the new wave (``new``)."""
        key = (side, c)
        if key not in self._counts:
            frame = self.ref if side == "ref" else self.N
            self._counts[key] = frame.group_by(c).agg(pl.len().alias("n")).filter(pl.col(c).is_not_null())
        return self._counts[key]

    # -- units ----------------------------------------------------------------------------
    def _units(self) -> UnitFlow:
        last = self.B.group_by(UNIT_ID).agg(pl.col(POS).max().alias("__pa_last"))
        returning = self.code_map.filter(pl.col(BASE_UNIT).is_not_null())
        n_ret = returning.height
        entering = self.code_map.height - n_ret
        not_returning = self.bunits.join(returning.select(BASE_UNIT), left_on=UNIT_ID, right_on=BASE_UNIT, how="anti")
        after_gap = (
            returning.join(last, left_on=BASE_UNIT, right_on=UNIT_ID, how="inner")
            .filter(pl.col("__pa_last") < self.last_pos)
            .sort(self.nkeys)
        )
        if after_gap.height:
            self.keep("returning-after-absence", after_gap.select(
                *self.nkeys, self._labels_expr("__pa_last").alias("last_base_period")))
            examples = [
                {**self._keys_of(r), "last_base_period": self._lab(int(r["__pa_last"]))}
                for r in after_gap.head(self.examples).iter_rows(named=True)
            ]
            self.add(
                "returning-after-absence",
                f"{_plural(after_gap.height, 'returning unit')} {'was' if after_gap.height == 1 else 'were'} "
                "absent from the base's last period "
                f"{self._lab(self.last_pos)}; their gap stays in the panel: check they are the same units "
                "(not re-used ids) before appending",
                count=after_gap.height,
                examples=examples,
            )
        # Of the units the base holds in its last period, those the new wave does not bring back.
        in_last = self.B.filter(pl.col(POS) == self.last_pos).select(UNIT_ID).unique()
        left_last = (
            not_returning.join(in_last, on=UNIT_ID, how="semi").sort(self.nkeys)
        )
        if left_last.height:
            self.keep("units-not-returning", left_last.select(*self.nkeys))
            self.add(
                "units-not-returning",
                f"{_plural(left_last.height, 'unit')} of base period {self._lab(self.last_pos)} "
                f"{'is' if left_last.height == 1 else 'are'} not in the new wave; if they left the survey, "
                "attrition may select the sample: compare their base answers with the stayers'",
                count=left_last.height,
                examples=self._unit_examples(left_last),
            )
        return UnitFlow(
            base=self.bunits.height,
            new=self.code_map.height,
            returning=n_ret,
            entering=entering,
            not_returning=not_returning.height,
            returning_after_absence=after_gap.height,
            last_period=in_last.height,
            not_returning_from_last_period=left_last.height,
        )

    # -- periods --------------------------------------------------------------------------
    def _periods(self) -> PeriodPlacement:
        base_set = set(self.base_pos)
        overlap = [p for p in self.new_pos if p in base_set]
        keys = [BASE_UNIT, POS]
        colliding = 0
        if overlap:
            held = self.B.filter(pl.col(POS).is_in(overlap)).select(pl.col(UNIT_ID).alias(BASE_UNIT), POS).unique()
            in_overlap = self.N.filter(pl.col(POS).is_in(overlap) & pl.col(BASE_UNIT).is_not_null())
            hits = in_overlap.select(keys).unique().join(held, on=keys, how="semi")
            colliding = hits.height
            if colliding:
                self.keep("overlapping-periods", hits.sort(keys).join(
                    self.bunits.rename({UNIT_ID: BASE_UNIT}), on=BASE_UNIT, how="left").select(
                    *self.nkeys, self._labels_expr(POS).alias(self.time)))
                hit_periods = sorted(hits.get_column(POS).unique().to_list())
                labels = [self._lab(p) for p in hit_periods]
                ex = (
                    hits.sort(keys)
                    .head(self.examples)
                    .join(self.bunits.rename({UNIT_ID: BASE_UNIT}), on=BASE_UNIT, how="left")
                    .sort(keys)
                )
                examples = [
                    {**self._keys_of(r), self.time: self._lab(r[POS])}
                    for r in ex.iter_rows(named=True)
                ]
                self.add(
                    "overlapping-periods",
                    f"{_plural(colliding, '(unit, period) key')} of the new wave {'is' if colliding == 1 else 'are'} "
                "already in the base "
                    f"(period {_labels_text(labels)}); appending would duplicate them: drop or re-key the "
                    f"{_labels_text(labels)} rows of the new wave before appending, or replace the base's "
                    "rows on purpose",
                    count=colliding,
                    examples=examples,
                )
            late = in_overlap.height + self.N.filter(
                pl.col(POS).is_in(overlap) & pl.col(BASE_UNIT).is_null()
            ).height - in_overlap.join(held, on=keys, how="semi").height
            if late:
                self.add(
                    "backfilled-rows",
                    f"{_plural(late, 'row')} of the new wave {_verb(late, 'falls', 'fall')} in periods the base already holds "
                    f"({_labels_text([self._lab(p) for p in overlap])}) without colliding with its keys; "
                    "appending backfills those periods: check this is intended",
                    count=late,
                )
        # duplicates inside the new wave
        dup = self.N.group_by(UNIT_ID, POS).agg(pl.len().alias("__pa_n")).filter(pl.col("__pa_n") > 1)
        if dup.height:
            extra = int((dup.get_column("__pa_n") - 1).sum())
            self.keep("duplicate-keys", dup.sort(UNIT_ID, POS).join(self.nunits, on=UNIT_ID, how="left").select(
                *self.nkeys, self._labels_expr(POS).alias(self.time), pl.col("__pa_n").alias("rows")))
            ex = dup.sort(UNIT_ID, POS).head(self.examples).join(self.nunits, on=UNIT_ID, how="left")
            examples = [
                {**self._keys_of(r), self.time: self._lab(r[POS]),
                 "rows": int(r["__pa_n"])}
                for r in ex.iter_rows(named=True)
            ]
            self.add(
                "duplicate-keys",
                f"{_plural(extra, 'row')} of the new wave {_verb(extra, 'repeats', 'repeat')} a (unit, period) key already used in the "
                "wave; keep one row per key before appending",
                count=extra,
                examples=examples,
            )
        if self.np.missing_keys:
            self.add(
                "missing-keys",
                f"{_plural(self.np.missing_keys, 'row')} of the new wave {_verb(self.np.missing_keys, 'has', 'have')} no unit or no period; they "
                "cannot be appended: fill in their keys or drop them",
                count=self.np.missing_keys,
                examples=self.np.missing_key_examples[: self.examples],
            )
        self._unexpected_periods(base_set)
        return PeriodPlacement(
            base=tuple(self._lab(p) for p in self.base_pos),
            new=tuple(self._lab(p) for p in self.new_pos),
            overlap=tuple(self._lab(p) for p in overlap),
            frequency=self.scale.frequency,
            step=self.step,
            colliding_keys=colliding,
        )

    def _unexpected_periods(self, base_set: set[int]) -> None:
        step, _ = grid_step(self.base_pos)
        if step is None and self.scale.frequency not in ("integer", "datetime"):
            step = 1  # one base period on a calendar scale: the next period is one step on
        self.step = step
        if step is None:
            return
        first, last = self.base_pos[0], self.last_pos
        fresh = [p for p in self.new_pos if p not in base_set]
        later = [p for p in fresh if p > last]
        expected = {last + step * k for k in range(1, len(later) + 1)}
        held = set(self.new_pos)
        problems = []
        for p in fresh:
            if p > last and p in expected:
                continue
            if (p - first) % step != 0:
                why = f"is not on the base grid's step of {step}"
            elif p < first:
                why = "comes before the base's first period"
            elif p < last:
                why = "fills a period missing inside the base grid"
            else:
                # the periods between, counted (never listed: a mistyped 20190101 on a yearly
                # grid would skip twenty million of them)
                between = (p - last) // step - 1
                covered = sum(1 for q in held if last < q < p and (q - last) % step == 0)
                n_skipped = between - covered
                shown = []
                q = last + step
                while q < p and len(shown) < 3:
                    if q not in held:
                        shown.append(str(self._lab(q)))
                    q += step
                if n_skipped <= 0:
                    why = "does not continue the grid"
                elif n_skipped <= 3:
                    why = f"skips {', '.join(shown)}"
                else:
                    why = (f"skips {n_skipped:,} periods ({', '.join(shown)}, ...); "
                           "a mistyped period label is more likely than that many missing waves")
            problems.append({"period": self._lab(p), "reason": why})
        if problems:
            labels = [e["period"] for e in problems]
            self.keep("unexpected-period", pl.DataFrame({"period": [str(e["period"]) for e in problems],
                                                         "reason": [e["reason"] for e in problems]}))
            self.add(
                "unexpected-period",
                f"new period {_labels_text(labels)} does not continue the base grid "
                f"(last {self._lab(last)}, step {step}): {problems[0]['reason']}; check the wave's period "
                "labels before appending",
                count=len(problems),
                examples=problems[: self.examples],
            )

    # -- per column -----------------------------------------------------------------------
    def _columns(self) -> list[ColumnShift]:
        kinds = self._base_kinds()
        tol = self.s.profile.float_tolerance
        # Columns held fixed within units: constant, time-invariant, and nearly-time-invariant
        # ones where few units change (a column that is nearly invariant only because its within
        # share is small still changes for most units, and is checked for jumps instead).
        few = self.s.profile.nearly_invariant_units_share
        changing = getattr(self, "changing_share", {})

        min_units = self.s.compare.invariant_min_units
        twice = getattr(self, "observed_twice", {})

        def fixed(c: str) -> bool:
            k = kinds.get(c)
            if twice.get(c, 0) < min_units:  # too few repeat observations to call it fixed
                return False
            if k in ("constant", "time-invariant"):
                return True
            return k == "nearly-time-invariant" and changing.get(c, 0.0) <= few

        inv = [c for c in self.compared if fixed(c)]
        jump = [
            c for c in self.numeric
            if kinds.get(c) == "time-varying" or (kinds.get(c) == "nearly-time-invariant" and c not in inv)
        ]
        jump_info = self._consistency(inv, jump, tol, kinds)
        for c in [c for c in self.compared if kinds.get(c) == "period-only"]:
            jump_info[c] = self._period_only(c, tol)
        cat_info = self._categories(kinds)
        self._samples = self._numeric_samples(jump_info)
        out = []
        for j, c in enumerate(self.compared):
            out.append(self._distribution(j, c, kinds.get(c), jump_info.get(c), cat_info.get(c)))
        return out

    def _numeric_samples(self, jump_info: dict[str, WithinCheck]) -> dict[str, tuple[np.ndarray, np.ndarray, float]]:
        """Per numeric column: the reference sample and the new wave's (less the base's step
        for a stepped column), sorted, and their stability index; one column per thread."""
        bins = self.s.compare.psi_bins
        smoothing = self.s.compare.psi_smoothing
        new_values = []
        for c in self.numeric:
            values = pl.col(c)
            within = jump_info.get(c)
            step = within.expected_step if isinstance(within, JumpCheck) else None
            if step is not None:
                # like with like: the new wave less the base's step times the periods since the reference
                values = values - step * self._periods_between(pl.col(POS), pl.lit(self.last_pos))
            new_values.append(values.alias(c))
        shifted = self.N.select(new_values) if new_values else None

        def prepare(c: str) -> tuple[np.ndarray, np.ndarray, float]:
            a = np.sort(self.ref.get_column(c).drop_nulls().to_numpy().astype(float, copy=False))
            b = np.sort(shifted.get_column(c).drop_nulls().to_numpy().astype(float, copy=False))
            return a, b, numeric_psi(a, b, bins=bins, smoothing=smoothing, assume_sorted=True)

        from concurrent.futures import ThreadPoolExecutor

        from auditor.stats.moments import workers

        with ThreadPoolExecutor(max_workers=workers()) as pool:  # numpy's sorts release the GIL
            return dict(zip(self.numeric, pool.map(prepare, self.numeric), strict=True))

    def _base_kinds(self) -> dict[str, str]:
        cols = getattr(self.prof, "columns", None)
        if not isinstance(cols, pl.DataFrame) or "name" not in cols.columns or "kind" not in cols.columns:
            return {}
        self.base_distinct = (
            dict(zip(cols["name"].to_list(), cols["distinct"].to_list(), strict=True))
            if "distinct" in cols.columns
            else {}
        )
        if {"units_changing", "units_observed_twice"} <= set(cols.columns):
            self.observed_twice = {
                r["name"]: r["units_observed_twice"] or 0
                for r in cols.select("name", "units_observed_twice").iter_rows(named=True)
            }
            self.units_changing = {
                r["name"]: r["units_changing"] or 0
                for r in cols.select("name", "units_changing").iter_rows(named=True)
            }
            self.changing_share = {
                r["name"]: (r["units_changing"] or 0) / r["units_observed_twice"] if r["units_observed_twice"] else 0.0
                for r in cols.select("name", "units_changing", "units_observed_twice").iter_rows(named=True)
            }
        return dict(zip(cols["name"].to_list(), cols["kind"].to_list(), strict=True))

    def _periods_between(self, later: pl.Expr, earlier: pl.Expr) -> pl.Expr:
        """Grid steps between two positions on the shared scale (the base grid's step)."""
        return (later - earlier) / float(self.step or 1)

    def _consistency(
        self, inv: list[str], jump: list[str], tol: float, kinds: dict[str, str]
    ) -> dict[str, WithinCheck]:
        """invariant-changed and implausible-jump findings; the expected change and its scale by column."""
        cols = [*inv, *jump]
        if not cols:
            return {}
        learned = self._learn_changes(jump, tol) if jump else {}
        n_units = self.bunits.height
        base_last = pl.DataFrame({UNIT_ID: pl.Series(UNIT_ID, np.arange(n_units), dtype=pl.UInt32)}).with_columns(
            [pl.Series(name, arr).fill_nan(None)
             for c in jump for name, arr in ((c, learned[c].pop("__last")), (f"{c}\x00bpos", learned[c].pop("__bpos")))]
        )
        narrow = self.B.select(UNIT_ID, POS, *inv).sort(UNIT_ID, POS) if inv else self.B.head(0)
        if inv:
            fixed = narrow.group_by(UNIT_ID).agg([pl.col(c).drop_nulls().last().alias(c) for c in inv])
            base_last = base_last.join(fixed.with_columns(pl.col(UNIT_ID).cast(pl.UInt32)), on=UNIT_ID, how="left")
        new_first = (
            self.N.filter(pl.col(BASE_UNIT).is_not_null())
            .select(BASE_UNIT, POS, *cols)
            .sort(BASE_UNIT, POS)
            .group_by(BASE_UNIT)
            .agg(
                [pl.col(c).drop_nulls().first().alias(c) for c in cols]
                + [pl.col(POS).filter(pl.col(c).is_not_null()).first().alias(f"{c}\x00npos") for c in jump]
            )
        )
        both = new_first.with_columns(pl.col(BASE_UNIT).cast(pl.UInt32)).join(
            base_last.rename({c: f"{c}\x00base" for c in cols}), left_on=BASE_UNIT, right_on=UNIT_ID, how="inner"
        ).join(self.bunits.rename({UNIT_ID: BASE_UNIT}), on=BASE_UNIT, how="left")
        info: dict[str, WithinCheck] = {}
        # Invariant columns: a returning unit changes when its first new value is none of the
        # values it ever reported in the base (so a one-season typo in the base is not
        # held against a correct new value).
        for c in inv:
            a, b = pl.col(f"{c}\x00base"), pl.col(c)
            if c in self.numeric:
                differs = (b - a).abs() > tol * (1 + a.abs())
            else:
                differs = a != b
            # candidates differ from their last base value; only they need all their base values
            cand = both.select(BASE_UNIT, *self.nkeys, c, f"{c}\x00base").filter(
                b.is_not_null() & a.is_not_null() & differs
            )
            pairs = (
                narrow.filter(pl.col(UNIT_ID).is_in(cand.get_column(BASE_UNIT).implode()))
                .select(UNIT_ID, pl.col(c).alias("__pa_b"))
                .drop_nulls()
                .unique()
            )
            matched = cand.join(pairs, left_on=BASE_UNIT, right_on=UNIT_ID, how="inner")
            if c in self.numeric:
                same = (pl.col(c) - pl.col("__pa_b")).abs() <= tol * (1 + pl.col("__pa_b").abs())
            else:
                same = pl.col(c) == pl.col("__pa_b")
            seen = matched.filter(same).select(BASE_UNIT).unique()
            # units with base values for c, none of them equal to the new one
            has_base = matched.select(BASE_UNIT).unique()
            changed = (
                cand.join(has_base, on=BASE_UNIT, how="semi")
                .join(seen, on=BASE_UNIT, how="anti")
                .sort(self.nkeys)
            )
            n = changed.height
            info[c] = FixedValueCheck(n)
            if not n:
                continue
            self.keep("invariant-changed", changed.select(
                *self.nkeys, pl.lit(c).alias("column"), pl.col(f"{c}\x00base").cast(pl.String).alias("base_value"),
                pl.col(c).cast(pl.String).alias("new_value")))
            examples = [
                {**self._keys_of(r),
                 "base": _json_value(r[f"{c}\x00base"]), "new": _json_value(r[c])}
                for r in changed.head(self.examples).iter_rows(named=True)
            ]
            if kinds.get(c) == "nearly-time-invariant":
                moved = getattr(self, "units_changing", {}).get(c, 0)
                seen_twice = getattr(self, "observed_twice", {}).get(c, 0)
                held = (f"'{c}' is nearly time-invariant in the base (it changes within only "
                        f"{_plural(moved, 'unit')} of the {seen_twice:,} seen twice)")
            else:
                held = f"'{c}' does not change within units in the base"
            self.add(
                "invariant-changed",
                f"{held}, but {_plural(n, 'returning unit')} "
                f"{_verb(n, 'reports', 'report')} a value in the new wave {_verb(n, 'it', 'they')} never reported before; "
                "a fixed-effects model would read these as real changes: confirm them with the source or keep "
                "the base value",
                column=c,
                count=n,
                examples=examples,
            )
        if jump:
            self._jumps(jump, both, learned, info)
        return info

    def _learn_changes(self, jump: list[str], tol: float) -> dict[str, dict[str, Any]]:
        """What the base's own within-unit changes say about each column: a step it moves by a
        period for (nearly) every unit (an age), or the centre and robust scale of its changes
        (:func:`change_scale`); and each unit's last value and its position (``__last``,
        ``__bpos``: arrays by base unit code, NaN where the unit has none). numpy, one
        column per thread."""
        step_share = self.s.compare.step_share
        zero_share = self.s.compare.jump_zero_share
        n_units = self.bunits.height
        # rows in (unit, period) order by one integer sort (numpy's stable sort merges the
        # runs of a file written period by period), then each column's consecutive changes
        units = self.B.get_column(UNIT_ID).to_numpy()
        pos = self.B.get_column(POS).to_numpy()
        order = _unit_period_order(units, pos)
        units, pos = units[order], pos[order]
        same = units[1:] == units[:-1]
        pairs = np.flatnonzero(same)  # row i and i + 1 are one unit's consecutive rows
        after = pairs + 1
        last_rows = np.flatnonzero(np.r_[~same, True]) if units.size else np.zeros(0, dtype=np.intp)
        k = (pos[after] - pos[pairs]) / float(self.step or 1)
        one_step = bool(np.all(k == 1))

        def learn(c: str) -> dict[str, Any]:
            x = self.B.get_column(c).to_numpy().astype(float, copy=False)[order]  # null as NaN
            gaps = np.isnan(x)
            if not gaps.any():  # every row has a value: each unit's last row is its last value
                ends = last_rows
            else:
                valid = np.flatnonzero(~gaps)
                ends = valid[np.r_[units[valid[1:]] != units[valid[:-1]], True]] if valid.size else valid
            last, bpos = np.full(n_units, np.nan), np.full(n_units, np.nan)
            last[units[ends]], bpos[units[ends]] = x[ends], pos[ends]
            out: dict[str, Any] = {"__last": last, "__bpos": bpos}
            changes = x[after] - x[pairs]
            seen = ~np.isnan(changes)
            changes = changes[seen]
            per = changes if one_step else changes[k[seen] > 0] / k[seen][k[seen] > 0]
            if per.size:
                # A step needs step_share of the changes on one value, a block of sorted positions
                # that holds every position from (1 - share) n to share n - 1 wherever it starts:
                # quantiles just inside those (one partition, with the median) disagree otherwise.
                inner = min(0.5, 1 - step_share + 0.01) if per.size >= 200 else 0.5
                lo, m, hi = np.quantile(per, [inner, 0.5, 1 - inner])
                if m != 0 and hi - lo <= 2 * tol * (1 + abs(m)):
                    if np.mean(np.abs(per - m) <= tol * (1 + abs(m))) >= step_share:
                        return {**out, "change_median": _num(m), "change_scale": _num(abs(m)),
                                "change_scale_method": "step", "expected_step": _num(m), "__step": float(m)}
            centre, scale, method = change_scale(changes, zero_share=zero_share)
            return {**out, "change_median": _num(centre), "change_scale": _num(scale),
                    "change_scale_method": method, "__centre": centre, "__scale": scale}

        from concurrent.futures import ThreadPoolExecutor

        from auditor.stats.moments import workers

        with ThreadPoolExecutor(max_workers=workers()) as pool:  # numpy releases the GIL in these loops
            return dict(zip(jump, pool.map(learn, jump), strict=True))

    def _jumps(
        self, jump: list[str], both: pl.DataFrame, learned: dict[str, dict[str, Any]], info: dict[str, WithinCheck]
    ) -> None:
        """implausible-jump: each returning unit's change across the boundary against what the
        base's own within-unit changes say (:meth:`_learn_changes`): a stepped column is judged
        in steps away from the expected change, the others in robust deviations."""
        cut = self.s.compare.jump_mads
        step_cut = self.s.compare.jump_steps
        zs = []
        for c in jump:
            entry = learned[c]
            new_change = pl.col(c) - pl.col(f"{c}\x00base")
            step = entry.pop("__step", None)
            centre, scale = entry.pop("__centre", None), entry.pop("__scale", None)
            if step is not None:
                # the change expected across the boundary is the step times the periods between
                expected = step * self._periods_between(pl.col(f"{c}\x00npos"), pl.col(f"{c}\x00bpos"))
                zs.append(((new_change - expected).abs() / abs(step) * (cut / step_cut)).alias(f"{c}\x00z"))
            elif not scale:
                zs.append(pl.lit(None, dtype=pl.Float64).alias(f"{c}\x00z"))
            else:
                z = (new_change - centre).abs() / scale
                if entry["change_scale_method"].startswith("non-zero"):
                    z = pl.when(new_change == 0).then(0.0).otherwise(z)
                zs.append(z.alias(f"{c}\x00z"))
        zed = both.with_columns(zs)
        for c in jump:
            hit = zed.filter(pl.col(f"{c}\x00z") > cut)
            entry = learned[c]
            found = JumpCheck(change_median=entry["change_median"], change_scale=entry["change_scale"],
                              change_scale_method=entry["change_scale_method"],
                              expected_step=entry.get("expected_step"), implausible_jumps=hit.height)
            info[c] = found
            if not hit.height:
                continue
            self.keep("implausible-jump", hit.sort(self.nkeys).select(
                *self.nkeys, pl.lit(c).alias("column"),
                self._labels_expr(f"{c}\x00bpos").alias("base_period"),
                pl.col(f"{c}\x00base").cast(pl.String).alias("base_value"),
                self._labels_expr(f"{c}\x00npos").alias("new_period"),
                pl.col(c).cast(pl.String).alias("new_value"),
                pl.col(f"{c}\x00z").round(3).alias("distance")))
            stepped = found.expected_step is not None
            ex = hit.sort(f"{c}\x00z", descending=True).head(self.examples)
            examples = []
            for r in ex.iter_rows(named=True):
                e = {**self._keys_of(r), "base": _json_value(r[f"{c}\x00base"]), "new": _json_value(r[c])}
                if stepped:
                    e["steps_off"] = round(float(r[f"{c}\x00z"]) * step_cut / cut, 2)
                else:
                    e["robust_z"] = round(float(r[f"{c}\x00z"]), 2)
                examples.append(e)
            if stepped:
                why = (f"by more than {step_cut:g} steps away from the base's own change of "
                       f"{found.expected_step:+g} a period")
            else:
                why = (f"by more than {cut:g} robust deviations of the base's own period-to-period changes "
                       f"(scale: {found.change_scale_method})")
            self.add(
                "implausible-jump",
                f"'{c}' jumps for {_plural(hit.height, 'returning unit')} {why}; check for a unit or entry "
                "error (a missed decimal, another measure) before appending",
                column=c,
                count=hit.height,
                examples=examples,
            )

    def _period_only(self, c: str, tol: float) -> SharedValueCheck:
        """A column all units share within each base period (a price, a national index) must
        again hold one value per period in the new wave: period-value-differs otherwise."""
        v = pl.col(c)
        if c in self.numeric:
            differs = (v.max() - v.min()) > tol * (1 + v.mean().abs())
        else:
            differs = v.drop_nulls().n_unique() > 1
        per = (
            self.N.group_by(POS)
            .agg(differs.fill_null(False).alias("__pa_d"), v.drop_nulls().n_unique().alias("__pa_n"),
                 v.min().alias("__pa_lo"), v.max().alias("__pa_hi"))
            .filter(pl.col("__pa_d"))
            .sort(POS)
        )
        if per.height:
            first = per.row(0, named=True)
            self.add(
                "period-value-differs",
                f"'{c}' holds one value for every unit in each base period, but in "
                f"{_plural(per.height, 'period')} of the new wave units hold different values "
                f"({first['__pa_n']} values in {self._lab(first[POS])}, {_json_value(first['__pa_lo'])} to "
                f"{_json_value(first['__pa_hi'])}); a period effect absorbs it only if every unit shares it: "
                "check the wave's values",
                column=c,
                count=per.height,
                examples=[
                    {"period": self._lab(r[POS]), "values": int(r["__pa_n"]),
                     "lowest": _json_value(r["__pa_lo"]), "highest": _json_value(r["__pa_hi"])}
                    for r in per.head(self.examples).iter_rows(named=True)
                ],
            )
        return SharedValueCheck(per.height)

    def _categories(self, kinds: dict[str, str]) -> dict[str, LevelCheck]:
        max_levels = self.s.compare.category_max_levels
        min_expected = self.s.compare.vanished_min_expected
        distinct = getattr(self, "base_distinct", {})
        info: dict[str, LevelCheck] = {}
        n_new = self.N.height
        for c in self.levels:
            nb = distinct.get(c)
            base_levels = self.B.select(pl.col(c).drop_nulls().unique()).to_series()
            if nb is None:
                nb = base_levels.len()
            if nb > max_levels:
                info[c] = LevelCheck(checked=False)
                continue
            new_counts = self._level_counts("new", c)
            fresh = new_counts.filter(~pl.col(c).is_in(base_levels.implode())).sort("n", c, descending=[True, False])
            ref_counts = self._level_counts("ref", c)
            ref_total = max(int(ref_counts.get_column("n").sum()), 1)
            gone = (
                ref_counts.filter(~pl.col(c).is_in(new_counts.get_column(c).implode()))
                .with_columns((pl.col("n") / ref_total * n_new).alias("expected"))
                .filter(pl.col("expected") >= min_expected)
                .sort("n", c, descending=[True, False])
            )
            info[c] = LevelCheck(checked=True, new_levels=fresh.height, vanished_levels=gone.height)
            if fresh.height:
                rows = int(fresh.get_column("n").sum())
                self.keep("new-categories", fresh.select(pl.lit(c).alias("column"), pl.col(c).cast(pl.String)
                                                          .alias("level"), pl.col("n").alias("rows")))
                self.add(
                    "new-categories",
                    f"'{c}' has {_plural(fresh.height, 'level')} never seen in the base "
                    f"({short_list(fresh.get_column(c).head(6).to_list(), 6)}; {_plural(rows, 'row')}); "
                    "map them to the base's code list or document the new codes before appending",
                    column=c,
                    count=fresh.height,
                    examples=[{"level": r[c], "rows": int(r["n"])} for r in fresh.head(self.examples).iter_rows(named=True)],
                )
            if gone.height:
                self.add(
                    "vanished-categories",
                    f"'{c}' has {_plural(gone.height, 'level')} of base period {self._lab(self.last_pos)} that no "
                    f"row of the new wave uses ({short_list(gone.get_column(c).head(6).to_list(), 6)}); check "
                    "whether the code list was changed or merged",
                    column=c,
                    count=gone.height,
                    examples=[
                        {"level": r[c], "rows_in_reference": int(r["n"]), "expected_new_rows": round(float(r["expected"]), 1)}
                        for r in gone.head(self.examples).iter_rows(named=True)
                    ],
                )
        return info

    def _distribution(
        self, j: int, c: str, kind: str | None, within: WithinCheck | None, levels: LevelCheck | None
    ) -> ColumnShift:
        smoothing = self.s.compare.psi_smoothing
        miss = f"__pa_miss_{j}"
        ref_rows, new_rows = self.ref.height, self.N.height
        mb = float(self.ref.get_column(miss).mean()) if ref_rows else math.nan
        mn = float(self.N.get_column(miss).mean()) if new_rows else math.nan
        ks_stat = ks_p = math.nan
        ks_method = ""
        if c in self.numeric:
            a, b, psi = self._samples[c]
            kind_cmp = "numeric"
            ks_stat, ks_p, ks_method = ks_two_sample(a, b)
            nb, nn = a.size, b.size
        else:
            bc, nc = self._level_counts("ref", c), self._level_counts("new", c)
            bd = dict(zip(bc[c].to_list(), bc["n"].to_list(), strict=True))
            nd = dict(zip(nc[c].to_list(), nc["n"].to_list(), strict=True))
            max_levels = self.s.compare.category_max_levels
            if len(bd) > max_levels:
                psi = math.nan
            else:
                psi = level_psi(bd, nd, smoothing=smoothing)
            kind_cmp = "levels"
            nb, nn = sum(bd.values()), sum(nd.values())
        ref = f"base period {self._lab(self.last_pos)}"
        cut = self.s.compare.psi_shift
        # A period-only column changes with the period by definition: its shift is no alarm
        # (period-value-differs judges it); a stepped column was compared less its step.
        if math.isfinite(psi) and psi > cut and kind != "period-only":
            self.add(
                "distribution-shift",
                f"the distribution of '{c}' in the new wave differs from {ref} (stability index "
                f"{psi:.2f} > {cut:g}); check for a changed question, unit of measure or coding before "
                "appending",
                column=c,
                count=nn,
            )
        jump_amount = self.s.compare.missing_jump
        if math.isfinite(mb) and math.isfinite(mn) and mn - mb > jump_amount:
            self.add(
                "missing-jump",
                f"'{c}' is missing in {mn:.1%} of the new wave's rows against {mb:.1%} in {ref}; find out "
                "why (a skipped question, a broken export) before appending",
                column=c,
                count=int(round(mn * new_rows)),
            )
        return ColumnShift(
            column=c,
            compared_as=kind_cmp,
            base_kind=kind,
            reference=ref,
            n_base=int(nb),
            n_new=int(nn),
            ks_statistic=_num(ks_stat),
            ks_p=significant(ks_p),
            ks_p_method=ks_method or None,
            psi=_num(psi),
            missing_base=_num(mb),
            missing_new=_num(mn),
            within=within,
            levels=levels,
        )

    # -- merged ---------------------------------------------------------------------------
    def _merged_profile(self) -> tuple[tuple[Finding, ...], dict[str, Any] | None]:
        prof = _profile_panel(self.appended(), self.s)
        marked = tuple(
            dataclasses.replace(f, message=f"base + new: {f.message}") for f in getattr(prof, "findings", ())
        )
        panel = getattr(prof, "panel", None)
        return marked, (dict(panel) if isinstance(panel, dict) else None)

    def appended(self) -> Panel:
        """The panel as it would be after appending the wave: base + new rows, loaded once."""
        if self._appended is None:
            self._appended = appended_panel(self.bp, self.np, self.s)
        return self._appended


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
        elif _is_numeric(bs[c]) and _is_numeric(ns[c]):
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
