"""Terminal rendering of a contract check.

Layout (the project's own): one verdict line, then the broken rules, each with
where it applies, how many rows/units/periods break it, what was found and up
to two located examples; then the holding rules folded into one line per
subject (the panel, or a column).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from auditor.report.text import clip, paint, safe, wrap

if TYPE_CHECKING:  # pragma: no cover
    from auditor.rules import CheckResult, RuleResult


def _subject(r: RuleResult) -> str:
    return "(panel)" if r.column is None else r.column


def _example_text(example: dict[str, Any]) -> str:
    return ", ".join(f"{safe(k)}={safe(v)}" for k, v in example.items())


def render(
    result: CheckResult, width: int = 100, colour: bool = False, *, color: bool | None = None
) -> str:
    """The check result as terminal text, at most ``width`` characters a line.

    ``colour`` (or its spelling ``color``) turns ANSI styles on.
    """
    color = colour if color is None else color
    width = max(60, width)
    broken = result.failed
    total = len(result.rules)
    lines: list[str] = []
    verdict = (
        paint("contract holds", "bold", color)
        if not broken
        else paint(f"contract broken: {len(broken)} of {total} rules fail", "error", color)
    )
    lines.append(f"{verdict}  ({total - len(broken)} of {total} rules hold)")
    lines.append(clip(f"  rules: {safe(result.contract)}", width))
    lines.append(clip(f"  data:  {safe(result.source)}", width))
    if broken:
        lines.append("")
        lines.append(paint("Broken", "bold", color))
        subj_w = min(24, max(len(safe(_subject(r))) for r in broken))
        rule_w = max(len(safe(r.rule)) for r in broken)
        for r in broken:
            head = f"  {clip(safe(_subject(r)), subj_w):<{subj_w}}  {safe(r.rule):<{rule_w}}  {r.failing:>8}  "
            body = wrap(safe(r.message), width - len(head), 0)
            lines.append(head + body[0])
            lines.extend(" " * len(head) + b for b in body[1:])
            for ex in r.examples[:2]:
                at = clip("at " + _example_text(ex), width - 6)
                lines.append("      " + paint(at, "dim", color))
    holding: dict[str, list[str]] = {}
    for r in result.rules:
        if r.passed:
            holding.setdefault(_subject(r), []).append(r.rule)
    if holding:
        lines.append("")
        lines.append(paint("Holding", "bold", color))
        for subject, names in holding.items():
            text = f"  {safe(subject)}: " + ", ".join(safe(n) for n in names)
            lines.extend(wrap(text, width, 4))
    return "\n".join(lines) + "\n"
