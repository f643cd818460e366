"""Cluster benchmark: the dask engine on a local cluster of 2 worker processes against the
memory engine, on the synthetic panel of profile_bench.py written as one Parquet file per
period (default 16 million rows), all measured in the same run.

It prints:

- the memory engine: ``panel-audit profile DIR --engine memory --json`` (time, peak RSS);
- the dask engine on a local cluster of 2 workers (1 thread each) started once: the
  profile's time, the workers' and the client's peak RSS, and whether its document
  equals the memory engine's to 1e-12;
- the command ``panel-audit profile DIR --engine dask``, which starts and closes its own
  cluster (time, the client's peak RSS);
- many shards, more partitions than cores: the same profile cut into more and more
  partitions, and on the first half of the periods (half the rows, the same units),
  with the compute seconds of the kernel tasks and of the merge tasks summed over the
  workers (the scheduler's task stream): the merge work grows with the number of
  shards, the kernel work with the rows.

    python tests/benchmarks/cluster_bench.py [--rows 16] [--shards 10,40,120] [--keep DIR]

Figures are printed, never asserted.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from profile_bench import (  # noqa: E402
    TIME,
    UNIT,
    compile_package,
    console_script,
    fmt_mib,
    fmt_s,
    last_line,
    line,
    machine_line,
    run_child,
    write_pieces,
)

DROP = 0.08

CLUSTER_SCRIPT = """
import json, sys, time
import distributed
import polars as pl
sys.path.insert(0, sys.argv[5])
from conftest import approx_equal
import auditor.stats.cluster as cluster
from auditor.checks.config import load_settings
from auditor.commands.profile import profile_panel

folder, memory_doc, shards, unit, period = sys.argv[1], sys.argv[2], sys.argv[3], sys.argv[6], sys.argv[7]
rows_total = int(sys.argv[4])
out = {}
t0 = time.perf_counter()
lc = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                              silence_logs=40)
client = distributed.Client(lc)
out["cluster_start"] = time.perf_counter() - t0
settings = load_settings(None)

def timed(data, partition_rows):
    cluster.PARTITION_ROWS = partition_rows
    with distributed.get_task_stream(client) as ts:
        t = time.perf_counter()
        run = cluster.profile_passes(data, unit, period, settings, lc.scheduler_address)
        doc = profile_panel(run.panel, settings, run.passes).to_dict()
        seconds = time.perf_counter() - t
    spent = {}
    for task in ts.data:
        name = distributed.utils.key_split(task["key"])
        for ss in task["startstops"]:
            if ss["action"] == "compute":
                spent[name] = spent.get(name, 0.0) + ss["stop"] - ss["start"]
    return run, doc, seconds, spent

run, doc, seconds, spent = timed(folder, cluster.PARTITION_ROWS)
want = json.load(open(memory_doc))
doc["panel"].pop("engine"); want["panel"].pop("engine")
def largest(a, b, path=""):
    # (largest relative difference of two documents' floats, where); other values must be equal
    if isinstance(a, dict):
        return max((largest(a[k], b.get(k), f"{path}.{k}") for k in a), default=(0.0, path))
    if isinstance(a, list):
        return max((largest(x, y, f"{path}[{i}]") for i, (x, y) in enumerate(zip(a, b))), default=(0.0, path))
    if isinstance(a, float) and isinstance(b, float):
        return (abs(a - b) / max(abs(a), abs(b)) if a != b else 0.0, path)
    return (0.0 if a == b else float("inf"), path)

out["first"] = {"seconds": seconds, "partitions": run.partitions, "worker_peak_rss": run.worker_peak_rss,
                "equal": approx_equal(doc, want, 1e-12, 1e-15), "largest": largest(doc, want), "spent": spent}
out["shards"] = []
for k in [int(s) for s in shards.split(",")]:
    for label, data in (("all periods", folder), ("first half of the periods", folder + "/half")):
        rows = rows_total if label == "all periods" else int(sys.argv[8])
        run, doc, seconds, spent = timed(data, max(1, rows // k))
        out["shards"].append({"asked": k, "label": label, "rows": rows, "partitions": run.partitions,
                              "seconds": seconds, "spent": spent})
client.close(); lc.close()
import resource
out["client_peak_rss"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps(out))
"""


def units_for(rows: float, periods: int) -> int:
    return max(1, round(rows / (periods * (1 - DROP))))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, default=16, help="millions of rows (default 16)")
    ap.add_argument("--periods", type=int, default=10)
    ap.add_argument("--shards", default="10,40,120", help="partitions asked for in the many-shard runs")
    ap.add_argument("--keep", metavar="DIR", help="write (or reuse) the data here and keep it")
    args = ap.parse_args(argv)
    print(machine_line())
    print(compile_package())
    tmp = None if args.keep else tempfile.TemporaryDirectory(prefix="pa-cluster-")
    folder = Path(args.keep) if args.keep else Path(tmp.name)
    waves = folder / "waves"
    if not any(waves.glob("*.parquet")):
        t0 = time.perf_counter()
        write_pieces(waves, units_for(args.rows * 1e6, args.periods), args.periods)
        print(f"panel written in {time.perf_counter() - t0:.0f} s")
    files = sorted(waves.glob("*.parquet"))
    half = waves / "half"  # the first half of the periods: the same units, half the rows
    half.mkdir(exist_ok=True)
    for f in files[: len(files) // 2]:
        if not (half / f.name).exists():
            (half / f.name).symlink_to(f)
    import polars as pl

    rows = sum(pl.scan_parquet(f).select(pl.len()).collect().item() for f in files)
    half_rows = sum(pl.scan_parquet(f).select(pl.len()).collect().item() for f in files[: len(files) // 2])
    print(f"panel: {rows:,} rows in {len(files)} Parquet files (one per period), {sum(f.stat().st_size for f in files) / 2**20:,.0f} MiB")

    memory = run_child([console_script(), "profile", str(waves), "--unit", UNIT, "--time", TIME, "--json",
                        "--fail-on", "never", "--engine", "memory"])
    if memory.code not in (0, 1):
        print(f"memory engine failed: {last_line(memory.stderr)}")
        return 1
    doc_path = folder / "memory.json"
    doc_path.write_text(memory.stdout)
    print(line("memory engine (the command)", fmt_s(memory.seconds)))
    print(line("  peak RSS", fmt_mib(memory.rss_mib)))

    tests_dir = str(Path(__file__).resolve().parent.parent)
    child = run_child([sys.executable, "-c", CLUSTER_SCRIPT, str(waves), str(doc_path), args.shards, str(rows),
                       tests_dir, UNIT, TIME, str(half_rows)])
    if child.code != 0:
        print(f"cluster run failed: {last_line(child.stderr)}")
        return 1
    got = json.loads(child.stdout.strip().splitlines()[-1])
    first = got["first"]
    print(f"dask engine, local cluster of 2 worker processes x 1 thread (started in {got['cluster_start']:.1f} s)")
    print(line(f"  profile, {first['partitions']} partitions", fmt_s(first["seconds"])))
    print(line("  / memory engine", f"{first['seconds'] / memory.seconds:.2f}x"))
    for addr, peak in sorted(first["worker_peak_rss"].items()):
        print(line(f"  peak RSS worker {addr.rsplit(':', 1)[-1]}", fmt_mib(peak / 2**20)))
    print(line("  peak RSS client (whole child process)", fmt_mib(got["client_peak_rss"] / 2**20)))
    print(line("  document equals the memory engine's (1e-12)", str(first["equal"])))
    rel, where = first["largest"]
    print(line("  largest relative difference", f"{rel:.1e} ({where or 'none'})"))
    spent = first["spent"]
    print("  compute seconds summed over workers: "
          + ", ".join(f"{k} {v:.2f}" for k, v in sorted(spent.items(), key=lambda kv: -kv[1])))

    command = run_child([console_script(), "profile", str(waves), "--unit", UNIT, "--time", TIME, "--json",
                         "--fail-on", "never", "--engine", "dask"])
    print(line("dask engine, the command (starts and closes its cluster)", fmt_s(command.seconds)))
    print(line("  peak RSS of the command (client)", fmt_mib(command.rss_mib)))

    print("many shards (more partitions than cores): compute seconds summed over the workers")
    print(f"  {'rows':>12} {'partitions':>10} {'wall':>8} {'kernel':>8} {'merge':>8} {'2nd pass':>8} {'merge/shard':>11}")
    for r in got["shards"]:
        s = r["spent"]
        merge = s.get("merge", 0.0)
        print(f"  {r['rows']:>12,} {r['partitions']:>10} {r['seconds']:>7.1f}s {s.get('shard', 0.0):>7.1f}s "
              f"{merge:>7.2f}s {s.get('refine', 0.0):>7.1f}s {merge / max(r['partitions'] - 1, 1):>10.3f}s")
    if tmp is not None:
        tmp.cleanup()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
