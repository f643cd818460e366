"""Write the golden JSON and YAML documents of the demo panel and a small benchmark panel,
and the demo's text outputs and HTML report.

Every document is produced through the command line (``python -m auditor.cli ...``, the module every
version of the package has) in a
scratch folder, with paths relative to it, so the bytes do not depend on where the
run happens. ``documents(folder)`` returns them by file name; run as a script it
writes them beside this file:

    python tests/data/golden/make_golden.py

tests/test_layout_bytes.py calls ``documents`` with the code as it is and compares
the bytes with the files written here (see README.md in this folder for the commit
that wrote them).
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
BENCH = HERE.parent.parent / "benchmarks"

#: the demo's model-readiness set-up (auditor's demo: DEMO_REGRESSORS and friends),
#: written out so that a change to the demo's constants shows here as a difference
DEMO_KEYS = ["--unit", "orchard_id", "--time", "season"]
DEMO_INSTRUMENTS = [
    "--outcome", "log_yield_ha",
    "--regressors", "rainfall_mm,irrigation_h,labour_days,altitude_m,soil_class,founder_training_yrs",
    "--correlated", "labour_days,founder_training_yrs",
    "--period-effects", "--treat-as-invariant", "founder_training_yrs",
]
#: the benchmark panel of tests/benchmarks/profile_bench.py, small and seeded
BENCH_UNITS, BENCH_PERIODS, BENCH_SEED = 3_000, 8, 2026
BENCH_KEYS = ["--unit", "orchard", "--time", "season"]
#: one BLAS thread in every run: the last digits of the instruments document's statistics
#: depend on how many threads the linear algebra splits its sums over (2 cores and 1 differ
#: in the 16th digit), and a test session may have set these already (a local dask
#: cluster sets them to 1 for its workers); fixed here, the bytes do not depend on the machine
ENV = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "COLUMNS": "100",
       "NO_COLOR": "1"}
#: the report's one line that changes between runs: when it was written
WRITTEN = re.compile(rb"written \d{4}-\d{2}-\d{2} \d{2}:\d{2} UTC")
BENCH_INSTRUMENTS = [
    "--outcome", "y", "--regressors", "x1,x2,x3,x4,x5,x6,elevation,planted", "--correlated", "x1,planted",
]


def _run(folder: Path, *argv: str) -> bytes:
    """stdout of ``python -m auditor.cli ARGV`` run in ``folder``; exit 0 or 1 (findings) expected."""
    proc = subprocess.run([sys.executable, "-m", "auditor.cli", *argv], cwd=folder, capture_output=True,
                          stdin=subprocess.DEVNULL, check=False, env={**os.environ, **ENV})
    if proc.returncode not in (0, 1):
        raise RuntimeError(f"panel-audit {' '.join(argv)} exited {proc.returncode}: {proc.stderr.decode()[-500:]}")
    if not proc.stdout or b"No module named" in proc.stderr:
        raise RuntimeError(f"panel-audit {' '.join(argv)} wrote nothing: {proc.stderr.decode()[-500:]}")
    return proc.stdout


def _bench_files(folder: Path) -> None:
    sys.path.insert(0, str(BENCH))
    try:
        from profile_bench import unit_attributes, wave, write_panel
    finally:
        sys.path.remove(str(BENCH))
    write_panel(folder / "panel.parquet", BENCH_UNITS, BENCH_PERIODS, seed=BENCH_SEED)
    nxt = wave(unit_attributes(BENCH_UNITS, BENCH_SEED), BENCH_PERIODS, BENCH_SEED)
    nxt.write_parquet(folder / "next.parquet")


def documents(folder: Path) -> dict[str, bytes]:
    """Every golden document, by file name, computed by the current code in ``folder``."""
    docs: dict[str, bytes] = {}
    folder.mkdir(parents=True, exist_ok=True)
    # (a) the shipped demo: its registry and next season, as `panel-audit demo` writes them
    _run(folder, "demo", "--out", "demo")
    reg, nxt = "demo/orchards.csv", "demo/orchards_next_season.csv"
    docs["demo_written_profile.json"] = (folder / "demo" / "orchards_profile.json").read_bytes()
    docs["demo_profile.json"] = _run(folder, "profile", reg, *DEMO_KEYS, "--json", "--fail-on", "never")
    docs["demo_instruments.json"] = _run(folder, "instruments", reg, *DEMO_KEYS, *DEMO_INSTRUMENTS, "--json",
                                         "--fail-on", "never")
    docs["demo_compare.json"] = _run(folder, "compare", reg, nxt, *DEMO_KEYS, "--merged", "--json",
                                     "--fail-on", "never")
    docs["demo_draft.yaml"] = _run(folder, "rules", "draft", reg, *DEMO_KEYS)
    (folder / "demo_contract.yaml").write_bytes(docs["demo_draft.yaml"])
    docs["demo_check.json"] = _run(folder, "check", nxt, "--rules", "demo_contract.yaml", "--against", reg, "--json")
    # the same runs as text, and the HTML report of the new season against the registry
    docs["demo_profile.txt"] = _run(folder, "profile", reg, *DEMO_KEYS, "--fail-on", "never")
    docs["demo_instruments.txt"] = _run(folder, "instruments", reg, *DEMO_KEYS, *DEMO_INSTRUMENTS,
                                        "--fail-on", "never")
    docs["demo_compare.txt"] = _run(folder, "compare", reg, nxt, *DEMO_KEYS, "--merged", "--fail-on", "never")
    docs["demo_check.txt"] = _run(folder, "check", nxt, "--rules", "demo_contract.yaml", "--against", reg)
    _run(folder, "report", nxt, *DEMO_KEYS, *DEMO_INSTRUMENTS, "--against", reg, "--out", "demo_report.html",
         "--fail-on", "never")
    docs["demo_report.html"] = WRITTEN.sub(b"written <when> UTC", (folder / "demo_report.html").read_bytes())
    # (b) the benchmark panel, small and seeded, with a next period as the new wave
    _bench_files(folder)
    panel, new = "panel.parquet", "next.parquet"
    docs["bench_profile.json"] = _run(folder, "profile", panel, *BENCH_KEYS, "--json", "--fail-on", "never")
    docs["bench_instruments.json"] = _run(folder, "instruments", panel, *BENCH_KEYS, *BENCH_INSTRUMENTS, "--json",
                                          "--fail-on", "never")
    docs["bench_compare.json"] = _run(folder, "compare", panel, new, *BENCH_KEYS, "--json", "--fail-on", "never")
    docs["bench_draft.yaml"] = _run(folder, "rules", "draft", panel, *BENCH_KEYS)
    (folder / "bench_contract.yaml").write_bytes(docs["bench_draft.yaml"])
    docs["bench_check.json"] = _run(folder, "check", new, "--rules", "bench_contract.yaml", "--against", panel,
                                    "--json")
    docs["bench_instruments.txt"] = _run(folder, "instruments", panel, *BENCH_KEYS, *BENCH_INSTRUMENTS,
                                         "--fail-on", "never")
    docs["bench_compare.txt"] = _run(folder, "compare", panel, new, *BENCH_KEYS, "--fail-on", "never")
    _run(folder, "report", panel, *BENCH_KEYS, *BENCH_INSTRUMENTS, "--out", "bench_report.html", "--fail-on", "never")
    docs["bench_report.html"] = WRITTEN.sub(b"written <when> UTC", (folder / "bench_report.html").read_bytes())
    return docs


def main() -> int:
    import tempfile

    with tempfile.TemporaryDirectory(prefix="pa-golden-") as tmp:
        for name, body in documents(Path(tmp)).items():
            (HERE / name).write_bytes(body)
            print(f"{name}: {len(body):,} bytes")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
