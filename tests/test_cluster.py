"""The dask engine (auditor/cluster.py) on a real distributed.LocalCluster of 2 worker
processes started by these tests and closed at the end, whatever happens.

Claim checked: ``--engine dask`` gives the memory engine's document (to 1e-12 relative,
counts, kinds and findings exactly) on a panel held as one Parquet file per wave, so
that every unit has rows in several partitions, with NaN, infinities, nulls, text,
dates, duplicate and missing keys. The oracle of the figures themselves is in
tests/test_moments.py (exact arithmetic); here the two engines must agree.
"""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import polars as pl
import pytest
from conftest import PERIOD_BY_PERIOD, approx_equal, without_period_by_period

import auditor

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def scheduler():
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0", silence_logs=40
    )
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()


def write_waves(folder, seed: int = 7, n: int = 150, periods: int = 5) -> pl.DataFrame:
    """An invented registry of beehives, one Parquet file per season."""
    rng = np.random.default_rng(seed)
    hive = np.repeat(np.arange(1000, 1000 + n), periods)
    season = np.tile(np.arange(2015, 2015 + periods), n)
    rows = hive.size
    honey = 30 + np.repeat(rng.normal(0, 5, n), periods) + rng.normal(0, 2, rows)
    honey[rng.integers(0, rows, 12)] = np.nan
    honey[rng.integers(0, rows, 4)] = np.inf
    frame = pl.DataFrame(
        {
            "hive": hive,
            "season": season,
            "honey_kg": honey,
            "frames": rng.integers(5, 12, rows),
            "colonies": np.repeat(rng.integers(1, 4, n), periods).astype(np.int64),
            "apiary": np.repeat(np.array(["north", "mill", "ridge"])[rng.integers(0, 3, n)], periods),
            "queen": np.array(["old", "new"])[rng.integers(0, 2, rows)],
            "inspected": [dt.date(2015, 5, 1) + dt.timedelta(days=int(d)) for d in rng.integers(0, 90, rows)],
            "level": np.repeat(rng.normal(0, 1, n), periods) * 1e-3 + 1e9,  # 1e9 + small noise
        }
    ).with_columns(
        pl.when(pl.int_range(pl.len()) % 23 == 3).then(None).otherwise(pl.col("frames")).alias("frames"),
        pl.when(pl.int_range(pl.len()) % 17 == 5).then(None).otherwise(pl.col("queen")).alias("queen"),
        pl.when(pl.int_range(pl.len()) % 97 == 1).then(None).otherwise(pl.col("hive")).alias("hive"),  # missing keys
    ).sample(fraction=0.9, seed=seed)
    frame = pl.concat([frame, frame.head(2)])  # two duplicate keys
    folder.mkdir(parents=True, exist_ok=True)
    for year in range(2015, 2015 + periods):
        frame.filter(pl.col("season") == year).write_parquet(folder / f"season_{year}.parquet", row_group_size=40)
    return frame


def without_engine(doc: dict) -> dict:
    assert doc["panel"].pop("engine") in ("dask", "in-memory")
    return doc


@pytest.fixture(scope="module")
def waves(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hives") / "waves"
    write_waves(folder)
    return folder


def test_profile_on_the_cluster_equals_the_memory_engine(scheduler, waves, monkeypatch):
    import auditor.stats.cluster as cluster

    monkeypatch.setattr(cluster, "PARTITION_ROWS", 30)  # one partition per row group of 40 rows
    parts = cluster.partitions(sorted(waves.glob("*.parquet")), dict(pl.scan_parquet(waves).collect_schema()))
    assert len(parts) > 10
    on_cluster = auditor.profile(waves, unit="hive", time="season", engine="dask", scheduler=scheduler)
    memory = auditor.profile(waves, unit="hive", time="season", engine="memory")
    a, b = without_engine(on_cluster.to_dict()), without_engine(memory.to_dict())
    assert a["panel"]["duplicate_keys"] == 2 and a["panel"]["missing_keys"] > 0
    kinds = {c["name"]: c["kind"] for c in a["columns"]}
    assert kinds["apiary"] == "time-invariant" and kinds["honey_kg"] == "time-varying"
    assert approx_equal(a, b, rel=1e-12, abs_=1e-15)


def test_profile_command_with_a_scheduler(scheduler, waves, cli):
    glob = str(waves / "*.parquet")
    got = cli("profile", glob, "--unit", "hive", "--time", "season", "--json", "--engine", "dask",
              "--scheduler", scheduler, "--fail-on", "never")
    assert got.returncode == 0, got.stderr
    want = cli("profile", glob, "--unit", "hive", "--time", "season", "--json", "--in-memory", "--fail-on", "never")
    assert approx_equal(without_engine(json.loads(got.stdout)), without_engine(json.loads(want.stdout)), 1e-12, 1e-15)


def test_profile_command_starts_and_closes_a_local_cluster(waves, cli):
    got = cli("profile", str(waves), "--unit", "hive", "--time", "season", "--json", "--engine", "dask",
              "--fail-on", "never", timeout=300)
    assert got.returncode == 0, got.stderr
    assert json.loads(got.stdout)["panel"]["engine"] == "dask"


def test_dask_engine_refuses_text_files(tmp_path, cli):
    path = tmp_path / "hives.csv"
    pl.DataFrame({"hive": [1, 1, 2], "season": [1, 2, 1], "x": [1.0, 2.0, 3.0]}).write_csv(path)
    got = cli("profile", str(path), "--unit", "hive", "--time", "season", "--engine", "dask")
    assert got.returncode == 2
    assert got.stderr.startswith("panel-audit: error: --engine dask reads Parquet files")


def test_scheduler_needs_the_dask_engine(waves, cli):
    got = cli("profile", str(waves), "--unit", "hive", "--time", "season", "--scheduler", "tcp://127.0.0.1:1")
    assert got.returncode == 2 and "needs --engine dask" in got.stderr


def test_engine_and_its_shorthand_must_agree(waves, cli):
    got = cli("profile", str(waves), "--unit", "hive", "--time", "season", "--engine", "dask", "--in-memory")
    assert got.returncode == 2 and "--in-memory contradicts --engine dask" in got.stderr


def test_an_unreachable_scheduler_is_a_clear_error(waves, cli):
    got = cli("profile", str(waves), "--unit", "hive", "--time", "season", "--engine", "dask",
              "--scheduler", "tcp://127.0.0.1:9", timeout=120)
    assert got.returncode == 2
    assert got.stderr.startswith("panel-audit: error: cannot reach the dask scheduler at 'tcp://127.0.0.1:9'")


def test_without_the_dask_extra_the_engine_says_how_to_install_it(monkeypatch):
    import sys

    from auditor.errors import AuditError
    from auditor.stats import cluster

    monkeypatch.setitem(sys.modules, "distributed", None)  # as if not installed
    with pytest.raises(AuditError) as err, cluster.connect(None):
        pass
    assert err.value.code == "engine-dask-missing" and "pip install 'panel-auditor[dask]'" in err.value.message


def test_an_unknown_engine_name_is_refused():
    from auditor.errors import AuditError

    with pytest.raises(AuditError, match="--engine must be one of auto, memory, streaming, dask"):
        auditor.profile("unused.parquet", unit="hive", time="season", engine="spark")


def test_help_and_the_memory_engine_never_import_dask(waves):
    import subprocess
    import sys

    code = (
        "import sys, auditor.cli, auditor; "
        "auditor.profile(sys.argv[1], unit='hive', time='season', engine='memory'); "
        "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))"
    )
    out = subprocess.run([sys.executable, "-c", code, str(waves)], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
    helped = subprocess.run(
        [sys.executable, "-X", "importtime", "-m", "auditor.cli", "profile", "--help"], capture_output=True, text=True
    )
    assert helped.returncode == 0 and "dask" not in helped.stderr and "distributed" not in helped.stderr


def write_model_waves(folder, seed: int = 3, n: int = 220, periods: int = 6) -> None:
    """An invented Hausman-Taylor design of market gardens, unbalanced, one Parquet file per
    season: exogenous x1a, x1b, a trend, a correlated x2 and z2, a text soil class, a
    nearly-invariant training column with a few coding errors, missing values."""
    rng = np.random.default_rng(seed)
    u, a, b = (rng.normal(size=n) for _ in range(3))
    unit, t = np.repeat(np.arange(n), periods), np.tile(np.arange(periods), n)
    rows = unit.size
    z2 = 0.9 * a + 0.6 * b + 0.8 * u + rng.normal(scale=0.5, size=n)
    x1a = a[unit] + rng.normal(size=rows)
    x1b = b[unit] + rng.normal(size=rows)
    x2 = 0.8 * u[unit] + rng.normal(size=rows)
    trend = rng.integers(0, 15, size=n)[unit] + t
    soil = np.array(["loam", "sand", "clay"])[rng.integers(0, 3, n)][unit]
    training = np.repeat(rng.integers(0, 4, n), periods).astype(float)
    training[rng.integers(0, rows, 6)] += 1  # coding errors: nearly time-invariant
    y = 1 + 0.5 * x1a + 0.3 * x1b + 0.7 * x2 + z2[unit] + 0.05 * trend + u[unit] + rng.normal(size=rows)
    y[rng.integers(0, rows, 9)] = np.nan
    frame = pl.DataFrame({"garden": unit, "season": 2010 + t, "y": y, "x1a": x1a, "x1b": x1b, "x2": x2,
                          "trend": trend, "z2": z2[unit], "soil": soil, "training": training})
    frame = frame.sample(fraction=0.85, seed=seed)
    folder.mkdir(parents=True, exist_ok=True)
    for year in range(2010, 2010 + periods):
        frame.filter(pl.col("season") == year).write_parquet(folder / f"season_{year}.parquet", row_group_size=70)


@pytest.mark.parametrize(
    "options",
    [
        {"correlated": ["x2", "z2"], "period_effects": True, "treat_as_invariant": ["training"]},
        {"correlated": None},
    ],
    ids=["hausman-taylor-with-period-effects", "roles-from-mundlak"],
)
def test_instruments_on_the_cluster_equal_the_memory_engine(scheduler, tmp_path, monkeypatch, options):
    # the bar: the memory engine's coefficients to 1e-9 (here the whole document)
    import auditor.stats.cluster as cluster
    from auditor.commands.instruments import instruments

    folder = tmp_path / "gardens"
    write_model_waves(folder)
    monkeypatch.setattr(cluster, "PARTITION_ROWS", 50)
    regs = ["x1a", "x1b", "x2", "trend", "z2", "soil", "training"]
    kw = {"unit": "garden", "time": "season", "outcome": "y", "regressors": regs, **options}
    memory = without_period_by_period(instruments(folder, engine="memory", **kw).to_dict())
    on_cluster = instruments(folder, engine="dask", scheduler=scheduler, **kw).to_dict()
    if on_cluster["estimates"]["hausman_taylor"] is not None:  # said, not silently null
        skipped = [f["message"] for f in on_cluster["findings"] if f["check"] == "richer-sets-skipped"]
        assert skipped and "not computed on the dask engine" in skipped[0]
    assert "not computed on the dask engine" in on_cluster["tests"]["attrition_note"]
    on_cluster = without_period_by_period(on_cluster)
    assert memory["estimates"]["hausman_taylor"] is not None or options["correlated"] is None
    assert approx_equal(on_cluster, memory, rel=1e-9, abs_=1e-12)


def test_instruments_command_with_a_scheduler(scheduler, tmp_path, cli):
    folder = tmp_path / "gardens"
    write_model_waves(folder, seed=8)
    args = ["instruments", str(folder), "--unit", "garden", "--time", "season", "--outcome", "y",
            "--regressors", "x1a,x1b,x2,z2,soil", "--correlated", "x2,z2", "--json", "--fail-on", "never"]
    got = cli(*args, "--engine", "dask", "--scheduler", scheduler)
    assert got.returncode == 0, got.stderr
    want = cli(*args, "--engine", "memory")
    a, b = without_period_by_period(json.loads(got.stdout)), without_period_by_period(json.loads(want.stdout))
    assert approx_equal(a["estimates"], b["estimates"], 1e-9, 1e-12) and a["roles"] == b["roles"]


def test_compare_on_the_cluster_equals_the_memory_engine(scheduler, tmp_path, cli):
    # the base's profile runs on the cluster; the document is the memory engine's
    base = tmp_path / "base"
    frame = write_waves(base, seed=12, periods=5)
    nxt = tmp_path / "season_2020.parquet"
    frame.filter(pl.col("season") == 2019).with_columns(pl.lit(2020).alias("season")).write_parquet(nxt)
    args = ["compare", str(base), str(nxt), "--unit", "hive", "--time", "season", "--json", "--fail-on", "never"]
    got = cli(*args, "--engine", "dask", "--scheduler", scheduler)
    assert got.returncode == 0, got.stderr
    want = cli(*args, "--engine", "memory")
    assert approx_equal(json.loads(got.stdout), json.loads(want.stdout), 1e-12, 1e-15)


def test_report_on_the_cluster_shows_the_memory_engines_figures(scheduler, waves, tmp_path):
    from auditor.commands.report import write_report

    kw = {"unit": "hive", "time": "season", "outcome": "honey_kg", "regressors": ["frames", "colonies", "apiary"],
          "correlated": []}
    on_cluster: list = []
    memory: list = []
    page = write_report(waves, out=tmp_path / "dask.html", engine="dask", scheduler=scheduler,
                        collect_findings=on_cluster, **kw)
    write_report(waves, out=tmp_path / "memory.html", engine="memory", collect_findings=memory, **kw)

    def shown(found):
        return [f.to_dict() for f in found if f.check not in PERIOD_BY_PERIOD]

    assert approx_equal(shown(on_cluster), shown(memory), 1e-9, 1e-12)
    assert "not computed on the dask engine" in page.read_text()


def test_an_off_by_one_in_the_kernel_fails_every_driver(scheduler, waves, tmp_path, monkeypatch):
    # a mutation check: each unit's mean divided by n_i + 1 instead of n_i inside the kernel
    # (auditor.stats.moments._centred) must take every engine away from an outside oracle, exact
    # rational arithmetic of methods.md section 2 (tests/test_moments.py); unplanted, every
    # engine equals it to 1e-12. One file sorted by unit in row groups of 40 rows: most units
    # inside one partition with several rows, some split between two.
    import distributed
    from test_moments import exact_figures

    import auditor.stats.cluster as cluster
    import auditor.stats.moments as moments

    frame = pl.read_parquet(waves).drop_nulls(["hive", "season"]).sort("hive", "season")
    data = tmp_path / "hives.parquet"
    frame.write_parquet(data, row_group_size=40)
    monkeypatch.setattr(cluster, "PARTITION_ROWS", 40)
    want = exact_figures(frame["hive"].to_numpy(), frame["honey_kg"].to_numpy())
    waves = data

    def within_sd(engine: str) -> float:
        doc = auditor.profile(waves, unit="hive", time="season", engine=engine,
                              scheduler=scheduler if engine == "dask" else None).to_dict()
        return next(c["within_sd"] for c in doc["columns"] if c["name"] == "honey_kg")

    def plant() -> None:
        import auditor.stats.moments as m

        if not hasattr(m, "_unplanted"):
            m._unplanted = m._centred
            m._centred = lambda xf, uu, ref, n_i, a, b: m._unplanted(xf, uu, ref, n_i + 1, a, b)

    def unplant() -> None:
        import auditor.stats.moments as m

        if hasattr(m, "_unplanted"):
            m._centred = m._unplanted
            del m._unplanted

    engines = ("memory", "streaming", "dask")
    for engine in engines:
        assert within_sd(engine) == pytest.approx(want["within_sd"], rel=1e-12), engine
    with distributed.Client(scheduler) as client:
        try:
            plant()
            client.run(plant)
            planted = {engine: within_sd(engine) for engine in engines}
        finally:
            unplant()
            client.run(unplant)
    assert not hasattr(moments, "_unplanted")
    for engine, got in planted.items():
        assert got != pytest.approx(want["within_sd"], rel=1e-6), engine
