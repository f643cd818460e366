"""The profile: structure, variation and findings of one panel (``auditor.commands.profile``)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import polars as pl

from auditor.checks.config import Settings, load_settings
from auditor.checks.findings import Finding, sort_findings
from auditor.io.load import Panel, load_panel
from auditor.stats.moments import Passes
from auditor.stats.structure import compute_structure, structure_findings
from auditor.stats.variation import compute_variation, run_passes, variation_findings
from auditor.version import tool_info


@dataclass(frozen=True)
class ProfileDetails:
    """Tables behind the profile, for figures and later stages.

    ``patterns``: ``periods`` (list of period indices), ``label``, ``units``, most
    common first (every pattern). ``obs_per_unit``: ``t_i``, ``units``.
    ``missing_by_period``: ``column``, ``period`` (label as text), ``missing_share``.
    ``per_unit``: one row per unit code (rows, periods_seen, first, last, gap_periods).
    ``absorbed_basis``: the rows and units ``absorbed_by_time`` was computed on.
    """

    patterns: pl.DataFrame
    obs_per_unit: pl.DataFrame
    missing_by_period: pl.DataFrame
    per_unit: pl.DataFrame
    absorbed_basis: dict[str, Any]


@dataclass(frozen=True)
class ProfileResult:
    """A panel's profile: ``panel`` (contract dict), ``columns`` (polars), ``findings``."""

    panel: dict[str, Any]
    columns: pl.DataFrame
    findings: tuple[Finding, ...]
    data: Panel
    settings: Settings
    details: ProfileDetails

    def to_dict(self) -> dict[str, Any]:
        """The contract's JSON document (non-finite numbers as null)."""
        from auditor.vocab import clean

        return clean(
            {
                "tool": tool_info(),
                "source": self.data.source,
                "panel": self.panel,
                "columns": self.columns.to_dicts(),
                "absorbed_basis": self.details.absorbed_basis,
                "findings": [f.to_dict() for f in self.findings],
            }
        )

    def _repr_html_(self) -> str:  # pragma: no cover - exercised in notebooks and report tests
        from auditor.render.html import profile_fragment

        return profile_fragment(self)


def profile(
    data: Any,
    *,
    unit: str | Sequence[str],
    time: str,
    rules: str | Path | None = None,
    settings: Settings | None = None,
    streaming: bool | None = None,
    engine: str = "auto",
    scheduler: str | None = None,
) -> ProfileResult:
    """Profile ``data`` (a path, paths, or a pandas/polars frame) keyed by ``unit`` and ``time``.

    ``rules`` is a rules file overriding the shipped thresholds (or pass ``settings``).
    ``engine``: ``auto`` (memory or streaming by the input's size), ``memory``,
    ``streaming`` or ``dask`` (Parquet input on a dask cluster: the one at ``scheduler``,
    or a local one started for the run); ``streaming`` True / False is the older
    shorthand for the streaming and memory engines. Raises AuditError for input that
    cannot be used.
    """
    from auditor import progress
    from auditor.stats.engines import resolve_engine

    if settings is None:
        settings = load_settings(rules)
    name = resolve_engine(engine, streaming, scheduler)
    if name == "dask":
        from auditor.stats.cluster import profile_passes

        run = profile_passes(data, unit, time, settings, scheduler)
        return profile_panel(run.panel, settings, run.passes)
    with progress.step("reading the panel"):
        panel = load_panel(data, unit, time, streaming={"memory": False, "streaming": True}.get(name), settings=settings)
    return profile_panel(panel, settings)


def profile_panel(panel: Panel, settings: Settings, passes: Passes | None = None) -> ProfileResult:
    """The profile of an already loaded panel (``passes``: its statistics, when an engine
    computed them already)."""
    from auditor import progress

    if passes is None:
        with progress.step(f"grouped pass over {panel.rows:,} rows"):
            passes = run_passes(panel, settings)
    with progress.step("structure and variation"):
        s = compute_structure(panel, settings, passes.per_unit, passes.duplicate_cells)
        v = compute_variation(panel, settings, passes)
    findings = [*panel.load_findings, *structure_findings(panel, s, settings), *variation_findings(panel, v, settings)]
    from auditor.render.details import example_runs

    return example_runs(ProfileResult(
        panel=s.summary,
        columns=v.columns,
        findings=sort_findings(findings),
        data=panel,
        settings=settings,
        details=ProfileDetails(
            patterns=s.patterns,
            obs_per_unit=s.obs_per_unit,
            missing_by_period=v.missing_by_period,
            per_unit=s.per_unit,
            absorbed_basis=v.absorbed_basis,
        ),
    ))
