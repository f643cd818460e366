"""Model readiness (``panel-audit instruments``): roles, identification, the diagnostic
estimators, instrument strength and the findings an analyst needs before fitting a
fixed-effects, random-effects or Hausman-Taylor model.

The flow is a chain of typed stages, each a frozen value built from the ones before:

- :class:`Sample`: the complete rows, the numeric design columns (text columns become
  indicators ``col=value`` with the most common level as base; ``--period-effects``
  adds ``period=<value>``), each regressor's kind from the profile's variation pass;
- :class:`Design`: which design column is a period effect (added dummies, then the
  user's own period-only regressors), time-varying (X) or time-invariant (Z);
- identification (auditor.stats.identification): what each fit can estimate;
- :class:`Roles`: X1, X2, Z1, Z2 and the Hausman-Taylor set-up;
- :class:`Fits`: within, between, random effects, Mundlak, Hausman-Taylor;
- :class:`Validity` and :class:`Strength`: which X1 means may serve as instruments
  and how strong they are;
- :func:`readiness_findings` turns all of it into findings, and
  :class:`InstrumentsResult` is the document.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from auditor.checks.config import Settings, load_settings
from auditor.checks.findings import Finding, make, sort_findings
from auditor.commands.instruments_values import (
    AttritionTest,
    Candidate,
    ChiSquareTest,
    ColumnUse,
    ContrastsWithHT,
    Estimates,
    FitCoefficients,
    MundlakTest,
    NearCollinear,
    OrderCondition,
    ReferenceF,
    RoleColumns,
    SampleSummary,
    SarganByEstimator,
    SetAside,
    SpecificationTests,
    SuggestedSet,
    UnitStrength,
    VarianceComponents,
    X2Strength,
    plain,
)
from auditor.io.load import Panel, load_panel
from auditor.stats import attrition, identification, instrument_sets, models, strength
from auditor.stats.design import Design, Sample, _design, _moved_to_z, _sample, _validate
from auditor.vocab import clean, p_phrase


@dataclass(frozen=True)
class InstrumentsResult:
    """Everything ``panel-audit instruments`` reports; ``to_dict()`` is the contract's JSON.

    Every field is a typed value (auditor.commands.instruments_values) holding its slice
    of the document. ``roles`` lists X1/X2/Z1/Z2 (the constant is always in Z1 and not
    listed; period effects are exogenous and listed in X1 and in ``period_effects``);
    ``roles_declared`` is false when X2 was suggested from the data. ``columns``
    describes each regressor as used (kind, role, within share, the fits that identify
    it). ``estimates`` holds each fit's coefficients and standard errors by column name.
    :meth:`from_dict` rebuilds a result from its document (for example one read back
    from disk) so that the renderers can show it.
    """

    outcome: str
    roles: RoleColumns
    roles_declared: bool
    period_effects: tuple[str, ...]
    columns: tuple[ColumnUse, ...]
    not_identified: tuple[SetAside, ...]
    near_collinear: tuple[NearCollinear, ...]
    order_condition: OrderCondition | None
    strength: tuple[UnitStrength, ...]
    x2_strength: tuple[X2Strength, ...]
    cragg_donald: float | None
    candidates: tuple[Candidate, ...]
    suggestion: tuple[SuggestedSet, ...]
    tests: SpecificationTests
    estimates: Estimates
    variance_components: VarianceComponents | None
    sample: SampleSummary
    reference_f: ReferenceF
    findings: tuple[Finding, ...]
    source: str

    def _repr_html_(self) -> str:
        """The result as an HTML fragment for notebooks (the report's renderer)."""
        from auditor.render.html import instruments_fragment

        return instruments_fragment(self)

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``instruments`` document (non-finite numbers as null)."""
        from auditor.version import tool_info

        return clean(
            {
                "tool": tool_info(),
                "source": self.source,
                "outcome": self.outcome,
                "sample": plain(self.sample),
                "roles": plain(self.roles),
                "roles_declared": self.roles_declared,
                "period_effects": list(self.period_effects),
                "columns": plain(self.columns),
                "not_identified": plain(self.not_identified),
                "near_collinear": plain(self.near_collinear),
                "order_condition": plain(self.order_condition),
                "strength": plain(self.strength),
                "x2_strength": plain(self.x2_strength),
                "cragg_donald": self.cragg_donald,
                "reference_f": plain(self.reference_f),
                "candidates": plain(self.candidates),
                "suggestion": plain(self.suggestion),
                "tests": plain(self.tests),
                "estimates": plain(self.estimates),
                "variance_components": plain(self.variance_components),
                "findings": [f.to_dict() for f in self.findings],
            }
        )

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> InstrumentsResult:
        """The result rebuilt from its contract document (``to_dict()`` of the rebuilt result
        gives ``doc`` back; a name missing from a partial document takes an empty value)."""
        doc = clean(dict(doc))
        findings = tuple(
            Finding(check=str(f.get("check")), severity=str(f.get("severity")), message=str(f.get("message", "")),
                    column=f.get("column"), count=f.get("count"), examples=tuple(f.get("examples") or ()))
            for f in doc.get("findings") or ())
        return cls(
            outcome=str(doc.get("outcome", "")),
            roles=RoleColumns.from_dict(doc.get("roles") or {}),
            roles_declared=bool(doc.get("roles_declared", True)),
            period_effects=tuple(doc.get("period_effects") or ()),
            columns=ColumnUse.rows(doc.get("columns")),
            not_identified=SetAside.rows(doc.get("not_identified")),
            near_collinear=NearCollinear.rows(doc.get("near_collinear")),
            order_condition=OrderCondition.maybe(doc.get("order_condition")),
            strength=UnitStrength.rows(doc.get("strength")),
            x2_strength=X2Strength.rows(doc.get("x2_strength")),
            cragg_donald=doc.get("cragg_donald"),
            candidates=Candidate.rows(doc.get("candidates")),
            suggestion=SuggestedSet.rows(doc.get("suggestion")),
            tests=SpecificationTests.from_dict(doc.get("tests") or {}),
            estimates=Estimates.from_dict(doc.get("estimates") or {}),
            variance_components=VarianceComponents.maybe(doc.get("variance_components")),
            sample=SampleSummary.from_dict(doc.get("sample") or {}),
            reference_f=ReferenceF.from_dict(doc.get("reference_f") or {}),
            findings=findings,
            source=str(doc.get("source", "")),
        )


# --------------------------------------------------------------------------- inputs


def _names(value: str | Sequence[str] | None) -> list[str]:
    if value is None:
        return []
    items = value.split(",") if isinstance(value, str) else list(value)
    return [str(v).strip() for v in items if str(v).strip()]


@dataclass(frozen=True)
class Roles:
    """X1, X2, Z1, Z2 (X1 includes the period effects, which are exogenous) and the
    Hausman-Taylor set-up built from them and from what the within fit identifies."""

    x1: tuple[str, ...]
    x2: tuple[str, ...]
    z1: tuple[str, ...]
    z2: tuple[str, ...]
    declared: bool
    spec: models.HTSpec

    @property
    def order_met(self) -> bool:
        """The order condition k1 >= g2."""
        return self.spec.k1 >= self.spec.g2

    def as_dict(self) -> dict[str, list[str]]:
        """The contract's ``roles``."""
        return {"X1": list(self.x1), "X2": list(self.x2), "Z1": list(self.z1), "Z2": list(self.z2)}


def _roles(design: Design, ident: identification.Identification, corr: list[str] | None,
           mundlak_p: dict[str, float | None], alpha: float, expand: dict[str, list[str]]) -> Roles:
    """Stage 4: roles from the declaration (or, without one, X2 from the Mundlak evidence)."""
    x_user = ident.levels_x(ident.x)
    z_names = ident.levels_z(ident.z)
    periods = list(ident.periods)
    declared = corr is not None
    if declared:
        corr_cols: set[str] = set()
        for c in corr or []:
            corr_cols.update(expand.get(c, [c]))
        x2 = [c for c in x_user if c in corr_cols]
        z2 = [c for c in z_names if c in corr_cols]
    else:
        x2 = [c for c in x_user if mundlak_p.get(c) is not None and mundlak_p[c] < alpha]
        z2 = []
    x1_user = [c for c in x_user if c not in x2]
    z1 = [c for c in z_names if c not in z2]
    x1 = x1_user + periods
    spec = models.HTSpec(
        x1=tuple(x1), x2=tuple(x2), z1=tuple(z1), z2=tuple(z2), means=tuple(x1_user),
        within=tuple(c for c in ident.within if c in x1 or c in x2),
        compared=tuple(c for c in ident.within if c in x1_user or c in x2),
    )
    return Roles(tuple(x1), tuple(x2), tuple(z1), tuple(z2), declared, spec)


# --------------------------------------------------------------------------- stage 5: fits


@dataclass(frozen=True)
class Fits:
    """The diagnostic fits (None where they cannot be computed) and the tests that compare them."""

    within: models.Fit | None
    between: models.Fit | None
    random: models.Fit | None
    components: models.Components | None
    mundlak: models.Mundlak | None
    hausman_taylor: models.HausmanTaylor | None
    hausman_random: models.WaldTest | None
    too_few_units: bool
    unit_parameters: int
    units: int
    richer: dict[str, instrument_sets.RicherFit | None] = dataclasses.field(default_factory=dict)
    richer_note: str | None = None
    attrition: AttritionTest | None = None
    attrition_note: str | None = None


def _early_fits(design: Design, ident: identification.Identification, outcome_invariant: bool,
                pool: ThreadPoolExecutor) -> tuple[models.Fit | None, models.Fit | None, models.Mundlak | None,
                                                    Any, bool, int]:
    """Within, between and Mundlak now; random effects started in ``pool``. Returns (within,
    between, mundlak, random-effects job, too few units, unit-level parameters)."""
    pa = design.pa
    wf = models.within(pa, list(ident.within))[0] if not outcome_invariant else None
    k_unit = 1 + len(ident.between_z) + len(ident.between_means)
    too_few = pa.n <= k_unit
    if too_few:
        return wf, None, None, None, True, k_unit
    bf, _ = models.between(pa, list(ident.between_means), list(ident.between_z))
    lev = pa.select(ident.levels_x(pa.x_names), ident.levels_z(ident.z))
    mu = models.mundlak(lev, mean_columns=[*ident.mundlak_tested, *ident.mundlak_controls],
                        tested=list(ident.mundlak_tested))
    job = pool.submit(models.random_effects, lev, wf, bf) if wf is not None else None
    return wf, bf, mu, job, False, k_unit


def _late_fits(design: Design, ident: identification.Identification, roles: Roles, wf: models.Fit | None,
               bf: models.Fit | None, mu: models.Mundlak | None, job: Any, too_few: bool,
               k_unit: int) -> Fits:
    """Hausman-Taylor beside the running random-effects job, then the Hausman contrast."""
    ht = None
    if roles.order_met and job is not None:
        lev = design.pa.select(list(roles.x1) + list(roles.x2), list(roles.z1) + list(roles.z2))
        ht = models.hausman_taylor(lev, [], [], [], [], within_fit=wf, spec=roles.spec)
    re = comp = h = None
    if job is not None:
        re, comp = job.result()
        compared = [c for c in ident.within if c in ident.x]  # period effects excluded
        if compared:
            h = models.hausman_within_random(wf, re, compared)
    return Fits(wf, bf, re, comp, mu, ht, h, too_few, k_unit, design.pa.n)


def _beyond(design: Design, ident: identification.Identification, roles: Roles, fits: Fits,
            settings: Settings) -> Fits:
    """Amemiya-MaCurdy and Breusch-Mizon-Schmidt beside Hausman-Taylor (at its theta), and the
    Nijman-Verbeek attrition test on the within fit."""
    richer: dict[str, instrument_sets.RicherFit | None] = {instrument_sets.AM: None, instrument_sets.BMS: None}
    note = None
    ht = fits.hausman_taylor
    if design.period is None:  # equivalent rows of unit moments (the dask engine) carry no periods
        note = ("not computed on the dask engine: their instruments are each unit's values period by period, "
                "which the unit moments do not keep; run with --engine memory for them") if ht is not None else None
        return dataclasses.replace(fits, richer=richer, richer_note=note, attrition=None, attrition_note=(
            "not computed on the dask engine: the test needs each row's period, which the unit moments do not keep"))
    if ht is not None:
        _, dense = np.unique(design.period, return_inverse=True)
        periods = int(dense.max()) + 1
        sp = roles.spec
        size = 2 + len(sp.z1) + len(sp.means) * (periods + 1) + periods + len(sp.x2) * periods
        limit = settings.instruments.richer_max_instruments
        if size > limit:
            note = (f"not computed: the richer instrument sets would hold about {size} unit-level columns "
                    f"(instruments.richer_max_instruments is {limit})")
        elif 2 * size >= design.pa.n:
            note = (f"not computed: about {size} unit-level instrument columns for {design.pa.n} units (they need "
                    "more than twice as many units as columns, or the first stage fits the units almost exactly)")
        else:
            lev = design.pa.select(list(roles.x1) + list(roles.x2), list(roles.z1) + list(roles.z2))
            period = dense.astype(np.int64)
            shared = instrument_sets.prepare(lev, sp, ht.components.theta, period, periods)
            for which in richer:
                richer[which] = instrument_sets.fit(lev, sp, ht.components.theta, period, periods, which, ht.fit,
                                                    tol=settings.instruments.collinear_tol,
                                                    prepared=shared)
    attrition_test = None
    if fits.within is not None and ident.within:
        attrition_test = AttritionTest.maybe(clean(attrition.nijman_verbeek(design.pa, list(ident.within),
                                                                            design.period)))
    return dataclasses.replace(fits, richer=richer, richer_note=note, attrition=attrition_test)


# --------------------------------------------------------------------------- stage 6: validity


@dataclass(frozen=True)
class Validity:
    """Per excluded X1 mean: its difference-in-Sargan p and its state (see strength.USABLE_STATE)."""

    c_p: dict[str, float | None]
    states: dict[str, tuple[str, str]]


def _validity(roles: Roles, ht: models.HausmanTaylor | None, test_alpha: float) -> Validity:
    """Which excluded X1 means the over-identification tests accept, reject, or cannot judge.

    With a Z2 column the Mundlak evidence is disturbed (Z2 is correlated with u_i and with
    the X1 means), so the over-identification tests decide. A mean is invalid when its
    difference-in-Sargan (C) test rejects while the Sargan test of the other means
    accepts. The other means are accepted when the Sargan test of the whole set accepts,
    or when a mean was found invalid (the set without it is accepted); when the whole set
    is rejected and no single mean can be blamed (with one over-identifying restriction
    there are no C tests at all) they are undecided. Just identified, nothing can be
    tested and validity is assumed.
    """
    c_p: dict[str, float | None] = {}
    states: dict[str, tuple[str, str]] = {}
    if ht is None or not roles.spec.g2:
        return Validity(c_p, states)
    excluded = [c for c in roles.spec.means if c not in roles.spec.x1_between_only]
    culprits = []
    for c in excluded:
        t, rest = ht.c_tests.get(c), ht.rest_sargan.get(c)
        c_p[c] = None if t is None else t.p
        if t is not None and t.p is not None and rest is not None and rest.p is not None:
            if t.p < test_alpha <= rest.p:
                culprits.append(c)
    if ht.sargan is None or ht.sargan.p is None:
        return Validity(c_p, {c: ("assumed", "just identified, assumed") for c in excluded})
    basis = "c-test" if any(v is not None for v in c_p.values()) else "sargan"
    for c in excluded:
        if c in culprits:
            states[c] = ("invalid", "c-test")
        elif ht.sargan.p >= test_alpha:
            states[c] = ("accepted", basis)
        elif culprits:
            states[c] = ("accepted", f"c-test; the set without {', '.join(culprits)} is accepted")
        else:
            states[c] = ("undecided", "sargan rejects the set; no single mean can be blamed")
    return Validity(c_p, states)


# --------------------------------------------------------------------------- stage 7: strength


@dataclass(frozen=True)
class Strength:
    """Instrument strength rows for the unit-level endogenous columns, X2 first stages,
    the candidate search and the suggested sets."""

    rows: tuple[UnitStrength, ...]
    cragg_donald: float | None
    candidates: tuple[Candidate, ...]
    suggestion: tuple[SuggestedSet, ...]
    x2_rows: tuple[X2Strength, ...]


def _strength(design: Design, ident: identification.Identification, roles: Roles, fits: Fits,
              validity: Validity, settings: Settings, pool: ThreadPoolExecutor) -> Strength:
    """Stage 7: Z2 strength (and X2 identified between units only), the X2 first stages beside it."""
    t = settings.instruments
    size, thumb, lee = t.stock_yogo_size, t.rule_of_thumb_f, t.lee_f
    sp, pa = roles.spec, design.pa
    excluded = [c for c in sp.means if c not in sp.x1_between_only]
    x2_within = [c for c in roles.x2 if c in sp.within]
    x2_job = None
    if x2_within and fits.hausman_taylor is not None:
        x2_job = pool.submit(strength.x2_first_stage, pa, list(sp.within), x2_within, list(roles.z1),
                             fits.hausman_taylor.components.theta, list(sp.means))
    rows: list[dict[str, Any]] = []
    cd = None
    cands: list[dict[str, Any]] = []
    sugg: list[dict[str, Any]] = []
    if sp.g2 and not fits.too_few_units:
        rows, cd = strength.z2_strength(pa, excluded, list(roles.z1), list(roles.z2), size=size, rule_of_thumb=thumb,
                                        order_met=roles.order_met, included_means=sp.x1_between_only,
                                        endogenous_means=sp.x2_between_only)
        for r in rows:
            f = r["partial_f"]
            r["p"] = strength.f_pvalue(f, r["df"])
            r["at_least_rule_of_thumb"] = None if f is None else bool(f >= thumb)
            r["at_least_lee"] = None if f is None else bool(f >= lee)
        _anderson_rubin(rows, design, roles, fits, excluded, t.anderson_rubin_level)
        mundlak_p = {r["column"]: r["p"] for r in fits.mundlak.per_column} if fits.mundlak is not None else {}
        if roles.z2:
            cands, sugg = strength.candidates(
                pa, excluded, list(roles.z1), list(roles.z2), mundlak_p, alpha=t.mundlak_alpha,
                size=size, rule_of_thumb=thumb, max_exhaustive=t.exhaustive_candidates,
                c_p=validity.c_p, states=validity.states or None, included_means=sp.x1_between_only)
    x2_rows = x2_job.result() if x2_job is not None else []
    for r in x2_rows:
        r["within_share"] = ident.within_share.get(r["endogenous"])
    return Strength(UnitStrength.rows(clean(rows)), cd, Candidate.rows(clean(cands)), SuggestedSet.rows(clean(sugg)),
                    X2Strength.rows(clean(x2_rows)))


def _anderson_rubin(rows: list[dict[str, Any]], design: Design, roles: Roles, fits: Fits, excluded: list[str],
                    level: float) -> None:
    """Attach the Anderson-Rubin set to the strength row when there is one unit-level endogenous
    column and it is a Z2 column; otherwise say why it is not computed."""
    sp, pa = roles.spec, design.pa
    for r in rows:
        r["anderson_rubin"] = None
    if len(rows) != 1 or sp.x2_between_only or fits.within is None or not roles.order_met:
        why = ("several unit-level endogenous columns" if len(rows) > 1 else
               "the endogenous column is an X2 column identified between units only" if sp.x2_between_only else
               "no within fit or the order condition fails")
        for r in rows:
            r["anderson_rubin_note"] = f"not computed: {why} (the set is for one Z2 column)"
        return
    wf = fits.within
    d = pa.ybar - pa.xbar[:, [pa.x_names.index(c) for c in wf.names]] @ wf.coef if wf.names else pa.ybar.copy()
    z = pa.zbar[:, pa.z_names.index(rows[0]["endogenous"])]
    included = strength.unit_included(pa, list(roles.z1), sp.x1_between_only)
    rows[0]["anderson_rubin"] = strength.anderson_rubin(d, z, included, pa.xbar[:, [pa.x_names.index(c)
                                                                                       for c in excluded]], level)


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
    engine: str = "auto",
    scheduler: str | None = None,
) -> InstrumentsResult:
    """Model readiness of ``outcome`` on ``regressors`` in the panel ``data``.

    ``correlated`` names the regressors suspected of correlation with the unit effect
    (None: suggest X2 from the Mundlak evidence; an empty list: none). Text columns
    may be named whole or by indicator (``soil=SD``). ``engine`` and ``scheduler`` as
    in :func:`auditor.commands.profile.profile`: with ``dask`` the sample and the unit
    cross-products of the design are computed on the cluster, and the fits run on
    their equivalent rows (:func:`auditor.stats.moments.equivalent_rows`). Raises AuditError
    for input that cannot be used.
    """
    from auditor.stats.pvalues import preload

    preload()  # scipy.special and scipy.sparse, while the panel is read and profiled
    if settings is None:
        settings = load_settings(rules)
    spec = ModelSpec.of(outcome, regressors, correlated, period_effects, treat_as_invariant)
    from auditor import progress
    from auditor.stats.engines import resolve_engine

    name = resolve_engine(engine, None, scheduler)
    if name == "dask":
        from auditor.stats import cluster

        shell, _ = cluster.load(data, unit, time, settings)
        spec.validate(shell)
        with progress.step("the design's moments on the cluster"):
            with cluster.session(data, unit, time, settings, scheduler) as run:
                sample = run.sample(spec.outcome, list(spec.regressors), spec.period_effects,
                                    list(spec.treat_as_invariant))
        return _run(run.panel, spec, settings, sample=sample)
    with progress.step("reading the panel"):
        panel = load_panel(data, unit, time, streaming={"memory": False, "streaming": True}.get(name),
                           settings=settings)
    return instruments_panel(panel, spec, settings)


@dataclass(frozen=True)
class ModelSpec:
    """What model readiness is asked about: the ``outcome``, the ``regressors``, those
    suspected of correlation with the unit effect (``correlated``; None: suggest them from
    the Mundlak evidence), whether period effects are added, and the nearly-time-invariant
    columns to treat as invariant. :meth:`of` takes the API's and the command line's forms
    (a comma-separated text or a sequence of names)."""

    outcome: str
    regressors: tuple[str, ...]
    correlated: tuple[str, ...] | None = None
    period_effects: bool = False
    treat_as_invariant: tuple[str, ...] = ()

    @classmethod
    def of(cls, outcome: str, regressors: Sequence[str] | str, correlated: Sequence[str] | str | None = None,
           period_effects: bool = False, treat_as_invariant: Sequence[str] = ()) -> ModelSpec:
        """The spec from names given as text (``"a,b"``) or sequences, trimmed."""
        return cls(str(outcome).strip(), tuple(_names(regressors)),
                   None if correlated is None else tuple(_names(correlated)), bool(period_effects),
                   tuple(_names(list(treat_as_invariant))))

    @property
    def correlated_list(self) -> list[str] | None:
        """``correlated`` as a list (None kept: suggest X2)."""
        return None if self.correlated is None else list(self.correlated)

    def validate(self, panel: Panel) -> None:
        """Raise AuditError when ``panel`` cannot answer this spec (an unknown or non-numeric
        outcome, a key as a regressor, a correlated or invariant column not among the regressors)."""
        _validate(panel, self.outcome, list(self.regressors), self.correlated_list, list(self.treat_as_invariant))


def instruments_panel(panel: Panel, spec: ModelSpec, settings: Settings) -> InstrumentsResult:
    """Model readiness on an already loaded panel (as :func:`instruments`, without reading
    the input again: the report profiles and checks one Panel)."""
    spec.validate(panel)
    return _run(panel, spec, settings)


def _run(panel: Panel, spec: ModelSpec, settings: Settings, sample: Sample | None = None) -> InstrumentsResult:
    from auditor import progress

    outcome, regs, corr = spec.outcome, list(spec.regressors), spec.correlated_list
    period_effects, invariant = spec.period_effects, list(spec.treat_as_invariant)

    t = settings.instruments
    with progress.step(f"kinds and complete rows of {len(regs)} regressors"):
        if sample is None:
            sample = _sample(panel, outcome, regs, period_effects, invariant, settings)
        design = _design(sample)
    with progress.step("what each fit identifies"):
        ident = identification.decide(design.pa, design.periods, design.x, design.z, tol=t.collinear_tol,
                                      near_r2=t.near_collinear_r2)
    if ident.moved_to_z:
        design = _moved_to_z(design, ident.moved_to_z)
    outcome_invariant = sample.kinds[outcome] in ("time-invariant", "constant")
    expand: dict[str, list[str]] = {}
    for name, parent in sample.design_cols:
        expand.setdefault(parent, []).append(name)
    alpha, test_alpha = t.mundlak_alpha, t.test_alpha
    # Fits that do not feed one another run side by side in a second thread (numpy
    # releases the interpreter lock): random effects beside the roles and Hausman-Taylor,
    # the X2 first stages beside the Z2 strength. Findings are sorted at the end.
    with ThreadPoolExecutor(max_workers=1) as pool, progress.step(f"fits on {design.pa.nobs:,} rows"):
        wf, bf, mu, job, too_few, k_unit = _early_fits(design, ident, outcome_invariant, pool)
        mundlak_p = {r["column"]: r["p"] for r in mu.per_column} if mu is not None else {}
        roles = _roles(design, ident, corr, mundlak_p, alpha, expand)
        fits = _beyond(design, ident, roles, _late_fits(design, ident, roles, wf, bf, mu, job, too_few, k_unit),
                       settings)
        validity = _validity(roles, fits.hausman_taylor, test_alpha)
        stren = _strength(design, ident, roles, fits, validity, settings, pool)
    findings = readiness_findings(sample, design, ident, roles, fits, validity, stren, settings)
    return _document(panel, sample, design, ident, roles, fits, stren, findings, settings)


# --------------------------------------------------------------------------- the document


def _test(test: models.WaldTest | None, **extra: str) -> ChiSquareTest | None:
    """A statistics module's test as the document's value (``extra``: names written after its own)."""
    return None if test is None else ChiSquareTest.from_dict(clean({**test.to_dict(), **extra}))


def _tests(fits: Fits, roles: Roles, alpha: float) -> SpecificationTests:
    mundlak = None
    if fits.mundlak is not None:
        mu = fits.mundlak
        mundlak = MundlakTest.from_dict(clean({
            **mu.to_dict(), "alpha": alpha,
            "flagged": [r["column"] for r in mu.per_column if r["p"] is not None and r["p"] < alpha]}))
    ht = fits.hausman_taylor
    by_est = against = None
    if ht is not None:
        richer = {name: fits.richer.get(name) for name in (instrument_sets.AM, instrument_sets.BMS)}
        by_est = SarganByEstimator(
            hausman_taylor=_test(ht.sargan, name="Sargan"),
            **{k: _test(None if rf is None else rf.sargan, name="Sargan") for k, rf in richer.items()})
        against = ContrastsWithHT(**{k: _test(None if rf is None else rf.against_ht) for k, rf in richer.items()})
    return SpecificationTests(
        mundlak=mundlak,
        hausman_within_random=_test(fits.hausman_random),
        overidentification=_test(ht.sargan, name="Sargan") if ht is not None else None,
        hausman_within_ht=_test(ht.hausman_within) if ht is not None else None,
        overidentification_by_estimator=by_est,
        hausman_against_ht=against,
        attrition=fits.attrition,
        attrition_note=fits.attrition_note or None,
    )


def _document(panel: Panel, sample: Sample, design: Design, ident: identification.Identification, roles: Roles,
              fits: Fits, stren: Strength, findings: list[Finding], settings: Settings) -> InstrumentsResult:
    t = settings.instruments

    def coefficients(fit: models.Fit | None) -> FitCoefficients | None:
        return None if fit is None else FitCoefficients.from_dict(clean(fit.to_dict()))

    richer = {name: fits.richer.get(name) for name in (instrument_sets.AM, instrument_sets.BMS)}
    estimates = Estimates(
        within=coefficients(fits.within), between=coefficients(fits.between), random=coefficients(fits.random),
        mundlak=coefficients(fits.mundlak.fit if fits.mundlak is not None else None),
        hausman_taylor=coefficients(fits.hausman_taylor.fit if fits.hausman_taylor is not None else None),
        **{k: None if rf is None else FitCoefficients.from_dict(clean(rf.estimates())) for k, rf in richer.items()},
    )
    components = fits.components.to_dict() if fits.components is not None else None
    if fits.hausman_taylor is not None:
        components = {**(components or {}), "hausman_taylor": fits.hausman_taylor.components.to_dict()}
    role_of = {c: r for r, cols in roles.as_dict().items() for c in cols}
    not_id = [d.to_dict() for d in _set_aside(sample, design, ident)]
    lost_everywhere = {d["column"] for d in not_id if "hausman_taylor" in d["fits"] and "within" in d["fits"]}
    columns = []
    kind = {**design.col_kind, **{c: "time-invariant" for c in ident.moved_to_z}}
    for name, parent in [(p, None) for p in sample.added_periods] + list(sample.design_cols):
        fits_of = [f for f in identification.ALL_FITS if ident.identifies(f, name)]
        columns.append({
            "column": name,
            "source": parent,
            "kind": kind.get(name, "period-only"),
            "role": role_of.get(name) or ("not-identified" if name in lost_everywhere or not fits_of else None),
            "period_effect": name in design.periods,
            "identified_by": fits_of,
            "within_share": ident.within_share.get(name),
            "base_level": sample.base_levels.get(parent) if parent in sample.base_levels else None,
        })
    sample_doc = {
        "rows": int(design.pa.nobs), "units": int(design.pa.n), "rows_dropped": int(sample.dropped),
        "periods": len(sample.periods_present), "period_effects": bool(sample.added_periods),
        "balanced": not design.unbalanced,
    }
    return InstrumentsResult(
        outcome=sample.outcome,
        roles=RoleColumns.from_dict(roles.as_dict()),
        roles_declared=roles.declared,
        period_effects=tuple(ident.periods),
        columns=ColumnUse.rows(clean(columns)),
        not_identified=SetAside.rows(clean(not_id)),
        near_collinear=NearCollinear.rows(clean([{"column": n.column, "fit": n.fit, "r2": n.r2, "with": list(n.with_)}
                                                 for n in ident.near])),
        order_condition=OrderCondition(k1=int(roles.spec.k1), g2=int(roles.spec.g2), met=bool(roles.order_met)),
        strength=stren.rows,
        x2_strength=stren.x2_rows,
        cragg_donald=stren.cragg_donald,
        candidates=stren.candidates,
        suggestion=stren.suggestion,
        tests=_tests(fits, roles, t.mundlak_alpha),
        estimates=estimates,
        variance_components=VarianceComponents.maybe(clean(components)),
        sample=SampleSummary.from_dict(clean(sample_doc)),
        reference_f=ReferenceF(rule_of_thumb=float(t.rule_of_thumb_f), lee=float(t.lee_f)),
        findings=tuple(sort_findings(findings)),
        source=panel.source,
    )


def _set_aside(sample: Sample, design: Design, ident: identification.Identification) -> list[identification.Dependence]:
    """Every column some fit sets aside: constants first, then what identification found."""
    out = [identification.Dependence(c, "constant", (), identification.ALL_FITS) for c in design.constant]
    return out + list(ident.set_aside)


# --------------------------------------------------------------------------- findings


def readiness_findings(sample: Sample, design: Design, ident: identification.Identification, roles: Roles,
                       fits: Fits, validity: Validity, stren: Strength, settings: Settings) -> list[Finding]:
    """Every finding of ``instruments``, from the stages' values (no statistic is computed here)."""
    out: list[Finding] = []
    out += _sample_findings(sample, settings)
    out += _identification_findings(sample, design, ident, settings)
    out += _fit_findings(sample, roles, fits, settings)
    out += _instrument_findings(roles, fits, validity, stren, settings)
    return out


def _sample_findings(sample: Sample, settings: Settings) -> list[Finding]:
    out = []
    for c, old, changed in sample.treated:
        out.append(make(
            "treated-as-invariant", settings,
            f"'{c}' ({old}) was replaced by each unit's most common value, changing {changed} units, "
            "so it now enters as time-invariant and any real changes in it are ignored.",
            column=c, count=changed,
        ))
    if sample.dropped:
        mc = sample.miss_counts
        worst = [c for c in sorted(mc, key=lambda c: -mc[c]) if mc[c]][:3]
        out.append(make(
            "rows-dropped", settings,
            f"{sample.dropped:,} of {sample.rows_keyed:,} rows lack the outcome or a regressor and are left out of every "
            f"fit, which changes the sample the models describe (most missing: "
            f"{', '.join(f'{c} {mc[c]}' for c in worst)}).",
            count=sample.dropped,
        ))
    if sample.kinds[sample.outcome] in ("time-invariant", "constant"):
        out.append(make(
            "outcome-time-invariant", settings,
            f"'{sample.outcome}' never changes within a unit, so a within (fixed-effects) model has nothing to "
            "explain and only between-unit comparisons are possible.",
            column=sample.outcome,
        ))
    return out


_FIT_WORDS = {"within": "within", "between": "between", "random": "random-effects", "mundlak": "Mundlak",
              "hausman_taylor": "Hausman-Taylor"}


def _listing(names: Sequence[str], limit: int = 6) -> str:
    names = list(names)
    if len(names) <= limit:
        return ", ".join(names)
    return f"{', '.join(names[:3])}, ..., {names[-1]} ({len(names)} columns)"


def dependence_message(dep: identification.Dependence) -> str:
    """One plain sentence (or two) on why a column is set aside and by which fits."""
    c, reason, with_ = dep.column, dep.reason, [w for w in dep.with_ if w != "const"]
    everywhere = set(dep.fits) >= set(identification.ALL_FITS)
    if reason == "constant":
        return f"'{c}' has one value everywhere, so no model can estimate its coefficient and it is left out."
    members = _listing(with_) if with_ else "the constant"
    choice = (f" The coefficients of {members} in {'every fit' if everywhere else 'the within fit'} depend on "
              "which member of this set is left out; the other coefficients do not.") if with_ else ""
    if reason == "period-only":
        return (f"'{c}' varies only across periods and the other period effects ({members}) already span it, so no "
                f"fit can estimate its coefficient and it is left out.{choice}")
    if not everywhere and reason in ("absorbed-by-time", "collinear-within"):
        how = ("moves in step with the period effects" if reason == "absorbed-by-time"
               else "is an exact linear combination of")
        kept = ", ".join(_FIT_WORDS[f] for f in identification.LEVELS_FITS)
        return (f"Within units '{c}' {how} {members}, so the within fit cannot estimate it and sets it aside; the "
                f"{kept} fits keep it, since in levels it is identified.{choice}")
    if dep.fits == (identification.BETWEEN,):
        return (f"Across units the mean of '{c}' is an exact linear combination of {members}, so the between fit "
                "leaves it out; the other fits keep it.")
    return (f"'{c}' is an exact linear combination of {members} in levels and within units, so no fit can "
            f"estimate its coefficient and it is left out.{choice}")


def _identification_findings(sample: Sample, design: Design, ident: identification.Identification,
                             settings: Settings) -> list[Finding]:
    out = []
    for name, parent in sample.design_cols:
        if sample.kinds[parent] == "nearly-time-invariant" and name in ident.x:
            units = sample.info[parent]["units_changing"]
            out.append(make(
                "nearly-invariant-regressor", settings,
                f"'{name}' changes for only {units} units, so as a time-varying regressor its within coefficient "
                f"rests on those few changes (pass --treat-as-invariant {parent} if they are coding errors).",
                column=name, count=units,
            ))
    for dep in _set_aside(sample, design, ident):
        out.append(make("not-identified", settings, dependence_message(dep), column=dep.column))
    for near in ident.near:
        where = "within units" if near.fit == "within" else "in levels"
        out.append(make(
            "near-collinear", settings,
            f"{where.capitalize()} {near.r2:.4%} of the variation of '{near.column}' is explained by "
            f"{_listing(near.with_)}; it is kept (only exact dependence sets a column aside), but its coefficient "
            "is imprecise and sensitive to small changes in the data.",
            column=near.column,
        ))
    return out


def _fit_findings(sample: Sample, roles: Roles, fits: Fits, settings: Settings) -> list[Finding]:
    out = []
    test_alpha = settings.instruments.test_alpha
    alpha = settings.instruments.mundlak_alpha
    n_examples = settings.instruments.examples
    if fits.too_few_units:
        out.append(make(
            "too-few-units", settings,
            f"{fits.units} units cannot identify {fits.unit_parameters} unit-level parameters (constant, "
            "time-invariant regressors and unit means), so the between, random-effects, Mundlak and "
            "Hausman-Taylor fits are not computed.",
            count=fits.units,
        ))
    if not roles.declared:
        out.append(make(
            "correlated-not-declared", settings,
            "No regressor was declared correlated with the unit effect: X2 is suggested from the Mundlak evidence "
            f"({', '.join(roles.x2) or 'none'}), which assumes every time-invariant regressor is exogenous, and "
            "whether a time-invariant regressor is correlated cannot be tested from the data, so any Z2 must be "
            "declared with --correlated.",
            count=len(roles.x2),
        ))
    if not roles.order_met:
        sp = roles.spec
        out.append(make(
            "order-condition", settings,
            f"With {sp.k1} excluded unit means of exogenous time-varying regressors (X1) for {sp.g2} correlated "
            "columns identified between units only (Z2) the Hausman-Taylor model is not identified: declare fewer "
            "regressors correlated or add exogenous time-varying ones.",
            count=sp.g2 - sp.k1,
        ))
    mu = fits.mundlak
    if mu is not None and mu.joint.p is not None and mu.joint.p < alpha:
        flagged = [r for r in mu.per_column if r["p"] is not None and r["p"] < alpha]
        out.append(make(
            "correlated-with-effect", settings,
            f"The Mundlak test finds the unit means of the time-varying regressors jointly significant "
            f"({p_phrase(mu.joint.p)}): the evidence is against the random-effects assumption that no "
            "time-varying regressor is correlated with the unit effect, and if it fails the random-effects "
            "estimates are inconsistent.",
            count=len(flagged),
            examples=[{"column": r["column"], "p": r["p"]} for r in flagged][:n_examples],
        ))
    h = fits.hausman_random
    if h is not None and h.p is not None and h.p < test_alpha:
        out.append(make(
            "random-effects-rejected", settings,
            f"The Hausman test rejects equal within and random-effects coefficients ({p_phrase(h.p)}): the "
            "evidence is against the random-effects assumption, under which both are consistent; if it fails, "
            "the random-effects estimates of the time-varying coefficients are inconsistent.",
        ))
    if h is not None and h.note:
        out.append(make("hausman-not-positive-definite", settings,
                        f"In the Hausman test {h.note}, so the test has fewer degrees of freedom than coefficients."))
    out += _beyond_findings(fits, test_alpha, settings)
    ht = fits.hausman_taylor
    if ht is not None:
        for nm, t in (("Sargan", ht.sargan), ("within vs Hausman-Taylor", ht.hausman_within)):
            if t is not None and t.p is not None and t.p < test_alpha:
                out.append(make(
                    "overidentification-rejected", settings,
                    f"The {nm} test rejects the over-identifying restrictions ({p_phrase(t.p)}): the evidence "
                    "is against the exogeneity of at least one X1 column's unit mean, and if one is correlated with "
                    "the unit effect the Hausman-Taylor estimates are inconsistent.",
                ))
    return out


def _beyond_findings(fits: Fits, test_alpha: float, settings: Settings) -> list[Finding]:
    """Attrition, and the extra restrictions of the richer instrument sets."""
    out = []
    a = fits.attrition
    if a is not None and a.p is not None and a.p < test_alpha:
        out.append(make(
            "selective-attrition", settings,
            f"The Nijman-Verbeek test finds that being observed in the next period is related to the outcome "
            f"within units (t = {a.t:.3g}, {p_phrase(a.p)}): leaving the panel appears related to the "
            "idiosyncratic error, so the within estimates on the observed rows may be inconsistent.",
        ))
    for name, rf in fits.richer.items():
        if rf is None:
            continue
        label = instrument_sets.NAMES[name]
        for what, t in (("Sargan test", rf.sargan), ("contrast with Hausman-Taylor", rf.against_ht)):
            if t is not None and t.p is not None and t.p < test_alpha:
                out.append(make(
                    "richer-set-rejected", settings,
                    f"The {label} {what} rejects ({p_phrase(t.p)}): the evidence is against the stronger "
                    f"exogeneity its extra instruments assume, and if it fails the {label} estimates are "
                    "inconsistent.",
                ))
    if fits.richer_note:
        out.append(make("richer-sets-skipped", settings, f"Amemiya-MaCurdy and Breusch-Mizon-Schmidt are "
                                                          f"{fits.richer_note}."))
    return out


def _instrument_findings(roles: Roles, fits: Fits, validity: Validity, stren: Strength,
                         settings: Settings) -> list[Finding]:
    out = []
    alpha = settings.instruments.mundlak_alpha
    thumb = settings.instruments.rule_of_thumb_f
    mundlak_p = {r["column"]: r["p"] for r in fits.mundlak.per_column} if fits.mundlak is not None else {}
    if roles.declared:
        for c in roles.spec.means:
            state = validity.states.get(c)
            cp, mp = validity.c_p.get(c), mundlak_p.get(c)
            if state is not None and state[0] == "invalid":
                text = (f"the difference-in-Sargan test of its unit mean gives {p_phrase(cp)} while the other "
                        "instruments pass")
            elif state is None and mp is not None and mp < alpha:
                text = f"its Mundlak {p_phrase(mp)} says it is correlated with the unit effect"
            else:
                continue
            out.append(make(
                "invalid-instrument", settings,
                f"'{c}' is declared exogenous (X1) but {text}, so its unit mean is probably an invalid instrument "
                "and the Hausman-Taylor estimates would be inconsistent.",
                column=c,
            ))
    for r in stren.rows:
        if r.verdict != "weak":
            continue
        basis = "conditional F" if r.verdict_basis == "conditional_f" else "first-stage F"
        value = r.conditional_f if r.verdict_basis == "conditional_f" else r.partial_f
        crit = r.critical_value if r.critical_value is not None else thumb
        out.append(make(
            "weak-instrument", settings,
            f"The unit means of X1 explain '{r.endogenous}' weakly ({basis} {value:.3g} below {crit:.4g}, "
            f"{r.critical_source}), so its Hausman-Taylor coefficient is imprecise and, in finite samples, "
            "biased towards random effects.",
            column=r.endogenous,
        ))
    weak_share = settings.instruments.weak_within_share
    for r in stren.x2_rows:
        share = r.within_share
        if share is not None and share < weak_share:
            out.append(make(
                "weak-within-variation", settings,
                f"Only {share:.1%} of the variation of '{r.endogenous}' is within units, so its own within "
                "deviation is a weak instrument and its Hausman-Taylor coefficient is imprecise.",
                column=r.endogenous,
            ))
    return out
