"""Model readiness (``panel-audit instruments``): roles, identification, the diagnostic
estimators, instrument strength and the findings an analyst needs before fitting a
fixed-effects, random-effects or Hausman-Taylor model.

The flow: load and validate once; take each regressor's kind from the profile's
variation pass; build numeric arrays (text columns become indicators ``col=value``
with the most common level as base, period dummies ``period=<value>``); find what
the data cannot identify with a sequential rank-revealing factorisation in a stated
order; fit the rest with auditor.models; measure strength with auditor.strength;
turn the numbers into findings.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from auditor import models, strength
from auditor.config import Settings, load_settings
from auditor.errors import fail, short_list
from auditor.findings import Finding, make, sort_findings
from auditor.load import INTERNAL, PERIOD_ID, UNIT_ID, Panel, load_panel

SECTION = "instruments"
ROLES = ("X1", "X2", "Z1", "Z2")


@dataclass(frozen=True)
class InstrumentsResult:
    """Everything ``panel-audit instruments`` reports; ``to_dict()`` is the contract's JSON.

    ``roles`` maps X1/X2/Z1/Z2 to column names (the constant is always in Z1 and not
    listed); ``roles_declared`` is false when X2 was suggested from the data.
    ``columns`` describes each regressor as used (kind, role, within share).
    Estimates are dicts of ``coef``/``se``/``se_cluster`` keyed by column name.
    """

    outcome: str
    roles: dict[str, list[str]]
    roles_declared: bool
    columns: tuple[dict[str, Any], ...]
    not_identified: tuple[dict[str, Any], ...]
    order_condition: dict[str, Any]
    strength: tuple[dict[str, Any], ...]
    x2_strength: tuple[dict[str, Any], ...]
    cragg_donald: float | None
    candidates: tuple[dict[str, Any], ...]
    suggestion: tuple[dict[str, Any], ...]
    tests: dict[str, Any]
    estimates: dict[str, Any]
    variance_components: dict[str, Any] | None
    sample: dict[str, Any]
    reference_f: dict[str, float]
    findings: tuple[Finding, ...]
    source: str

    def _repr_html_(self) -> str:
        """The result as an HTML fragment for notebooks (the report's renderer)."""
        from auditor.report.html import instruments_fragment

        return instruments_fragment(self)

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``instruments`` document (non-finite numbers as null)."""
        from auditor.profile import tool_info
        from auditor.report.jsonout import clean

        return clean(
            {
                "tool": tool_info(),
                "source": self.source,
                "outcome": self.outcome,
                "sample": self.sample,
                "roles": self.roles,
                "roles_declared": self.roles_declared,
                "columns": list(self.columns),
                "not_identified": list(self.not_identified),
                "order_condition": self.order_condition,
                "strength": list(self.strength),
                "x2_strength": list(self.x2_strength),
                "cragg_donald": self.cragg_donald,
                "reference_f": self.reference_f,
                "candidates": list(self.candidates),
                "suggestion": list(self.suggestion),
                "tests": self.tests,
                "estimates": self.estimates,
                "variance_components": self.variance_components,
                "findings": [f.to_dict() for f in self.findings],
            }
        )


# --------------------------------------------------------------------------- inputs


def _names(value: str | Sequence[str] | None) -> list[str]:
    if value is None:
        return []
    items = value.split(",") if isinstance(value, str) else list(value)
    return [str(v).strip() for v in items if str(v).strip()]


_TEXT_TYPES = (pl.String, pl.Categorical, pl.Enum)


def _is_text(dtype: pl.DataType) -> bool:
    return isinstance(dtype, _TEXT_TYPES) or dtype == pl.String


def _usable(dtype: pl.DataType) -> bool:
    return dtype.is_numeric() or dtype == pl.Boolean or _is_text(dtype)


def _validate(panel: Panel, outcome: str, regs: list[str], correlated: list[str] | None,
              invariant: list[str]) -> None:
    available = short_list(c for c in panel.schema if c not in INTERNAL)
    keys = {**{u: "unit key" for u in panel.unit}, panel.time: "time key"}
    if outcome in keys:
        raise fail("instruments-key-as-regressor", column=outcome, role=keys[outcome])
    if outcome not in panel.schema:
        raise fail("instruments-unknown-outcome", column=outcome, available=available)
    dt = panel.schema[outcome]
    if not (dt.is_numeric() or dt == pl.Boolean):
        raise fail("instruments-outcome-not-numeric", column=outcome, dtype=str(dt).lower())
    if not regs:
        raise fail("instruments-no-regressors")
    seen: set[str] = set()
    for r in regs:
        if r in seen:
            raise fail("instruments-regressor-repeated", column=r)
        seen.add(r)
        if r == outcome:
            raise fail("instruments-regressor-is-outcome", column=r)
        if r in keys:
            raise fail("instruments-key-as-regressor", column=r, role=keys[r])
        if r not in panel.schema:
            raise fail("instruments-unknown-regressor", column=r, available=available)
        if not _usable(panel.schema[r]):
            raise fail("instruments-regressor-unusable", column=r, dtype=str(panel.schema[r]).lower())
    for option, names in (("--correlated", correlated or []), ("--treat-as-invariant", invariant)):
        for c in names:
            parent = c.split("=", 1)[0] if c not in regs else c
            if parent not in regs:
                raise fail("instruments-not-a-regressor", option=option, column=c, regressors=", ".join(regs))


def _missing(col: str, dtype: pl.DataType) -> pl.Expr:
    e = pl.col(col).is_null()
    if dtype.is_float():
        e = e | ~pl.col(col).is_finite()
    return e


# --------------------------------------------------------------------------- rank


def sequential_rank(gram: np.ndarray, tol: float) -> tuple[list[int], dict[int, list[int]]]:
    """Columns kept and set aside by a rank-revealing pass in the given column order.

    Equivalent to a QR factorisation with the columns taken in order: column j is set
    aside when its residual sum of squares, after projecting on the columns kept
    before it, is at most ``tol`` times its own. Works on the cross-product matrix
    (scaled to unit diagonal). Returns (kept indices, {set-aside index: indices of the
    kept columns it depends on}).
    """
    k = gram.shape[0]
    diag = np.diag(gram).copy()
    kept: list[int] = []
    dropped: dict[int, list[int]] = {}
    scale = np.where(diag > 0, 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0)), 0.0)
    g = gram * scale[:, None] * scale[None, :]
    for j in range(k):  # loop over the few columns
        if diag[j] <= 0:
            dropped[j] = []
            continue
        if kept:
            gk = g[np.ix_(kept, kept)]
            c = g[kept, j]
            coef = np.linalg.solve(gk, c)
            resid = 1.0 - float(c @ coef)
        else:
            coef = np.zeros(0)
            resid = 1.0
        if resid <= tol:
            dropped[j] = [kept[i] for i in range(len(kept)) if abs(coef[i]) > 1e-6]
        else:
            kept.append(j)
    return kept, dropped


# --------------------------------------------------------------------------- the command


def instruments(
    data: Any,
    *,
    unit: str | Sequence[str],
    time: str,
    outcome: str,
    regressors: Sequence[str] | str,
    correlated: Sequence[str] | str | None = None,
    period_effects: bool = False,
    treat_as_invariant: Sequence[str] = (),
    settings: Settings | None = None,
    rules: str | Path | None = None,
) -> InstrumentsResult:
    """Model readiness of ``outcome`` on ``regressors`` in the panel ``data``.

    ``correlated`` names the regressors suspected of correlation with the unit effect
    (None: suggest X2 from the Mundlak evidence; an empty list: none). Text columns
    may be named whole or by indicator (``soil=SD``). Raises AuditError for input
    that cannot be used.
    """
    from auditor.pvalues import preload

    preload()  # scipy.special and scipy.sparse, while the panel is read and profiled
    if settings is None:
        settings = load_settings(rules)
    regs = _names(regressors)
    corr = None if correlated is None else _names(correlated)
    invariant = _names(list(treat_as_invariant))
    outcome = str(outcome).strip()
    panel = load_panel(data, unit, time, settings=settings)
    _validate(panel, outcome, regs, corr, invariant)
    return _run(panel, outcome, regs, corr, bool(period_effects), invariant, settings)


def _run(panel: Panel, outcome: str, regs: list[str], corr: list[str] | None, period_effects: bool,
         invariant: list[str], settings: Settings) -> InstrumentsResult:
    from auditor.variation import compute_variation

    get = lambda key: settings.get(SECTION, key)  # noqa: E731
    findings: list[Finding] = []
    n_examples = int(get("examples"))

    # kinds from the profile's variation pass, on the columns used only
    var = compute_variation(dataclasses.replace(panel, columns=(outcome, *regs)), settings)
    info = {r["name"]: r for r in var.columns.to_dicts()}
    kinds = {c: info[c]["kind"] for c in (outcome, *regs)}

    schema = panel.schema
    frame = panel.frame.select([UNIT_ID, PERIOD_ID, outcome, *regs])

    # --treat-as-invariant: the unit's most common value (ties: the smallest)
    for c in invariant:
        modes = (
            frame.filter(~_missing(c, schema[c]))
            .group_by([UNIT_ID, c]).len()
            .sort([UNIT_ID, "len", c], descending=[False, True, False])
            .group_by(UNIT_ID, maintain_order=True)
            .agg(pl.col(c).first().alias("__pa_mode"), pl.len().alias("__pa_values"))
        )
        changed = int((modes["__pa_values"] > 1).sum())
        frame = frame.join(modes.select(UNIT_ID, "__pa_mode"), on=UNIT_ID, how="left").with_columns(
            pl.col("__pa_mode").alias(c)
        ).drop("__pa_mode")
        old = kinds[c]
        kinds[c] = "time-invariant"
        findings.append(make(
            "treated-as-invariant", settings,
            f"'{c}' ({old}) was replaced by each unit's most common value, changing {changed} units, "
            "so it now enters as time-invariant and any real changes in it are ignored.",
            column=c, count=changed,
        ))

    # complete cases of the outcome and every regressor
    rows_keyed = frame.height
    miss_counts = frame.select([_missing(c, schema[c]).sum().alias(c) for c in (outcome, *regs)]).row(0, named=True)
    frame = frame.filter(~pl.any_horizontal([_missing(c, schema[c]) for c in (outcome, *regs)]))
    dropped = rows_keyed - frame.height
    if frame.height == 0:
        worst = sorted(miss_counts, key=lambda c: -miss_counts[c])[:3]
        raise fail("instruments-no-complete-rows", rows=rows_keyed, dropped=dropped,
                   worst=", ".join(f"'{c}' ({miss_counts[c]} missing)" for c in worst))
    n_units = frame.select(pl.col(UNIT_ID).n_unique()).item()
    if n_units < 2:
        code = frame[UNIT_ID][0]
        label = panel.unit_labels([int(code)])
        raise fail("instruments-one-unit", unit=", ".join(str(v) for v in label[0].values()) if label else code)
    if dropped:
        worst = [c for c in sorted(miss_counts, key=lambda c: -miss_counts[c]) if miss_counts[c]][:3]
        findings.append(make(
            "rows-dropped", settings,
            f"{dropped} of {rows_keyed} rows lack the outcome or a regressor and are left out of every fit, "
            f"which changes the sample the models describe (most missing: "
            f"{', '.join(f'{c} {miss_counts[c]}' for c in worst)}).",
            count=dropped,
        ))

    # numeric design columns: indicators for text, floats for the rest
    design_cols: list[tuple[str, str]] = []  # (name, parent)
    exprs: list[pl.Expr] = [pl.col(UNIT_ID), pl.col(PERIOD_ID), pl.col(outcome).cast(pl.Float64).alias("__pa_y")]
    not_identified: list[dict[str, Any]] = []
    base_levels: dict[str, Any] = {}
    for c in regs:
        if _is_text(schema[c]):
            counts = frame.group_by(pl.col(c).cast(pl.String)).len().sort(["len", c], descending=[True, False])
            levels = counts[c].to_list()
            base_levels[c] = levels[0]
            if len(levels) == 1:
                not_identified.append({"column": c, "reason": "constant", "with": []})
                continue
            for lev in levels[1:]:
                name = f"{c}={lev}"
                exprs.append((pl.col(c).cast(pl.String) == lev).cast(pl.Float64).alias(name))
                design_cols.append((name, c))
        else:
            exprs.append(pl.col(c).cast(pl.Float64).alias(c))
            design_cols.append((c, c))
    periods_present = sorted(frame[PERIOD_ID].unique().to_list())
    period_cols: list[str] = []
    if period_effects:
        for p in periods_present[1:]:  # loop over periods, not rows
            name = f"period={panel.grid[p]}"
            exprs.append((pl.col(PERIOD_ID) == p).cast(pl.Float64).alias(name))
            period_cols.append(name)
    num = frame.select(exprs)

    # roles from kinds
    expand: dict[str, list[str]] = {}
    for name, parent in design_cols:
        expand.setdefault(parent, []).append(name)
    user_x: list[str] = []
    user_z: list[str] = []
    col_kind: dict[str, str] = {}
    for name, parent in design_cols:
        k = kinds[parent]
        col_kind[name] = k
        absorbed = bool(info[parent].get("absorbed_by_time")) and parent not in invariant
        if k == "constant":
            not_identified.append({"column": name, "reason": "constant", "with": []})
        elif k == "time-invariant":
            user_z.append(name)
        elif k == "period-only" and period_effects:
            not_identified.append({"column": name, "reason": "period-only", "with": ["period effects"]})
        elif absorbed and period_effects:
            not_identified.append({"column": name, "reason": "absorbed-by-time", "with": ["period effects"]})
        else:
            user_x.append(name)
            if k == "nearly-time-invariant":
                findings.append(make(
                    "nearly-invariant-regressor", settings,
                    f"'{name}' changes for only {info[parent]['units_changing']} units, so as a time-varying "
                    f"regressor its within coefficient rests on those few changes (pass --treat-as-invariant "
                    f"{parent} if they are coding errors).",
                    column=name, count=info[parent]["units_changing"],
                ))

    codes_raw = num[UNIT_ID].to_numpy().astype(np.int64)
    uniq, codes = np.unique(codes_raw, return_inverse=True)
    n = len(uniq)
    y = num["__pa_y"].to_numpy().astype(float)
    tol = float(get("collinear_tol"))

    def matrix(cols: list[str]) -> np.ndarray:
        if not cols:
            return np.zeros((len(y), 0))
        return num.select(cols).to_numpy().astype(float)

    # within rank: period dummies first, then the user's X in order
    order = period_cols + user_x
    xmat = matrix(order)
    counts = np.bincount(codes, minlength=n).astype(float)
    xbar = models.unit_means(codes, n, xmat, counts)
    xw = xmat - xbar[codes]
    if order:
        gram = xw.T @ xw
        wss = np.diag(gram).copy()
        overall = counts @ xbar / counts.sum()
        tss = wss + counts @ ((xbar - overall) ** 2)  # TSS = WSS + BSS (methods.md section 2)
        share_of = {c: (float(w / t) if t > 0 else None) for c, w, t in zip(order, wss, tss, strict=True)}
        no_within = [j for j in range(len(order)) if tss[j] > 0 and wss[j] <= tol * tss[j]]
        for j in no_within:
            gram[j, :] = 0.0
            gram[:, j] = 0.0
        kept, dep = sequential_rank(gram, tol)
    else:
        kept, dep, no_within = [], {}, []
        share_of = {}
    moved_to_z = [order[j] for j in no_within if order[j] in user_x]
    for j, with_ in dep.items():
        name = order[j]
        if j in no_within:
            continue
        not_identified.append({"column": name, "reason": "collinear-within",
                               "with": [order[i] for i in with_] or ["the unit effects"]})
    kept_names = {order[j] for j in kept}
    x_period = [c for c in period_cols if c in kept_names]
    x_user = [c for c in user_x if c in kept_names]
    z_all = user_z + moved_to_z
    for c in moved_to_z:
        col_kind[c] = "time-invariant"

    # unit-level rank: [1, Z, X means] in that order
    zmat_rows = matrix(z_all)
    zbar = models.unit_means(codes, n, zmat_rows, counts)
    x_names = x_user + x_period
    xi_kept = [order.index(c) for c in x_names]
    ub = np.column_stack([np.ones(n), zbar, xbar[:, xi_kept]])
    unit_names = ["const", *z_all, *[f"mean({c})" for c in x_names]]
    ugram = ub.T @ ub
    ukept, udep = sequential_rank(ugram, tol)
    z_names = [z for i, z in enumerate(z_all, start=1) if i in ukept]
    for j, with_ in udep.items():
        if 1 <= j <= len(z_all):
            not_identified.append({"column": z_all[j - 1], "reason": "collinear-between",
                                   "with": [unit_names[i] for i in with_]})
    mean_columns = [c for i, c in enumerate(x_names, start=1 + len(z_all)) if i in ukept]
    zi = [z_all.index(c) for c in z_names]
    pa = models.PanelArrays(codes=codes, n=n, y=y, x=xmat[:, xi_kept], x_names=tuple(x_names),
                            z=zmat_rows[:, zi], z_names=tuple(z_names))

    for item in not_identified:
        findings.append(make(
            "not-identified", settings, _not_identified_message(item), column=item["column"],
        ))

    # outcome and unit counts
    outcome_invariant = kinds[outcome] in ("time-invariant", "constant")
    if outcome_invariant:
        findings.append(make(
            "outcome-time-invariant", settings,
            f"'{outcome}' never changes within a unit, so a within (fixed-effects) model has nothing to explain "
            "and only between-unit comparisons are possible.",
            column=outcome,
        ))
    k_unit = 1 + len(z_names) + len(mean_columns)
    too_few = n <= k_unit
    if too_few:
        findings.append(make(
            "too-few-units", settings,
            f"{n} units cannot identify {k_unit} unit-level parameters (constant, time-invariant regressors and "
            "unit means), so the between, random-effects, Mundlak and Hausman-Taylor fits are not computed.",
            count=n,
        ))

    # ---- fits
    alpha = float(get("mundlak_alpha"))
    test_alpha = float(get("test_alpha"))
    estimates: dict[str, Any] = {"within": None, "between": None, "random": None, "mundlak": None,
                                 "hausman_taylor": None}
    tests: dict[str, Any] = {"mundlak": None, "hausman_within_random": None, "overidentification": None,
                             "hausman_within_ht": None}
    components: dict[str, Any] | None = None
    wf = bf = mu = None
    # Fits that do not feed one another run side by side in a second thread (numpy
    # releases the interpreter lock): random effects beside the roles and
    # Hausman-Taylor, the X2 first stages beside the Z2 strength. Findings are sorted
    # at the end, so the order they are made in does not matter.
    pool = ThreadPoolExecutor(max_workers=1)
    random_job = None
    if not outcome_invariant:
        wf, ew = models.within(pa)
        estimates["within"] = wf.to_dict()
    if not too_few:
        bf, _ = models.between(pa, mean_columns)
        estimates["between"] = bf.to_dict()
        mundlak_tested = [c for c in x_user if c in mean_columns]
        mu = models.mundlak(pa, mean_columns, tested=mundlak_tested,
                            within_fit=(wf, ew) if wf is not None else None)
        tests["mundlak"] = {**mu.to_dict(), "alpha": alpha,
                            "flagged": [r["column"] for r in mu.per_column if r["p"] is not None and r["p"] < alpha]}
        estimates["mundlak"] = mu.fit.to_dict()
        if wf is not None:
            random_job = pool.submit(models.random_effects, pa, wf, bf)
    mundlak_p: dict[str, float | None] = {}
    if mu is not None:
        mundlak_p = {r["column"]: r["p"] for r in mu.per_column}

    # ---- roles
    declared = corr is not None
    corr_cols: set[str] = set()
    for c in corr or []:
        corr_cols.update(expand.get(c, [c]))
    if declared:
        x2 = [c for c in x_user if c in corr_cols]
        z2 = [c for c in z_names if c in corr_cols]
    else:
        x2 = [c for c in x_user if (mundlak_p.get(c) is not None and mundlak_p[c] < alpha)]
        z2 = []
        findings.append(make(
            "correlated-not-declared", settings,
            "No regressor was declared correlated with the unit effect: X2 is suggested from the Mundlak evidence "
            f"({', '.join(x2) or 'none'}), which assumes every time-invariant regressor is exogenous, and whether "
            "a time-invariant regressor is correlated cannot be tested from the data, so any Z2 must be declared "
            "with --correlated.",
            count=len(x2),
        ))
    x1 = [c for c in x_user if c not in x2] + x_period
    z1 = [c for c in z_names if c not in z2]
    mean_instr = [c for c in x_user if c not in x2 and c in mean_columns]
    k1, g2 = len(mean_instr), len(z2)
    order_met = k1 >= g2
    if not order_met:
        findings.append(make(
            "order-condition", settings,
            f"With {k1} exogenous time-varying regressors (X1) for {g2} correlated time-invariant ones (Z2) "
            "the Hausman-Taylor model is not identified: declare fewer regressors correlated or add "
            "exogenous time-varying ones.",
            count=g2 - k1,
        ))

    # invalid instruments and correlated-with-effect
    if mu is not None:
        if mu.joint.p is not None and mu.joint.p < alpha:
            findings.append(make(
                "correlated-with-effect", settings,
                f"The Mundlak test finds the unit means of the time-varying regressors jointly significant "
                f"(p = {mu.joint.p:.3g}), so some regressors are correlated with the unit effect and random "
                "effects would be biased.",
                count=sum(1 for r in mu.per_column if r["p"] is not None and r["p"] < alpha),
                examples=[{"column": r["column"], "p": float(f"{r['p']:.3g}")} for r in mu.per_column
                          if r["p"] is not None and r["p"] < alpha][:n_examples],
            ))
    # ---- Hausman-Taylor (beside random effects, when both are fitted)
    ht = None
    if order_met and random_job is not None:
        ht = models.hausman_taylor(pa, x1, x2, z1, z2, within_fit=wf, mean_instruments=mean_instr)
    if random_job is not None:
        re, comp = random_job.result()
        estimates["random"] = re.to_dict()
        components = comp.to_dict()
        if x_user:
            h = models.hausman_within_random(wf, re, x_user)
            tests["hausman_within_random"] = h.to_dict()
            if h.p is not None and h.p < test_alpha:
                findings.append(make(
                    "random-effects-rejected", settings,
                    f"The Hausman test rejects random effects (p = {h.p:.3g}), so its estimates of the "
                    "time-varying coefficients are likely biased and within or Hausman-Taylor should be used.",
                ))
            if h.positive_definite is False:
                findings.append(make(
                    "hausman-not-positive-definite", settings,
                    f"In the Hausman test {h.note}, so the test has fewer degrees of freedom than coefficients.",
                ))
    if ht is not None:
        estimates["hausman_taylor"] = ht.fit.to_dict()
        if ht.sargan is not None:
            tests["overidentification"] = {**ht.sargan.to_dict(), "name": "Sargan"}
            tests["hausman_within_ht"] = ht.hausman_within.to_dict()
            bad = [(nm, t) for nm, t in (("Sargan", ht.sargan), ("within vs Hausman-Taylor", ht.hausman_within))
                   if t.p is not None and t.p < test_alpha]
            for nm, t in bad:
                findings.append(make(
                    "overidentification-rejected", settings,
                    f"The {nm} test rejects the over-identifying restrictions (p = {t.p:.3g}), so at least one "
                    "X1 column is probably correlated with the unit effect and the Hausman-Taylor estimates "
                    "are suspect.",
                ))
        components = {**(components or {}), "hausman_taylor": ht.components.to_dict()}

    # validity of each X1 mean as an instrument. With a Z2 column the Mundlak evidence is
    # disturbed (Z2 is correlated with u_i and with the X1 means), so the over-identification
    # tests decide: the difference-in-Sargan (C) test where the other means still
    # over-identify the model (invalid when C rejects and the Sargan of the rest accepts);
    # with one over-identifying restriction the Sargan test of the whole set, which cannot
    # single a column out; just identified, nothing can be tested and validity is assumed.
    c_tests: dict[str, float | None] = {}
    invalid: dict[str, tuple[bool, str]] = {}
    if ht is not None and z2:
        for c in mean_instr:
            t, rest = ht.c_tests.get(c), ht.rest_sargan.get(c)
            c_tests[c] = None if t is None else t.p
            if t is not None and t.p is not None and rest is not None and rest.p is not None:
                invalid[c] = (t.p < test_alpha and rest.p >= test_alpha, "c-test")
            elif ht.sargan is not None:
                invalid[c] = (False, "sargan" if ht.sargan.p >= test_alpha else "sargan rejects, column unknown")
            else:
                invalid[c] = (False, "just identified, assumed")
    if declared:
        for c in mean_instr:
            cp, mp = c_tests.get(c), mundlak_p.get(c)
            if invalid.get(c, (False, ""))[0]:
                text = (f"the difference-in-Sargan test of its unit mean gives p = {cp:.3g} while the other "
                        "instruments pass")
            elif c not in invalid and mp is not None and mp < alpha:
                text = f"its Mundlak p = {mp:.3g} says it is correlated with the unit effect"
            else:
                continue
            findings.append(make(
                "invalid-instrument", settings,
                f"'{c}' is declared exogenous (X1) but {text}, so its unit mean is probably an invalid instrument "
                "and Hausman-Taylor would be biased.",
                column=c,
            ))

    # ---- strength
    size = int(get("stock_yogo_size"))
    thumb = float(get("rule_of_thumb_f"))
    lee = float(get("lee_f"))
    z_rows: list[dict[str, Any]] = []
    cd = None
    cands: list[dict[str, Any]] = []
    sugg: list[dict[str, Any]] = []
    x2_rows: list[dict[str, Any]] = []
    x2_job = None
    if x2 and ht is not None:
        x2_job = pool.submit(strength.x2_first_stage, pa, x1, x2, z1, ht.components.theta, means=mean_instr)
    if z2 and not too_few:
        z_rows, cd = strength.z2_strength(pa, mean_instr, z1, z2, size=size, rule_of_thumb=thumb,
                                          order_met=order_met)
        for r in z_rows:
            f = r["partial_f"]
            r["p"] = strength.f_pvalue(f, r["df"])
            r["at_least_rule_of_thumb"] = None if f is None else bool(f >= thumb)
            r["at_least_lee"] = None if f is None else bool(f >= lee)
            if r["verdict"] == "weak":
                basis = "conditional F" if r["verdict_basis"] == "conditional_f" else "first-stage F"
                value = r["conditional_f"] if r["verdict_basis"] == "conditional_f" else f
                crit = r["critical_value"] if r["critical_value"] is not None else thumb
                findings.append(make(
                    "weak-instrument", settings,
                    f"The unit means of X1 explain '{r['endogenous']}' weakly ({basis} {value:.3g} below "
                    f"{crit:.4g}), so its Hausman-Taylor coefficient is imprecise and biased towards random effects.",
                    column=r["endogenous"],
                ))
        cands, sugg = strength.candidates(pa, mean_instr, z1, z2, mundlak_p, alpha=alpha, size=size,
                                          rule_of_thumb=thumb, max_exhaustive=int(get("exhaustive_candidates")),
                                          c_p=c_tests, invalid=invalid)
    within_share = {c: share_of.get(c) for c in pa.x_names}
    if x2_job is not None:
        x2_rows = x2_job.result()
        for r in x2_rows:
            share = within_share.get(r["endogenous"])
            r["within_share"] = share
            if share is not None and share < float(get("weak_within_share")):
                findings.append(make(
                    "weak-within-variation", settings,
                    f"Only {share:.1%} of the variation of '{r['endogenous']}' is within units, so its own within "
                    "deviation is a weak instrument and its Hausman-Taylor coefficient is imprecise.",
                    column=r["endogenous"],
                ))

    pool.shutdown()

    # ---- the document
    roles = {"X1": x1, "X2": x2, "Z1": z1, "Z2": z2}
    role_of = {c: r for r, cols in roles.items() for c in cols}
    not_id_cols = {d["column"] for d in not_identified}
    columns = []
    for name, parent in design_cols + [(p, None) for p in period_cols]:
        columns.append({
            "column": name,
            "source": parent,
            "kind": col_kind.get(name, "period-only"),
            "role": role_of.get(name) or ("not-identified" if name in not_id_cols else None),
            "within_share": within_share.get(name),
            "base_level": base_levels.get(parent) if parent in base_levels else None,
        })
    sample = {
        "rows": int(len(y)), "units": int(n), "rows_dropped": int(dropped), "periods": len(periods_present),
        "period_effects": period_effects,
    }
    return InstrumentsResult(
        outcome=outcome,
        roles=roles,
        roles_declared=declared,
        columns=tuple(columns),
        not_identified=tuple(not_identified),
        order_condition={"k1": k1, "g2": g2, "met": order_met},
        strength=tuple(z_rows),
        x2_strength=tuple(x2_rows),
        cragg_donald=cd,
        candidates=tuple(cands),
        suggestion=tuple(sugg),
        tests=tests,
        estimates=estimates,
        variance_components=components,
        sample=sample,
        reference_f={"rule_of_thumb": thumb, "lee": lee},
        findings=sort_findings(findings),
        source=panel.source,
    )


def _not_identified_message(item: dict[str, Any]) -> str:
    c, reason, with_ = item["column"], item["reason"], item.get("with") or []
    if reason == "constant":
        return f"'{c}' has one value everywhere, so no model can estimate its coefficient and it is left out."
    if reason == "period-only":
        return (f"'{c}' varies only across periods, so with period effects in the model its coefficient is not "
                "identified and it is left out.")
    if reason == "absorbed-by-time":
        return (f"'{c}' moves in step with the periods for every unit (like age), so with unit and period effects "
                "its coefficient is not identified and it is left out.")
    if reason == "collinear-within":
        return (f"Within units '{c}' is an exact linear combination of {', '.join(with_)}, so its within "
                "coefficient is not identified and it is left out; the other coefficients do not depend on this choice.")
    return (f"Across units '{c}' is an exact linear combination of {', '.join(with_)}, so its coefficient is not "
            "identified and it is left out.")
