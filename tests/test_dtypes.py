"""One vocabulary of column types (auditor/dtypes.py), as the documents spell them.

The spellings are the project's own conventions (the golden documents of
tests/test_layout_bytes.py hold none of these types): the profile calls an Enum column
"categorical", compare calls it "enum"; both call a Categorical "categorical". The missing
tests are checked against plain Python on the same values.
"""

from __future__ import annotations

import math

import polars as pl

import auditor
from auditor.dtypes import (
    compare_dtype_name,
    null_or_nan,
    null_or_non_finite,
    profile_dtype_name,
    type_family,
)


def test_the_two_dtype_spellings_differ_only_for_enum() -> None:
    enum = pl.Enum(["a", "b"])
    assert profile_dtype_name(enum) == "categorical"
    assert compare_dtype_name(enum) == "enum"
    for dt in (pl.Categorical(), pl.Int64(), pl.Float64(), pl.String(), pl.Datetime("us"), pl.Date()):
        assert profile_dtype_name(dt) == compare_dtype_name(dt)
    assert profile_dtype_name(pl.Datetime("ms", "UTC")) == "datetime"


def test_type_families() -> None:
    cases = {pl.Boolean(): "boolean", pl.Int8(): "integer", pl.UInt32(): "integer", pl.Float32(): "float",
             pl.Decimal(10, 2): "float", pl.String(): "text", pl.Categorical(): "text",
             pl.Enum(["x"]): "text", pl.Date(): "date", pl.Datetime("ns"): "datetime", pl.Duration(): None}
    assert {str(k): type_family(k) for k in cases} == {str(k): v for k, v in cases.items()}


def test_missing_in_two_strengths() -> None:
    values = [1.0, None, math.nan, math.inf, -math.inf, 0.0]
    frame = pl.DataFrame({"x": values}, schema={"x": pl.Float64})
    nan = frame.select(null_or_nan("x", pl.Float64())).to_series().to_list()
    fin = frame.select(null_or_non_finite("x", pl.Float64())).to_series().to_list()
    assert nan == [v is None or (isinstance(v, float) and math.isnan(v)) for v in values]
    assert fin == [v is None or not math.isfinite(v) for v in values]


def test_the_documents_use_their_spelling() -> None:
    base = pl.DataFrame({"u": ["a", "b", "a", "b"], "t": [1, 1, 2, 2], "g": [1, 2, 1, 2]})
    new = pl.DataFrame({"u": ["a", "b"], "t": [3, 3], "g": ["x", "y"]},
                       schema={"u": pl.String, "t": pl.Int64, "g": pl.Enum(["x", "y"])})
    prof = auditor.profile(new, unit="u", time="t").to_dict()
    assert [c["dtype"] for c in prof["columns"] if c["name"] == "g"] == ["categorical"]
    comp = auditor.compare(base, new, unit="u", time="t").to_dict()
    assert [(c["base"], c["new"]) for c in comp["schema"]["type_changed"] if c["column"] == "g"] == [("int64", "enum")]
