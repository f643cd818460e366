"""Terminal rendering of ``panel-audit explain``: every code on one line, or one code in full."""

from __future__ import annotations

from auditor.render.text import wrap


def render_all(width: int = 100) -> str:
    """Every finding code, one a line: the code, its default severity and command, what it looks for."""
    from auditor.checks.findings import CHECKS

    w = max(len(c) for c in CHECKS)
    lines = []
    for code, spec in CHECKS.items():
        head = f"{code:<{w}}  {spec.severity:<7}  {spec.command:<11}  "
        body = wrap(spec.about, max(30, width - len(head)), 0)
        lines.append(head + body[0])
        lines += [" " * len(head) + b for b in body[1:]]
    lines.append("")
    lines.append("panel-audit explain CODE says what a code means, what its count counts and what to do.")
    return "\n".join(lines) + "\n"


def render_one(code: str, width: int = 100) -> str:
    """One code: what it means, what its count counts, why it matters, what to do."""
    from auditor.checks.explain import check_or_fail
    from auditor.checks.findings import CHECKS

    e = check_or_fail(code)
    spec = CHECKS.get(code)
    lines = [f"{code}" + (f" ({spec.severity} by default, from {spec.command})" if spec else "")]
    for label, text in (("what it means", e.meaning), ("count", e.count), ("why it matters", e.why),
                        ("what to do", e.action)):
        lines.append("")
        lines.append(f"  {label}")
        lines += ["    " + part for part in wrap(text, width - 4, 0)]
    return "\n".join(lines) + "\n"
