"""What each finding code means: written once, read by ``panel-audit explain``, the text and
HTML renderers (a one-line gloss) and the JSON Schema.

For every code of ``auditor.checks.findings.CHECKS``: what it means, what its ``count`` counts,
why it matters for estimation, and what to do. A test checks that every check has an
entry and that no entry is left without a check.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Explanation:
    """The four parts of a finding code's explanation (plain sentences)."""

    meaning: str
    count: str
    why: str
    action: str


E = Explanation

EXPLANATIONS: dict[str, Explanation] = {
    # --- profile ---------------------------------------------------------------
    "missing-keys": E(
        "Rows whose unit or time key is empty.",
        "rows with a missing unit or time key",
        "Such rows belong to no unit or no period; they are excluded from every statistic, and a model "
        "package would drop them or misplace them.",
        "Recover the keys from the source, or remove the rows knowingly before estimating.",
    ),
    "duplicate-keys": E(
        "Several rows share one (unit, period) key.",
        "rows beyond the first for each duplicated key",
        "A panel has one row per unit and period; duplicates double-count observations, distort unit means and "
        "the within transformation, and usually signal a bad merge or a re-delivered wave.",
        "List them with --details, find which copy is right, and keep one row per key.",
    ),
    "gaps": E(
        "Units absent in a period between their first and last period.",
        "units with at least one gap",
        "Gaps make the panel unbalanced and break lags and first differences; if absence is related to the "
        "outcome the estimates can be inconsistent.",
        "Check whether the gaps are real non-response or lost rows; model them as unbalanced, or restore the rows.",
    ),
    "irregular-periods": E(
        "The period grid skips a whole period (a wave missing for everybody).",
        "periods missing from the grid",
        "Period effects and lags assume consecutive periods; a missing wave changes what 'the previous period' is.",
        "Confirm the wave was never collected, or find the file that is missing.",
    ),
    "constant-column": E(
        "A column with one value in every row.",
        "distinct values (always 1)",
        "A constant carries no variation, so no model can estimate its effect; it is collinear with the intercept.",
        "Leave it out of the model, or check whether the export lost its values.",
    ),
    "nearly-time-invariant": E(
        "A column meant to be fixed that changes for only a few units, or whose within share is tiny.",
        "units whose value changes",
        "A within estimator identifies its effect from those few changes alone, which are often coding errors; "
        "as a time-invariant regressor it would be mis-specified by the changes.",
        "Look at the changing units (--details); correct coding errors, or pass --treat-as-invariant to "
        "instruments if the changes are errors.",
    ),
    "absorbed-by-time": E(
        "Period effects explain (almost) all of a column's within variation, as for age or potential experience.",
        "units whose value changes",
        "With unit and period effects in the model, the within fit cannot estimate the column (exactly "
        "absorbed) or estimates it very imprecisely (nearly absorbed); the levels fits can still identify it.",
        "Decide which of the trend and the period effects the within model should carry; instruments reports "
        "per fit what is identified.",
    ),
    "near-constant": E(
        "One value holds nearly every row of a column.",
        "distinct values of the column",
        "Its effect rests on the few rows with another value, so estimates are fragile and driven by outliers.",
        "Check the rare values; consider whether the column belongs in the model.",
    ),
    "few-switchers": E(
        "A 0/1 column that few units switch within their own rows.",
        "units that switch between 0 and 1",
        "A within estimate of a binary regressor is identified only from switchers; with few of them it is "
        "imprecise and may reflect those units' peculiarities.",
        "Report how many switchers identify the effect, or prefer a model that also uses between variation.",
    ),
    "missing-in-period": E(
        "A column entirely missing in one or more periods (a question not asked in that wave).",
        "periods in which the column is missing for every unit",
        "A model using the column loses those periods altogether, which changes the sample and the period effects.",
        "Check the questionnaire of that wave; model the periods separately or impute knowingly.",
    ),
    "high-missing": E(
        "A column missing in a large share of rows.",
        "rows where the column is missing",
        "Complete-case estimation drops those rows; if missingness is related to the outcome the estimates can "
        "be inconsistent.",
        "Look at who is missing (--details); consider whether the column is needed or how to handle the gaps.",
    ),
    "non-finite": E(
        "Infinite values in a numeric column.",
        "rows holding an infinite value",
        "They are left out of every statistic here, but most estimators fail or return nonsense on them.",
        "Find where they come from (a division by zero, a log of zero) and recode them.",
    ),
    "unbalanced": E(
        "Units are observed in different numbers of periods.",
        "units in the panel",
        "Random-effects weights and several tests depend on each unit's number of periods; attrition may be "
        "selective.",
        "Nothing to fix as such; look at attrition and gaps, and at the attrition test of instruments.",
    ),
    "singleton-units": E(
        "Units observed in one period only.",
        "units with a single row",
        "They contribute nothing to a within estimator and only to the between part of other fits.",
        "Keep them for random effects if appropriate; do not count them as panel information.",
    ),
    "period-only": E(
        "A column that varies across periods but is the same for every unit within a period (a national price, "
        "a year dummy).",
        "distinct values of the column",
        "Period effects absorb it completely; beside them its effect is not identified, and instruments treats it "
        "as a period effect.",
        "Use it as a period effect, or leave out full period effects if its own coefficient is of interest.",
    ),
    "schema-mismatch": E(
        "A column's type differs between the files of one panel.",
        "files whose type for the column is listed",
        "The column is read as a common type; a text id in one wave and a number in another can split or merge "
        "units.",
        "Re-export the waves with one type per column.",
    ),
    "column-all-missing": E(
        "A column with no value in any row.",
        "rows with a value (always 0)",
        "It cannot enter any model.",
        "Check the export; leave it out.",
    ),
    "files-skipped": E(
        "Files in a data folder or glob that are not in a data format, left out of the panel.",
        "files skipped",
        "If one of them was meant to be a wave, the panel is missing it.",
        "Check the list; rename or convert a wave that was skipped by mistake.",
    ),
    "unit-key-twins": E(
        "Unit ids that differ only by Unicode form or invisible characters.",
        "groups of ids that look the same",
        "They are counted as different units although they are probably the same one, which splits its history.",
        "Normalise the ids at the source (one Unicode form, no invisible characters).",
    ),
    # --- instruments -----------------------------------------------------------
    "order-condition": E(
        "Fewer excluded unit means of exogenous time-varying regressors (k1) than correlated columns identified "
        "between units only (g2).",
        "how many instruments are missing (g2 - k1)",
        "Hausman-Taylor is not identified; its estimates would not exist.",
        "Declare fewer regressors correlated, or add exogenous time-varying regressors.",
    ),
    "weak-instrument": E(
        "A Z2 column whose first-stage F is below its critical value.",
        "not used",
        "With weak instruments the Hausman-Taylor coefficient is imprecise and, in finite samples, biased towards "
        "random effects; its usual confidence interval cannot be trusted.",
        "Look at the Anderson-Rubin set, the candidate instruments and the richer instrument sets.",
    ),
    "invalid-instrument": E(
        "An X1 column whose unit mean the evidence rejects as an instrument.",
        "not used",
        "An instrument correlated with the unit effect makes the Hausman-Taylor estimates inconsistent.",
        "Consider declaring the column correlated (X2) and check the other instruments.",
    ),
    "overidentification-rejected": E(
        "The Sargan test or the within vs Hausman-Taylor contrast rejects the over-identifying restrictions.",
        "not used",
        "At least one instrument is probably correlated with the unit effect; the Hausman-Taylor estimates are "
        "then inconsistent.",
        "Look at the candidates' states and the difference-in-Sargan tests; revisit the roles.",
    ),
    "not-identified": E(
        "A regressor whose coefficient one or more fits cannot estimate (the finding names them).",
        "not used",
        "Left out of those fits; the coefficients of the other members of its collinear set in those fits depend "
        "on which member is left out.",
        "Decide which member the model should carry, or drop the redundant column.",
    ),
    "near-collinear": E(
        "A regressor almost a linear combination of the columns before it in a fit (kept).",
        "not used",
        "Its coefficient is imprecise and sensitive to small changes in the data.",
        "Consider whether both the column and the ones that explain it are needed.",
    ),
    "correlated-with-effect": E(
        "The Mundlak test finds the unit means of the time-varying regressors jointly significant.",
        "unit means with a significant coefficient",
        "Evidence against random effects' assumption that no time-varying regressor is correlated with the unit "
        "effect; if it fails, random-effects estimates are inconsistent.",
        "State the evidence; the flagged columns are candidates for X2.",
    ),
    "random-effects-rejected": E(
        "The Hausman test rejects equal within and random-effects coefficients.",
        "not used",
        "Evidence against the random-effects assumption, under which both fits are consistent.",
        "State the evidence; a test with limited power does not prove the opposite when it accepts.",
    ),
    "hausman-not-positive-definite": E(
        "In a Hausman contrast the difference of the covariance matrices has negative eigenvalues.",
        "not used",
        "The statistic is computed on the positive directions only, with fewer degrees of freedom.",
        "Read the test with care; it usually means the two fits' variance estimates disagree.",
    ),
    "outcome-time-invariant": E(
        "The outcome never changes within a unit.",
        "not used",
        "A within model has nothing to explain; only between-unit comparisons are possible.",
        "Check the outcome column; use a cross-section model if it really is fixed.",
    ),
    "too-few-units": E(
        "Fewer units than unit-level parameters.",
        "units in the sample",
        "The between, random-effects, Mundlak and Hausman-Taylor fits cannot be computed.",
        "Use fewer time-invariant regressors or more units.",
    ),
    "correlated-not-declared": E(
        "No regressor was declared correlated with the unit effect; X2 is suggested from the Mundlak evidence.",
        "suggested X2 columns",
        "Whether a time-invariant regressor is correlated cannot be tested, so Z2 must come from the design.",
        "Declare the correlated regressors with --correlated.",
    ),
    "nearly-invariant-regressor": E(
        "A nearly-time-invariant column used as a time-varying regressor.",
        "units whose value changes",
        "Its within coefficient rests on the few changes, often coding errors.",
        "Pass --treat-as-invariant if the changes are errors.",
    ),
    "weak-within-variation": E(
        "An X2 column with little within variation.",
        "not used",
        "Its own within deviation is its instrument; with little of it the Hausman-Taylor coefficient is imprecise.",
        "Expect wide intervals for it; look at the observation-level first stage.",
    ),
    "selective-attrition": E(
        "The Nijman-Verbeek test relates being observed next period to the outcome within units.",
        "not used",
        "Leaving the panel appears related to the idiosyncratic error, so within estimates on the observed rows "
        "may be inconsistent.",
        "Look at who leaves and when; consider selection corrections or bounds.",
    ),
    "richer-set-rejected": E(
        "The Sargan test or the contrast with Hausman-Taylor rejects Amemiya-MaCurdy's or "
        "Breusch-Mizon-Schmidt's extra restrictions.",
        "not used",
        "Evidence against the stronger exogeneity those instruments assume; their estimates are then inconsistent.",
        "Prefer the Hausman-Taylor instruments unless the design supports the stronger assumption.",
    ),
    "richer-sets-skipped": E(
        "Amemiya-MaCurdy and Breusch-Mizon-Schmidt were not computed.",
        "not used",
        "Too many unit-level instrument columns for the number of units (or above the configured limit).",
        "Raise instruments.richer_max_instruments if the panel has enough units.",
    ),
    "rows-dropped": E(
        "Rows left out because the outcome or a regressor is missing.",
        "rows left out of every fit",
        "The fits describe the complete cases only; if missingness is selective the estimates can be inconsistent.",
        "Check which columns are missing most (the finding names them).",
    ),
    "treated-as-invariant": E(
        "A column replaced by its most common value within each unit (--treat-as-invariant).",
        "units whose values were replaced",
        "Any real changes in the column are ignored.",
        "Make sure the replaced changes are errors.",
    ),
    # --- compare ---------------------------------------------------------------
    "overlapping-periods": E(
        "New-wave (unit, period) keys the base already holds.",
        "new-wave rows whose key the base holds",
        "Appending would duplicate those keys and corrupt the panel.",
        "Remove the overlap, or replace the base's rows knowingly.",
    ),
    "type-changed": E(
        "A column whose type differs between base and new wave (an error for a key column).",
        "the column (always 1)",
        "Values may no longer compare (a number delivered as text), and a key of another type can split units.",
        "Fix the export of the new wave.",
    ),
    "invariant-changed": E(
        "Returning units whose fixed (time-invariant) answer differs in the new wave.",
        "returning units whose value changed",
        "A fixed attribute that moves is usually a coding or linkage error, and it turns a Z column into a "
        "nearly-time-invariant one.",
        "Check the units listed (--details) and correct the wave or the linkage.",
    ),
    "implausible-jump": E(
        "Returning units whose change since their last base value is far outside the base's own changes.",
        "returning units with an implausible change",
        "Such jumps are usually unit errors or mis-linked units, and they dominate within estimates.",
        "Check the units listed (--details).",
    ),
    "new-categories": E(
        "Levels of a categorical column never seen in the base.",
        "new levels",
        "New codes may be typos or a changed code list; models with indicators gain columns.",
        "Map them to the base's codes or document the new ones.",
    ),
    "vanished-categories": E(
        "Levels of the base's last period that no new-wave row uses, although several were expected.",
        "vanished levels",
        "A code list may have changed, or a group may be missing from the delivery.",
        "Check the code list of the new wave.",
    ),
    "distribution-shift": E(
        "A column whose distribution in the new wave differs from the base's last period (stability index above "
        "its cut-off).",
        "new-wave rows with a value of the column",
        "A shift can be real change or a change of measurement (units, definitions) that period effects would "
        "wrongly absorb.",
        "Check the column's definition and units in the new wave.",
    ),
    "missing-jump": E(
        "A missing share that rises against the base's last period.",
        "new-wave rows where the column is missing",
        "A question may have been dropped or a field lost in the export.",
        "Check the delivery of that column.",
    ),
    "column-removed": E(
        "A base column absent from the new wave.",
        "the column (always 1)",
        "Models using it lose the new wave.",
        "Check whether the column was renamed or dropped.",
    ),
    "unexpected-period": E(
        "A new period that does not continue the base grid (skipped, off-step, or inside the base).",
        "unexpected periods",
        "Appending would leave a hole in the grid or mix waves.",
        "Check the period labels of the new wave.",
    ),
    "column-added": E(
        "A column new in the wave.",
        "the column (always 1)",
        "Earlier waves lack it; a model using it loses them.",
        "Document it.",
    ),
    "backfilled-rows": E(
        "New-wave rows in periods the base holds, with keys it does not hold.",
        "rows back-filled into base periods",
        "The delivery changes the panel's past, not only its present.",
        "Confirm that late rows for past periods are intended.",
    ),
    "returning-after-absence": E(
        "Returning units absent from the base's last period.",
        "units returning after an absence",
        "Their history has a gap; lags across it are undefined.",
        "Nothing to fix; note the gap.",
    ),
    "units-not-returning": E(
        "Base units absent from the new wave.",
        "base units not in the wave",
        "Attrition; if selective, later estimates are affected.",
        "Check whether the units left or were lost in the delivery.",
    ),
    "period-value-differs": E(
        "A column all units shared within each base period (a period-level value) on which units disagree in "
        "the new wave.",
        "new-wave periods in which units hold different values",
        "A period-level value that varies across units in one wave is usually a delivery error, and it changes "
        "how the column enters the models.",
        "Check the column in the new wave.",
    ),
    # --- check -----------------------------------------------------------------
    "rule-failed": E(
        "A rule of the panel contract that the data breaks.",
        "failing rows, units or periods, as the rule's message says",
        "The delivery does not keep the contract's promise.",
        "See the rule's failing examples (--details) and fix the delivery or the contract.",
    ),
}


def explanation(code: str) -> Explanation | None:
    """The explanation of ``code``, or None when it has none."""
    return EXPLANATIONS.get(code)


def check_or_fail(code: str) -> Explanation:
    """The explanation of ``code``; an AuditError (exit 2) naming close codes when there is none."""
    import difflib

    from auditor.errors import fail

    hit = EXPLANATIONS.get(code)
    if hit is None:
        close = difflib.get_close_matches(code, list(EXPLANATIONS), n=3, cutoff=0.5)
        raise fail("unknown-finding-code", name=code,
                   close=f"did you mean {', '.join(close)}?" if close else f"{len(EXPLANATIONS)} codes")
    return hit


def as_document(code: str | None = None) -> dict:
    """The explanations as a JSON document: every code, or the one named (with its severity and command)."""
    from auditor.checks.findings import CHECKS
    from auditor.version import tool_info

    codes = [code] if code else list(EXPLANATIONS)
    out = []
    for c in codes:
        e = check_or_fail(c)
        spec = CHECKS.get(c)
        out.append({"code": c, "severity": spec.severity if spec else None, "command": spec.command if spec else None,
                    "summary": spec.about if spec else None, "meaning": e.meaning, "count": e.count, "why": e.why,
                    "action": e.action})
    return {"tool": tool_info(), "codes": out}
