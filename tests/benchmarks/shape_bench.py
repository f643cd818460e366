"""Shape benchmark: many periods and many columns, each measured against its own baseline in one run.

1. Many periods: ``panel-audit profile`` of a panel with P periods (default 1,500) and
   K number columns (default 320) with about 5% missing values, so that every column
   has its own period system. The same command is run a second time with the period
   system forced dense (``auditor.stats.moments.DENSE_PERIODS`` raised above P, the
   previous behaviour), and the two time and peak-RSS figures are printed with their
   ratio and whether the two documents agree on every ``time_r2`` (to 1e-9).
2. Many columns: the profile of C and 4 C columns of 4 rows (default 10,000 and
   40,000); the growth 4C / C is about 4 when the work per column is constant (a
   quadratic cost gives 16).

Figures are printed, never asserted: this is a benchmark, not a test.

    python tests/benchmarks/shape_bench.py [--periods P] [--columns K] [--wide C] [--repeat R]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).resolve().parent))

from profile_bench import best, compile_package, fmt_mib, fmt_s, line, machine_line  # noqa: E402

DENSE = (
    "import sys, auditor.stats.moments as u; u.DENSE_PERIODS = 10**9; "
    "sys.argv = ['panel-audit', *sys.argv[1:]]; from auditor.cli import main; main()"
)


def many_periods(path: Path, periods: int, columns: int, seed: int = 19) -> int:
    """200 units, each present in about 60% of ``periods``; ``columns`` float columns
    (a third trending with the period) with 5% missing values. Returns the rows."""
    rng = np.random.default_rng(seed)
    u = np.repeat(np.arange(200), periods)
    t = np.tile(np.arange(periods), 200)
    keep = rng.random(u.size) < 0.6
    u, t = u[keep], t[keep]
    data: dict[str, np.ndarray] = {"unit": u, "period": t + 1000}
    for k in range(columns):
        x = rng.normal(size=u.size) + 0.01 * t * (k % 3)
        x[rng.random(u.size) < 0.05] = np.nan
        data[f"c{k}"] = x
    pl.DataFrame(data).with_columns(pl.col(f"c{k}").fill_nan(None) for k in range(columns)).write_parquet(path)
    return int(u.size)


def wide(path: Path, columns: int) -> None:
    """Two units, two periods, ``columns`` float columns."""
    data: dict[str, list] = {"unit": ["a", "a", "b", "b"], "period": [1, 2, 1, 2]}
    for k in range(columns):
        data[f"c{k}"] = [1.0, 2.0, 3.0, float(k)]
    pl.DataFrame(data).write_parquet(path)


def _r2(stdout: str) -> list:
    return [c.get("time_r2") for c in json.loads(stdout)["columns"]]


def _make_in_child(kind: str, path: Path, *sizes: int) -> None:
    """Write a data file in a child process: a child forked from a large parent starts
    with the parent's pages, and its peak RSS would count them."""
    subprocess.run([sys.executable, __file__, "--make", kind, str(path), *map(str, sizes)], check=True)


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["--make"]:
        kind, path, *sizes = argv[1:]
        if kind == "periods":
            many_periods(Path(path), int(sizes[0]), int(sizes[1]))
        else:
            wide(Path(path), int(sizes[0]))
        return 0
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--periods", type=int, default=1500)
    ap.add_argument("--columns", type=int, default=320)
    ap.add_argument("--wide", type=int, default=10_000)
    ap.add_argument("--repeat", type=int, default=1)
    args = ap.parse_args(argv)
    # the data are written by children; this process stays small (see _make_in_child)
    print(machine_line())
    print(compile_package())
    keys = ["--unit", "unit", "--time", "period", "--json", "--fail-on", "never"]
    with tempfile.TemporaryDirectory(prefix="pa-shape-bench-") as tmp:
        folder = Path(tmp)
        data = folder / "periods.parquet"
        _make_in_child("periods", data, args.periods, args.columns)
        rows = pl.scan_parquet(data).select(pl.len()).collect().item()
        print(f"many periods: {rows:,} rows, {args.periods:,} periods, {args.columns} columns with missing values")
        sparse = best([sys.executable, "-m", "auditor.cli", "profile", str(data), *keys], args.repeat)
        dense = best([sys.executable, "-c", DENSE, "profile", str(data), *keys], args.repeat)
        if sparse.code not in (0, 1) or dense.code not in (0, 1):
            print(f"a run failed: {sparse.code} {dense.code}: {(sparse.stderr + dense.stderr).strip()[-300:]}")
            return 1
        a, b = _r2(sparse.stdout), _r2(dense.stdout)
        agree = all((x is None and y is None) or (x is not None and y is not None and abs(x - y) <= 1e-9)
                    for x, y in zip(a, b, strict=True))
        print(line("sparse period system (this release)", f"{fmt_s(sparse.seconds)}, {fmt_mib(sparse.rss_mib)}"))
        print(line("dense P x P system per column (before)", f"{fmt_s(dense.seconds)}, {fmt_mib(dense.rss_mib)}"))
        print(line("dense / sparse", f"time {dense.seconds / sparse.seconds:.1f}x, "
                   f"peak RSS {dense.rss_mib / sparse.rss_mib:.1f}x"))
        print(line("time_r2 agree to 1e-9", "yes" if agree else "NO"))

        runs = []
        for c in (args.wide, 4 * args.wide):
            path = folder / f"wide{c}.parquet"
            _make_in_child("wide", path, c)
            runs.append(best([sys.executable, "-m", "auditor.cli", "profile", str(path), *keys], args.repeat))
            print(line(f"{c:,} columns x 4 rows", f"{fmt_s(runs[-1].seconds)}, {fmt_mib(runs[-1].rss_mib)}"))
        print(line("growth 4C / C", f"{runs[1].seconds / runs[0].seconds:.1f}x", "about 4 (linear)"))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
