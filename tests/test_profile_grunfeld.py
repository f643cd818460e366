"""Profile of the Grunfeld panel against an independent pandas group-by computation.

Source: the Grunfeld investment data shipped by statsmodels
(statsmodels.datasets.grunfeld); the textbook sample is the 10 firms left after
dropping "American Steel", 1935-1954, 200 rows, balanced (check-values.md).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import auditor

statsmodels = pytest.importorskip("statsmodels")


@pytest.fixture(scope="module")
def grunfeld() -> pd.DataFrame:
    from statsmodels.datasets import grunfeld as g

    data = g.load_pandas().data
    return data[data["firm"] != "American Steel"].reset_index(drop=True)


def _pandas_decomposition(df: pd.DataFrame, col: str) -> dict[str, float]:
    """Within/between figures by plain pandas (the oracle; methods.md section 2 formulas)."""
    x = df[col].astype(float)
    unit_mean = df.groupby("firm")[col].transform("mean")
    tss = float(((x - x.mean()) ** 2).sum())
    wss = float(((x - unit_mean) ** 2).sum())
    n_units = df["firm"].nunique()
    return {
        "within_share": wss / tss,
        "between_sd": float(df.groupby("firm")[col].mean().std(ddof=1)),
        "within_sd": float(np.sqrt(wss / (len(df) - n_units))),
        "overall_sd": float(x.std(ddof=1)),
        "mean": float(x.mean()),
    }


def test_grunfeld_structure_is_balanced_10_by_20(grunfeld: pd.DataFrame) -> None:
    r = auditor.profile(grunfeld, unit="firm", time="year")
    p = r.panel
    assert (p["rows"], p["units"], p["periods"]) == (200, 10, 20)
    assert p["balanced"] is True
    assert p["period_values"][0] == 1935 and p["period_values"][-1] == 1954
    assert p["step"] == 1
    assert p["duplicate_keys"] == 0 and p["missing_keys"] == 0 and p["units_with_gaps"] == 0
    # Ahrens and Pincus (1981): r = 1 exactly for a balanced panel.
    assert p["unbalancedness"] == pytest.approx(1.0, abs=1e-15)
    assert p["patterns"] == [{"periods": "1935-1954", "units": 10}]


@pytest.mark.parametrize("col", ["invest", "value", "capital"])
def test_grunfeld_within_between_match_pandas(grunfeld: pd.DataFrame, col: str) -> None:
    r = auditor.profile(grunfeld, unit="firm", time="year")
    row = r.columns.filter(r.columns["name"] == col).to_dicts()[0]
    expected = _pandas_decomposition(grunfeld, col)
    for key, value in expected.items():
        assert row[key] == pytest.approx(value, rel=1e-10), key
    assert row["kind"] == "time-varying"
