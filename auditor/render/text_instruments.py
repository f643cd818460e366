"""Terminal rendering of ``panel-audit instruments``.

The project's own layout: one line on the sample, the findings, then four blocks:
the regressors with their kind and role; the instrument strength with each F
beside its critical value and the two reference values; the specification tests
as sentences with their numbers; and the coefficients of within, random effects and
Hausman-Taylor side by side for the columns each identifies.
"""

from __future__ import annotations

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
from auditor.vocab import format_p

if TYPE_CHECKING:  # pragma: no cover
    from auditor.commands.instruments import InstrumentsResult

_VERDICT_STYLE = {"strong": "bold", "weak": "warning", "not-identified": "error"}
_STATE_WORD = {"accepted": "yes", "assumed": "yes (assumed)", "invalid": "no", "undecided": "undecided"}
_FIT_WORD = {"within": "within", "between": "between", "random": "random effects", "mundlak": "Mundlak",
             "hausman_taylor": "Hausman-Taylor"}


def _coef_cell(est: dict[str, Any] | None, col: str) -> str:
    if not est or col not in est["coef"]:
        return "·"
    return f"{fmt_num(est['coef'][col], 4)} ({fmt_num(est['se'][col], 3)})"


def _test_line(label: str, test: dict[str, Any] | None, missing: str) -> str:
    if not test or test.get("statistic") is None:
        return f"  {label}: {missing}"
    return f"  {label}: {fmt_num(test['statistic'], 4)} on {test['df']} df, p {format_p(test['p'])}"


def _short(names: list[str]) -> str:
    if len(names) <= 4:
        return ", ".join(safe(n) for n in names)
    return f"{safe(names[0])}, {safe(names[1])}, ..., {safe(names[-1])}"


def _para(text: str, width: int, indent: int = 2) -> list[str]:
    """``text`` wrapped to ``width`` with ``indent`` spaces before each line, never cut."""
    return [" " * indent + line.lstrip() if i else " " * indent + line
            for i, line in enumerate(wrap(text, width - indent, indent + 2))]


def _regressors(d: dict[str, Any], width: int, colour: bool) -> list[str]:
    declared = "declared with --correlated" if d["roles_declared"] else "X2 suggested by the Mundlak evidence"
    lines = [paint(f"regressors ({declared}; the constant is Z1)", "bold", colour)]
    rows = []
    for c in d["columns"]:
        if c.get("period_effect"):
            continue  # summarised below
        rows.append([c["column"], c["kind"], c["role"] or "-", pct(c["within_share"])])
    lines += table(["column", "kind", "role", "within part"], rows, width, "lllr")
    periods = d.get("period_effects") or []
    if periods:
        lines += _para(f"+ {len(periods)} period effects: {_short(periods)}; exogenous, each instrumented by "
                       "itself, not counted in k1 and left out of the contrasts", width)
    for item in d["not_identified"]:
        with_ = _short(list(item.get("with") or []))
        fits = item.get("fits") or []
        where = ("every fit" if len(fits) >= len(_FIT_WORD) else ", ".join(_FIT_WORD.get(f, f) for f in fits))
        lines += _para(f"not identified by {where}: {safe(item['column'])} ({item['reason']}"
                       f"{'; with ' + with_ if with_ else ''})", width)
    for item in d.get("near_collinear") or []:
        lines += _para(f"nearly collinear ({item['fit']}): {safe(item['column'])}, {100 * item['r2']:.4g}% of its "
                       "variation explained by the columns before it", width)
    oc = d["order_condition"]
    sign = ">=" if oc["met"] else "<"
    lines.append(
        f"  order condition: k1 = {oc['k1']} {sign} g2 = {oc['g2']}, "
        + paint("met" if oc["met"] else "not met", "bold" if oc["met"] else "error", colour)
    )
    return lines


def _strength(d: dict[str, Any], width: int, colour: bool) -> list[str]:
    ref = d["reference_f"]
    lines: list[str] = []
    if d["strength"]:
        lines.append(paint("instrument strength (unit level: each endogenous column on [1, Z1] and the X1 unit "
                           "means)", "bold", colour))
        sizes = {r.get("critical_size") for r in d["strength"] if r.get("critical_size")}
        sy_head = f"Stock-Yogo {sizes.pop()}%" if len(sizes) == 1 else "Stock-Yogo"
        rows = []
        for r in d["strength"]:
            crit = r["critical_value"]
            rows.append([
                r["endogenous"], fmt_num(r["partial_f"], 4), fmt_num(r["robust_f"], 4), fmt_num(r["partial_r2"], 3),
                f"{r['df'][0]}, {r['df'][1]}", format_p(r.get("p")),
                fmt_num(crit, 4) if crit is not None else f"{ref['rule_of_thumb']:g} (no cell)",
                "above" if r["at_least_rule_of_thumb"] else "below",
                "above" if r["at_least_lee"] else "below",
                paint(r["verdict"], _VERDICT_STYLE.get(r["verdict"], "dim"), colour),
            ])
        lines += table(
            ["endogenous", "F", "F (HC1)", "partial R2", "df", "p", sy_head, f"vs {ref['rule_of_thumb']:g}",
             f"vs {ref['lee']:g}", "verdict"],
            rows, width, "lrrrrrrrrl",
        )
        lines.append(f"  instruments: {', '.join(safe(x) for x in d['strength'][0]['instruments']) or 'none'}")
        included = d["strength"][0].get("included") or []
        if any(c.startswith("mean(") for c in included):
            lines.append(f"  included besides the constant: {', '.join(safe(x) for x in included)}")
        for r in d["strength"]:
            ar = r.get("anderson_rubin")
            if ar is not None:
                lines += _para(f"Anderson-Rubin {100 * ar['level']:g}% set for {safe(r['endogenous'])}: "
                               f"{ar_text(ar)}", width)
            elif r.get("anderson_rubin_note"):
                lines += _para(f"Anderson-Rubin set: {r['anderson_rubin_note']}", width)
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
        rows = [[r["endogenous"], r["instrument"], fmt_num(r["partial_f"], 4), format_p(r["mundlak_p"]),
                 format_p(r["c_p"]), _STATE_WORD.get(r.get("state"), "yes" if r["usable"] else "no")]
                for r in d["candidates"]]
        lines += table(["Z2", "mean of", "F", "Mundlak p", "C-test p", "usable"], rows, width, "llrrrl")
        for sg in d["suggestion"]:
            inst = ", ".join(safe(x) for x in sg["instruments"]) or "none usable"
            line = f"  suggested for {safe(sg['endogenous'])}: {inst} (F {fmt_num(sg['partial_f'], 4)}, {sg['verdict']}"
            if sg.get("set_rejected"):
                line += ("; but the over-identification tests reject the instrument set and no single mean can be "
                         "blamed, so the validity of these instruments is not established)")
            else:
                line += ")"
            lines += _para(line.strip(), width)
    return lines


def ar_text(ar: dict[str, Any]) -> str:
    """An Anderson-Rubin set in words: its pieces, or what an empty or unbounded set means."""
    kind = ar.get("kind")
    if kind == "empty":
        return ("empty: at every value of the coefficient the excluded unit means still explain the unit-level "
                "residual, so the test rejects the model (its over-identifying restrictions) everywhere")
    if kind == "whole line":
        return "the whole line: the instruments carry no usable information on this coefficient"

    def end(v: float | None, sign: str) -> str:
        return f"{sign}inf" if v is None else fmt_num(v, 4)

    pieces = [f"[{end(lo, '-')}, {end(hi, '+')}]" for lo, hi in ar["intervals"]]
    text = " or ".join(pieces)
    if kind == "two rays":
        text += " (two rays: unbounded, the instruments are weak)"
    return text


def _tests(d: dict[str, Any]) -> list[str]:
    t = d["tests"]
    lines = [_test_line("Mundlak, unit means of X jointly zero (clustered)", t["mundlak"], "not computed")]
    if t["mundlak"] and t["mundlak"].get("flagged"):
        lines.append(f"    means with p below {t['mundlak']['alpha']:g}: "
                     f"{', '.join(safe(c) for c in t['mundlak']['flagged'])}")
    lines.append(_test_line("Hausman, within against random effects", t["hausman_within_random"], "not computed"))
    if t["hausman_within_random"] and t["hausman_within_random"].get("note"):
        lines.append("    " + safe(t["hausman_within_random"]["note"]))
    lines.append(_test_line("Sargan over-identification", t["overidentification"], "none (just identified or no fit)"))
    lines.append(_test_line("Hausman, within against Hausman-Taylor", t["hausman_within_ht"],
                            "none (just identified or no fit)"))
    lines.append(_test_line("attrition (Nijman-Verbeek, next period observed, clustered)", t.get("attrition"),
                            "not computed (nobody leaves the panel)"))
    vc = d["variance_components"]
    if vc:
        lines.append(f"  random effects: sd of the unit effect {fmt_num(vc['sigma_u'], 4)}, sd of the idiosyncratic "
                     f"error {fmt_num(vc['sigma_e'], 4)}, mean quasi-demeaning weight {fmt_num(vc['theta_mean'], 4)}")
    return lines


def _wrapped_tests(d: dict[str, Any], width: int) -> list[str]:
    out: list[str] = []
    for line in _tests(d):
        indent = len(line) - len(line.lstrip())
        out += _para(line.strip(), width, indent)
    return out


def _coefficients(d: dict[str, Any], width: int, colour: bool) -> list[str]:
    e = d["estimates"]
    lines = [paint("coefficients (classical standard errors in brackets; · = not identified by that fit)",
                   "bold", colour)]
    periods = set(d.get("period_effects") or [])
    order = ["const"] + [c["column"] for c in d["columns"] if c["column"] not in periods]
    present = {c for est in (e["within"], e["random"], e["hausman_taylor"]) for c in (est or {}).get("coef", {})}
    rows = [[c, _coef_cell(e["within"], c), _coef_cell(e["random"], c), _coef_cell(e["hausman_taylor"], c)]
            for c in order if c in present]
    lines += table(["column", "within", "random effects", "Hausman-Taylor"], rows, width, "lrrr")
    if periods:
        lines.append("  (period effects estimated, not shown; see --json)")
    members = [i for i in d["not_identified"] if i.get("fits") == ["within"] and i.get("with")]
    for i in members:
        lines += _para(f"the within coefficients of {_short(list(i['with']))} depend on setting "
                       f"{safe(i['column'])} aside; the other coefficients do not", width)
    if e["hausman_taylor"] is None:
        lines.append("  Hausman-Taylor not estimated (order condition not met, or too few units)")
    return lines


_RICHER = (("hausman_taylor", "Hausman-Taylor"), ("amemiya_macurdy", "Amemiya-MaCurdy"),
           ("breusch_mizon_schmidt", "Breusch-Mizon-Schmidt"))


def _richer(d: dict[str, Any], width: int, colour: bool) -> list[str]:
    """Hausman-Taylor, Amemiya-MaCurdy and Breusch-Mizon-Schmidt side by side."""
    e, t = d["estimates"], d["tests"]
    if not e.get("amemiya_macurdy"):
        return []
    lines = ["", paint("richer instrument sets (same theta as Hausman-Taylor; classical standard errors)", "bold",
                       colour)]
    periods = set(d.get("period_effects") or [])
    order = ["const"] + [c["column"] for c in d["columns"] if c["column"] not in periods]
    present = set(e["hausman_taylor"]["coef"])
    rows = [[c, *[_coef_cell(e.get(k), c) for k, _ in _RICHER]] for c in order if c in present]
    lines += table(["column", *[label for _, label in _RICHER]], rows, width, "lrrr")
    by = t.get("overidentification_by_estimator") or {}
    against = t.get("hausman_against_ht") or {}
    for key, label in _RICHER:
        test = by.get(key)
        inst = (e.get(key) or {}).get("instruments")
        extra = f" ({inst} instruments)" if inst else ""
        lines.append(_test_line(f"Sargan, {label}{extra}", test, "none (just identified)"))
        if key in against:
            lines.append(_test_line(f"Hausman, Hausman-Taylor against {label}", against.get(key), "not computed"))
    for key, label in _RICHER[1:]:
        note = (e.get(key) or {}).get("note")
        if note:
            lines += _para(f"{label}: {note}", width)
    return lines


def render(result: InstrumentsResult, *, width: int | None = None, colour: bool = False,
           show: str | None = None) -> str:
    """The instruments result as terminal text, ``width`` columns wide (the terminal's when
    None), ANSI colour when ``colour``; ``show``: the least severe findings listed."""
    width = width or terminal_width()
    d = result.to_dict()
    s = d["sample"]
    head = (
        f"model readiness of {safe(d['outcome'])}: {fmt_num(s['rows'])} rows in {fmt_num(s['units'])} units, "
        f"{s['periods']} periods"
    )
    if s["rows_dropped"]:
        head += f" ({fmt_num(s['rows_dropped'])} rows with a missing value left out)"
    if s["period_effects"]:
        head += "; period effects added"
    lines = [paint(line, "bold", colour) for line in wrap(head, width, 2)] + [""]
    lines += findings_block(result.findings, width, colour, show=show)
    lines.append("")
    lines += _regressors(d, width, colour)
    lines.append("")
    lines += _strength(d, width, colour)
    lines.append("")
    lines.append(paint("specification tests", "bold", colour))
    lines += _wrapped_tests(d, width)
    lines.append("")
    lines += _coefficients(d, width, colour)
    lines += _richer(d, width, colour)
    return "\n".join(lines) + "\n"
