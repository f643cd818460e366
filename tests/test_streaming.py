"""Streaming and in-memory profiles of the same Parquet file give the same document (issue 7)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from conftest import approx_equal

import auditor


def _approx(a, b):
    # merged sums equal one pass to 1e-12 relative (issue 7)
    return approx_equal(a, b, rel=1e-12, abs_=1e-15)


@pytest.fixture(scope="module")
def parquet(tmp_path_factory):
    rng = np.random.default_rng(4)
    n, periods = 400, 6
    u = np.repeat(np.arange(n), periods)
    t = np.tile(np.arange(2001, 2001 + periods), n)
    df = pl.DataFrame(
        {
            "u": u,
            "t": t,
            "x": rng.normal(size=n * periods) + np.repeat(rng.normal(size=n), periods),
            "age": np.repeat(rng.integers(20, 60, n), periods) + (t - 2001),
            "g": np.repeat(np.array(["a", "b", "c"])[rng.integers(0, 3, n)], periods),
        }
    ).sample(fraction=0.85, seed=3)
    df = pl.concat([df, df.head(2)])  # two duplicate keys
    path = tmp_path_factory.mktemp("stream") / "p.parquet"
    df.write_parquet(path)
    return path


def _doc(path, streaming, unit="u", time="t"):
    d = auditor.profile(path, unit=unit, time=time, streaming=streaming).to_dict()
    assert d["panel"].pop("engine") == ("streaming" if streaming else "in-memory")
    return d


def test_streaming_equals_in_memory(parquet) -> None:
    assert _doc(parquet, True) == _doc(parquet, False)


def test_streaming_in_many_partitions_of_units_equals_in_memory(parquet, monkeypatch) -> None:
    # ranges of units read one at a time: per-unit figures joined in unit order, per-period
    # sums and the period dummies' matrices added up; equal to one pass to 1e-12
    import auditor.stats.engines as engines

    monkeypatch.setattr(engines, "PARTITION_ROWS", 97)
    calls = []
    original = engines.moments.shard
    monkeypatch.setattr(engines.moments, "shard", lambda *a, **k: calls.append(1) or original(*a, **k))
    streamed = _doc(parquet, True)
    assert len(calls) >= 20  # 2,000-odd rows in ranges of about 97 rows
    assert _approx(streamed, _doc(parquet, False))


def test_streaming_in_small_batches_merges_exactly(parquet, monkeypatch) -> None:
    # the row-batch pass (composite keys): units split across batches, per-unit moments
    # merged exactly (Chan, Golub and LeVeque) and a second pass with the merged unit
    # means, equal to one pass to 1e-12
    import auditor.stats.engines as engines

    monkeypatch.setattr(engines, "by_unit_ranges", lambda panel: False)
    monkeypatch.setattr(engines, "BATCH_ROWS", 97)
    assert _approx(_doc(parquet, True), _doc(parquet, False))


def test_streaming_with_text_keys_and_duplicates_in_partitions(tmp_path, monkeypatch) -> None:
    # text unit keys are ranged by their sorted order; duplicate cells and gaps found per range
    import auditor.stats.engines as engines

    rng = np.random.default_rng(11)
    n, periods = 150, 5
    df = pl.DataFrame(
        {
            "hh": np.repeat([f"H{i:04d}" for i in range(n)], periods),
            "wave": np.tile(np.arange(1, periods + 1), n),
            "spend": rng.normal(size=n * periods),
            "region": np.repeat(np.array(["n", "s"])[rng.integers(0, 2, n)], periods),
        }
    ).sample(fraction=0.9, seed=2)
    df = pl.concat([df, df.slice(10, 3)])
    path = tmp_path / "hh.parquet"
    df.write_parquet(path)
    monkeypatch.setattr(engines, "PARTITION_ROWS", 50)
    streamed = auditor.profile(path, unit="hh", time="wave", streaming=True).to_dict()
    whole = auditor.profile(path, unit="hh", time="wave", streaming=False).to_dict()
    assert streamed["panel"].pop("engine") == "streaming"
    whole["panel"].pop("engine")
    assert streamed["panel"]["duplicate_keys"] == 3
    assert _approx(streamed, whole)


@pytest.mark.parametrize("ranges", [True, False], ids=["unit-ranges", "row-batches"])
def test_streaming_with_missing_and_non_finite_values_equals_in_memory(tmp_path, monkeypatch, ranges) -> None:
    # whole-column counts of a streaming panel come from each column read whole and sorted:
    # nulls, NaN, infinities, the first finite value, finite extremes and distinct values
    # must equal the in-memory pass, for floats (64 and 32 bit), integers with nulls,
    # booleans, dates and text
    import datetime as dt

    import auditor.stats.engines as engines

    rng = np.random.default_rng(23)
    n, periods = 120, 6
    rows = n * periods
    x = rng.normal(size=rows).round(2)  # rounded: repeated values
    x[rng.integers(0, rows, 25)] = np.nan
    x[rng.integers(0, rows, 6)] = np.inf
    x[rng.integers(0, rows, 4)] = -np.inf
    x[0] = np.nan  # the first finite value is not the first row
    counts = rng.integers(0, 9, rows).astype(float)
    df = pl.DataFrame(
        {
            "farm": np.repeat(np.arange(n), periods),
            "year": np.tile(np.arange(2010, 2010 + periods), n),
            "x": x,
            "x32": rng.normal(size=rows).astype(np.float32),
            "k": counts,
            "flag": rng.integers(0, 2, rows).astype(bool),
            "day": [dt.date(2020, 1, 1) + dt.timedelta(days=int(d)) for d in rng.integers(0, 40, rows)],
            "crop": np.array(["rye", "oat", "pea"])[rng.integers(0, 3, rows)],
        }
    ).with_columns(
        pl.when(pl.int_range(pl.len()) % 17 == 3).then(None).otherwise(pl.col("x")).alias("x"),
        pl.when(pl.int_range(pl.len()) % 13 == 5).then(None).otherwise(pl.col("k")).cast(pl.Int64).alias("k"),
        pl.when(pl.int_range(pl.len()) % 11 == 7).then(None).otherwise(pl.col("flag")).alias("flag"),
        pl.when(pl.int_range(pl.len()) % 19 == 2).then(None).otherwise(pl.col("crop")).alias("crop"),
        pl.when(pl.int_range(pl.len()) % 23 == 4).then(None).otherwise(pl.col("x32")).alias("x32"),
    ).sample(fraction=0.9, seed=5)
    path = tmp_path / "farms.parquet"
    df.write_parquet(path)
    monkeypatch.setattr(engines, "PARTITION_ROWS", 101)
    monkeypatch.setattr(engines, "BATCH_ROWS", 101)
    monkeypatch.setattr(engines, "by_unit_ranges", lambda panel: ranges)
    streamed = _doc(path, True, "farm", "year")
    whole = _doc(path, False, "farm", "year")
    cols = {c["name"]: c for c in streamed["columns"]}
    assert cols["x"]["missing_share"] > 0 and cols["k"]["missing_share"] > 0 and cols["x32"]["missing_share"] > 0
    assert _approx(streamed, whole)
