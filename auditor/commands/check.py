"""`panel-audit check`: a panel against its contract, and across the boundary with the waves so far.

The rules themselves are judged in auditor.contracts.rules (within the panel) and
auditor.contracts.boundary (across waves); this command reads the contract and the
panel, runs both and gathers the result.
"""

from __future__ import annotations

import time as _time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from auditor.checks.contract import read_contract
from auditor.checks.findings import Finding, make
from auditor.contracts.rules import (
    MESSAGE_LIMIT,
    RuleResult,
    contract_keys,
    has_row_rules,
    preload_gx,
    run_contract,
)
from auditor.errors import fail
from auditor.io.load import load_panel


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
    base_source: str | None = None
    examples_shown: int = 5

    def shown(self) -> CheckResult:
        """The result with each rule's and finding's examples cut to the configured number
        (after ``check(..., keep_all=True)`` kept every failure)."""
        import dataclasses

        k = self.examples_shown
        return dataclasses.replace(
            self,
            rules=tuple(dataclasses.replace(r, examples=tuple(r.examples[:k])) for r in self.rules),
            findings=tuple(dataclasses.replace(f, examples=tuple(f.examples[:k])) for f in self.findings),
        )

    @property
    def passed(self) -> bool:
        """True when every rule holds."""
        return all(r.passed for r in self.rules)

    @property
    def failed(self) -> tuple[RuleResult, ...]:
        """The rules that were evaluated and do not hold."""
        return tuple(r for r in self.rules if r.evaluated and not r.passed)

    @property
    def not_evaluated(self) -> tuple[RuleResult, ...]:
        """The rules that could not run on the column's type (each says why)."""
        return tuple(r for r in self.rules if not r.evaluated)

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``check`` JSON document (``against``: the base of the
        cross-wave rules, or null)."""
        from auditor.version import tool_info

        return {
            "tool": tool_info(),
            "passed": self.passed,
            "contract": self.contract,
            "source": self.source,
            "against": self.base_source,
            "summary": {
                "rules": len(self.rules),
                "failed": len(self.failed),
                "not_evaluated": len(self.not_evaluated),
            },
            "rules": [r.to_dict() for r in self.rules],
        }


def check(
    data: Any,
    *,
    rules: str | Path,
    unit: str | list[str] | None = None,
    time: str | None = None,
    against: Any = None,
    keep_all: bool = False,
) -> CheckResult:
    """Run the contract in the file ``rules`` on ``data`` (path(s) or a pandas/polars frame).

    The unit and time keys come from the contract's ``panel`` part, or from
    ``unit``/``time`` when the contract leaves them out. With ``against`` (the
    panel so far: path(s), a folder of waves or a frame) the rules that span
    waves (invariant, monotone, max_change, max_change_per_period, the step and
    keys the base already holds) are also judged across the boundary between the
    two. ``keep_all``: every rule keeps every failing row, unit or period in its
    ``examples`` (for ``--details``; :meth:`CheckResult.shown` cuts them back to the
    configured number). Returns a CheckResult; raises AuditError (exit 2) when the file
    or the data cannot be used.
    """
    clock = _time.perf_counter()
    contract, settings = read_contract(rules)
    shown = settings.check.examples
    if keep_all:
        import dataclasses

        thresholds = {k: dict(v) for k, v in settings.thresholds.items()}
        thresholds["check"]["examples"] = 1 << 62  # every failure, not a few examples
        settings = dataclasses.replace(settings, thresholds=thresholds)
    if contract.is_empty:
        raise fail("contract-empty", path=rules)
    units, time_key = contract_keys(contract, rules, unit, time)
    if against is not None and not hasattr(against, "columns"):  # a base that cannot be read: before any work
        from auditor.io.sources import resolve_inputs

        for path in resolve_inputs(against):
            if not path.exists():
                raise fail("file-not-found", path=path)
    if has_row_rules(contract):
        preload_gx()  # beside loading the panel and the polars rules, which release the GIL
    from auditor import progress

    with progress.step("reading the panel"):
        panel = load_panel(data, units, time_key, settings=settings)
    timings = {"load": _time.perf_counter() - clock}
    token = MESSAGE_LIMIT.set(shown if keep_all else None)
    try:
        with progress.step(f"{len(contract.columns)} columns' rules on {panel.rows:,} rows"):
            results = run_contract(contract, panel, settings, timings=timings)
    finally:
        MESSAGE_LIMIT.reset(token)
    base_source = None
    if against is not None:
        from auditor.contracts.boundary import across_waves

        clock = _time.perf_counter()
        with progress.step("the rules across waves"):
            crossing, base_source = across_waves(contract, panel, against, settings)
        results = (*results, *crossing)
        timings["across_waves"] = _time.perf_counter() - clock
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
        base_source=base_source,
        examples_shown=shown,
    )
