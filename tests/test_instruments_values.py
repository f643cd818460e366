"""The typed instruments result: its parts write the contract's JSON, a document rebuilt with
``InstrumentsResult.from_dict`` renders like the run that wrote it, and the text and HTML
renderers read typed fields (a result built by hand, parts missing, renders).

Oracles: the golden documents of tests/data/golden (the contract's JSON and the text the
command printed for the demo and benchmark panels, written before the result was typed);
the rest are hand-built values whose output is stated here.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from test_models import simulate

from auditor.checks.findings import Finding
from auditor.commands.instruments import InstrumentsResult, instruments
from auditor.commands.instruments_values import (
    ChiSquareTest,
    ColumnUse,
    ConfidenceSet,
    Estimates,
    FitCoefficients,
    OrderCondition,
    ReferenceF,
    RoleColumns,
    SampleSummary,
    SetAside,
    SpecificationTests,
    UnitStrength,
    VarianceComponents,
)
from auditor.render import html
from auditor.render.text_instruments import render

GOLDEN = Path(__file__).resolve().parent / "data" / "golden"


@pytest.fixture(scope="module")
def sim_result() -> InstrumentsResult:
    # the simulated Hausman-Taylor design of tests/test_models.py: Z2 strength rows, an
    # Anderson-Rubin set, Hausman-Taylor and the richer instrument sets
    return instruments(simulate(), unit="unit", time="t", outcome="y", regressors=["x1a", "x1b", "x2", "z1", "z2"],
                       correlated=["x2", "z2"])


def _golden(name: str) -> dict:
    return json.loads((GOLDEN / f"{name}_instruments.json").read_text(encoding="utf-8"))


@pytest.mark.parametrize("name", ["demo", "bench"])
def test_a_golden_document_round_trips_through_the_typed_result(name: str) -> None:
    doc = _golden(name)
    rebuilt = InstrumentsResult.from_dict(doc)
    assert rebuilt.to_dict() == doc
    # and the parts are typed values, not the document's dicts
    assert isinstance(rebuilt.order_condition, OrderCondition)
    assert all(isinstance(r, UnitStrength) for r in rebuilt.strength)
    assert isinstance(rebuilt.estimates.within, FitCoefficients)
    assert isinstance(rebuilt.tests.hausman_within_random, ChiSquareTest)


@pytest.mark.parametrize("name", ["demo", "bench"])
def test_the_text_of_a_rebuilt_document_is_the_text_the_command_printed(name: str) -> None:
    # golden text: the CLI at COLUMNS=100 without colour (tests/data/golden/make_golden.py)
    text = render(InstrumentsResult.from_dict(_golden(name)), width=100, colour=False, show="note")
    assert text == (GOLDEN / f"{name}_instruments.txt").read_text(encoding="utf-8")


def test_a_rebuilt_result_gives_the_same_notebook_fragment_as_the_live_one(sim_result) -> None:
    live = html.instruments_fragment(sim_result, figures=False)
    again = html.instruments_fragment(InstrumentsResult.from_dict(sim_result.to_dict()), figures=False)
    assert again == live


def _hand_built(**changes) -> InstrumentsResult:
    """A made-up result: one Z2 column with a weak first stage and an unbounded Anderson-Rubin set,
    Hausman-Taylor estimated, no richer sets, no candidates."""
    values = dict(
        outcome="yield_t",
        roles=RoleColumns(x1=("rain_mm",), x2=(), z1=("soil=clay",), z2=("area_ha",)),
        roles_declared=True,
        period_effects=(),
        columns=(ColumnUse(column="rain_mm", kind="time-varying", role="X1", within_share=0.75),
                 ColumnUse(column="area_ha", kind="time-invariant", role="Z2", within_share=0.0)),
        not_identified=(SetAside(column="plot_copy", reason="collinear-between", with_=("area_ha",),
                                 fits=("between",)),),
        near_collinear=(),
        order_condition=OrderCondition(k1=1, g2=1, met=True),
        strength=(UnitStrength(endogenous="area_ha", role="Z2", instruments=("rain_mm",), partial_f=3.25,
                               robust_f=2.5, partial_r2=0.04, df=(1, 96), critical_value=16.38, critical_size=10,
                               critical_source="Stock-Yogo 2005, 10% maximal size", verdict_basis="partial_f",
                               verdict="weak", p=0.0745, at_least_rule_of_thumb=False, at_least_lee=False,
                               anderson_rubin=ConfidenceSet(level=0.9, intervals=((None, -2.5), (4.75, None)),
                                                            kind="two rays")),),
        x2_strength=(),
        cragg_donald=None,
        candidates=(),
        suggestion=(),
        tests=SpecificationTests(hausman_within_random=ChiSquareTest(statistic=7.5, df=2, p=0.0235,
                                                                     positive_definite=True)),
        estimates=Estimates(hausman_taylor=FitCoefficients(coef={"const": 1.5, "area_ha": 0.875},
                                                           se={"const": 0.25, "area_ha": 0.125})),
        variance_components=VarianceComponents(sigma_u=0.5, sigma_e=0.25, theta_mean=0.625),
        sample=SampleSummary(rows=400, units=100, rows_dropped=0, periods=4, period_effects=False, balanced=True),
        reference_f=ReferenceF(rule_of_thumb=10.0, lee=104.7),
        findings=(Finding(check="weak-instrument", severity="warning", message="a made-up finding",
                          column="area_ha"),),
        source="made-up",
    )
    values.update(changes)
    return InstrumentsResult(**values)


def test_the_text_renderer_reads_the_typed_fields_of_a_hand_built_result() -> None:
    text = render(_hand_built(), width=120)
    assert "model readiness of yield_t: 400 rows in 100 units, 4 periods" in text
    assert "Anderson-Rubin 90% set for area_ha: [-inf, -2.5] or [4.75, +inf] (two rays" in text
    assert "Hausman, within against random effects: 7.5 on 2 df, p 0.0235" in text
    assert "Sargan over-identification: none (just identified or no fit)" in text
    assert "not identified by between: plot_copy (collinear-between; with area_ha)" in text
    assert "order condition: k1 = 1 >= g2 = 1, met" in text
    assert "0.875 (0.125)" in text  # the Hausman-Taylor coefficient of area_ha and its se
    assert "richer instrument sets" not in text  # no Amemiya-MaCurdy fit


def test_the_html_renderer_reads_the_typed_fields_of_a_hand_built_result() -> None:
    frag = html.instruments_fragment(_hand_built(), figures=True)
    assert "[\u2212\u221e, -2.5] or [4.75, +\u221e]" in frag  # the Anderson-Rubin cell
    assert 'id="fig-first-stage"' in frag and 'id="fig-anderson-rubin"' in frag
    assert "<td>Sargan, Amemiya-MaCurdy</td>" not in frag  # no richer sets, no rows for them
    assert "<td>Hausman: within against random effects</td><td class=\"pa-n\">7.5</td>" in frag
    assert "Not identified by between: <code>plot_copy</code>" in frag
    assert "a made-up finding" in frag


def test_a_result_without_hausman_taylor_or_strength_rows_still_renders() -> None:
    bare = _hand_built(roles=RoleColumns(x1=("rain_mm",)), not_identified=(),
                       order_condition=OrderCondition(k1=1, g2=0, met=True), strength=(),
                       tests=SpecificationTests(), estimates=Estimates(), variance_components=None, findings=())
    text = render(bare, width=100)
    assert "no Z2 column, so no time-invariant regressor needs instruments" in text
    assert "Hausman-Taylor not estimated" in text
    assert "Mundlak, unit means of X jointly zero (clustered): not computed" in text
    frag = html.instruments_fragment(bare)
    assert 'id="readiness"' in frag and "First stages" not in frag and "<svg" not in frag
    assert "Estimates (coefficient" not in frag and "sd of unit effect" not in frag
    # a partial document (older or hand-written) rebuilds with empty parts and renders too
    partial = InstrumentsResult.from_dict({"outcome": "y", "roles": {"Z2": ["z"]}, "strength": [
        {"endogenous": "z", "partial_f": 4.0, "verdict": "weak"}]})
    assert partial.strength[0].anderson_rubin is None and partial.tests.mundlak is None
    assert "model readiness of y" in render(partial, width=100)
    assert 'id="readiness"' in html.instruments_fragment(partial)


def test_an_attrition_test_not_computed_shows_why_in_its_own_row() -> None:
    # the dask engine leaves the attrition test out with a note: the page says why in that row,
    # never a row labelled with the JSON name
    why = "not computed on the dask engine (it needs every row of the panel)"
    frag = html.instruments_fragment(_hand_built(tests=SpecificationTests(attrition_note=why)), figures=False)
    assert f"<td>Attrition (Nijman-Verbeek): next period observed</td><td>\u2013</td><td>\u2013</td><td>not computed: {why}" in frag.replace(' class="pa-n"', "")
    assert "attrition_note" not in frag


def test_optional_names_are_written_only_when_set() -> None:
    # the document has always left out a contrast's note and positive_definite when unset,
    # and a strength row's anderson_rubin_note when a set was computed
    assert ChiSquareTest(statistic=1.5, df=1, p=0.25).to_dict() == {"statistic": 1.5, "df": 1, "p": 0.25}
    assert ChiSquareTest(statistic=1.5, df=1, p=0.25, positive_definite=False).to_dict()["positive_definite"] is False
    row = UnitStrength(endogenous="z").to_dict()
    assert "anderson_rubin_note" not in row and row["anderson_rubin"] is None and list(row)[-1] == "anderson_rubin"
    assert SetAside(column="a", reason="constant", with_=("b",)).to_dict() == {
        "column": "a", "reason": "constant", "with": ["b"], "fits": []}
    assert RoleColumns(x1=("a",)).to_dict() == {"X1": ["a"], "X2": [], "Z1": [], "Z2": []}
    assert "hausman_taylor" not in VarianceComponents(sigma_u=1.0).to_dict()
    # the dask engine's documents carry attrition_note after attrition; the memory engine's do not
    assert list(SpecificationTests(attrition_note="not computed").to_dict())[-2:] == ["attrition", "attrition_note"]
    assert "attrition_note" not in SpecificationTests().to_dict()


def test_the_renderers_refuse_the_json_dict_and_say_how_to_rebuild_it(sim_result) -> None:
    with pytest.raises(TypeError, match="from_dict"):
        html.instruments_fragment(sim_result.to_dict())
