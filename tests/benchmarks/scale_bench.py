"""Scale benchmark: profile time and peak RSS at 1, 4 and 16 million rows, and a larger run.

For each size it writes the synthetic panel of profile_bench.py (10 periods, 8% of rows
dropped, 10 numeric and 2 text columns) to one Parquet file and prints the wall time and
peak RSS of ``panel-audit profile --json`` beside the one-pass floor (polars scan,
group_by unit: count, sum, sum of squares of every numeric column) measured in the same
run, and the time ratios between sizes (target: 16M / 1M between 12x and 20x, linear).
The profile of a 1,000-unit panel gives the fixed cost (start-up, imports); the growth
is also printed net of it.

``--big`` adds the larger-than-memory run: a panel of about 50 million rows written in
pieces (one Parquet file per period) to a temporary folder and profiled from the folder
with the streaming engine; target peak RSS under 4 GiB. It takes long.

    python tests/benchmarks/scale_bench.py [--sizes 1,4,16] [--big] [--big-rows 50]

Figures are printed, never asserted.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import polars as pl  # noqa: E402
from profile_bench import (  # noqa: E402
    NUMERIC,
    TEXT,
    TIME,
    UNIT,
    best,
    compile_package,
    console_script,
    floor_run,
    fmt_mib,
    fmt_s,
    last_line,
    line,
    machine_line,
    write_panel,
    write_pieces,
)

DROP = 0.08


def units_for(rows: float, periods: int) -> int:
    """Units giving about ``rows`` rows over ``periods`` periods after the 8% drop."""
    return max(1, round(rows / (periods * (1 - DROP))))


def profile_argv(data: Path, *extra: str) -> list[str]:
    return [console_script(), "profile", str(data), "--unit", UNIT, "--time", TIME, "--json",
            "--fail-on", "never", *extra]


def fixed_cost(folder: Path, periods: int, repeat: int) -> float:
    """Seconds of the profile of a 1,000-unit panel: start-up, imports and per-run work
    that do not grow with rows."""
    data = folder / "panel_tiny.parquet"
    write_panel(data, 1_000, periods)
    a = best(profile_argv(data), repeat)
    data.unlink()
    return a.seconds


def scale_runs(folder: Path, sizes: list[float], periods: int, repeat: int) -> None:
    print(f"scale: one Parquet file per size, {periods} periods, best of {repeat}")
    fixed = fixed_cost(folder, periods, max(repeat, 3))
    print(line("  profile of 1,000 units (fixed cost)", fmt_s(fixed)))
    results = []
    for millions in sizes:
        data = folder / f"panel_{millions:g}M.parquet"
        t0 = time.perf_counter()
        rows = write_panel(data, units_for(millions * 1e6, periods), periods)
        written = time.perf_counter() - t0
        a = best(profile_argv(data), repeat)
        if a.code not in (0, 1):
            print(f"  {millions:g}M: profile failed (exit {a.code}): {last_line(a.stderr)}")
            return
        floor_s, floor = floor_run(str(data), repeat)
        size = data.stat().st_size / 2**20
        results.append((millions, rows, a.seconds, floor_s))
        print(f"  {rows:,} rows ({size:,.0f} MiB Parquet, written in {written:.0f} s)")
        print(line("    profile", fmt_s(a.seconds)))
        print(line("    one-pass floor", fmt_s(floor_s)))
        ratio = a.seconds / floor_s
        print(line("    profile / floor", f"{ratio:.2f}x", "<= 3x", ratio <= 3))
        print(line("    profile / the floor's whole process", f"{a.seconds / floor.seconds:.2f}x"))
        print(line("    peak RSS profile", fmt_mib(a.rss_mib)))
        print(line("    peak RSS floor", fmt_mib(floor.rss_mib)))
        data.unlink()
    if len(results) > 1:
        m0, r0, s0, f0 = results[0]
        print("  growth against the smallest size")
        for m, r, s, f in results[1:]:
            growth = s / s0
            rows_ratio = r / r0
            label = f"    profile {m:g}M / {m0:g}M (rows x{rows_ratio:.1f})"
            if m / m0 == 16:
                print(line(label, f"{growth:.2f}x", "12x-20x", 12 <= growth <= 20))
            else:
                print(line(label, f"{growth:.2f}x"))
            print(line(f"    floor {m:g}M / {m0:g}M", f"{f / f0:.2f}x"))
            if s0 > fixed:
                print(line("      net of the fixed cost", f"{(s - fixed) / (s0 - fixed):.2f}x"))


def big_run(folder: Path, millions: float, periods: int, skip_profile: bool) -> None:
    pieces = folder / "waves"
    t0 = time.perf_counter()
    if pieces.is_dir() and any(pieces.glob("*.parquet")):
        rows = sum(pl.scan_parquet(p).select(pl.len()).collect().item() for p in pieces.glob("*.parquet"))
        how = "reused"
    else:
        rows = write_pieces(pieces, units_for(millions * 1e6, periods), periods)
        how = f"written in {time.perf_counter() - t0:.0f} s"
    files = sorted(pieces.glob("*.parquet"))
    size = sum(p.stat().st_size for p in files) / 2**30
    print(
        f"larger-than-memory run: {rows:,} rows in {len(files)} Parquet pieces "
        f"({size:.1f} GiB on disk, {how}), {len(NUMERIC)} numeric + {len(TEXT)} text columns"
    )
    limit = 4 * 1024
    floor_s, floor = floor_run(str(pieces / "*.parquet"), 1)
    print(line("  one-pass floor (same folder)", fmt_s(floor_s)))
    print(line("  peak RSS floor", fmt_mib(floor.rss_mib)))
    if not skip_profile:
        a = best(profile_argv(pieces, "--streaming"), 1)
        if a.code not in (0, 1):
            print(f"  profile --streaming failed (exit {a.code}): {last_line(a.stderr)}")
        else:
            ratio = a.seconds / floor_s
            print(line("  profile --streaming (folder input)", fmt_s(a.seconds)))
            print(line("  profile / floor", f"{ratio:.2f}x", "<= 3x", ratio <= 3))
            print(line("  peak RSS profile", fmt_mib(a.rss_mib), "< 4,096 MiB", a.rss_mib < limit))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1,4,16", help="millions of rows (default 1,4,16)")
    ap.add_argument("--periods", type=int, default=10)
    ap.add_argument("--repeat", type=int, default=2, help="runs per size; the best counts")
    ap.add_argument("--big", action="store_true", help="also the ~50M-row run from pieces")
    ap.add_argument("--big-rows", type=float, default=50, help="millions of rows of the big run")
    ap.add_argument("--only-big", action="store_true", help="skip the 1/4/16M sizes")
    ap.add_argument("--keep", metavar="DIR", help="write (or reuse) the data here and keep it")
    ap.add_argument("--skip-profile", action="store_true", help="big run: the floor only")
    args = ap.parse_args(argv)
    print(machine_line())
    print(compile_package())
    tmp = None if args.keep else tempfile.TemporaryDirectory(prefix="pa-scale-")
    folder = Path(args.keep) if args.keep else Path(tmp.name)
    folder.mkdir(parents=True, exist_ok=True)
    if not args.only_big:
        scale_runs(folder, [float(s) for s in args.sizes.split(",")], args.periods, args.repeat)
    if args.big or args.only_big:
        big_run(folder, args.big_rows, args.periods, args.skip_profile)
    if tmp is not None:
        tmp.cleanup()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
