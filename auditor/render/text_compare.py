"""Terminal rendering of ``compare``: a new wave against the panel so far.

Layout (the project's own): a verdict line (may the wave be appended as it is?),
four fact lines (periods, units, schema, rows), the wave's findings with what to
do, the merged profile's findings under their own heading when asked for, then
one table of how each column moved against the base's last period.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from auditor.render.text import (
    findings_block,
    fmt_num,
    paint,
    pct,
    safe,
    table,
    terminal_width,
    wrap,
)

if TYPE_CHECKING:  # pragma: no cover
    from auditor.commands.compare import CompareResult


def _runs(labels: Sequence[Any]) -> str:
    """Integer periods as ranges ("2017-2021, 2023"); other labels listed."""
    if not labels:
        return "none"
    if not all(isinstance(v, int) for v in labels):
        shown = [safe(v) for v in labels]
        return ", ".join(shown) if len(shown) <= 6 else f"{shown[0]} … {shown[-1]} ({len(shown)})"
    vals = sorted(labels)
    steps = [b - a for a, b in zip(vals, vals[1:], strict=False)]
    step = min(steps) if steps else 1
    parts: list[str] = []
    start = prev = vals[0]
    for v in vals[1:]:
        if v - prev == step:
            prev = v
            continue
        parts.append(f"{start}-{prev}" if prev != start else f"{start}")
        start = prev = v
    parts.append(f"{start}-{prev}" if prev != start else f"{start}")
    return ", ".join(parts)


def _p_value(p: float | None) -> str:
    if p is None:
        return "-"
    return "<0.001" if p < 0.001 else f"{p:.3f}"


def _skipped_periods(findings: Sequence[Any]) -> str:
    """The verdict's words for new periods that do not continue the base grid ("" if none)."""
    hits = [f for f in findings if f.check == "unexpected-period"]
    if not hits:
        return ""
    ex = list(hits[0].examples)
    if not ex:
        return "a new period does not continue the base grid"
    first = ex[0]
    more = f" (and {len(ex) - 1} more)" if len(ex) > 1 else ""
    return f"new period {safe(first.get('period'))} {safe(first.get('reason'))}{more}"


def _plural(n: int, one: str, many: str | None = None) -> str:
    return f"{n:,} {one}" if n == 1 else f"{n:,} {many or one + 's'}"


def _names(items: Sequence[str], limit: int = 6) -> str:
    if not items:
        return "none"
    shown = [safe(i) for i in items[:limit]]
    more = f" (+{len(items) - limit} more)" if len(items) > limit else ""
    return ", ".join(shown) + more


def _verdict(wave: Sequence[Any], errors: list[Any], colour: bool) -> str:
    """Whether the wave can be appended: its errors, a skipped period, its warnings."""
    skipped = _skipped_periods(wave)
    if errors:
        checks = sorted({f.check for f in errors})
        verdict = paint(
            f"do not append yet: {len(errors)} problem{'s' if len(errors) != 1 else ''} would corrupt the panel "
            f"({', '.join(checks)})" + (f"; and {skipped}" if skipped else ""),
            "error",
            colour,
        )
    elif skipped:
        verdict = paint(f"no error, but {skipped}: confirm the missing wave or fix the period labels before appending",
                        "warning", colour)
    else:
        verdict = "no error: the wave can be appended once the warnings below are understood"
        if not any(f.severity == "warning" for f in wave):
            verdict = "no error and no warning: the wave can be appended"
    return verdict


def _column_moves(result: CompareResult, width: int, colour: bool) -> list[str]:
    """The table of how each column moved, new wave against the reference (none: no lines)."""
    lines: list[str] = []
    if result.columns:
        lines.append(paint(f"how each column moved (new wave against {safe(result.reference)})", "bold", colour))
        rows = []
        for c in result.columns:
            notes = []
            if c.changed_units:
                notes.append(_plural(c.changed_units, "fixed value") + " changed")
            if c.implausible_jumps:
                notes.append(_plural(c.implausible_jumps, "jump"))
            if c.new_levels:
                notes.append(_plural(c.new_levels, "new level"))
            if c.vanished_levels:
                notes.append(_plural(c.vanished_levels, "level") + " gone")
            if c.periods_with_several_values:
                notes.append(_plural(c.periods_with_several_values, "period") + " not shared by all units")
            if c.expected_step is not None:
                notes.append(f"step {c.expected_step:+g} a period expected")
            rows.append(
                [
                    c.column,
                    c.compared_as,
                    fmt_num(c.psi),
                    fmt_num(c.ks_statistic),
                    _p_value(c.ks_p),
                    f"{pct(c.missing_base)} → {pct(c.missing_new)}",
                    "; ".join(notes),
                ]
            )
        lines += table(
            ["column", "as", "PSI", "KS D", "KS p", "missing then → now", "notes"],
            rows,
            width,
            "llrrrrl",
        )
    return lines


def render(result: CompareResult, *, width: int | None = None, colour: bool = False,
           show: str | None = None) -> str:
    """The comparison as terminal text (``show``: the least severe findings listed)."""
    width = width or terminal_width()
    u, p, s = result.units, result.periods, result.schema
    wave = result.wave_findings
    errors = [f for f in wave if f.severity == "error"]
    lines = [
        paint(
            f"panel-audit compare · new wave {safe(result.sources.new)} against base {safe(result.sources.base)}",
            "bold",
            colour,
        )
    ]
    verdict = _verdict(wave, errors, colour)
    lines += wrap(f"  verdict  {verdict}", width, 11)

    step = f", step {p.step}" if p.step is not None else ""
    held = f"already held: {_runs(p.overlap)}"
    if p.colliding_keys:
        held += f" ({fmt_num(p.colliding_keys)} colliding keys)"
    lines += wrap(
        f"  periods  base {_runs(p.base)} ({len(p.base)}{step}) · new {_runs(p.new)} · {held}",
        width,
        11,
    )
    lines += wrap(
        f"  units    returning {fmt_num(u.returning)} of {fmt_num(u.base)}"
        f" ({fmt_num(u.returning_after_absence)} after an absence) · entering {fmt_num(u.entering)}"
        f" · not back {fmt_num(u.not_returning)}"
        f" ({fmt_num(u.not_returning_from_last_period)} of them were in {safe(result.reference_period)})",
        width,
        11,
    )
    changed = [f"{safe(t.column)} {safe(t.base)}→{safe(t.new)}" for t in s.type_changed]
    lines += wrap(
        f"  schema   added {_names(s.added)} · removed {_names(s.removed)} · type changes {_names(changed)}",
        width,
        11,
    )
    lines += wrap(
        f"  rows     base {fmt_num(result.rows.base)} · new {fmt_num(result.rows.new)} · distributions "
        f"against {safe(result.reference)} ({fmt_num(result.rows.base_reference)} rows)",
        width,
        11,
    )
    lines.append("")
    lines += findings_block(list(wave), width, colour, show=show)
    if result.merged_findings or result.merged_panel is not None:
        lines.append("")
        lines.append(paint("base + new profiled together", "bold", colour))
        lines += findings_block(list(result.merged_findings), width, colour, show=show)
    lines.append("")
    lines += _column_moves(result, width, colour)
    return "\n".join(lines) + "\n"
