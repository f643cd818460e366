"""Terminal rendering of the profile, and the helpers every text renderer shares.

Layout (the project's own): a few lines of panel facts, the findings grouped by
severity with counts and examples, then one table of columns (kind, within
share, units changing, missing share). Colour only on a terminal, never when
NO_COLOR is set; data-derived text goes through the one sanitiser
(auditor.render.sanitise), which shows acting characters as ``<U+XXXX>``.
"""

from __future__ import annotations

import os
import shutil
import sys
from collections.abc import Iterable, Sequence
from typing import TYPE_CHECKING, Any

from auditor.checks.findings import SEVERITIES, Finding, counts_by_severity
from auditor.render.sanitise import visible

if TYPE_CHECKING:  # pragma: no cover
    from auditor.commands.profile import ProfileResult

_COLOURS = {"error": "31;1", "warning": "33", "note": "36", "dim": "2", "bold": "1"}


def safe(text: Any) -> str:
    """``text`` as one printable line: controls, format characters and separators
    (newlines too) written ``<U+XXXX>`` by the one sanitiser (auditor.render.sanitise)."""
    return visible(text)


def use_colour(stream: Any = None) -> bool:
    """Colour when writing to a terminal and NO_COLOR is not set."""
    stream = stream if stream is not None else sys.stdout
    if os.environ.get("NO_COLOR") is not None:
        return False
    return bool(getattr(stream, "isatty", lambda: False)())


def terminal_width(default: int = 100, stream: Any = None) -> int:
    """The width to lay text out in: the terminal's columns when ``stream`` (default
    stdout) is a terminal; else ``COLUMNS`` when set, else ``default``. At least 40."""
    stream = stream if stream is not None else sys.stdout
    if bool(getattr(stream, "isatty", lambda: False)()):
        return max(40, shutil.get_terminal_size((default, 24)).columns)
    try:
        return max(40, int(os.environ.get("COLUMNS", "")))
    except ValueError:
        return default


def paint(text: str, style: str, colour: bool) -> str:
    """``text`` wrapped in an ANSI style when ``colour`` is on."""
    return f"\x1b[{_COLOURS[style]}m{text}\x1b[0m" if colour else text


def clip(text: str, width: int) -> str:
    """``text`` cut to ``width`` characters with an ellipsis (kept for callers that lay out
    fixed-width cells; the renderers wrap instead and never cut data)."""
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
    """A plain table of text cells, each column as wide as its widest cell (``width`` is
    accepted for symmetry with the other helpers; cells are never cut).

    ``align`` holds one letter per column, ``l`` or ``r`` (default: first left, rest right).
    """
    rows = [[safe(c) for c in r] for r in rows]
    align = align or ("l" + "r" * (len(headers) - 1))
    widths = [len(h) for h in headers]
    for r in rows:
        for i, c in enumerate(r):
            widths[i] = max(widths[i], len(c))
    del width  # a table is as wide as its widest cells: names and values are never cut

    def line(cells: Sequence[str]) -> str:
        out = []
        for i, c in enumerate(cells):
            out.append(c.ljust(widths[i]) if align[i] == "l" else c.rjust(widths[i]))
        return "  " + "  ".join(out).rstrip()

    return [line(headers), "  " + "  ".join("─" * w for w in widths), *(line(r) for r in rows)]


def _value_text(v: Any) -> str:
    if isinstance(v, float) and v.is_integer() and abs(v) < 1e15:
        return f"{int(v)}"
    if isinstance(v, float):
        return fmt_num(v, 4)
    return safe(v)


def example_text(example: dict[str, Any]) -> str:
    """One example in words: ``OR-0086: 10 in 2017-2021, 20 in 2022`` when it carries the
    unit's values by period (``values``), else ``key value`` pairs (whole numbers without
    a decimal point)."""
    ex = dict(example)
    values = ex.pop("values", None)
    parts = [f"{safe(k)} {_value_text(v)}" for k, v in ex.items()]
    if values is not None:
        who = ", ".join(_value_text(v) for v in ex.values())
        return f"{who}: {safe(values)}" if who else safe(values)
    return ", ".join(parts)


#: severities shown by --show: at or above the named one
SHOW_LEVELS = {"error": ("error",), "warning": ("error", "warning"), "note": SEVERITIES}
#: repeated findings of one code (each on its own column) shown as one entry from this many on
GROUP_FROM = 3


def _groups(findings: Sequence[Finding]) -> list[list[Finding]]:
    """Consecutive findings of one severity and code, each on a column, form one group
    when there are at least GROUP_FROM of them; every other finding is a group of one."""
    out: list[list[Finding]] = []
    for f in findings:
        last = out[-1] if out else None
        if last and f.column and last[0].column and (last[0].severity, last[0].check) == (f.severity, f.check):
            last.append(f)
        else:
            out.append([f])
    split: list[list[Finding]] = []
    for g in out:
        split += [g] if len(g) >= GROUP_FROM else [[f] for f in g]
    return split


def findings_block(findings: Sequence[Finding], width: int, colour: bool, examples: int = 2,
                   show: str | None = None) -> list[str]:
    """Findings by severity: a count line, then one entry each with a few examples; messages
    wrapped to ``width``, never cut. Repeated findings of one code are one entry listing
    their columns. ``show`` (error, warning or note) keeps the findings at or above it (the
    count line still counts every finding)."""
    from auditor.checks.explain import explanation

    counts = counts_by_severity(findings)
    head = "findings: " + " · ".join(
        paint(f"{counts[s]} {s}{'s' if counts[s] != 1 else ''}", s, colour and counts[s] > 0) for s in SEVERITIES
    )
    lines = [head]
    if not findings:
        lines.append("  nothing to report")
        return lines
    kept = [f for f in findings if f.severity in SHOW_LEVELS.get(show or "note", SEVERITIES)]
    if len(kept) < len(findings):
        lines.append(f"  (showing {show}s and above: {len(findings) - len(kept)} more in --json)")
    for group in _groups(kept):
        f = group[0]
        tag = paint(f"{f.severity:<7}", f.severity, colour)
        if len(group) > 1:
            lines.append(f"  {tag} {f.check} ({len(group)} columns)")
            gloss = explanation(f.check)
            text = gloss.meaning if gloss is not None else f.message
            lines += [" " * 12 + part for part in wrap(safe(text), width - 12, 0)]
            cols = ", ".join(safe(g.column) for g in group)
            lines += [" " * 12 + part for part in wrap(f"columns: {cols}", width - 12, 2)]
            lines.append(paint(" " * 12 + f"(each column's message in --json; panel-audit explain {f.check})",
                               "dim", colour))
            continue
        where = f" [{safe(f.column)}]" if f.column else ""
        lines.append(f"  {tag} {f.check}{where}")
        for part in wrap(safe(f.message), width - 12, 0):
            lines.append(" " * 12 + part)
        for ex in f.examples[:examples]:
            for i, part in enumerate(wrap("e.g. " + example_text(dict(ex)), width - 12, 5)):
                lines.append(paint(" " * 12 + (part if i == 0 else part), "dim", colour))
    return lines


def render(result: ProfileResult, *, width: int | None = None, colour: bool = False,
           show: str | None = None) -> str:
    """The profile as terminal text (``show``: the least severe findings listed, see findings_block)."""
    width = width or terminal_width()
    p = result.panel
    obs = p["obs_per_unit"]
    grid = p["period_values"]
    span = f"{grid[0]} to {grid[-1]}" if grid else "-"
    step = f", step {p['step']}" if p.get("step") is not None else ", irregular steps"
    head = [
        f"panel-audit profile · {safe(result.data.source)}",
        f"  units {fmt_num(p['units'])} · periods {p['periods']} ({span}{step}) · rows {fmt_num(p['rows'])}"
        f" · {'balanced' if p['balanced'] else 'unbalanced'} (Ahrens-Pincus {p['unbalancedness']:.3f})",
        (f"  rows per unit (duplicates included): {obs['min']} to {obs['max']}, median {fmt_num(obs['median'])}, "
         f"harmonic mean {obs['harmonic_mean']:.2f}" if obs["min"] != obs["max"] else
         f"  rows per unit (duplicates included): {obs['min']} for every unit"),
        f"  keys: {fmt_num(p['duplicate_keys'])} duplicate rows · {fmt_num(p['missing_keys'])} rows missing a key · "
        f"{fmt_num(p['units_with_gaps'])} units with gaps ({fmt_num(p['gap_periods'])} periods) · "
        f"{fmt_num(p['singleton_units'])} seen once",
    ]
    lines = [paint(part, "bold", colour) for part in wrap(head[0], width, 4)]
    lines += [part for line in head[1:] for part in wrap(line, width, 4)]
    pats = p.get("patterns", [])[:4]
    if pats:
        joined = " · ".join(f"{safe(x['periods'])} ({fmt_num(x['units'])})" for x in pats)
        lines += wrap(f"  participation, most common first: {joined}", width, 4)
    lines.append("")
    lines += findings_block(result.findings, width, colour, show=show)
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
