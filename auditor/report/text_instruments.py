"""Terminal rendering of ``panel-audit instruments``.

The project's own layout: one line on the sample, the findings, then four blocks:
the regressors with their kind and role; the instrument strength with each F
beside its critical value and the two reference values; the specification tests
as sentences with their numbers; and the coefficients of within, random effects and
Hausman-Taylor side by side for the columns each identifies.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from auditor.report.text import (
    clip,
    findings_block,
    fmt_num,
    paint,
    pct,
    safe,
    table,
    terminal_width,
)

if TYPE_CHECKING:  # pragma: no cover
    from auditor.readiness import InstrumentsResult

_VERDICT_STYLE = {"strong": "bold", "weak": "warning", "not-identified": "error"}


def _coef_cell(est: dict[str, Any] | None, col: str) -> str:
    if not est or col not in est["coef"]:
        return "·"
    return f"{fmt_num(est['coef'][col], 4)} ({fmt_num(est['se'][col], 3)})"


def _test_line(label: str, test: dict[str, Any] | None, missing: str) -> str:
    if not test or test.get("statistic") is None:
        return f"  {label}: {missing}"
    return f"  {label}: {fmt_num(test['statistic'], 4)} on {test['df']} df, p {fmt_num(test['p'], 3)}"


def render(result: InstrumentsResult, width: int | None = None, color: bool = False, *,
           colour: bool | None = None) -> str:
    """The instruments result as terminal text, ``width`` columns wide, ANSI colour when ``color``
    (``colour`` is accepted as the same switch)."""
    width = width or terminal_width()
    colour = color if colour is None else colour
    d = result.to_dict()
    s = d["sample"]
    lines: list[str] = []
    head = (
        f"model readiness of {safe(d['outcome'])}: {fmt_num(s['rows'])} rows in {fmt_num(s['units'])} units, "
        f"{s['periods']} periods"
    )
    if s["rows_dropped"]:
        head += f" ({fmt_num(s['rows_dropped'])} rows with a missing value left out)"
    if s["period_effects"]:
        head += "; period effects added"
    lines += [paint(clip(head, width), "bold", colour), ""]
    lines += findings_block(result.findings, width, colour)
    lines.append("")

    # --- regressors and roles
    declared = "declared with --correlated" if d["roles_declared"] else "X2 suggested by the Mundlak evidence"
    lines.append(paint(f"regressors ({declared}; the constant is Z1)", "bold", colour))
    rows = []
    for c in d["columns"]:
        if c["source"] is None and c["role"] == "X1":
            continue  # period dummies are summarised below
        rows.append([c["column"], c["kind"], c["role"] or "-", pct(c["within_share"])])
    lines += table(["column", "kind", "role", "within part"], rows, width, "lllr")
    periods = [c["column"] for c in d["columns"] if c["source"] is None]
    if periods:
        lines.append(f"  + {len(periods)} period dummies ({safe(periods[0])} ... {safe(periods[-1])}), role X1")
    for item in d["not_identified"]:
        with_ = ", ".join(item.get("with") or [])
        lines.append(f"  not identified: {safe(item['column'])} ({item['reason']}{'; ' + safe(with_) if with_ else ''})")
    oc = d["order_condition"]
    sign = ">=" if oc["met"] else "<"
    lines.append(
        f"  order condition: k1 = {oc['k1']} {sign} g2 = {oc['g2']}, "
        + paint("met" if oc["met"] else "not met", "bold" if oc["met"] else "error", colour)
    )
    lines.append("")

    # --- strength
    ref = d["reference_f"]
    if d["strength"]:
        lines.append(paint("instrument strength for Z2 (unit level: Z2 on [1, Z1] and the X1 unit means)", "bold", colour))
        rows = []
        for r in d["strength"]:
            crit = r["critical_value"]
            rows.append([
                r["endogenous"], fmt_num(r["partial_f"], 4), fmt_num(r["robust_f"], 4), fmt_num(r["partial_r2"], 3),
                f"{r['df'][0]}, {r['df'][1]}",
                fmt_num(crit, 4) if crit is not None else f"{ref['rule_of_thumb']:g} (no cell)",
                "above" if r["at_least_rule_of_thumb"] else "below",
                "above" if r["at_least_lee"] else "below",
                paint(r["verdict"], _VERDICT_STYLE.get(r["verdict"], "dim"), colour),
            ])
        lines += table(
            ["Z2", "F", "F (HC1)", "partial R2", "df", "Stock-Yogo", f"vs {ref['rule_of_thumb']:g}",
             f"vs {ref['lee']:g}", "verdict"],
            rows, width, "lrrrrrrrl",
        )
        lines.append(f"  instruments: {', '.join(safe(x) for x in d['strength'][0]['instruments']) or 'none'}")
        if d["cragg_donald"] is not None:
            lines.append(f"  Cragg-Donald minimum eigenvalue: {fmt_num(d['cragg_donald'], 4)}")
            for r in d["strength"]:
                lines.append(f"  conditional F (Sanderson-Windmeijer) of {safe(r['endogenous'])}: "
                             f"{fmt_num(r['conditional_f'], 4)}")
    elif d["roles"]["Z2"] == []:
        lines.append(paint("instrument strength", "bold", colour))
        lines.append("  no Z2 column, so no time-invariant regressor needs instruments")
    if d["x2_strength"]:
        lines.append("  X2 columns (observation level, instrumented by their own within deviation):")
        rows = [[r["endogenous"], pct(r["within_share"]), fmt_num(r["own_f"], 4), fmt_num(r["other_f_cluster"], 4),
                 fmt_num(r["r2"], 3)] for r in d["x2_strength"]]
        lines += table(["X2", "within part", "F own deviation", "F means (clustered)", "R2"], rows, width, "lrrrr")
    if d["candidates"]:
        lines.append("  each X1 unit mean alone:")
        rows = [[r["endogenous"], r["instrument"], fmt_num(r["partial_f"], 4), fmt_num(r["mundlak_p"], 3),
                 fmt_num(r["c_p"], 3), "yes" if r["usable"] else "no"] for r in d["candidates"]]
        lines += table(["Z2", "mean of", "F", "Mundlak p", "C-test p", "usable"], rows, width, "llrrrl")
        for sg in d["suggestion"]:
            inst = ", ".join(safe(x) for x in sg["instruments"]) or "none usable"
            lines.append(f"  suggested for {safe(sg['endogenous'])}: {inst} "
                         f"(F {fmt_num(sg['partial_f'], 4)}, {sg['verdict']})")
    lines.append("")

    # --- tests
    t = d["tests"]
    lines.append(paint("specification tests", "bold", colour))
    lines.append(_test_line("Mundlak, unit means of X jointly zero (clustered)", t["mundlak"], "not computed"))
    if t["mundlak"] and t["mundlak"].get("flagged"):
        lines.append(f"    means with p below {t['mundlak']['alpha']:g}: "
                     f"{', '.join(safe(c) for c in t['mundlak']['flagged'])}")
    lines.append(_test_line("Hausman, within against random effects", t["hausman_within_random"], "not computed"))
    if t["hausman_within_random"] and t["hausman_within_random"].get("note"):
        lines.append("    " + safe(t["hausman_within_random"]["note"]))
    lines.append(_test_line("Sargan over-identification", t["overidentification"], "none (just identified or no fit)"))
    lines.append(_test_line("Hausman, within against Hausman-Taylor", t["hausman_within_ht"],
                            "none (just identified or no fit)"))
    vc = d["variance_components"]
    if vc:
        lines.append(f"  variance components (random effects): sigma_u {fmt_num(vc['sigma_u'], 4)}, "
                     f"sigma_e {fmt_num(vc['sigma_e'], 4)}, mean theta {fmt_num(vc['theta_mean'], 4)}")
    lines.append("")

    # --- coefficients
    e = d["estimates"]
    lines.append(paint("coefficients (classical standard errors in brackets; · = not identified by that fit)",
                       "bold", colour))
    order: list[str] = []
    for est in (e["within"], e["random"], e["hausman_taylor"]):
        for c in (est or {}).get("coef", {}):
            if c not in order and not c.startswith("period="):
                order.append(c)
    order.sort(key=lambda c: (c != "const", 0))
    rows = [[c, _coef_cell(e["within"], c), _coef_cell(e["random"], c), _coef_cell(e["hausman_taylor"], c)]
            for c in order]
    lines += table(["column", "within", "random effects", "Hausman-Taylor"], rows, width, "lrrr")
    if periods:
        lines.append("  (period dummies estimated, not shown; see --json)")
    if e["hausman_taylor"] is None:
        lines.append("  Hausman-Taylor not estimated (order condition not met, or too few units)")
    return "\n".join(lines) + "\n"
