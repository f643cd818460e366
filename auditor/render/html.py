"""The HTML report: one self-contained page (figures inline as SVG, no script, no
outside resource), and the same sections as notebook fragments (``_repr_html_``).

The renderer shows what the statistics modules computed; it computes nothing of
its own beyond formatting, except the quantiles of the shifted columns that the
new-wave figure draws (a display summary of at most a few columns). Every text
taken from the data (column names, values, categories, labels) goes through
``esc``: acting characters shown as ``<U+XXXX>`` (auditor.render.sanitise),
then ``html.escape``.
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any

from auditor.checks.findings import SEVERITY_RANK, Finding
from auditor.render.sanitise import visible
from auditor.version import __version__
from auditor.vocab import clean

if TYPE_CHECKING:  # pragma: no cover
    from auditor.checks.config import Settings
    from auditor.commands.compare import CompareResult
    from auditor.commands.instruments import InstrumentsResult
    from auditor.commands.instruments_values import SpecificationTests, UnitStrength


SECTIONS: tuple[tuple[str, str], ...] = (
    ("summary", "Summary"),
    ("findings", "Findings"),
    ("structure", "Structure"),
    ("variation", "Variation"),
    ("missing", "Missing data"),
    ("readiness", "Model readiness"),
    ("new-wave", "New wave"),
)

FIGURE_FILES: dict[str, str] = {
    "participation": "participation.png",
    "periods-per-unit": "periods_per_unit.png",
    "entry-exit": "entry_exit.png",
    "within-share": "within_share.png",
    "missing-map": "missing_map.png",
    "first-stage": "first_stage_f.png",
    "anderson-rubin": "anderson_rubin_set.png",
    "wave-shift": "wave_shift.png",
    "shifted-distributions": "shifted_distributions.png",
}


#: the caption under each figure of the page (``{...}``: values filled in by ``_figure``)
FIGURE_CAPTIONS: dict[str, str] = {
    "participation": (
        "Each band is one participation pattern, as tall as its share of units; filled cells "
        "are the periods its units are observed in. The rarest patterns share the last band, "
        "shaded by the share of its units present."
    ),
    "periods-per-unit": (
        "Units by the number of periods they are observed in. Units seen once carry no within "
        "variation."
    ),
    "entry-exit": (
        "Units present in each period (top); units seen for the first time, back after a gap, "
        "or seen for the last time (bottom). The first period's units are the starting "
        "cohort, and who leaves after the last period is not yet known."
    ),
    "within-share": (
        "Within share = within sum of squares / total sum of squares; colour is the column's "
        "kind."
    ),
    "missing-map": (
        "Share of rows missing each column, period by period; \u00d7 marks a column missing "
        "entirely in a period (often a question not asked in that wave)."
    ),
    "first-stage": (
        "Bars: the first-stage F of each correlated fixed regressor on its excluded "
        "instruments. Black tick: its Stock-Yogo (2005) critical value; dashed: F = "
        "{rule_of_thumb:g} (Staiger-Stock 1997); dotted: F = {t_test:g} (Lee, McCrary, "
        "Moreira and Porter 2022)."
    ),
    "anderson-rubin": (
        "Blue: the values of the coefficient the Anderson-Rubin test does not reject (robust "
        "to weak instruments; an arrow marks an unbounded end). Orange: the Hausman-Taylor "
        "estimate \u00b1 1.96 standard errors, which is reliable only with strong "
        "instruments."
    ),
    "wave-shift": (
        "Two-sample Kolmogorov-Smirnov statistic of each column: the new wave against {ref}."
    ),
    "shifted-distributions": (
        "Cumulative distributions of the most shifted numeric columns, the new wave against "
        "{ref}; the widest vertical gap between the two lines is the KS statistic."
    ),
}


# --- small helpers -------------------------------------------------------------------


def esc(value: Any, limit: int = 200) -> str:
    """``value`` as safe HTML text: acting characters (controls, bidirectional and
    zero-width ones) shown as ``<U+XXXX>`` by the one sanitiser, shortened to
    ``limit`` characters (with an ellipsis), then escaped with ``html.escape``."""
    s = visible(value)
    if len(s) > limit:
        s = s[: limit - 1] + "\u2026"
    return html.escape(s, quote=True)


def _int(v: Any) -> str:
    if v is None:
        return "\u2013"
    try:
        return f"{int(v):,}"
    except (TypeError, ValueError):
        return esc(v)


def _finite(v: Any) -> float | str | None:
    """``v`` as a float, None when missing or NaN, or its escaped text when it is no number."""
    if v is None:
        return None
    try:
        x = float(v)
    except (TypeError, ValueError):
        return esc(v)
    return x if x == x else None


def _num(v: Any, digits: int = 3) -> str:
    x = _finite(v)
    if not isinstance(x, float):
        return "\u2013" if x is None else x
    if x != 0 and (abs(x) >= 1e6 or abs(x) < 10 ** (-digits)):
        return f"{x:.{digits}g}"
    if abs(x) >= 1000:
        return f"{x:,.1f}"
    return f"{x:.{digits}g}" if abs(x) < 1 else f"{x:,.{digits}f}".rstrip("0").rstrip(".")


def _pct(v: Any, digits: int = 1) -> str:
    x = _finite(v)
    if not isinstance(x, float):
        return "\u2013" if x is None else x
    if 0 < x < 0.001:
        return "&lt;0.1%"
    return f"{x:.{digits}%}"


def _p(v: Any) -> str:
    if v is None:
        return "\u2013"
    x = float(v)
    return "&lt;0.001" if x < 0.001 else f"{x:.3f}"


def _plural(n: Any, word: str, many: str | None = None) -> str:
    n = int(n or 0)
    return f"{n:,} {word if n == 1 else (many or word + 's')}"


def _tag(severity: str) -> str:
    s = severity if severity in SEVERITY_RANK else "note"
    return f'<span class="pa-tag pa-{s}">{esc(severity)}</span>'


def _table(head: Sequence[str], rows: Iterable[Sequence[str]], *, cls: str = "", numeric: Sequence[int] = ()) -> str:
    """A table from already-escaped cell HTML; ``numeric`` column indices align right."""
    num = set(numeric)
    right = ' class="pa-n"'
    th = "".join(f"<th{right if i in num else ''}>{h}</th>" for i, h in enumerate(head))
    body = []
    for r in rows:
        tds = "".join(f"<td{right if i in num else ''}>{c}</td>" for i, c in enumerate(r))
        body.append(f"<tr>{tds}</tr>")
    return (f'<div class="pa-scroll"><table class="pa-table {cls}"><thead><tr>{th}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table></div>')


def _facts(items: Sequence[tuple[str, str]]) -> str:
    cells = "".join(f'<div class="pa-fact"><dt>{k}</dt><dd>{v}</dd></div>' for k, v in items)
    return f'<dl class="pa-facts">{cells}</dl>'


def _figure(svgs: Mapping[str, str], name: str, **values: Any) -> str:
    """The figure ``name`` with its caption (``FIGURE_CAPTIONS``, ``values`` filled in), or
    nothing when it was not drawn."""
    caption = FIGURE_CAPTIONS[name].format(**values)
    svg = svgs.get(name)
    if not svg:
        return ""
    return f'<figure class="pa-fig" id="fig-{name}">{svg}<figcaption>{caption}</figcaption></figure>'


def _note(text: str) -> str:
    return f'<p class="pa-quiet">{text}</p>'


# --- limits ----------------------------------------------------------------------------


@dataclass(frozen=True)
class Limits:
    """How much of each table and figure the page shows (from the ``report`` settings),
    and the first-stage F lines drawn (from the ``instruments`` settings)."""

    findings: int = 200
    columns: int = 400
    patterns: int = 12
    pattern_rows: int = 30
    figure_columns: int = 40
    periods_table: int = 120
    shift_columns: int = 4
    quantiles: int = 101
    max_bytes: int = 2_000_000
    f_rule_of_thumb: float = 10.0
    f_t_test: float = 104.7

    @classmethod
    def from_settings(cls, settings: Settings | None) -> Limits:
        """The limits in ``settings`` (section ``report``, the patterns listed from ``profile``
        and the F lines the instruments check uses); the shipped defaults without settings."""
        if settings is None:
            from auditor.checks.config import default_settings

            settings = default_settings()
        r = settings.report
        return cls(findings=r.findings, columns=r.columns, patterns=settings.profile.patterns,
                   pattern_rows=r.pattern_rows, figure_columns=r.figure_columns, periods_table=r.periods_table,
                   shift_columns=r.shift_columns, quantiles=r.quantiles, max_bytes=r.max_bytes,
                   f_rule_of_thumb=settings.instruments.rule_of_thumb_f, f_t_test=settings.instruments.lee_f)


# --- figures ---------------------------------------------------------------------------


def build_figures(
    result: Any,
    instruments: InstrumentsResult | None = None,
    comparison: CompareResult | None = None,
    *,
    quantiles: Mapping[str, tuple[Sequence[float], Sequence[float]]] | None = None,
    limits: Limits | None = None,
) -> dict[str, Any]:
    """Every figure the report shows, by name (see ``FIGURE_FILES``), as matplotlib Figures.

    ``result`` is a ProfileResult; ``instruments`` an InstrumentsResult and
    ``comparison`` a CompareResult; ``quantiles`` (column -> base and new
    quantiles) feeds the shifted-distributions figure.
    """
    from auditor.render import figures as fg

    lim = limits or Limits()
    panel = result.panel
    grid = list(panel.get("period_values") or [])
    details = getattr(result, "details", None)
    out: dict[str, Any] = {}
    if details is not None and getattr(details, "patterns", None) is not None:
        out["participation"] = fg.participation(details.patterns, grid, max_rows=lim.pattern_rows)
    if details is not None and getattr(details, "obs_per_unit", None) is not None:
        out["periods-per-unit"] = fg.periods_per_unit(details.obs_per_unit, len(grid))
    if panel.get("attrition"):
        out["entry-exit"] = fg.entry_exit(panel["attrition"])
    columns = getattr(result, "columns", None)
    if columns is not None and columns.height and "within_share" in columns.columns:
        out["within-share"] = fg.within_shares(columns, max_columns=lim.figure_columns)
    if details is not None and getattr(details, "missing_by_period", None) is not None:
        out["missing-map"] = fg.missing_map(details.missing_by_period, grid, max_columns=lim.figure_columns)
    if instruments is not None:
        out.update(_readiness_figures(instruments, lim))
    if comparison is not None and comparison.columns:
        out["wave-shift"] = fg.wave_shift(comparison.columns, max_columns=lim.figure_columns)
        if quantiles:
            ks = {c.column: c.ks_statistic for c in comparison.columns}
            out["shifted-distributions"] = fg.shifted_distributions(quantiles, ks=ks)
    return out


def _readiness_figures(inst: InstrumentsResult, lim: Limits) -> dict[str, Any]:
    """The first-stage figure (with strength rows) and the Anderson-Rubin figure (with a set)."""
    from auditor.render import figures as fg

    out: dict[str, Any] = {}
    if inst.strength:
        out["first-stage"] = fg.first_stage_strength(inst.strength, rule_of_thumb=lim.f_rule_of_thumb,
                                                     t_test_bound=lim.f_t_test)
        if any(r.anderson_rubin is not None for r in inst.strength):
            out["anderson-rubin"] = fg.anderson_rubin_set(inst.strength, inst.estimates.hausman_taylor)
    return out


@dataclass(frozen=True)
class Listed:
    """A finding as the page lists it: the Finding, the part of the audit it came from
    (``profile``, ``model readiness``, ``new wave``) and its examples as that part's JSON
    document writes them (model readiness and new wave clean non-finite numbers)."""

    source: str
    finding: Finding
    examples: tuple[Any, ...]


def _listed(findings: Iterable[Finding], source: str, *, cleaned: bool) -> list[Listed]:
    return [Listed(source, f, tuple(clean(dict(e)) if cleaned else dict(e) for e in f.examples)) for f in findings]


def _readiness_findings(inst: InstrumentsResult) -> list[Listed]:
    """The instruments findings, marked as from model readiness."""
    return _listed(inst.findings, "model readiness", cleaned=True)


def _svgs(figures: Mapping[str, Any]) -> dict[str, str]:
    from auditor.render.figures import to_svg

    return {name: to_svg(fig, name=name) for name, fig in figures.items()}


# --- sections --------------------------------------------------------------------------


def _wave_items(comparison: CompareResult) -> list[Listed]:
    """The comparison's findings (the wave's and the merged profile's), from ``new wave``."""
    return _listed(comparison.findings, "new wave", cleaned=True)


def _all_findings(result: Any, instruments: InstrumentsResult | None, comparison: CompareResult | None) -> list[Listed]:
    items = _listed(getattr(result, "findings", ()) or (), "profile", cleaned=False)
    if instruments is not None:
        items.extend(_readiness_findings(instruments))
    if comparison is not None:
        items.extend(_wave_items(comparison))
    order = {"profile": 0, "model readiness": 1, "new wave": 2}
    items.sort(key=lambda i: (SEVERITY_RANK.get(i.finding.severity, 9), order[i.source], i.finding.check,
                              i.finding.column or ""))
    return items


def _periods_text(panel: Mapping[str, Any]) -> str:
    grid = panel.get("period_values") or []
    n = panel.get("periods", len(grid))
    if not grid:
        return _plural(n, "period")
    span = f"{esc(grid[0])} to {esc(grid[-1])}" if len(grid) > 1 else esc(grid[0])
    step = panel.get("step")
    how = f"a regular grid, step {esc(step)}" if step is not None else "an irregular grid"
    return f"{_plural(n, 'period')}, {span} ({how})"


def _summary(result: Any, findings: list[Listed], lim: Limits) -> str:
    p = result.panel
    opu = p.get("obs_per_unit") or {}
    unit = ", ".join(esc(u) for u in p.get("unit", []) or [])
    parts = [
        f"The panel holds {_plural(p.get('rows'), 'row')} on {_plural(p.get('units'), 'unit')} "
        f"(key <code>{unit}</code>) over {_periods_text(p)}."
    ]
    if p.get("balanced"):
        parts.append("It is balanced: every unit is observed once in every period.")
    else:
        parts.append(
            f"It is unbalanced: units have {_int(opu.get('min'))} to {_int(opu.get('max'))} rows, duplicates "
            f"included (median {_num(opu.get('median'))}, harmonic mean {_num(opu.get('harmonic_mean'))}; "
            f"Ahrens-Pincus unbalancedness r = {_num(p.get('unbalancedness'))})."
        )
    extra = []
    if p.get("units_with_gaps"):
        extra.append(f"{_plural(p['units_with_gaps'], 'unit')} have gaps "
                     f"({_plural(p.get('gap_periods'), 'period')} absent inside their spans)")
    if p.get("singleton_units"):
        extra.append(f"{_plural(p['singleton_units'], 'unit')} are seen only once")
    if p.get("duplicate_keys"):
        extra.append(f"{_plural(p['duplicate_keys'], 'row')} repeat a (unit, period) key")
    if p.get("missing_keys"):
        extra.append(f"{_plural(p['missing_keys'], 'row')} lack a unit or period key")
    if extra:
        text = "; ".join(extra)
        parts.append(text[0].upper() + text[1:] + ".")
    tally = {s: sum(1 for i in findings if i.finding.severity == s) for s in SEVERITY_RANK}
    if findings:
        parts.append(
            f"The audit raised {_plural(tally['error'], 'error')}, {_plural(tally['warning'], 'warning')} "
            f"and {_plural(tally['note'], 'note')}."
        )
    else:
        parts.append("The audit raised no finding.")
    chips = "".join(
        f'<span class="pa-chip pa-{s}"><b>{tally[s]:,}</b> {s}{"s" if tally[s] != 1 else ""}</span>'
        for s in SEVERITY_RANK
    )
    top = [i.finding for i in findings[:5]]
    lead = ""
    if top:
        items = "".join(
            f"<li>{_tag(f.severity)} <b>{esc(f.check)}</b>"
            f"{' in <code>' + esc(f.column, 80) + '</code>' if f.column else ''}: "
            f"{esc(f.message, 400)}</li>"
            for f in top
        )
        lead = f'<h3>Most serious first</h3><ol class="pa-top">{items}</ol>'
    return (f'<section id="summary"><h2>Summary</h2><div class="pa-chips">{chips}</div>'
            f'<p class="pa-lede">{" ".join(parts)}</p>{lead}</section>')


def _examples(ex: Any) -> str:
    if not ex:
        return ""
    shown = []
    from auditor.render.text import example_text

    for e in list(ex)[:3]:
        if isinstance(e, Mapping):
            shown.append(esc(example_text(dict(list(e.items())[:6])), 200))
        else:
            shown.append(esc(e, 80))
    more = f'<span class="pa-quiet"> and {len(ex) - 3:,} more kept</span>' if len(ex) > 3 else ""
    items = "".join(f"<code>{s}</code>" for s in shown)
    return f'<div class="pa-eg"><span class="pa-quiet">for example</span> {items}{more}</div>'


def _check_cell(code: str) -> str:
    """The check's code, with what it means and what its count counts as a tooltip
    (auditor.checks.explain, the words ``panel-audit explain`` prints)."""
    from auditor.checks.explain import explanation

    e = explanation(code)
    if e is None:
        return f"<b>{esc(code)}</b>"
    tip = f"{e.meaning} Count: {e.count}. {e.action}"
    return f'<b><abbr title="{esc(tip, 600)}">{esc(code)}</abbr></b>'


def _findings(findings: list[Listed], lim: Limits) -> str:
    if not findings:
        return '<section id="findings"><h2>Findings</h2><p>Nothing to report: every check passed.</p></section>'
    sources = {i.source for i in findings}
    head = ["severity", "check", "column", "count", "what it means"]
    if len(sources) > 1:
        head.insert(0, "from")
    rows = []
    for i in findings[: lim.findings]:
        f = i.finding
        r = [_tag(f.severity), _check_cell(f.check),
             f"<code>{esc(f.column, 80)}</code>" if f.column else "",
             _int(f.count) if f.count is not None else "",
             esc(f.message, 600) + _examples(i.examples)]
        if len(sources) > 1:
            r.insert(0, esc(i.source))
        rows.append(r)
    count_col = head.index("count")
    more = ""
    if len(findings) > lim.findings:
        more = _note(f"The first {lim.findings:,} of {len(findings):,} findings are shown; "
                     "the JSON output lists them all.")
    return (f'<section id="findings"><h2>Findings</h2>'
            f'{_table(head, rows, cls="pa-findings", numeric=[count_col])}{more}</section>')


def _structure(result: Any, svgs: Mapping[str, str], lim: Limits) -> str:
    p = result.panel
    opu = p.get("obs_per_unit") or {}
    facts = _facts([
        ("rows", _int(p.get("rows"))),
        ("units", _int(p.get("units"))),
        ("periods", _int(p.get("periods"))),
        ("grid step", esc(p.get("step")) if p.get("step") is not None else "irregular"),
        ("balanced", "yes" if p.get("balanced") else "no"),
        ("repeated keys", _int(p.get("duplicate_keys"))),
        ("rows without a key", _int(p.get("missing_keys"))),
        ("units with gaps", _int(p.get("units_with_gaps"))),
        ("periods in gaps", _int(p.get("gap_periods"))),
        ("units seen once", _int(p.get("singleton_units"))),
        ("periods per unit", f"{_int(opu.get('min'))}\u2013{_int(opu.get('max'))}, "
                             f"median {_num(opu.get('median'))}"),
        ("Ahrens-Pincus r", _num(p.get("unbalancedness"))),
    ])
    parts = [f'<section id="structure"><h2>Structure</h2>{facts}']
    parts.append(_figure(svgs, "participation"))
    patterns = p.get("patterns") or []
    if patterns:
        total = max(int(p.get("units") or 0), 1)
        rows = [[esc(x.get("periods"), 300), _int(x.get("units")), _pct((x.get("units") or 0) / total)]
                for x in patterns[: lim.patterns]]
        parts.append("<h3>Most common participation patterns</h3>")
        parts.append(_table(["periods observed", "units", "share of units"], rows, cls="pa-narrow",
                            numeric=[1, 2]))
    parts.append(_figure(svgs, "periods-per-unit"))
    parts.append(_figure(svgs, "entry-exit"))
    attrition = p.get("attrition") or []
    if attrition:
        rows = [[esc(a.get("period")), _int(a.get("present")), _int(a.get("entering")),
                 _int(a.get("returning")),
                 _int(a.get("leaving")) if a.get("leaving") is not None else '<span class="pa-quiet">not yet known</span>']
                for a in attrition[: lim.periods_table]]
        more = "" if len(attrition) <= lim.periods_table else _note(
            f"First {lim.periods_table:,} of {len(attrition):,} periods.")
        parts.append(f"<details><summary>Units in and out, period by period</summary>"
                     f"{_table(['period', 'present', 'first seen', 'back after a gap', 'last seen'], rows, numeric=[1, 2, 3, 4])}"
                     f"{more}</details>")
    parts.append("</section>")
    return "".join(parts)


def _bar(share: Any) -> str:
    if share is None:
        return "\u2013"
    x = max(0.0, min(1.0, float(share)))
    return (f'<span class="pa-nw"><span class="pa-meter"><span style="width:{x * 100:.1f}%"></span></span>'
            f'<span class="pa-meter-v">{_pct(x)}</span></span>')


def _variation(result: Any, svgs: Mapping[str, str], lim: Limits) -> str:
    cols = result.columns
    parts = ['<section id="variation"><h2>Variation</h2>',
             "<p>How much each column moves within units over time, against how much it differs "
             "between units. A fixed-effects fit learns only from the within part.</p>"]
    parts.append(_figure(svgs, "within-share"))
    if cols is None or cols.height == 0:
        parts.append("<p>No column besides the keys.</p></section>")
        return "".join(parts)
    rows = []
    for c in cols.head(lim.columns).iter_rows(named=True):
        kind = str(c.get("kind") or "")
        changing = c.get("units_changing")
        twice = c.get("units_observed_twice")
        rows.append([
            f"<code>{esc(c.get('name'), 80)}</code>",
            esc(c.get("dtype")),
            f'<span class="pa-kind pa-k-{esc(kind)}">{esc(kind)}</span>'
            + ('<br><span class="pa-quiet">follows the period</span>' if c.get("absorbed_by_time") else ""),
            _pct(c.get("missing_share")),
            _int(c.get("distinct")),
            f"{_int(changing)} of {_int(twice)}" if twice is not None else _int(changing),
            _bar(c.get("within_share")),
            _num(c.get("between_sd")),
            _num(c.get("within_sd")),
        ])
    head = ["column", "type", "kind", "missing", "distinct", "units changing",
            "within share", "sd between", "sd within"]
    parts.append(_table(head, rows, cls="pa-vars", numeric=[3, 4, 5, 7, 8]))
    if cols.height > lim.columns:
        parts.append(_note(f"The first {lim.columns:,} of {cols.height:,} columns are shown."))
    parts.append("</section>")
    return "".join(parts)


def _missing(result: Any, svgs: Mapping[str, str], lim: Limits) -> str:
    import polars as pl

    cols = result.columns
    parts = ['<section id="missing"><h2>Missing data</h2>']
    if cols is None or cols.height == 0 or "missing_share" not in cols.columns:
        parts.append("<p>No column besides the keys.</p></section>")
        return "".join(parts)
    gaps = cols.filter(pl.col("missing_share") > 0).sort("missing_share", descending=True)
    if gaps.height == 0:
        parts.append("<p>No value is missing in any column.</p></section>")
        return "".join(parts)
    parts.append(_figure(svgs, "missing-map"))
    whole: dict[str, list[str]] = {}
    details = getattr(result, "details", None)
    mbp = getattr(details, "missing_by_period", None)
    if mbp is not None and mbp.height:
        full = (mbp.filter(pl.col("missing_share") >= 1.0)
                .group_by("column", maintain_order=True)
                .agg(pl.col("period").cast(pl.String)))
        whole = {r[0]: r[1] for r in full.iter_rows()}
    rows = []
    for c in gaps.head(lim.columns).iter_rows(named=True):
        periods = whole.get(c["name"], [])
        shown = ", ".join(esc(x, 20) for x in periods[:12]) + (" \u2026" if len(periods) > 12 else "")
        rows.append([f"<code>{esc(c['name'], 80)}</code>", _bar(c["missing_share"]), shown])
    parts.append(_table(["column", "missing share", "periods missing entirely"], rows, cls="pa-narrow"))
    if gaps.height > lim.columns:
        parts.append(_note(f"The first {lim.columns:,} of {gaps.height:,} columns with missing values are shown."))
    parts.append("</section>")
    return "".join(parts)


def _names(values: Iterable[Any]) -> str:
    items = [f"<code>{esc(v, 60)}</code>" for v in values or []]
    return ", ".join(items) if items else '<span class="pa-quiet">none</span>'


def _readiness(inst: InstrumentsResult, svgs: Mapping[str, str], lim: Limits) -> str:
    roles = inst.roles
    parts = ['<section id="readiness"><h2>Model readiness</h2>',
             "<p>Where each regressor sits for a Hausman-Taylor fit: whether it changes over time "
             "and whether it is taken as correlated with the unit effect.</p>",
             '<table class="pa-roles"><thead><tr><th></th><th>not correlated with the unit effect</th>'
             "<th>correlated with the unit effect</th></tr></thead><tbody>"
             f"<tr><th>changes over time</th><td><b>X1</b> {_names(roles.x1)}</td>"
             f"<td><b>X2</b> {_names(roles.x2)}</td></tr>"
             f"<tr><th>fixed over time</th><td><b>Z1</b> {_names(roles.z1)}</td>"
             f"<td><b>Z2</b> {_names(roles.z2)}</td></tr></tbody></table>"]
    parts.append(_identified(inst))
    oc = inst.order_condition
    if oc is not None:
        met = "met" if oc.met else "<b>not met</b>"
        parts.append(f"<p>Order condition: k1 = {_int(oc.k1)} time-varying exogenous regressors "
                     f"against g2 = {_int(oc.g2)} correlated fixed ones, {met}.</p>")
    parts.append(_figure(svgs, "first-stage", rule_of_thumb=lim.f_rule_of_thumb, t_test=lim.f_t_test))
    if inst.strength:
        rows = [[f"<code>{esc(s.endogenous, 60)}</code>", esc(s.role), _names(s.instruments),
                 _num(s.partial_f), _num(s.robust_f), _num(s.partial_r2),
                 esc("; ".join(str(d) for d in s.df)), _num(s.critical_value),
                 esc(s.verdict), _ar_cell(s)] for s in inst.strength]
        parts.append("<h3>First stages</h3>")
        parts.append(_table(["regressor", "role", "instruments", "partial F", "robust F", "partial R\u00b2",
                             "df", "critical value", "verdict", "Anderson-Rubin set"], rows, numeric=[3, 4, 5, 7]))
        parts.append(_figure(svgs, "anderson-rubin"))
    parts.append(_candidates(inst, lim))
    parts.append("<h3>Tests</h3>")
    parts.append(_table(["test", "statistic", "df", "p"], _test_rows(inst.tests), cls="pa-narrow",
                        numeric=[1, 2, 3]))
    parts.append(_estimates(inst, lim))
    vc = inst.variance_components
    if vc is not None:
        parts.append(_facts([("sd of unit effect", _num(vc.sigma_u)),
                             ("sd of idiosyncratic error", _num(vc.sigma_e)),
                             ("mean quasi-demeaning weight", _num(vc.theta_mean))]))
    parts.append("</section>")
    return "".join(parts)


_FIT_NAMES = {"within": "within", "between": "between", "random": "random effects", "mundlak": "Mundlak",
              "hausman_taylor": "Hausman-Taylor", "amemiya_macurdy": "Amemiya-MaCurdy",
              "breusch_mizon_schmidt": "Breusch-Mizon-Schmidt"}
_IDENTIFYING_FITS = 5  # within, between, random effects, Mundlak, Hausman-Taylor: "every fit"


def _estimates(inst: InstrumentsResult, lim: Limits) -> str:
    """Each computed fit's coefficients side by side (period effects left out)."""
    est = inst.estimates.computed()
    if not est:
        return ""
    periods = set(inst.period_effects)
    names: list[str] = []
    for _, fit in est:
        for n in fit.coef:
            if n not in names and n not in periods and not (n.startswith("mean(") and n[5:-1] in periods):
                names.append(n)
    erows = []
    for n in names[: lim.columns]:
        r = [f"<code>{esc(n, 60)}</code>"]
        for _, fit in est:
            c, s = fit.coef.get(n), fit.se.get(n)
            pm = f'<br><span class="pa-quiet">\u00b1 {_num(s, 3)}</span>' if s is not None else ""
            r.append("\u2013" if c is None else f"{_num(c, 4)}{pm}")
        erows.append(r)
    parts = ["<h3>Estimates (coefficient \u00b1 standard error)</h3>",
             _table(["regressor", *[esc(_FIT_NAMES.get(k, k)) for k, _ in est]], erows,
                    numeric=list(range(1, len(est) + 1)))]
    if periods:
        parts.append(_note(f"The {len(periods)} period effects are estimated in every fit and not shown "
                           "(see the JSON document)."))
    return "".join(parts)


def _identified(inst: InstrumentsResult) -> str:
    """Period effects, and which fits set which column aside."""
    out = []
    periods = inst.period_effects
    if periods:
        out.append(f"<p>Period effects ({len(periods)}: {_names(periods[:3])}{', ...' if len(periods) > 3 else ''}) "
                   "are exogenous, each instrumented by itself; they do not count in k1 and are left out of the "
                   "contrasts.</p>")
    for x in inst.not_identified:
        where = ("every fit" if len(x.fits) >= _IDENTIFYING_FITS
                 else ", ".join(_FIT_NAMES.get(f, str(f)) for f in x.fits))
        shown = _names(x.with_[:4]) + (", ..." if len(x.with_) > 4 else "")
        out.append(f"<p>Not identified by {esc(where)}: <code>{esc(x.column, 60)}</code> "
                   f"({esc(x.reason)}{'; with ' + shown if x.with_ else ''}).</p>")
    return "".join(out)


def _test_rows(tests: SpecificationTests) -> list[list[str]]:
    """One row per test, in the document's order; the per-estimator groups (Sargan of each
    richer set, its contrast with Hausman-Taylor) one row per estimator."""

    def row(label: str, t: Any, why: str | None = None) -> list[str]:
        if t is None:
            return [esc(label), "\u2013", "\u2013", "not computed" + (f": {esc(why)}" if why else "")]
        return [esc(label), _num(t.statistic), _int(t.df), _p(t.p)]

    rows = [row("Mundlak: unit means of X jointly zero", tests.mundlak),
            row("Hausman: within against random effects", tests.hausman_within_random),
            row("Over-identifying restrictions (Sargan)", tests.overidentification),
            row("Hausman: within against Hausman-Taylor", tests.hausman_within_ht)]
    by, against = tests.overidentification_by_estimator, tests.hausman_against_ht
    if by is not None:  # its Hausman-Taylor entry is the Sargan row above
        rows += [row("Sargan, Amemiya-MaCurdy", by.amemiya_macurdy),
                 row("Sargan, Breusch-Mizon-Schmidt", by.breusch_mizon_schmidt)]
    if against is not None:
        rows += [row("Hausman: Hausman-Taylor against Amemiya-MaCurdy", against.amemiya_macurdy),
                 row("Hausman: Hausman-Taylor against Breusch-Mizon-Schmidt", against.breusch_mizon_schmidt)]
    rows.append(row("Attrition (Nijman-Verbeek): next period observed", tests.attrition, tests.attrition_note))
    return rows


def _ar_cell(row: UnitStrength) -> str:
    ar = row.anderson_rubin
    if ar is None:
        return '<span class="pa-quiet">not computed</span>' if row.anderson_rubin_note else "\u2013"
    if ar.kind == "empty":
        return "empty (rejected at every value)"
    if ar.kind == "whole line":
        return "the whole line"

    def end(v: Any, sign: str) -> str:
        return f"{sign}\u221e" if v is None else _num(v, 4)

    minus = "\u2212"
    return " or ".join(f"[{end(lo, minus)}, {end(hi, '+')}]" for lo, hi in ar.intervals)


_STATE_WORDS = {"accepted": "yes", "assumed": "yes (assumed)", "invalid": "no", "undecided": "undecided"}


def _candidates(inst: InstrumentsResult, lim: Limits) -> str:
    """Each X1 unit mean alone as an instrument, and the suggested set (saying when the set is rejected)."""
    if not inst.candidates:
        return ""
    rows = [[f"<code>{esc(c.endogenous, 60)}</code>", f"<code>{esc(c.instrument, 60)}</code>",
             _num(c.partial_f), _p(c.mundlak_p), _p(c.c_p),
             esc(_STATE_WORDS.get(str(c.state), "yes" if c.usable else "no"))]
            for c in inst.candidates[: lim.columns]]
    parts = ["<h3>Candidate instruments</h3>",
             _table(["regressor", "candidate", "partial F alone", "Mundlak p", "C-test p", "usable"], rows,
                    numeric=[2, 3, 4])]
    for sg in inst.suggestion:
        text = (f"Suggested for <code>{esc(sg.endogenous, 60)}</code>: {_names(sg.instruments)} "
                f"(F {_num(sg.partial_f)}, {esc(sg.verdict)}).")
        if sg.set_rejected:
            text += (" The over-identification tests reject the instrument set and no single mean can be blamed, "
                     "so the validity of these instruments is not established.")
        parts.append(f"<p>{text}</p>")
    return "".join(parts)


def _new_wave(comp: CompareResult, svgs: Mapping[str, str], lim: Limits) -> str:
    schema, units, periods = comp.schema, comp.units, comp.periods
    parts = ['<section id="new-wave"><h2>New wave</h2>']
    parts.append(_facts([
        ("units before", _int(units.base)), ("units in the new wave", _int(units.new)),
        ("returning", _int(units.returning)), ("new units", _int(units.entering)),
        ("not back", _int(units.not_returning)),
        ("periods before", esc(_span(periods.base))), ("new periods", esc(_span(periods.new))),
        ("periods in both", esc(_span(periods.overlap)) or "none"),
    ]))
    changes = []
    if schema.added:
        changes.append(f"<li>New columns: {_names(schema.added)}</li>")
    if schema.removed:
        changes.append(f"<li>Columns gone: {_names(schema.removed)}</li>")
    for t in schema.type_changed:
        changes.append(f"<li><code>{esc(t.column, 60)}</code> changed type from "
                       f"<code>{esc(t.base)}</code> to <code>{esc(t.new)}</code></li>")
    parts.append(f"<h3>Columns</h3><ul>{''.join(changes)}</ul>" if changes
                 else "<p>Both waves have the same columns with the same types.</p>")
    ref = esc(comp.reference or "the panel so far")
    parts.append(_figure(svgs, "wave-shift", ref=ref))
    parts.append(_figure(svgs, "shifted-distributions", ref=ref))
    cols = comp.columns
    if cols:
        rows = [[f"<code>{esc(c.column, 80)}</code>", _num(c.ks_statistic), _p(c.ks_p),
                 _num(c.psi), _pct(c.missing_base), _pct(c.missing_new)]
                for c in cols[: lim.columns]]
        parts.append(_table(["column", "KS statistic", "KS p", "population stability", "missing before",
                             "missing now"], rows, numeric=[1, 2, 3, 4, 5]))
    parts.append("</section>")
    return "".join(parts)


def _span(values: Sequence[int | str]) -> str:
    """Period labels as the page shows them: one label, or the first and last and how many."""
    vals = clean(list(values))
    if not vals:
        return ""
    if len(vals) == 1:
        return str(vals[0])
    return f"{vals[0]} to {vals[-1]} ({len(vals)})"


# --- page ------------------------------------------------------------------------------

CSS = """
.pa-report{--ink:#1F2430;--muted:#5F6673;--rule:#DDE1E7;--wash:#F5F7FA;--blue:#0072B2;--sky:#56B4E9;
--green:#009E73;--orange:#E69F00;--verm:#D55E00;--purple:#CC79A7;
font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"Noto Sans","DejaVu Sans",sans-serif;color:var(--ink);
max-width:1040px;margin:0 auto;padding:0 20px 48px;background:#fff}
.pa-report *{box-sizing:border-box}
.pa-report header{border-bottom:3px solid var(--ink);padding:26px 0 12px;margin-bottom:8px}
.pa-report h1{font-size:26px;margin:0;letter-spacing:-.01em}
.pa-report .pa-sub{color:var(--muted);margin:4px 0 0;font-size:14px}
.pa-report nav{display:flex;flex-wrap:wrap;gap:4px 18px;padding:8px 0 4px;font-size:14px}
.pa-report nav a{color:var(--blue);text-decoration:none;border-bottom:1px solid transparent}
.pa-report nav a:hover{border-bottom-color:var(--blue)}
.pa-report section{padding-top:14px;margin-top:18px;border-top:1px solid var(--rule)}
.pa-report h2{font-size:20px;margin:0 0 10px}
.pa-report h3{font-size:15px;margin:20px 0 8px;color:var(--ink)}
.pa-report code{font:13px/1.3 ui-monospace,"DejaVu Sans Mono",Menlo,Consolas,monospace;background:var(--wash);
padding:1px 4px;border-radius:3px;overflow-wrap:break-word}
.pa-report .pa-lede{font-size:16px;max-width:82ch}
.pa-report .pa-quiet{color:var(--muted);font-size:13px}
.pa-report .pa-chips{display:flex;gap:8px;margin:4px 0 10px}
.pa-report .pa-chip{border-radius:14px;padding:2px 12px;font-size:13px;border:1.5px solid}
.pa-report .pa-chip.pa-error{border-color:var(--verm);color:#9B3D00}
.pa-report .pa-chip.pa-warning{border-color:var(--orange);color:#7A5300}
.pa-report .pa-chip.pa-note{border-color:var(--blue);color:#00507D}
.pa-report .pa-tag{display:inline-block;min-width:62px;text-align:center;font-size:11px;font-weight:700;
text-transform:uppercase;letter-spacing:.04em;border-radius:3px;padding:1px 6px;color:#fff}
.pa-report .pa-tag.pa-error{background:var(--verm)}
.pa-report .pa-tag.pa-warning{background:var(--orange);color:#2B1D00}
.pa-report .pa-tag.pa-note{background:var(--blue)}
.pa-report ol.pa-top{padding-left:22px;margin:6px 0}
.pa-report ol.pa-top li{margin:5px 0}
.pa-report .pa-scroll{overflow-x:auto;margin:8px 0}
.pa-report table{border-collapse:collapse;font-size:13.5px;width:100%}
.pa-report th{text-align:left;font-weight:600;color:var(--muted);border-bottom:1.5px solid var(--ink);
padding:5px 8px;vertical-align:bottom;font-size:12.5px}
.pa-report td{padding:5px 8px;border-bottom:1px solid var(--rule);vertical-align:top}
.pa-report tbody tr:nth-child(even) td{background:#FAFBFC}
.pa-report .pa-n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
.pa-report table.pa-findings td:nth-last-child(n+4){white-space:nowrap}
.pa-report table.pa-findings td:last-child{min-width:34ch}
.pa-report .pa-eg{margin-top:3px;font-size:12.5px;line-height:1.7}
.pa-report .pa-eg code{margin-right:6px;font-size:12px;display:inline-block}
.pa-report table.pa-vars td:first-child{white-space:nowrap}
.pa-report table.pa-narrow{width:auto;min-width:50%}
.pa-report td .pa-nw{white-space:nowrap}
.pa-report dl.pa-facts{display:grid;grid-template-columns:repeat(auto-fill,minmax(150px,1fr));gap:8px;margin:8px 0 14px}
.pa-report .pa-fact{background:var(--wash);border-left:3px solid var(--sky);padding:6px 10px}
.pa-report .pa-fact dt{font-size:12px;color:var(--muted)}
.pa-report .pa-fact dd{margin:0;font-size:17px;font-weight:600;font-variant-numeric:tabular-nums}
.pa-report figure.pa-fig{margin:18px 0 10px}
.pa-report svg.pa-figure{width:100%;height:auto;display:block}
.pa-report figcaption{color:var(--muted);font-size:13px;margin-top:4px;max-width:80ch}
.pa-report .pa-meter{display:inline-block;width:70px;height:8px;background:var(--rule);vertical-align:middle;
border-radius:4px;overflow:hidden;margin-right:6px}
.pa-report .pa-meter>span{display:block;height:100%;background:var(--blue)}
.pa-report .pa-meter-v{font-variant-numeric:tabular-nums;font-size:12.5px}
.pa-report .pa-kind{font-size:12px;white-space:nowrap;padding-left:8px;border-left:4px solid var(--muted)}
.pa-report .pa-k-time-varying{border-color:var(--blue)}
.pa-report .pa-k-nearly-time-invariant{border-color:var(--orange)}
.pa-report .pa-k-time-invariant{border-color:var(--verm)}
.pa-report .pa-k-period-only{border-color:var(--purple)}
.pa-report .pa-k-constant{border-color:#9AA0A6}
.pa-report table.pa-roles{width:auto;margin:8px 0}
.pa-report table.pa-roles td,.pa-report table.pa-roles th{border:1px solid var(--rule);padding:8px 12px;min-width:200px}
.pa-report table.pa-roles tbody th{color:var(--ink);background:var(--wash)}
.pa-report details{margin:10px 0}
.pa-report summary{cursor:pointer;color:var(--blue)}
.pa-report footer{margin-top:30px;padding-top:10px;border-top:1px solid var(--rule);color:var(--muted);font-size:12.5px}
@media print{.pa-report nav{display:none}.pa-report section{break-inside:auto}.pa-report figure{break-inside:avoid}}
"""


def _body(result: Any, inst: InstrumentsResult | None, comp: CompareResult | None,
          svgs: Mapping[str, str], lim: Limits) -> list[str]:
    findings = _all_findings(result, inst, comp)
    parts = [_summary(result, findings, lim), _findings(findings, lim), _structure(result, svgs, lim),
             _variation(result, svgs, lim), _missing(result, svgs, lim)]
    if inst is not None:
        parts.append(_readiness(inst, svgs, lim))
    if comp is not None:
        parts.append(_new_wave(comp, svgs, lim))
    return parts


def _source(result: Any) -> str:
    data = getattr(result, "data", None)
    return str(getattr(data, "source", "") or "")


def _page(result: Any, inst: InstrumentsResult | None, comp: CompareResult | None,
          svgs: Mapping[str, str], lim: Limits, title: str | None) -> str:
    source = _source(result)
    heading = title or "Panel audit"
    present = {"readiness": inst is not None, "new-wave": comp is not None}
    nav = "".join(f'<a href="#{k}">{v}</a>' for k, v in SECTIONS if present.get(k, True))
    when = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    version = esc(__version__)
    sub = f"{esc(source, 160)} \u00b7 " if source else ""
    suffix = " \u2014 " + esc(source, 80) if source else ""
    body = "".join(_body(result, inst, comp, svgs, lim))
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        "<meta name=\"generator\" content=\"panel-audit\">"
        f"<title>{esc(heading)}{suffix}</title>"
        f"<style>{CSS}</style></head><body style=\"margin:0;background:#fff\">"
        f'<div class="pa-report"><header><h1>{esc(heading)}</h1>'
        f'<p class="pa-sub">{sub}written {when} by panel-audit {version}</p></header>'
        f"<nav>{nav}</nav>{body}"
        f"<footer>Written by panel-audit {version}. Figures are drawn from counts and shares "
        "aggregated over units and periods, never one mark per row. The JSON output of the same "
        "run carries every number shown here.</footer></div></body></html>\n"
    )


def render_html(
    profile_result: Any,
    instruments: InstrumentsResult | None = None,
    comparison: CompareResult | None = None,
    *,
    figures: bool | Mapping[str, Any] = True,
    settings: Settings | None = None,
    quantiles: Mapping[str, tuple[Sequence[float], Sequence[float]]] | None = None,
    title: str | None = None,
) -> str:
    """The whole report as one self-contained HTML document (text, UTF-8 when written).

    ``profile_result`` is a ProfileResult; ``instruments`` an InstrumentsResult (a
    document read back from JSON: ``InstrumentsResult.from_dict(doc)``) and
    ``comparison`` a CompareResult (likewise: ``CompareResult.from_dict(doc)``); their
    sections appear only when given. ``figures`` is True (draw them), False
    (none), or figures already drawn by ``build_figures``. The page is kept
    under the ``report.max_bytes`` limit by showing fewer table rows if needed.
    """
    lim = Limits.from_settings(settings or getattr(profile_result, "settings", None))
    inst, comp = _typed_instruments(instruments), _typed_comparison(comparison)
    if figures is True:
        drawn = build_figures(profile_result, inst, comp, quantiles=quantiles, limits=lim)
    elif figures is False:
        drawn = {}
    else:
        drawn = dict(figures)
    svgs = _svgs(drawn)
    page = _page(profile_result, inst, comp, svgs, lim, title)
    while len(page.encode("utf-8")) > lim.max_bytes and lim.columns > 10:
        lim = replace(lim, columns=lim.columns // 2, findings=max(lim.findings // 2, 10),
                      periods_table=max(lim.periods_table // 2, 10), patterns=max(lim.patterns // 2, 5))
        page = _page(profile_result, inst, comp, svgs, lim, title)
    return page


def _fragment(sections: list[str]) -> str:
    return f'<div class="pa-report"><style>{CSS}</style>{"".join(sections)}</div>'


def profile_fragment(result: Any, *, figures: bool = True) -> str:
    """The profile's sections as an HTML fragment for a notebook (``_repr_html_``)."""
    lim = Limits.from_settings(getattr(result, "settings", None))
    svgs = _svgs(build_figures(result, limits=lim)) if figures else {}
    return _fragment(_body(result, None, None, svgs, lim))


def _typed(result: Any, kind: str) -> Any:
    """``result`` if it is a typed result (or None); a clear TypeError for its JSON document,
    naming the ``from_dict`` of the result type ``kind`` that rebuilds one."""
    if isinstance(result, Mapping):
        article = "an" if kind[0] in "AEIOU" else "a"
        raise TypeError(f"the renderer takes {article} {kind}, not its JSON document: rebuild one with "
                        f"auditor.{kind}.from_dict(doc)")
    return result


def _typed_instruments(result: Any) -> InstrumentsResult | None:
    """``result`` if it is an instruments result (or None); a clear error for its JSON."""
    return _typed(result, "InstrumentsResult")


def instruments_fragment(result: InstrumentsResult, *, figures: bool = True) -> str:
    """An instruments result as an HTML fragment for a notebook (``_repr_html_``); a
    document read back from JSON renders through ``InstrumentsResult.from_dict(doc)``."""
    inst = _typed_instruments(result)
    if inst is None:
        raise TypeError("instruments_fragment needs an InstrumentsResult, not None")
    lim = Limits.from_settings(getattr(inst, "settings", None))
    svgs = _svgs(_readiness_figures(inst, lim)) if figures else {}
    items = _readiness_findings(inst)
    items.sort(key=lambda i: SEVERITY_RANK.get(i.finding.severity, 9))
    return _fragment([_findings(items, lim), _readiness(inst, svgs, lim)])


def _typed_comparison(comparison: Any) -> CompareResult | None:
    """``comparison`` if it is a compare result (or None); a clear error for its JSON."""
    return _typed(comparison, "CompareResult")


def compare_fragment(result: CompareResult, *, figures: bool = True) -> str:
    """A compare result as an HTML fragment for a notebook (a saved compare document is
    typed again by ``CompareResult.from_dict``)."""
    from auditor.render import figures as fg

    comp = _typed_comparison(result)
    if comp is None:
        raise TypeError("compare_fragment needs a compare result, not None")
    lim = Limits.from_settings(comp.settings)
    svgs = {}
    if figures and comp.columns:
        svgs["wave-shift"] = fg.to_svg(fg.wave_shift(comp.columns, max_columns=lim.figure_columns),
                                       name="wave-shift")
    items = _wave_items(comp)
    items.sort(key=lambda i: SEVERITY_RANK.get(i.finding.severity, 9))
    return _fragment([_findings(items, lim), _new_wave(comp, svgs, lim)])


# --- writing ---------------------------------------------------------------------------
