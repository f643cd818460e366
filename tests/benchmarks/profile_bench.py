"""Profile benchmark: the profile against a one-pass floor and a hand-written pandas script.

Builds a synthetic Parquet panel in a temporary folder (default 300,000 units x 10
periods, 8% of rows dropped, 10 numeric and 2 text columns) and prints, measured in
this run:

  (a) wall time and peak RSS of ``panel-audit profile --json`` (a child process);
  (b) the floor: one polars pass (scan_parquet, group_by unit: count, sum and sum of
      squares of every numeric column, collect), timed inside its own child process;
  (c) wall time and peak RSS of a straightforward pandas script (duplicates, gaps and,
      per column, within share, changing units and between sd);

with the ratios a/b and c/a beside their targets (a/b against the floor's compute
time; a against the floor's whole process, start to exit, is printed beside it), and
optional lines for the other commands (instruments, compare, check, report). Peak RSS
is read per child with os.wait4. The package's bytecode is compiled first, as a
regular install has it. Usage:

    python tests/benchmarks/profile_bench.py [--units N] [--periods T] [--repeat R]

Figures are printed, never asserted: this is a benchmark, not a test.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

UNIT, TIME = "orchard", "season"
FIRST_SEASON = 2001
TIME_VARYING = ["x1", "x2", "x3", "x4", "x5", "x6"]
NUMERIC = ["y", *TIME_VARYING, "tree_age", "elevation", "planted"]
TEXT = ["grade", "district"]
GRADES = ["A", "B", "C", "D"]
DISTRICTS = [f"D{k:02d}" for k in range(40)]


# --- the machine -------------------------------------------------------------------------


def machine_line() -> str:
    """Cores, memory and versions of this machine, for the top of the printout."""
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return (
        f"machine: {os.cpu_count()} cores, {mem:.1f} GiB memory, {platform.machine()}, "
        f"Python {platform.python_version()}, polars {pl.__version__}"
    )


# --- the synthetic panel -------------------------------------------------------------------


@dataclass(frozen=True)
class UnitAttributes:
    """Unit-level draws shared by every wave of one synthetic panel."""

    effect: np.ndarray
    elevation: np.ndarray
    planted: np.ndarray
    age0: np.ndarray
    district: np.ndarray


def unit_attributes(n_units: int, seed: int) -> UnitAttributes:
    rng = np.random.default_rng(seed)
    return UnitAttributes(
        effect=rng.normal(0.0, 1.0, n_units),
        elevation=np.round(rng.normal(300.0, 80.0, n_units), 1),
        planted=rng.integers(1950, 2000, n_units),
        age0=rng.integers(3, 40, n_units),
        district=rng.integers(0, len(DISTRICTS), n_units),
    )


def wave(attrs: UnitAttributes, period: int, seed: int, drop: float = 0.08) -> pl.DataFrame:
    """One period of the synthetic panel: every unit, less a random ``drop`` share of rows.

    Columns: 7 time-varying floats (y, x1..x6), ``tree_age`` (grows by one per period),
    ``elevation`` and ``planted`` (time-invariant), ``grade`` (text, time-varying) and
    ``district`` (text, time-invariant).
    """
    rng = np.random.default_rng([seed, period])
    n = attrs.effect.size
    units = np.flatnonzero(rng.random(n) >= drop)
    m = units.size
    eff = attrs.effect[units]
    cols: dict[str, object] = {
        UNIT: units.astype(np.int64),
        TIME: np.full(m, FIRST_SEASON + period, dtype=np.int64),
    }
    xs = {}
    for j, name in enumerate(TIME_VARYING, start=1):
        xs[name] = rng.normal(0.0, 1.0, m) + 0.3 * j * eff
    cols["y"] = 0.5 * xs["x1"] - 0.2 * xs["x2"] + eff + rng.normal(0.0, 0.5, m)
    cols.update(xs)
    cols["tree_age"] = (attrs.age0[units] + period).astype(np.int64)
    cols["elevation"] = attrs.elevation[units]
    cols["planted"] = attrs.planted[units].astype(np.int64)
    frame = pl.DataFrame(cols)
    grade = pl.Series(GRADES).gather(pl.Series(rng.integers(0, len(GRADES), m)))
    district = pl.Series(DISTRICTS).gather(pl.Series(attrs.district[units]))
    return frame.with_columns(grade.alias("grade"), district.alias("district"))


def write_panel(path: Path, n_units: int, n_periods: int, seed: int = 2026) -> int:
    """Write the synthetic panel as one Parquet file; return its row count."""
    attrs = unit_attributes(n_units, seed)
    frame = pl.concat([wave(attrs, p, seed) for p in range(n_periods)])
    frame.write_parquet(path)
    return frame.height


def write_pieces(folder: Path, n_units: int, n_periods: int, seed: int = 2026) -> int:
    """Write the synthetic panel as one Parquet file per period into ``folder``; return rows."""
    folder.mkdir(parents=True, exist_ok=True)
    attrs = unit_attributes(n_units, seed)
    rows = 0
    for p in range(n_periods):
        w = wave(attrs, p, seed)
        w.write_parquet(folder / f"season_{FIRST_SEASON + p}.parquet")
        rows += w.height
        del w
    return rows


# --- running children ----------------------------------------------------------------------


@dataclass(frozen=True)
class Run:
    """One child process: wall seconds, peak RSS in MiB, exit code, its stdout and stderr."""

    seconds: float
    rss_mib: float
    code: int
    stdout: str
    stderr: str


def run_child(argv: list[str], timeout: float = 7200.0) -> Run:
    """Run ``argv``; wall time from start to reaped exit, peak RSS of that child (wait4)."""
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        start = time.perf_counter()
        proc = subprocess.Popen(argv, stdout=out, stderr=err, stdin=subprocess.DEVNULL)
        deadline = start + timeout
        while True:
            pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                break
            if time.perf_counter() > deadline:
                proc.kill()
                pid, status, usage = os.wait4(proc.pid, 0)
                break
            time.sleep(0.005)
        seconds = time.perf_counter() - start
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        return Run(
            seconds,
            usage.ru_maxrss / 1024.0,  # Linux reports KiB
            proc.returncode,
            out.read().decode("utf-8", "replace"),
            err.read().decode("utf-8", "replace"),
        )


def best(argv: list[str], repeat: int) -> Run:
    """The fastest of ``repeat`` runs (its own peak RSS); stops at the first failure."""
    runs = []
    for _ in range(repeat):
        r = run_child(argv)
        runs.append(r)
        if r.code not in (0, 1):
            return r
    return min(runs, key=lambda r: r.seconds)


def compile_package() -> str:
    """Write the bytecode of the installed ``auditor`` package, as a regular install
    (``pip install .``) does: an editable install under PYTHONDONTWRITEBYTECODE would
    otherwise compile every module from source at each start. Returns a line to print."""
    import compileall
    import importlib.util

    spec = importlib.util.find_spec("auditor")
    if spec is None or not spec.submodule_search_locations:
        return "bytecode: the auditor package was not found"
    folder = list(spec.submodule_search_locations)[0]
    ok = compileall.compile_dir(folder, quiet=1, force=False)
    return f"bytecode: {'compiled' if ok else 'NOT all compiled'} for {folder} (as a regular install has it)"


def console_script(name: str = "panel-audit") -> str:
    """The console script installed next to this interpreter."""
    return str(Path(sys.executable).with_name(name))


FLOOR_SCRIPT = """
import sys, time
import polars as pl
source, unit, numeric = sys.argv[1], sys.argv[2], sys.argv[3].split(",")
start = time.perf_counter()
lf = pl.scan_parquet(source)
aggs = [pl.len().alias("rows")]
for c in numeric:
    x = pl.col(c).cast(pl.Float64)
    aggs += [x.count().alias(c + "_n"), x.sum().alias(c + "_s"), (x * x).sum().alias(c + "_q")]
out = lf.group_by(unit).agg(aggs).collect()
print(time.perf_counter() - start, out.height)
"""

PANDAS_SCRIPT = """
import json, sys
import numpy as np
import pandas as pd
path, unit, period = sys.argv[1:4]
df = pd.read_parquet(path)
result = {"duplicates": int(df.duplicated([unit, period]).sum())}
seasons = np.sort(df[period].unique())
df["_pos"] = df[period].map(pd.Series(np.arange(len(seasons)), index=seasons))
g = df.groupby(unit)["_pos"]
span = g.max() - g.min() + 1
present = g.nunique()
result["gap_periods"] = int((span - present).sum())
result["units_with_gaps"] = int((span > present).sum())
columns = {}
for col in df.columns:
    if col in (unit, period, "_pos"):
        continue
    rec = {"units_changing": int((df.groupby(unit)[col].nunique() > 1).sum())}
    if pd.api.types.is_numeric_dtype(df[col]):
        x = df[col].astype(float)
        unit_mean = df.groupby(unit)[col].transform("mean")
        wss = float(((x - unit_mean) ** 2).sum())
        tss = float(((x - x.mean()) ** 2).sum())
        rec["within_share"] = wss / tss if tss else None
        rec["between_sd"] = float(df.groupby(unit)[col].mean().std())
    columns[col] = rec
result["columns"] = columns
print(json.dumps(result))
"""


def floor_run(source: str, repeat: int) -> tuple[float, Run]:
    """The one-pass floor: compute seconds measured inside the child, and the child's run."""
    script = [sys.executable, "-c", FLOOR_SCRIPT, source, UNIT, ",".join(NUMERIC)]
    runs = [run_child(script) for _ in range(repeat)]
    for r in runs:
        if r.code != 0:
            raise SystemExit(f"floor pass failed: {r.stderr.strip().splitlines()[-1:]}")
    inner = [float(r.stdout.split()[0]) for r in runs]
    i = int(np.argmin(inner))
    return inner[i], runs[i]


def agreement(profile_doc: dict, pandas_doc: dict) -> str:
    """Whether the profile and the pandas script report the same figures (a sanity check)."""
    bad = []
    panel = profile_doc["panel"]
    if panel["duplicate_keys"] != pandas_doc["duplicates"]:
        bad.append("duplicates")
    if panel["gap_periods"] != pandas_doc["gap_periods"]:
        bad.append("gap_periods")
    cols = {c["name"]: c for c in profile_doc["columns"]}
    for name, rec in pandas_doc["columns"].items():
        ours = cols.get(name)
        if ours is None:
            bad.append(name)
            continue
        if ours["units_changing"] != rec["units_changing"]:
            bad.append(f"{name}.units_changing")
        for key in ("within_share", "between_sd"):
            if key in rec and rec[key] is not None:
                if ours[key] is None or abs(ours[key] - rec[key]) > 1e-9 * max(1.0, abs(rec[key])):
                    bad.append(f"{name}.{key}")
    return "yes" if not bad else "NO: " + ", ".join(bad[:8])


def line(label: str, value: str, target: str = "", met: bool | None = None) -> str:
    mark = "" if met is None else ("  [met]" if met else "  [NOT met]")
    tail = f"   target {target}{mark}" if target else ""
    return f"  {label:<44} {value:>14}{tail}"


def fmt_s(s: float) -> str:
    return f"{s:.2f} s"


def fmt_mib(m: float) -> str:
    return f"{m:,.0f} MiB"


def has_command(name: str) -> bool:
    r = run_child([console_script(), "--help"])
    return f" {name} " in r.stdout or f" {name}\n" in r.stdout


def last_line(text: str) -> str:
    lines = [t for t in text.strip().splitlines() if t.strip()]
    return lines[-1][:160] if lines else "(no message)"


# --- optional lines for the other commands ------------------------------------------------


def other_commands(folder: Path, data: Path, n_units: int, n_periods: int, profile_s: float) -> None:
    cli = console_script()
    keys = ["--unit", UNIT, "--time", TIME]
    print("other commands (same panel; skipped with a note when not available)")

    if has_command("instruments"):
        regs = [*TIME_VARYING, "elevation", "planted"]  # 8 regressors, 2 time-invariant
        r = run_child(
            [cli, "instruments", str(data), *keys, "--outcome", "y", "--regressors", ",".join(regs),
             "--correlated", "x1,planted", "--json", "--fail-on", "never"]
        )
        if r.code in (0, 1):
            ratio = r.seconds / profile_s
            print(line("instruments, 8 regressors (2 invariant)", fmt_s(r.seconds)))
            print(line("  instruments / profile", f"{ratio:.2f}x", "<= 3x", ratio <= 3))
            print(line("  peak RSS", fmt_mib(r.rss_mib)))
        else:
            print(f"  instruments: skipped, it exited {r.code}: {last_line(r.stderr)}")
    else:
        print("  instruments: skipped, the command is not available yet")

    if has_command("compare"):
        attrs = unit_attributes(n_units, 2026)
        new = folder / "next_season.parquet"
        wave(attrs, n_periods, 2026).write_parquet(new)
        r = run_child([cli, "compare", str(data), str(new), *keys, "--json", "--fail-on", "never"])
        if r.code in (0, 1):
            ratio = r.seconds / profile_s
            print(line("compare with a one-period wave (~10% rows)", fmt_s(r.seconds)))
            print(line("  compare / profile", f"{ratio:.2f}x", "<= 2x", ratio <= 2))
            print(line("  peak RSS", fmt_mib(r.rss_mib)))
        else:
            print(f"  compare: skipped, it exited {r.code}: {last_line(r.stderr)}")
    else:
        print("  compare: skipped, the command is not available yet")

    if has_command("check") and has_command("rules"):
        contract = folder / "contract.yaml"
        d = run_child([cli, "rules", "draft", str(data), *keys, "--out", str(contract), "--force"])
        if d.code == 0:
            r = run_child([cli, "check", str(data), "--rules", str(contract), "--json"])
            if r.code in (0, 1):
                print(line("rules draft", fmt_s(d.seconds)))
                print(line("check with the drafted contract", fmt_s(r.seconds)))
                print(line("  check / profile", f"{r.seconds / profile_s:.2f}x"))
                print(line("  peak RSS", fmt_mib(r.rss_mib)))
            else:
                print(f"  check: skipped, it exited {r.code}: {last_line(r.stderr)}")
        else:
            print(f"  check: skipped, rules draft exited {d.code}: {last_line(d.stderr)}")
    else:
        print("  check: skipped, the command is not available yet")

    if has_command("report"):
        html = folder / "report.html"
        r = run_child([cli, "report", str(data), *keys, "--out", str(html), "--force", "--fail-on", "never"])
        if r.code in (0, 1):
            extra = r.seconds - profile_s
            print(line("report (HTML with figures)", fmt_s(r.seconds)))
            print(line("  report - profile", f"{extra:+.2f} s", "<= +3 s", extra <= 3))
            print(line("  peak RSS", fmt_mib(r.rss_mib)))
        else:
            print(f"  report: skipped, it exited {r.code}: {last_line(r.stderr)}")
    else:
        print("  report: skipped, the command is not available yet")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=300_000, help="units (default 300000)")
    ap.add_argument("--periods", type=int, default=10, help="periods (default 10)")
    ap.add_argument("--repeat", type=int, default=3, help="runs of (a) and (b); the best counts")
    ap.add_argument("--no-others", action="store_true", help="skip the other commands")
    ap.add_argument("--keep", metavar="DIR", help="write the data here and keep it")
    args = ap.parse_args(argv)

    print(machine_line())
    print(compile_package())
    tmp = tempfile.TemporaryDirectory(prefix="pa-bench-") if not args.keep else None
    folder = Path(args.keep) if args.keep else Path(tmp.name)
    folder.mkdir(parents=True, exist_ok=True)
    data = folder / "panel.parquet"
    t0 = time.perf_counter()
    rows = write_panel(data, args.units, args.periods)
    size = data.stat().st_size / 2**20
    print(
        f"panel: {args.units:,} units x {args.periods} periods, 8% of rows dropped -> {rows:,} rows, "
        f"{len(NUMERIC)} numeric + {len(TEXT)} text columns, {size:,.0f} MiB Parquet "
        f"(written in {time.perf_counter() - t0:.1f} s)"
    )

    cli = console_script()
    a = best([cli, "profile", str(data), "--unit", UNIT, "--time", TIME, "--json", "--fail-on", "never"], args.repeat)
    if a.code not in (0, 1):
        print(f"profile failed (exit {a.code}): {last_line(a.stderr)}")
        return 1
    b_inner, b = floor_run(str(data), args.repeat)
    startup = best([cli, "--help"], args.repeat)
    c = run_child([sys.executable, "-c", PANDAS_SCRIPT, str(data), UNIT, TIME])
    if c.code != 0:
        print(f"pandas script failed: {last_line(c.stderr)}")
        return 1

    ab = a.seconds / b_inner
    ca = c.seconds / a.seconds
    print(f"measured (best of {args.repeat} for a and b)")
    print(line("(a) panel-audit profile --json", fmt_s(a.seconds)))
    print(line("(b) one polars pass (floor, compute only)", fmt_s(b_inner)))
    print(line("    the floor's process, start to exit", fmt_s(b.seconds)))
    print(line("    panel-audit --help (start-up)", fmt_s(startup.seconds)))
    print(line("(c) hand-written pandas script", fmt_s(c.seconds)))
    print(line("a / b", f"{ab:.2f}x", "<= 3x", ab <= 3))
    print(line("(a - start-up) / b", f"{(a.seconds - startup.seconds) / b_inner:.2f}x"))
    print(line("a / the floor's whole process", f"{a.seconds / b.seconds:.2f}x"))
    print(line("c / a", f"{ca:.2f}x", ">= 5x", ca >= 5))
    print(line("peak RSS (a) profile", fmt_mib(a.rss_mib)))
    print(line("peak RSS (b) floor", fmt_mib(b.rss_mib)))
    print(line("peak RSS (c) pandas", fmt_mib(c.rss_mib), "RSS(a) < RSS(c)", a.rss_mib < c.rss_mib))
    try:
        agree = agreement(json.loads(a.stdout), json.loads(c.stdout))
    except (json.JSONDecodeError, KeyError, TypeError) as exc:
        agree = f"could not compare ({exc})"
    print(line("profile and pandas agree on the figures", agree))

    if not args.no_others:
        other_commands(folder, data, args.units, args.periods, a.seconds)
    if tmp is not None:
        tmp.cleanup()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
