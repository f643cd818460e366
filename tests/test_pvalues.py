"""The p-value helpers equal scipy.stats (a general-purpose reference library).

auditor.stats.pvalues calls scipy.special directly to spare the scipy.stats import; the
values must be the ones scipy.stats gives.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from auditor.stats.pvalues import chi2_sf, f_sf, normal_sf
from auditor.vocab import p_phrase

POINTS = [0.0, 1e-300, 1e-8, 0.3, 1.0, 2.5, 7.9, 40.0, 1e3, math.inf]


@pytest.mark.parametrize("dof", [1, 2, 3, 7.5, 120])
def test_chi2_upper_tail_equals_scipy_stats(dof) -> None:
    for x in POINTS:
        assert chi2_sf(x, dof) == pytest.approx(float(stats.chi2.sf(x, dof)), rel=1e-14, abs=0.0)
    assert chi2_sf(-1.0, dof) == 1.0 == float(stats.chi2.sf(-1.0, dof))


@pytest.mark.parametrize(("dfn", "dfd"), [(1, 1), (1, 30), (3, 1000), (12, 7), (2, 2_500_000)])
def test_f_upper_tail_equals_scipy_stats(dfn, dfd) -> None:
    for x in POINTS:
        assert f_sf(x, dfn, dfd) == pytest.approx(float(stats.f.sf(x, dfn, dfd)), rel=1e-14, abs=0.0)
    assert f_sf(-0.5, dfn, dfd) == 1.0 == float(stats.f.sf(-0.5, dfn, dfd))


def test_normal_upper_tail_equals_scipy_stats() -> None:
    for x in [-math.inf, -40.0, -3.0, -1e-9, 0.0, 0.5, 1.959963984540054, 8.0, 38.0, math.inf]:
        assert normal_sf(x) == pytest.approx(float(stats.norm.sf(x)), rel=1e-14, abs=0.0)
    assert math.isnan(normal_sf(math.nan)) and np.isnan(stats.norm.sf(math.nan))
    # a fact of the trade (common practice): the two-sided 5% point of the normal
    assert 2 * normal_sf(1.959963984540054) == pytest.approx(0.05, rel=1e-12)


def test_a_p_value_in_a_sentence_reads_as_one_relation() -> None:
    # "p = < 1e-16" was written in finding messages; the floor reads "p < 1e-16"
    assert p_phrase(1e-300) == "p < 1e-16"
    assert p_phrase(0.0) == "p < 1e-16"
    assert p_phrase(0.0015) == "p = 0.0015"
    assert p_phrase(5.63e-05) == "p = 5.63e-05"
