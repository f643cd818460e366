"""Streaming and in-memory profiles of the same Parquet file give the same document (issue 7)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

import auditor


def _approx(a, b, rel=1e-12):
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_approx(a[k], b[k], rel) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_approx(x, y, rel) for x, y in zip(a, b, strict=True))
    if isinstance(a, float) and isinstance(b, float):
        return a == pytest.approx(b, rel=rel, abs=1e-15)
    return a == b


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


def _doc(path, streaming):
    d = auditor.profile(path, "u", "t", streaming=streaming).to_dict()
    assert d["panel"].pop("engine") == ("streaming" if streaming else "in-memory")
    return d


def test_streaming_equals_in_memory(parquet) -> None:
    assert _doc(parquet, True) == _doc(parquet, False)


def test_streaming_in_small_batches_merges_exactly(parquet, monkeypatch) -> None:
    # per-unit moments merged across batches (Chan, Golub and LeVeque) equal one pass to 1e-12
    import auditor.variation as variation

    monkeypatch.setattr(variation, "MOMENT_BATCH_ROWS", 97)
    assert _approx(_doc(parquet, True), _doc(parquet, False))
