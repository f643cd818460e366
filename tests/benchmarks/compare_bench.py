"""Compare benchmark: ``compare`` of the benchmark panel against a one-period wave, over ``profile``.

Uses the synthetic panel of profile_bench.py (default 300,000 units x 10 periods,
8% of rows dropped, Parquet) and a next wave of one period (about 10% of the rows),
times ``panel-audit profile BASE --json`` and ``panel-audit compare BASE NEW --json``
as child processes (best of --repeat) and prints the ratio beside its target (<= 2x).
Figures are printed, never asserted: this is a benchmark, not a test.

    python tests/benchmarks/compare_bench.py [--units N] [--periods T] [--repeat R]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from profile_bench import (  # noqa: E402
    TIME,
    UNIT,
    best,
    console_script,
    fmt_mib,
    fmt_s,
    line,
    machine_line,
    unit_attributes,
    wave,
    write_panel,
)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=300_000)
    ap.add_argument("--periods", type=int, default=10)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    print(machine_line())
    with tempfile.TemporaryDirectory(prefix="pa-compare-bench-") as tmp:
        folder = Path(tmp)
        data = folder / "panel.parquet"
        rows = write_panel(data, args.units, args.periods)
        new = folder / "next.parquet"
        nxt = wave(unit_attributes(args.units, 2026), args.periods, 2026)
        nxt.write_parquet(new)
        print(f"base: {rows:,} rows; new wave: {nxt.height:,} rows (one period)")
        cli = console_script()
        keys = ["--unit", UNIT, "--time", TIME, "--json", "--fail-on", "never"]
        a = best([cli, "profile", str(data), *keys], args.repeat)
        c = best([cli, "compare", str(data), str(new), *keys], args.repeat)
        if a.code not in (0, 1) or c.code not in (0, 1):
            print(f"a run failed: profile exit {a.code}, compare exit {c.code}: {c.stderr.strip()[-300:]}")
            return 1
        ratio = c.seconds / a.seconds
        print(f"measured (best of {args.repeat})")
        print(line("panel-audit profile BASE --json", fmt_s(a.seconds)))
        print(line("panel-audit compare BASE NEW --json", fmt_s(c.seconds)))
        print(line("compare / profile", f"{ratio:.2f}x", "<= 2x", ratio <= 2))
        print(line("peak RSS profile", fmt_mib(a.rss_mib)))
        print(line("peak RSS compare", fmt_mib(c.rss_mib)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
