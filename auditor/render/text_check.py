"""Terminal rendering of a contract check.

Layout (the project's own): one verdict line, then the broken rules, each with
where it applies, how many rows/units/periods break it, what was found and up
to two located examples; the rules that could not run on the column's type, with
why; then the holding rules folded into one line per subject (the panel, or a
column). Rules judged across the boundary with the panel so far (``--against``)
carry "across waves" after their name.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from auditor.render.text import paint, safe, terminal_width, wrap

if TYPE_CHECKING:  # pragma: no cover
    from auditor.commands.check import CheckResult
    from auditor.contracts.rules import RuleResult


def _subject(r: RuleResult) -> str:
    return "(panel)" if r.column is None else r.column


def _name(r: RuleResult) -> str:
    return f"{r.rule} (across waves)" if r.across_waves else r.rule


def _example_text(example: dict[str, Any]) -> str:
    return ", ".join(f"{safe(k)}={safe(v)}" for k, v in example.items())


def render(result: CheckResult, *, width: int | None = None, colour: bool = False,
           show: str | None = None) -> str:
    """The check result as terminal text, at most ``width`` characters a line (the
    terminal's when None, at least 60); ``colour`` turns ANSI styles on; ``show`` is
    accepted for the common signature (a contract's rules are all listed)."""
    color = colour
    width = max(60, width or terminal_width())
    broken = result.failed
    skipped = result.not_evaluated
    total = len(result.rules)
    holding = total - len(broken) - len(skipped)
    lines: list[str] = []
    if not broken and not skipped:
        verdict = paint("contract holds", "bold", color)
    else:
        what = f"{len(broken)} of {total} rules fail" if broken else "no rule fails"
        verdict = paint(f"contract broken: {what}", "error", color)
    tail = f", {len(skipped)} not evaluated" if skipped else ""
    lines.append(f"{verdict}  ({holding} of {total} rules hold{tail})")
    lines += wrap(f"  rules: {safe(result.contract)}", width, 9)
    lines += wrap(f"  data:  {safe(result.source)}", width, 9)
    if result.base_source:
        lines += wrap(f"  base:  {safe(result.base_source)} (rules across waves)", width, 9)
    shown = [("Broken", broken), ("Not evaluated", skipped)]
    for title, group in shown:
        if not group:
            continue
        lines.append("")
        lines.append(paint(title, "bold", color))
        subj_w = max(len(safe(_subject(r))) for r in group)
        rule_w = max(len(safe(_name(r))) for r in group)
        for r in group:
            count = "-" if r.failing is None else str(r.failing)
            head = f"  {safe(_subject(r)):<{subj_w}}  {safe(_name(r)):<{rule_w}}  {count:>8}  "
            body = wrap(safe(r.message), width - len(head), 0)
            lines.append(head + body[0])
            lines.extend(" " * len(head) + b for b in body[1:])
            for ex in r.examples[:2]:
                for part in wrap("at " + _example_text(ex), width - 6, 3):
                    lines.append("      " + paint(part, "dim", color))
    folded: dict[str, list[str]] = {}
    for r in result.rules:
        if r.passed:
            folded.setdefault(_subject(r), []).append(_name(r))
    if folded:
        lines.append("")
        lines.append(paint("Holding", "bold", color))
        for subject, names in folded.items():
            text = f"  {safe(subject)}: " + ", ".join(safe(n) for n in names)
            lines.extend(wrap(text, width, 4))
    return "\n".join(lines) + "\n"
