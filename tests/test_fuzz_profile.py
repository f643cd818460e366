"""Property-based fuzzing of ``auditor.profile`` on random valid panels (issue 8, items 2 and 3).

The invariants are facts of the trade (common practice) or follow from the
definitions in ../shared/methods.md section 1-2; the counts they are checked
against are computed here with plain pandas, independently of auditor's code.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from auditor.commands.profile import profile

UNIT, TIME = "plot", "wave"


@st.composite
def panels(draw) -> pd.DataFrame:
    """A random panel: unbalanced, with duplicate rows, missing keys and awkward values."""
    n_units = draw(st.integers(1, 7))
    n_periods = draw(st.integers(1, 6))
    step = draw(st.sampled_from([1, 2, 5]))
    present = draw(
        st.lists(st.booleans(), min_size=n_units * n_periods, max_size=n_units * n_periods)
    )
    cells = [(u, t) for u in range(n_units) for t in range(n_periods)]
    rows = [c for c, keep in zip(cells, present, strict=True) if keep] or [cells[0]]
    dups = draw(st.lists(st.sampled_from(rows), max_size=3))
    rows = rows + dups
    n = len(rows)
    finite = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)
    awkward = st.one_of(finite, st.none(), st.just(float("nan")), st.just(float("inf")), st.just(-float("inf")))
    label_offset = draw(st.integers(0, 3))
    frame = pd.DataFrame(
        {
            UNIT: [f"p{u + label_offset:03d}" for u, _ in rows],
            TIME: [2000 + step * t for _, t in rows],
            "x_float": draw(st.lists(awkward, min_size=n, max_size=n)),
            "x_int": draw(st.lists(st.integers(-5, 5), min_size=n, max_size=n)),
            "x_flag": draw(st.lists(st.sampled_from([0, 1]), min_size=n, max_size=n)),
            "x_text": draw(st.lists(st.sampled_from(["a", "b", "c", None]), min_size=n, max_size=n)),
            "x_fixed": [u * 1.5 for u, _ in rows],
        }
    )
    # a few rows with a missing key (never all of them)
    n_null_unit = draw(st.integers(0, 2))
    n_null_time = draw(st.integers(0, 2))
    extra = frame.head(n_null_unit + n_null_time).copy()
    if len(extra):
        extra[UNIT] = extra[UNIT].astype(object)
        extra[TIME] = extra[TIME].astype("Int64")
        extra.iloc[:n_null_unit, extra.columns.get_loc(UNIT)] = None
        extra.iloc[n_null_unit:, extra.columns.get_loc(TIME)] = pd.NA
        frame = pd.concat([frame.astype({TIME: "Int64"}), extra], ignore_index=True)
    return frame


def _to_polars(frame: pd.DataFrame) -> pl.DataFrame:
    out = pl.from_pandas(frame, nan_to_null=False)
    return out.with_columns(pl.col(TIME).cast(pl.Int64))


FUZZ = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _without_row_numbers(doc: dict) -> dict:
    # Examples of missing-key rows name their row number in the input, which moves when
    # the rows are shuffled; everything else must stay the same.
    out = json.loads(json.dumps(doc))
    for f in out["findings"]:
        f["examples"] = sorted(
            ({k: v for k, v in e.items() if k != "row"} for e in f["examples"]),
            key=lambda e: json.dumps(e, sort_keys=True),
        )
    return out


@FUZZ
@given(panels())
def test_profile_invariants_on_random_panels(frame):
    result = profile(_to_polars(frame), unit=UNIT, time=TIME)
    doc = result.to_dict()
    json.dumps(doc, allow_nan=False)  # non-finite numbers must have become null
    p = doc["panel"]

    # independent counts (pandas)
    keyed = frame.dropna(subset=[UNIT, TIME])
    assert p["rows"] == len(frame)
    assert p["missing_keys"] == len(frame) - len(keyed)
    assert p["units"] == keyed[UNIT].nunique()
    assert p["duplicate_keys"] == int(keyed.duplicated(subset=[UNIT, TIME]).sum())
    assert 0 <= p["duplicate_keys"] <= p["rows"]
    # rows = sum of obs per unit + missing keys (methods.md section 1)
    per_unit = result.details.obs_per_unit
    assert int((per_unit["t_i"] * per_unit["units"]).sum()) + p["missing_keys"] == p["rows"]
    assert math.isclose(p["obs_per_unit"]["mean"] * p["units"], len(keyed), rel_tol=1e-12)

    for col in doc["columns"]:
        ws = col["within_share"]
        if ws is not None:
            assert 0.0 <= ws <= 1.0, (col["name"], ws)
        assert 0.0 <= col["missing_share"] <= 1.0
        assert col["units_changing"] <= col["units_observed_twice"] <= p["units"]


@FUZZ
@given(panels(), st.randoms(use_true_random=False))
def test_shuffling_rows_gives_the_same_document(frame, rnd):
    order = list(range(len(frame)))
    rnd.shuffle(order)
    a = profile(_to_polars(frame), unit=UNIT, time=TIME).to_dict()
    b = profile(_to_polars(frame.iloc[order].reset_index(drop=True)), unit=UNIT, time=TIME).to_dict()
    _assert_same(_without_row_numbers(a), _without_row_numbers(b))


def _assert_same(a, b, path="doc"):
    # Counts, kinds, names and lists must match exactly. Floats may differ in the last
    # bits, because a sum taken in another row order rounds differently (IEEE 754
    # addition is not associative: common practice); 1e-12 relative is far below any
    # threshold the profile applies.
    if isinstance(a, float) or isinstance(b, float):
        assert isinstance(a, int | float) and isinstance(b, int | float), (path, a, b)
        assert math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-12), (path, a, b)
    elif isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), path
        for k in a:
            _assert_same(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _assert_same(x, y, f"{path}[{i}]")
    else:
        assert a == b, (path, a, b)


@FUZZ
@given(panels())
def test_same_input_gives_byte_identical_json(frame):
    from auditor.render.json import dumps

    data = _to_polars(frame)
    first = dumps(profile(data, unit=UNIT, time=TIME).to_dict())
    second = dumps(profile(data.clone(), unit=UNIT, time=TIME).to_dict())
    assert first == second


def test_within_share_of_fixed_column_is_zero_on_a_known_panel():
    # A hand-built check of the fuzz strategy's fixed column: x_fixed is constant within
    # each unit, so its within share is exactly 0 (methods.md section 2: WSS = 0).
    frame = pd.DataFrame({UNIT: ["p000", "p000", "p001", "p001"], TIME: [2000, 2001, 2000, 2001],
                          "x_fixed": [0.0, 0.0, 1.5, 1.5], "y": [1.0, 2.0, 3.0, 5.0]})
    cols = {c["name"]: c for c in profile(frame, unit=UNIT, time=TIME).to_dict()["columns"]}
    assert cols["x_fixed"]["within_share"] == 0.0
    # y: unit means 1.5 and 4; WSS = 0.5 + 2 = 2.5; TSS = sum((y - 2.75)^2) = 8.75 (by hand)
    assert cols["y"]["within_share"] == pytest.approx(2.5 / 8.75, rel=1e-12)
    assert np.isfinite(cols["y"]["within_sd"])
