"""The Finding value and the one list of checks with their default severities.

Checks are plain functions elsewhere (structure.py, variation.py, ...) that turn
computed statistics into Findings; renderers (text, JSON, HTML) show them. No
check knows how it is shown.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any, Protocol

SEVERITIES: tuple[str, ...] = ("error", "warning", "note")
#: the one severity ranking (0 the most serious), for sorting in every renderer
SEVERITY_RANK: dict[str, int] = {name: i for i, name in enumerate(SEVERITIES)}


class SeverityOverrides(Protocol):
    """What :func:`make` needs of the settings (auditor.checks.config.Settings has it):
    the severity a rules file gives a check, or the default."""

    def severity(self, check: str, default: str) -> str:
        """The severity of ``check`` (``default`` when the rules file leaves it)."""
        ...


@dataclass(frozen=True)
class CheckSpec:
    """A check's default severity, the command that runs it and what it looks for."""

    severity: str
    command: str
    about: str


CHECKS: dict[str, CheckSpec] = {
    # --- profile ---------------------------------------------------------------
    "missing-keys": CheckSpec("error", "profile", "rows whose unit or time key is missing"),
    "duplicate-keys": CheckSpec("error", "profile", "rows beyond the first sharing a (unit, time) key"),
    "gaps": CheckSpec("warning", "profile", "units absent in a period inside their own span"),
    "irregular-periods": CheckSpec("warning", "profile", "a whole period missing from the grid"),
    "constant-column": CheckSpec("warning", "profile", "a column with one value everywhere"),
    "nearly-time-invariant": CheckSpec(
        "warning", "profile", "a column that changes for only a few units (often a coding error)"
    ),
    "absorbed-by-time": CheckSpec(
        "warning", "profile", "within variation explained by period effects (age-like columns)"
    ),
    "near-constant": CheckSpec("warning", "profile", "one value holds nearly every row"),
    "few-switchers": CheckSpec("warning", "profile", "a 0/1 column with few units that switch"),
    "missing-in-period": CheckSpec("warning", "profile", "a column entirely missing in a period"),
    "high-missing": CheckSpec("warning", "profile", "a column with a high missing share"),
    "non-finite": CheckSpec("warning", "profile", "infinite values in a numeric column"),
    "unbalanced": CheckSpec("note", "profile", "units observed in different numbers of periods"),
    "singleton-units": CheckSpec("note", "profile", "units observed once"),
    "period-only": CheckSpec("note", "profile", "a column that varies only across periods"),
    "schema-mismatch": CheckSpec("warning", "profile", "wave files whose column types differ"),
    "column-all-missing": CheckSpec("warning", "profile", "a column with no value at all"),
    "files-skipped": CheckSpec("note", "profile", "files in a data folder or glob that are not a data format"),
    "unit-key-twins": CheckSpec(
        "note", "profile", "unit ids that differ only by Unicode form or invisible characters"
    ),
    # --- instruments -----------------------------------------------------------
    "order-condition": CheckSpec(
        "error", "instruments", "fewer exogenous time-varying regressors (X1) than correlated time-invariant ones (Z2)"
    ),
    "weak-instrument": CheckSpec("warning", "instruments", "a Z2 column whose first-stage F is below its critical value"),
    "invalid-instrument": CheckSpec(
        "warning", "instruments", "an X1 mean rejected by its difference-in-Sargan test (else its Mundlak coefficient)"
    ),
    "overidentification-rejected": CheckSpec(
        "warning", "instruments", "the Sargan or within-vs-Hausman-Taylor test rejects the instruments"
    ),
    "not-identified": CheckSpec("warning", "instruments", "a regressor whose coefficient one or more fits cannot identify"),
    "near-collinear": CheckSpec(
        "warning", "instruments", "a regressor almost a linear combination of others in a fit (kept; imprecise)"
    ),
    "correlated-with-effect": CheckSpec(
        "warning", "instruments", "Mundlak evidence that regressors are correlated with the unit effect"
    ),
    "random-effects-rejected": CheckSpec(
        "warning", "instruments", "the Hausman test rejects random effects against within"
    ),
    "hausman-not-positive-definite": CheckSpec(
        "note", "instruments", "a Hausman covariance difference that is not positive definite"
    ),
    "outcome-time-invariant": CheckSpec("error", "instruments", "an outcome that never changes within a unit"),
    "too-few-units": CheckSpec("error", "instruments", "fewer units than unit-level parameters"),
    "correlated-not-declared": CheckSpec(
        "note", "instruments", "no --correlated given: X2 suggested from the data, Z2 must be declared"
    ),
    "nearly-invariant-regressor": CheckSpec(
        "warning", "instruments", "a nearly-time-invariant regressor used as time-varying"
    ),
    "weak-within-variation": CheckSpec(
        "warning", "instruments", "an X2 column with little within variation to instrument itself"
    ),
    "selective-attrition": CheckSpec(
        "warning", "instruments", "the Nijman-Verbeek test relates leaving the panel to the idiosyncratic error"
    ),
    "richer-set-rejected": CheckSpec(
        "warning", "instruments", "the extra restrictions of Amemiya-MaCurdy or Breusch-Mizon-Schmidt are rejected"
    ),
    "richer-sets-skipped": CheckSpec(
        "note", "instruments", "Amemiya-MaCurdy and Breusch-Mizon-Schmidt not computed (too many instruments)"
    ),
    "rows-dropped": CheckSpec("note", "instruments", "rows left out because the outcome or a regressor is missing"),
    "treated-as-invariant": CheckSpec(
        "note", "instruments", "a column replaced by its most common value within each unit"
    ),
    # --- compare ---------------------------------------------------------------
    # (compare also reuses duplicate-keys and missing-keys, for the new wave's own rows)
    "overlapping-periods": CheckSpec(
        "error", "compare", "new-wave (unit, period) keys the base already holds"
    ),
    "type-changed": CheckSpec(
        "warning", "compare", "a column whose type differs between base and new wave (error for a key)"
    ),
    "invariant-changed": CheckSpec(
        "warning", "compare", "returning units whose time-invariant answer differs in the new wave"
    ),
    "implausible-jump": CheckSpec(
        "warning", "compare", "returning units whose change is far outside the base's own within changes"
    ),
    "new-categories": CheckSpec("warning", "compare", "levels of a categorical column never seen in the base"),
    "vanished-categories": CheckSpec(
        "note", "compare", "levels of the base's last period that no new-wave row uses"
    ),
    "distribution-shift": CheckSpec(
        "warning", "compare", "a stability index against the base's last period above the cut-off"
    ),
    "missing-jump": CheckSpec("warning", "compare", "a missing share that rises against the base's last period"),
    "period-value-differs": CheckSpec(
        "warning", "compare", "a column all units share within each base period that units disagree on in the new wave"
    ),
    "column-removed": CheckSpec("warning", "compare", "a base column absent from the new wave"),
    "unexpected-period": CheckSpec("warning", "compare", "a new period that does not continue the base grid"),
    "column-added": CheckSpec("note", "compare", "a column new in the wave"),
    "backfilled-rows": CheckSpec(
        "note", "compare", "new-wave rows in periods the base holds, with keys it does not hold"
    ),
    "returning-after-absence": CheckSpec(
        "note", "compare", "returning units absent from the base's last period"
    ),
    "units-not-returning": CheckSpec("note", "compare", "base units absent from the new wave"),
    # --- check / rules ---------------------------------------------------------
    "rule-failed": CheckSpec("error", "check", "a rule of a panel contract that the data breaks"),
}


@dataclass(frozen=True)
class Finding:
    """One thing the auditor found.

    ``count`` is the number of rows, units, periods or keys concerned (what the
    message says it counts); ``examples`` a few JSON-ready dicts.
    """

    check: str
    severity: str
    message: str
    column: str | None = None
    count: int | None = None
    examples: tuple[Mapping[str, Any], ...] = field(default_factory=tuple)

    def to_dict(self) -> dict[str, Any]:
        """The finding as the contract's JSON object."""
        return {
            "check": self.check,
            "severity": self.severity,
            "column": self.column,
            "count": self.count,
            "message": self.message,
            "examples": [dict(e) for e in self.examples],
        }


def make(
    check: str,
    settings: SeverityOverrides | None,
    message: str,
    *,
    column: str | None = None,
    count: int | None = None,
    examples: Iterable[Mapping[str, Any]] = (),
) -> Finding:
    """Build a Finding for a registered check, with its severity from ``settings`` or the default."""
    spec = CHECKS[check]
    severity = settings.severity(check, spec.severity) if settings is not None else spec.severity
    return Finding(
        check=check,
        severity=severity,
        message=message,
        column=column,
        count=None if count is None else int(count),
        examples=tuple(examples),
    )


def sort_findings(findings: Iterable[Finding]) -> tuple[Finding, ...]:
    """Findings in the contract's order: severity (error first), then check, then column."""
    return tuple(
        sorted(findings, key=lambda f: (SEVERITY_RANK.get(f.severity, 99), f.check, f.column or ""))
    )


def exit_code(findings: Iterable[Finding], fail_on: str) -> int:
    """0 when no finding reaches ``fail_on`` ('error', 'warning' or 'never'), else 1."""
    if fail_on == "never":
        return 0
    limit = SEVERITY_RANK[fail_on]
    return 1 if any(SEVERITY_RANK.get(f.severity, 99) <= limit for f in findings) else 0


def counts_by_severity(findings: Iterable[Finding]) -> dict[str, int]:
    """How many findings of each severity, every severity present as a key."""
    out = dict.fromkeys(SEVERITIES, 0)
    for f in findings:
        out[f.severity] = out.get(f.severity, 0) + 1
    return out
