"""Terminal rendering of ``panel-audit instruments``.

The project's own layout: one line on the sample, the findings, then four blocks:
the regressors with their kind and role; the instrument strength with each F
beside its critical value and the two reference values; the specification tests
as sentences with their numbers; and the coefficients of within, random effects and
Hausman-Taylor side by side for the columns each identifies.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

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
    from auditor.commands.instruments_values import (
        AttritionTest,
        ChiSquareTest,
        ConfidenceSet,
        FitCoefficients,
        MundlakTest,
    )

_VERDICT_STYLE = {"strong": "bold", "weak": "warning", "not-identified": "error"}
_STATE_WORD = {"accepted": "yes", "assumed": "yes (assumed)", "invalid": "no", "undecided": "undecided"}
_FIT_WORD = {"within": "within", "between": "between", "random": "random effects", "mundlak": "Mundlak",
             "hausman_taylor": "Hausman-Taylor"}


def _coef_cell(est: FitCoefficients | None, col: str) -> str:
    if est is None or col not in est.coef:
        return "·"
    return f"{fmt_num(est.coef[col], 4)} ({fmt_num(est.se.get(col), 3)})"


def _test_line(label: str, test: ChiSquareTest | MundlakTest | AttritionTest | None, missing: str) -> str:
    if test is None or test.statistic is None:
        return f"  {label}: {missing}"
    return f"  {label}: {fmt_num(test.statistic, 4)} on {test.df} df, p {format_p(test.p)}"


def _short(names: Sequence[str]) -> str:
    if len(names) <= 4:
        return ", ".join(safe(n) for n in names)
    return f"{safe(names[0])}, {safe(names[1])}, ..., {safe(names[-1])}"


def _para(text: str, width: int, indent: int = 2) -> list[str]:
    """``text`` wrapped to ``width`` with ``indent`` spaces before each line, never cut."""
    return [" " * indent + line.lstrip() if i else " " * indent + line
            for i, line in enumerate(wrap(text, width - indent, indent + 2))]


def _regressors(r: InstrumentsResult, width: int, colour: bool) -> list[str]:
    declared = "declared with --correlated" if r.roles_declared else "X2 suggested by the Mundlak evidence"
    lines = [paint(f"regressors ({declared}; the constant is Z1)", "bold", colour)]
    rows = [[c.column, c.kind, c.role or "-", pct(c.within_share)] for c in r.columns
            if not c.period_effect]  # period effects are summarised below
    lines += table(["column", "kind", "role", "within part"], rows, width, "lllr")
    periods = r.period_effects
    if periods:
        lines += _para(f"+ {len(periods)} period effects: {_short(periods)}; exogenous, each instrumented by "
                       "itself, not counted in k1 and left out of the contrasts", width)
    for item in r.not_identified:
        with_ = _short(item.with_)
        where = ("every fit" if len(item.fits) >= len(_FIT_WORD)
                 else ", ".join(_FIT_WORD.get(f, f) for f in item.fits))
        lines += _para(f"not identified by {where}: {safe(item.column)} ({item.reason}"
                       f"{'; with ' + with_ if with_ else ''})", width)
    for near in r.near_collinear:
        share = "an unknown share" if near.r2 is None else f"{100 * near.r2:.4g}%"
        lines += _para(f"nearly collinear ({near.fit}): {safe(near.column)}, {share} of its "
                       "variation explained by the columns before it", width)
    oc = r.order_condition
    if oc is not None:
        sign = ">=" if oc.met else "<"
        lines.append(
            f"  order condition: k1 = {oc.k1} {sign} g2 = {oc.g2}, "
            + paint("met" if oc.met else "not met", "bold" if oc.met else "error", colour)
        )
    return lines


def _unit_strength(r: InstrumentsResult, width: int, colour: bool) -> list[str]:
    """The unit-level first stages of the Z2 columns (and X2 columns identified between units only)."""
    ref, strength = r.reference_f, r.strength
    lines = [paint("instrument strength (unit level: each endogenous column on [1, Z1] and the X1 unit means)",
                   "bold", colour)]
    sizes = {s.critical_size for s in strength if s.critical_size}
    sy_head = f"Stock-Yogo {sizes.pop()}%" if len(sizes) == 1 else "Stock-Yogo"
    rows = []
    for s in strength:
        crit = s.critical_value
        rows.append([
            s.endogenous, fmt_num(s.partial_f, 4), fmt_num(s.robust_f, 4), fmt_num(s.partial_r2, 3),
            ", ".join(str(v) for v in s.df[:2]), format_p(s.p),
            fmt_num(crit, 4) if crit is not None else f"{ref.rule_of_thumb:g} (no cell)",
            "above" if s.at_least_rule_of_thumb else "below",
            "above" if s.at_least_lee else "below",
            paint(str(s.verdict), _VERDICT_STYLE.get(str(s.verdict), "dim"), colour),
        ])
    lines += table(
        ["endogenous", "F", "F (HC1)", "partial R2", "df", "p", sy_head, f"vs {ref.rule_of_thumb:g}",
         f"vs {ref.lee:g}", "verdict"],
        rows, width, "lrrrrrrrrl",
    )
    lines.append(f"  instruments: {', '.join(safe(x) for x in strength[0].instruments) or 'none'}")
    included = strength[0].included
    if any(c.startswith("mean(") for c in included):
        lines.append(f"  included besides the constant: {', '.join(safe(x) for x in included)}")
    for s in strength:
        if s.anderson_rubin is not None:
            level = "" if s.anderson_rubin.level is None else f" {100 * s.anderson_rubin.level:g}%"
            lines += _para(f"Anderson-Rubin{level} set for {safe(s.endogenous)}: {ar_text(s.anderson_rubin)}", width)
        elif s.anderson_rubin_note:
            lines += _para(f"Anderson-Rubin set: {s.anderson_rubin_note}", width)
    if r.cragg_donald is not None:
        lines.append(f"  Cragg-Donald minimum eigenvalue: {fmt_num(r.cragg_donald, 4)}")
        for s in strength:
            lines.append(f"  conditional F (Sanderson-Windmeijer) of {safe(s.endogenous)}: "
                         f"{fmt_num(s.conditional_f, 4)}")
    return lines


def _strength(r: InstrumentsResult, width: int, colour: bool) -> list[str]:
    lines: list[str] = []
    if r.strength:
        lines += _unit_strength(r, width, colour)
    elif not r.roles.z2:
        lines.append(paint("instrument strength", "bold", colour))
        lines.append("  no Z2 column, so no time-invariant regressor needs instruments")
    if r.x2_strength:
        lines.append("  X2 columns (observation level, instrumented by their own within deviation):")
        rows = [[x.endogenous, pct(x.within_share), fmt_num(x.own_f, 4), fmt_num(x.other_f_cluster, 4),
                 fmt_num(x.r2, 3)] for x in r.x2_strength]
        lines += table(["X2", "within part", "F own deviation", "F means (clustered)", "R2"], rows, width, "lrrrr")
    if r.candidates:
        lines.append("  each X1 unit mean alone:")
        rows = [[c.endogenous, c.instrument, fmt_num(c.partial_f, 4), format_p(c.mundlak_p), format_p(c.c_p),
                 _STATE_WORD.get(str(c.state), "yes" if c.usable else "no")] for c in r.candidates]
        lines += table(["Z2", "mean of", "F", "Mundlak p", "C-test p", "usable"], rows, width, "llrrrl")
        for sg in r.suggestion:
            inst = ", ".join(safe(x) for x in sg.instruments) or "none usable"
            line = f"  suggested for {safe(sg.endogenous)}: {inst} (F {fmt_num(sg.partial_f, 4)}, {sg.verdict}"
            if sg.set_rejected:
                line += ("; but the over-identification tests reject the instrument set and no single mean can be "
                         "blamed, so the validity of these instruments is not established)")
            else:
                line += ")"
            lines += _para(line.strip(), width)
    return lines


def ar_text(ar: ConfidenceSet) -> str:
    """An Anderson-Rubin set in words: its pieces, or what an empty or unbounded set means."""
    kind = ar.kind
    if kind == "empty":
        return ("empty: at every value of the coefficient the excluded unit means still explain the unit-level "
                "residual, so the test rejects the model (its over-identifying restrictions) everywhere")
    if kind == "whole line":
        return "the whole line: the instruments carry no usable information on this coefficient"

    def end(v: float | None, sign: str) -> str:
        return f"{sign}inf" if v is None else fmt_num(v, 4)

    pieces = [f"[{end(lo, '-')}, {end(hi, '+')}]" for lo, hi in ar.intervals]
    text = " or ".join(pieces)
    if kind == "two rays":
        text += " (two rays: unbounded, the instruments are weak)"
    return text


def _tests(r: InstrumentsResult) -> list[str]:
    t = r.tests
    lines = [_test_line("Mundlak, unit means of X jointly zero (clustered)", t.mundlak, "not computed")]
    if t.mundlak is not None and t.mundlak.flagged:
        lines.append(f"    means with p below {t.mundlak.alpha:g}: {', '.join(safe(c) for c in t.mundlak.flagged)}")
    lines.append(_test_line("Hausman, within against random effects", t.hausman_within_random, "not computed"))
    if t.hausman_within_random is not None and t.hausman_within_random.note:
        lines.append("    " + safe(t.hausman_within_random.note))
    lines.append(_test_line("Sargan over-identification", t.overidentification, "none (just identified or no fit)"))
    lines.append(_test_line("Hausman, within against Hausman-Taylor", t.hausman_within_ht,
                            "none (just identified or no fit)"))
    lines.append(_test_line("attrition (Nijman-Verbeek, next period observed, clustered)", t.attrition,
                            "not computed (nobody leaves the panel)"))
    vc = r.variance_components
    if vc is not None:
        lines.append(f"  random effects: sd of the unit effect {fmt_num(vc.sigma_u, 4)}, sd of the idiosyncratic "
                     f"error {fmt_num(vc.sigma_e, 4)}, mean quasi-demeaning weight {fmt_num(vc.theta_mean, 4)}")
    return lines


def _wrapped_tests(r: InstrumentsResult, width: int) -> list[str]:
    out: list[str] = []
    for line in _tests(r):
        indent = len(line) - len(line.lstrip())
        out += _para(line.strip(), width, indent)
    return out


def _shown_columns(r: InstrumentsResult) -> list[str]:
    """The constant and every design column but the period effects, in the document's order."""
    periods = set(r.period_effects)
    return ["const"] + [c.column for c in r.columns if c.column not in periods]


def _coefficients(r: InstrumentsResult, width: int, colour: bool) -> list[str]:
    e = r.estimates
    lines = [paint("coefficients (classical standard errors in brackets; · = not identified by that fit)",
                   "bold", colour)]
    shown = (e.within, e.random, e.hausman_taylor)
    present = {c for est in shown if est is not None for c in est.coef}
    rows = [[c, *[_coef_cell(est, c) for est in shown]] for c in _shown_columns(r) if c in present]
    lines += table(["column", "within", "random effects", "Hausman-Taylor"], rows, width, "lrrr")
    if r.period_effects:
        lines.append("  (period effects estimated, not shown; see --json)")
    for i in r.not_identified:
        if tuple(i.fits) == ("within",) and i.with_:
            lines += _para(f"the within coefficients of {_short(i.with_)} depend on setting "
                           f"{safe(i.column)} aside; the other coefficients do not", width)
    if e.hausman_taylor is None:
        lines.append("  Hausman-Taylor not estimated (order condition not met, or too few units)")
    return lines


def _richer(r: InstrumentsResult, width: int, colour: bool) -> list[str]:
    """Hausman-Taylor, Amemiya-MaCurdy and Breusch-Mizon-Schmidt side by side."""
    e, t = r.estimates, r.tests
    if e.amemiya_macurdy is None or e.hausman_taylor is None:
        return []
    by = t.overidentification_by_estimator
    against = t.hausman_against_ht
    # (label, coefficients, its Sargan test, whether a contrast with Hausman-Taylor is listed, that contrast)
    sets = (
        ("Hausman-Taylor", e.hausman_taylor, by.hausman_taylor if by else None, False, None),
        ("Amemiya-MaCurdy", e.amemiya_macurdy, by.amemiya_macurdy if by else None, against is not None,
         against.amemiya_macurdy if against else None),
        ("Breusch-Mizon-Schmidt", e.breusch_mizon_schmidt, by.breusch_mizon_schmidt if by else None,
         against is not None, against.breusch_mizon_schmidt if against else None),
    )
    lines = ["", paint("richer instrument sets (same theta as Hausman-Taylor; classical standard errors)", "bold",
                       colour)]
    present = set(e.hausman_taylor.coef)
    rows = [[c, *[_coef_cell(fit, c) for _, fit, _, _, _ in sets]] for c in _shown_columns(r) if c in present]
    lines += table(["column", *[label for label, *_ in sets]], rows, width, "lrrr")
    for label, fit, sargan, listed, contrast in sets:
        inst = fit.instruments if fit is not None else None
        extra = f" ({inst} instruments)" if inst else ""
        lines.append(_test_line(f"Sargan, {label}{extra}", sargan, "none (just identified)"))
        if listed:
            lines.append(_test_line(f"Hausman, Hausman-Taylor against {label}", contrast, "not computed"))
    for label, fit, *_ in sets[1:]:
        if fit is not None and fit.note:
            lines += _para(f"{label}: {fit.note}", width)
    return lines


def render(result: InstrumentsResult, *, width: int | None = None, colour: bool = False,
           show: str | None = None) -> str:
    """The instruments result as terminal text, ``width`` columns wide (the terminal's when
    None), ANSI colour when ``colour``; ``show``: the least severe findings listed."""
    width = width or terminal_width()
    s = result.sample
    head = (
        f"model readiness of {safe(result.outcome)}: {fmt_num(s.rows)} rows in {fmt_num(s.units)} units, "
        f"{s.periods} periods"
    )
    if s.rows_dropped:
        head += f" ({fmt_num(s.rows_dropped)} rows with a missing value left out)"
    if s.period_effects:
        head += "; period effects added"
    lines = [paint(line, "bold", colour) for line in wrap(head, width, 2)] + [""]
    lines += findings_block(result.findings, width, colour, show=show)
    lines.append("")
    lines += _regressors(result, width, colour)
    lines.append("")
    lines += _strength(result, width, colour)
    lines.append("")
    lines.append(paint("specification tests", "bold", colour))
    lines += _wrapped_tests(result, width)
    lines.append("")
    lines += _coefficients(result, width, colour)
    lines += _richer(result, width, colour)
    return "\n".join(lines) + "\n"
