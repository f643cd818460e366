"""Terminal rendering of the profile, and the helpers every text renderer shares.

Layout (the project's own): a few lines of panel facts, the findings grouped by
severity with counts and examples, then one table of columns (kind, within
share, units changing, missing share). Colour only on a terminal, never when
NO_COLOR is set; data-derived text goes through the one sanitiser
(auditor.report.sanitise), which shows acting characters as ``<U+XXXX>``.
"""

from __future__ import annotations

import os
import shutil
import sys
from collections.abc import Iterable, Sequence
from typing import TYPE_CHECKING, Any

from auditor.findings import SEVERITIES, Finding, counts_by_severity
from auditor.report.sanitise import visible

if TYPE_CHECKING:  # pragma: no cover
    from auditor.profile import ProfileResult

_COLOURS = {"error": "31;1", "warning": "33", "note": "36", "dim": "2", "bold": "1"}


def safe(text: Any) -> str:
    """``text`` as one printable line: controls, format characters and separators
    (newlines too) written ``<U+XXXX>`` by the one sanitiser (auditor.report.sanitise)."""
    return visible(text)


def use_colour(stream: Any = None) -> bool:
    """Colour when writing to a terminal and NO_COLOR is not set."""
    stream = stream if stream is not None else sys.stdout
    if os.environ.get("NO_COLOR") is not None:
        return False
    return bool(getattr(stream, "isatty", lambda: False)())


def terminal_width(default: int = 100) -> int:
    """The terminal's width in columns (``default`` when not a terminal), at least 60."""
    return max(60, shutil.get_terminal_size((default, 24)).columns)


def paint(text: str, style: str, colour: bool) -> str:
    """``text`` wrapped in an ANSI style when ``colour`` is on."""
    return f"\x1b[{_COLOURS[style]}m{text}\x1b[0m" if colour else text


def clip(text: str, width: int) -> str:
    """``text`` cut to ``width`` characters with an ellipsis."""
    return text if len(text) <= width else text[: max(0, width - 1)] + "…"


def wrap(text: str, width: int, indent: int) -> list[str]:
    """``text`` wrapped to ``width`` with a hanging ``indent``."""
    import textwrap

    return textwrap.wrap(text, width=max(20, width), subsequent_indent=" " * indent, break_long_words=True,
                         break_on_hyphens=False) or [""]


def fmt_num(value: Any, digits: int = 3) -> str:
    """A compact number: integers with thousands separators, floats with ``digits`` significant digits."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        if value != value:
            return "-"
        if value == 0:
            return "0"
        if abs(value) >= 1e6 or abs(value) < 1e-3:
            return f"{value:.{digits}g}"
        return f"{value:,.{digits}g}" if abs(value) >= 1000 else f"{value:.{digits}g}"
    return safe(value)


def pct(value: float | None, digits: int = 1) -> str:
    """A share as a percentage, '-' when missing."""
    return "-" if value is None else f"{100 * value:.{digits}f}%"


def table(headers: Sequence[str], rows: Iterable[Sequence[str]], width: int, align: str = "") -> list[str]:
    """A plain table of text cells fitted to ``width`` (the first column is shortened first).

    ``align`` holds one letter per column, ``l`` or ``r`` (default: first left, rest right).
    """
    rows = [[safe(c) for c in r] for r in rows]
    align = align or ("l" + "r" * (len(headers) - 1))
    widths = [len(h) for h in headers]
    for r in rows:
        for i, c in enumerate(r):
            widths[i] = max(widths[i], len(c))
    total = sum(widths) + 2 * (len(widths) - 1) + 2
    if total > width and widths:
        widths[0] = max(8, widths[0] - (total - width))

    def line(cells: Sequence[str]) -> str:
        out = []
        for i, c in enumerate(cells):
            c = clip(c, widths[i])
            out.append(c.ljust(widths[i]) if align[i] == "l" else c.rjust(widths[i]))
        return "  " + "  ".join(out).rstrip()

    return [line(headers), "  " + "  ".join("─" * w for w in widths), *(line(r) for r in rows)]


def example_text(example: dict[str, Any]) -> str:
    """One example as ``key=value key=value``."""
    return " ".join(f"{safe(k)}={safe(v)}" for k, v in example.items())


def findings_block(findings: Sequence[Finding], width: int, colour: bool, examples: int = 2) -> list[str]:
    """Findings by severity: a count line, then one entry each with a few examples."""
    counts = counts_by_severity(findings)
    head = "findings: " + " · ".join(
        paint(f"{counts[s]} {s}{'s' if counts[s] != 1 else ''}", s, colour and counts[s] > 0) for s in SEVERITIES
    )
    lines = [head]
    if not findings:
        lines.append("  nothing to report")
        return lines
    for f in findings:
        tag = paint(f"{f.severity:<7}", f.severity, colour)
        where = f" [{safe(f.column)}]" if f.column else ""
        first = f"  {tag} {f.check}{where}"
        lines.append(first)
        for part in wrap(safe(f.message), width - 12, 0):
            lines.append(" " * 12 + part)
        for ex in f.examples[:examples]:
            lines.append(paint(clip(" " * 12 + "e.g. " + example_text(dict(ex)), width), "dim", colour))
    return lines


def render(result: ProfileResult, width: int | None = None, colour: bool = False) -> str:
    """The profile as terminal text."""
    width = width or terminal_width()
    p = result.panel
    obs = p["obs_per_unit"]
    grid = p["period_values"]
    span = f"{grid[0]} to {grid[-1]}" if grid else "-"
    step = f", step {p['step']}" if p.get("step") is not None else ", irregular steps"
    lines = [
        paint(f"panel-audit profile · {safe(result.data.source)}", "bold", colour),
        f"  units {fmt_num(p['units'])} · periods {p['periods']} ({span}{step}) · rows {fmt_num(p['rows'])}"
        f" · {'balanced' if p['balanced'] else 'unbalanced'} (Ahrens-Pincus {p['unbalancedness']:.3f})",
        f"  rows per unit (duplicates included): {obs['min']} to {obs['max']}, median {fmt_num(obs['median'])}, harmonic mean "
        f"{obs['harmonic_mean']:.2f}",
        f"  keys: {fmt_num(p['duplicate_keys'])} duplicate rows · {fmt_num(p['missing_keys'])} rows missing a key · "
        f"{fmt_num(p['units_with_gaps'])} units with gaps ({fmt_num(p['gap_periods'])} periods) · "
        f"{fmt_num(p['singleton_units'])} seen once",
    ]
    pats = p.get("patterns", [])[:4]
    if pats:
        joined = " · ".join(f"{safe(x['periods'])} ({fmt_num(x['units'])})" for x in pats)
        lines += wrap(f"  participation, most common first: {joined}", width, 4)
    lines.append("")
    lines += findings_block(result.findings, width, colour)
    lines.append("")
    cols = result.columns
    if cols.height:
        lines.append(paint("columns", "bold", colour))
        rows = [
            [
                r["name"],
                r["kind"],
                pct(r["within_share"]),
                fmt_num(r["units_changing"]),
                pct(r["missing_share"]),
                "absorbed" if r["absorbed_by_time"] and r["kind"] != "period-only" else "",
            ]
            for r in cols.iter_rows(named=True)
        ]
        lines += table(["column", "kind", "within", "units changing", "missing", "period effects"], rows, width, "llrrrl")
    return "\n".join(lines) + "\n"
