"""The thresholds as typed values, one frozen dataclass per section of ``rules/defaults.yaml``.

A rules file is validated key by key against the shipped defaults (auditor.checks.config);
the merged mapping is then read once into these values, so code reads
``settings.profile.few_switchers`` (an ``int``) instead of looking a string up in a dict
and casting. Each class lists exactly the keys of its section, in the file's order
(tests/test_settings_sections.py checks the classes against the file), and
:func:`read_section` refuses a mapping with a key missing or one too many.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any, TypeVar, get_type_hints


@dataclass(frozen=True)
class ProfileThresholds:
    """``profile``: the cut-offs of the profile's checks (see rules/defaults.yaml)."""

    float_tolerance: float
    nearly_invariant_units_share: float
    nearly_invariant_within_share: float
    near_constant_share: float
    few_switchers: int
    absorbed_r2: float
    absorbed_max_rows: int
    high_missing_share: float
    examples: int
    patterns: int
    streaming_memory_share: float


@dataclass(frozen=True)
class InstrumentsThresholds:
    """``instruments``: model readiness (tests' levels, strength lines, rank tolerance, limits)."""

    stock_yogo_size: int
    rule_of_thumb_f: float
    lee_f: float
    mundlak_alpha: float
    test_alpha: float
    weak_within_share: float
    collinear_tol: float
    near_collinear_r2: float
    max_levels: int
    anderson_rubin_level: float
    richer_max_instruments: int
    exhaustive_candidates: int
    examples: int


@dataclass(frozen=True)
class CompareThresholds:
    """``compare``: a new wave against the panel so far (shift, jumps, levels)."""

    psi_shift: float
    psi_bins: int
    psi_smoothing: float
    missing_jump: float
    jump_mads: float
    jump_zero_share: float
    step_share: float
    jump_steps: float
    category_max_levels: int
    invariant_min_units: int
    vanished_min_expected: float


@dataclass(frozen=True)
class ReportThresholds:
    """``report``: how much of each table and figure the HTML page shows."""

    findings: int
    columns: int
    pattern_rows: int
    figure_columns: int
    periods_table: int
    shift_columns: int
    quantiles: int
    max_bytes: int


@dataclass(frozen=True)
class CheckThresholds:
    """``check``: examples kept per contract rule, and the margins of ``rules draft``."""

    examples: int
    draft_max_levels: int
    draft_missing_margin: float
    draft_attrition_margin: float
    draft_units_slack: float
    draft_range_slack: float
    draft_trend_share: float
    draft_change_slack: float
    draft_level_min_units: int


#: section name in rules/defaults.yaml -> its typed value
SECTIONS: dict[str, type] = {
    "profile": ProfileThresholds,
    "instruments": InstrumentsThresholds,
    "compare": CompareThresholds,
    "report": ReportThresholds,
    "check": CheckThresholds,
}

T = TypeVar("T")


def read_section(cls: type[T], values: dict[str, Any]) -> T:
    """``values`` (one validated section) as ``cls``, each number converted to the field's type.

    Raises ValueError naming the keys when ``values`` lacks one of the class's fields or
    has one the class does not know: the classes and rules/defaults.yaml must agree (a
    programming error, never a user's: user files are checked against the defaults first).
    """
    fields = [f.name for f in dataclasses.fields(cls)]  # type: ignore[arg-type]
    missing = [k for k in fields if k not in values]
    extra = [k for k in values if k not in fields]
    if missing or extra:
        raise ValueError(f"{cls.__name__} and the thresholds disagree: missing {missing}, unknown {extra}")
    hints = get_type_hints(cls)
    return cls(**{k: hints[k](values[k]) for k in fields})
