"""Contract check benchmark: `check` with a drafted contract against `profile`, and where its time goes.

Builds the synthetic Parquet panel of profile_bench.py (default 326,000 units x 10
periods, 8% of rows dropped: about 3 million rows), drafts a contract from it and
prints, measured in this run:

  (a) wall time and peak RSS of ``panel-audit profile --json`` (a child process);
  (b) wall time and peak RSS of ``panel-audit rules draft`` and of
      ``panel-audit check --json`` with the drafted contract (child processes, best
      of --repeat), and the ratio check / profile against its target (<= 4x,
      great-expectations included);
  (c) inside one process, the split of ``auditor.commands.check.check``: importing
      great-expectations, loading the panel, the polars panel rules, the one
      conversion to pandas, and the expectations themselves.

Usage:

    python tests/benchmarks/check_bench.py [--units N] [--periods T] [--keep DIR]

Figures are printed, never asserted: this is a benchmark, not a test.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
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
    run_child,
    write_panel,
)

SPLIT_SCRIPT = """
import sys, time, json
start = time.perf_counter()
import os
os.environ.setdefault("GX_ANALYTICS_ENABLED", "False")
import great_expectations  # noqa: F401
gx_import = time.perf_counter() - start
from auditor.commands.check import check
t0 = time.perf_counter()
result = check(sys.argv[1], rules=sys.argv[2])
total = time.perf_counter() - t0
print(json.dumps({"gx_import": gx_import, "total": total, **result.timings,
                  "rules": len(result.rules), "row_rules": sum(r.engine == "great-expectations" for r in result.rules)}))
"""


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=326_000, help="units (default 326000)")
    ap.add_argument("--periods", type=int, default=10, help="periods (default 10)")
    ap.add_argument("--keep", metavar="DIR", help="write the panel and contract here and keep them")
    ap.add_argument("--repeat", type=int, default=3, help="best of this many runs of profile and check (default 3)")
    args = ap.parse_args(argv)

    folder_ctx = tempfile.TemporaryDirectory() if not args.keep else None
    folder = Path(args.keep) if args.keep else Path(folder_ctx.name)  # type: ignore[union-attr]
    folder.mkdir(parents=True, exist_ok=True)
    print(machine_line())
    data = folder / "panel.parquet"
    rows = write_panel(data, args.units, args.periods)
    print(f"panel: {rows:,} rows, {args.units:,} units x {args.periods} periods ({data.stat().st_size / 2**20:.0f} MiB Parquet)")

    cli = console_script()
    keys = ["--unit", UNIT, "--time", TIME]
    prof = best([cli, "profile", str(data), *keys, "--json", "--fail-on", "never"], args.repeat)
    print(line(f"profile (best of {args.repeat})", fmt_s(prof.seconds)))
    print(line("  peak RSS", fmt_mib(prof.rss_mib)))

    contract = folder / "contract.yaml"
    d = run_child([cli, "rules", "draft", str(data), *keys, "--out", str(contract), "--force"])
    if d.code != 0:
        print(f"rules draft exited {d.code}: {d.stderr.strip()[-300:]}")
        return 1
    print(line("rules draft", fmt_s(d.seconds)))
    print(line("  draft / profile", f"{d.seconds / prof.seconds:.2f}x"))
    r = best([cli, "check", str(data), "--rules", str(contract), "--json"], args.repeat)
    if r.code not in (0, 1):
        print(f"check exited {r.code}: {r.stderr.strip()[-300:]}")
        return 1
    print(line(f"check with the drafted contract (best of {args.repeat})",
               fmt_s(r.seconds) + (" (passed)" if r.code == 0 else " (FAILED)")))
    ratio = r.seconds / prof.seconds
    print(line("  check / profile", f"{ratio:.2f}x", "<= 4x", ratio <= 4))
    print(line("  peak RSS", fmt_mib(r.rss_mib)))

    import json

    start = time.perf_counter()
    split = subprocess.run(
        [sys.executable, "-c", SPLIT_SCRIPT, str(data), str(contract)], capture_output=True, text=True, check=False
    )
    wall = time.perf_counter() - start
    if split.returncode != 0:
        print(f"split run failed: {split.stderr.strip()[-300:]}")
        return 1
    s = json.loads(split.stdout.strip().splitlines()[-1])
    print(f"where check's time goes (one process, {s['rules']} rules, {s['row_rules']} through great-expectations; wall {fmt_s(wall)})")
    for label, key in [
        ("import great-expectations", "gx_import"),
        ("load the panel (polars)", "load"),
        ("panel rules (polars)", "panel_rules"),
        ("convert to pandas, once", "conversion"),
        ("expectations (great-expectations)", "expectations"),
        ("check() in all", "total"),
    ]:
        print(line(f"  {label}", fmt_s(float(s.get(key, 0.0)))))
    if folder_ctx is not None:
        folder_ctx.cleanup()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
