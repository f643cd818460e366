"""Property-based fuzzing of the other commands' Python entries (issue 8, item 2):
``auditor.compare`` and ``auditor.instruments`` on random valid panels.

Invariants: no exception other than a catalogued AuditError (exit 2); the JSON document
serialises with allow_nan=False; unit counts add up (counted independently here with
Python sets); shuffling rows gives the same document (floats to 1e-12 relative, since
summation order changes the last bits: IEEE 754 addition is not associative, common
practice).
"""

from __future__ import annotations

import json
import math

import numpy as np
import polars as pl
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from auditor.errors import CATALOGUE, AuditError

UNIT, TIME = "plot", "wave"
FUZZ = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@st.composite
def wave_frames(draw, first_period: int, n_periods: int, id_pool: int) -> pl.DataFrame:
    ids = draw(st.lists(st.integers(0, id_pool), min_size=1, max_size=8, unique=True))
    rows = [(i, t) for i in ids for t in range(first_period, first_period + n_periods)]
    keep = draw(st.lists(st.booleans(), min_size=len(rows), max_size=len(rows)))
    rows = [r for r, k in zip(rows, keep, strict=True) if k] or rows[:1]
    n = len(rows)
    finite = st.floats(-1e4, 1e4, allow_nan=False, allow_infinity=False)
    return pl.DataFrame(
        {
            UNIT: [f"q{i:02d}" for i, _ in rows],
            TIME: [t for _, t in rows],
            "x": draw(st.lists(st.one_of(finite, st.none()), min_size=n, max_size=n)),
            "code": draw(st.lists(st.sampled_from(["A", "B", "C"]), min_size=n, max_size=n)),
            "fixed": [float(i % 3) for i, _ in rows],
        },
        schema_overrides={"x": pl.Float64},
    )


def _same(a, b, path="doc", rel=1e-12):
    if isinstance(a, float) or isinstance(b, float):
        assert isinstance(a, int | float) and isinstance(b, int | float), (path, a, b)
        assert math.isclose(a, b, rel_tol=rel, abs_tol=rel), (path, a, b)
    elif isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), path
        for k in a:
            _same(a[k], b[k], f"{path}.{k}", rel)
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _same(x, y, f"{path}[{i}]", rel)
    else:
        assert a == b, (path, a, b)


def _document(run) -> dict | None:
    """``run()``'s result as a strict-JSON document, or None after a catalogued exit-2
    error: a command may refuse a panel, never crash on it."""
    try:
        doc = run().to_dict()
    except AuditError as err:
        assert err.code in CATALOGUE
        return None
    json.dumps(doc, allow_nan=False)
    return doc


def _shuffled(frame: pl.DataFrame, seed: int) -> pl.DataFrame:
    order = np.random.default_rng(seed).permutation(frame.height)
    return frame[order]


@FUZZ
@given(
    wave_frames(first_period=2000, n_periods=3, id_pool=10),
    wave_frames(first_period=2003, n_periods=1, id_pool=14),
    st.integers(0, 2**16),
)
def test_compare_on_random_waves(base, new, seed):
    from auditor.commands.compare import compare

    doc = _document(lambda: compare(base, new, unit=UNIT, time=TIME))
    if doc is None:
        return
    u = doc["units"]
    base_ids, new_ids = set(base[UNIT]), set(new[UNIT])
    assert (u["base"], u["new"]) == (len(base_ids), len(new_ids))
    assert u["returning"] == len(base_ids & new_ids)
    assert u["entering"] == len(new_ids - base_ids)
    assert u["not_returning"] == len(base_ids - new_ids)
    again = compare(_shuffled(base, seed), _shuffled(new, seed + 1), unit=UNIT, time=TIME).to_dict()
    _same(json.loads(json.dumps(doc)), json.loads(json.dumps(again)))


@st.composite
def model_panels(draw, min_units: int = 2, min_periods: int = 2, min_keep: float = 0.5) -> pl.DataFrame:
    n_units = draw(st.integers(min_units, min_units + 10))
    n_periods = draw(st.integers(min_periods, 5))
    seed = draw(st.integers(0, 2**16))
    rng = np.random.default_rng(seed)
    keep = rng.random(n_units * n_periods) < draw(st.floats(min_keep, 1.0))
    unit = np.repeat(np.arange(n_units), n_periods)[keep]
    period = np.tile(np.arange(n_periods), n_units)[keep]
    u = rng.standard_normal(n_units)
    z = rng.integers(0, 12, n_units).astype(float)
    x1 = rng.standard_normal(unit.size) + 0.5 * rng.standard_normal(n_units)[unit]
    x2 = rng.standard_normal(unit.size) + u[unit]
    y = 1 + 0.5 * x1 + 0.3 * x2 + 0.2 * z[unit] + u[unit] + 0.3 * rng.standard_normal(unit.size)
    if draw(st.booleans()):
        x1 = np.where(rng.random(unit.size) < 0.1, np.nan, x1)  # some missing values
    return pl.DataFrame(
        {UNIT: [f"m{i:02d}" for i in unit], TIME: 2000 + period, "y": y, "x1": x1, "x2": x2, "z": z[unit]}
    ).with_columns(pl.col("x1").fill_nan(None))


KW = dict(unit=UNIT, time=TIME, outcome="y", regressors=["x1", "x2", "z"], correlated=["x2"])


@FUZZ
@given(model_panels())
def test_instruments_never_crashes_even_on_tiny_panels(frame):
    # Panels down to a handful of rows, where fits can be exact (no residual degrees of
    # freedom): a catalogued exit-2 error or a strict-JSON document, never an exception.
    from auditor.commands.instruments import instruments

    _document(lambda: instruments(frame, **KW))


@FUZZ
@given(model_panels(min_units=8, min_periods=3, min_keep=0.85), st.integers(0, 2**16))
def test_instruments_on_random_panels(frame, seed):
    from auditor.commands.instruments import instruments

    kw = KW
    doc = _document(lambda: instruments(frame, **kw))
    if doc is None:
        return
    roles = doc["roles"]
    assert {c for cols in roles.values() for c in cols if c != "const"} <= {"x1", "x2", "z"}
    for s in doc["strength"]:
        if s["partial_r2"] is not None:
            assert -1e-12 <= s["partial_r2"] <= 1 + 1e-12
    again = instruments(_shuffled(frame, seed), **kw).to_dict()
    # least-squares solutions on tiny random panels can be ill-conditioned, which magnifies
    # the last-bit differences of another summation order (common practice): 1e-9 relative
    _same(json.loads(json.dumps(doc)), json.loads(json.dumps(again)), rel=1e-9)
