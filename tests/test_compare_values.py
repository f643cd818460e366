"""The compare result as typed values: its JSON, and renderers that read attributes.

The JSON documents themselves are checked byte for byte against files written before
the result was typed (tests/test_layout_bytes.py); here: the document types back
(``CompareResult.from_dict``), every part's ``to_dict`` keeps the contract's key
order, and the text and HTML renderers draw a result built by hand, with and without
its optional parts.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from auditor.commands import compare_values as cv
from auditor.commands.compare import CompareResult, compare
from auditor.render import html
from auditor.render.text_compare import render

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def _row(column: str, **kw: object) -> cv.ColumnShift:
    base = dict(column=column, compared_as="numeric", base_kind="time-varying", reference="base period 2024",
                n_base=40, n_new=38, ks_statistic=0.21, ks_p=0.004, ks_p_method="exact", psi=0.31,
                missing_base=0.0, missing_new=0.05)
    base.update(kw)
    return cv.ColumnShift(**base)  # type: ignore[arg-type]


def _result(columns: tuple[cv.ColumnShift, ...], **kw: object) -> CompareResult:
    parts = dict(
        schema=cv.SchemaChanges(added=("hedge_m",), removed=(), type_changed=(cv.TypeChange("plot", "int64", "string", False),)),
        units=cv.UnitFlow(base=12, new=11, returning=10, entering=1, not_returning=2, returning_after_absence=1,
                       last_period=11, not_returning_from_last_period=1),
        periods=cv.PeriodPlacement(base=(2021, 2022, 2023, 2024), new=(2025,), overlap=(), frequency="integer",
                                step=1, colliding_keys=0),
        columns=columns, reference="base period 2024", reference_period=2024,
        rows=cv.RowCounts(base=44, new=11, base_reference=11, new_missing_keys=0),
        unit=("grove",), time="season", sources=cv.SourceNames(base="groves.csv", new="groves_2025.csv"),
        wave_findings=(),
    )
    parts.update(kw)
    return CompareResult(**parts)  # type: ignore[arg-type]


@pytest.fixture(scope="module")
def demo() -> CompareResult:
    return compare(EXAMPLES / "orchards.csv", EXAMPLES / "orchards_next_season.csv", unit="orchard_id",
                   time="season", merged=True)


def test_the_document_types_back_to_the_same_document(demo):
    doc = demo.to_dict()
    again = CompareResult.from_dict(doc)
    assert again.to_dict() == doc
    assert list(again.to_dict()) == list(doc)  # the same keys in the same order
    assert again.columns == demo.columns and again.units == demo.units and again.periods == demo.periods
    # the merged profile's findings keep their scope
    assert {again.scope_of(f) for f in again.findings} == {"wave", "merged"}


def test_each_column_row_carries_the_check_it_had(demo):
    by = {c.column: c for c in demo.columns}
    # examples/orchards_next_season.csv (README, "A new wave"): tree_age steps by one a season,
    # soil_class is a categorical with one new code, frost_alert is shared by all orchards
    assert isinstance(by["tree_age"].within, cv.JumpCheck) and by["tree_age"].expected_step == 1.0
    assert by["tree_age"].to_dict()["less_step"] is True
    assert isinstance(by["soil_class"].levels, cv.LevelCheck) and by["soil_class"].new_levels == 1
    assert isinstance(by["frost_alert"].within, cv.SharedValueCheck)
    assert isinstance(by["altitude_m"].within, cv.FixedValueCheck) and by["altitude_m"].changed_units == 0
    assert by["altitude_m"].implausible_jumps is None and by["altitude_m"].new_levels is None


def test_optional_keys_appear_only_for_their_check():
    jump = cv.JumpCheck(change_median=0.1, change_scale=2.0, change_scale_method="mad", expected_step=None,
                     implausible_jumps=3)
    assert list(jump.to_dict()) == ["change_median", "change_scale", "change_scale_method", "implausible_jumps"]
    stepped = dataclasses.replace(jump, change_scale_method="step", expected_step=1.0)
    assert list(stepped.to_dict())[3:] == ["expected_step", "implausible_jumps"]
    assert cv.LevelCheck(checked=False).to_dict() == {"levels_checked": False}
    row = _row("rain", within=stepped, levels=cv.LevelCheck(True, 2, 0)).to_dict()
    assert list(row)[:3] == ["column", "compared_as", "less_step"] and row["less_step"] is True
    assert list(row)[-3:] == ["levels_checked", "new_levels", "vanished_levels"]


def test_the_text_renderer_reads_the_typed_fields():
    rows = (
        _row("rain", within=cv.JumpCheck(0.0, 3.0, "mad", None, 2)),
        _row("tree_age", within=cv.JumpCheck(1.0, 1.0, "step", 1.0, 0)),
        _row("soil", compared_as="levels", ks_statistic=None, ks_p=None, ks_p_method=None,
             within=cv.FixedValueCheck(4), levels=cv.LevelCheck(True, 3, 1)),
        _row("frost", within=cv.SharedValueCheck(2)),
    )
    text = render(_result(rows), width=200)
    assert "new wave groves_2025.csv against base groves.csv" in text
    assert "returning 10 of 12 (1 after an absence)" in text
    assert "added hedge_m" in text and "plot int64→string" in text
    assert "base 2021-2024 (4, step 1)" in text
    for note in ("2 jumps", "step +1 a period expected", "4 fixed values changed", "3 new levels",
                 "1 level gone", "2 periods not shared by all units"):
        assert note in text, note


def test_a_result_without_columns_or_optional_parts_still_renders():
    bare = _result((), schema=cv.SchemaChanges((), (), ()),
                   periods=cv.PeriodPlacement(base=(2024,), new=(2025,), overlap=(), frequency="integer",
                                           step=None, colliding_keys=0))
    text = render(bare, width=120)
    assert "how each column moved" not in text and "step" not in text.split("periods", 1)[1].split("\n")[0]
    frag = html.compare_fragment(bare, figures=False)
    assert 'id="new-wave"' in frag and "Both waves have the same columns" in frag
    assert "KS statistic" not in frag  # no column table without columns
    one = _result((_row("rain"),))
    frag = html.compare_fragment(one)
    assert "<code>rain</code>" in frag and 'id="fig-wave-shift"' in frag
    assert "2021 to 2024 (4)" in frag  # the base periods, first to last


def test_the_html_renderer_refuses_a_document_and_names_the_remedy(demo):
    with pytest.raises(TypeError, match="CompareResult.from_dict"):
        html.compare_fragment(demo.to_dict())  # type: ignore[arg-type]
    typed = CompareResult.from_dict(demo.to_dict())
    assert html.compare_fragment(typed, figures=False) == html.compare_fragment(demo, figures=False)
