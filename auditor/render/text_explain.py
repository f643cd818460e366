"""Terminal rendering of ``panel-audit explain``: every code on one line, or one code in full."""

from __future__ import annotations

from auditor.render.text import terminal_width, wrap


def render(code: str | None = None, *, width: int | None = None, colour: bool = False,
           show: str | None = None) -> str:
    """Every finding code on one line each (``code`` None), or one code in full; the
    common text-renderer signature (``colour`` and ``show`` change nothing here)."""
    width = width or terminal_width()
    return _one(code, width) if code else _all(width)


def _all(width: int) -> str:
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


def _one(code: str, width: int) -> str:
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
