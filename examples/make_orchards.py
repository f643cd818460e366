"""Write the invented orchard registry and its next-season file beside this script.

    python examples/make_orchards.py          # writes examples/orchards.csv, examples/orchards_next_season.csv

The generator lives in auditor/demo_data.py (fixed seeds); tests/test_demo.py checks
that the shipped files equal a fresh run of it.
"""

from __future__ import annotations

import sys
from pathlib import Path

from auditor.io.demo_data import csv_text, orchard_files


def main(folder: Path) -> list[Path]:
    """Write both example files into ``folder``; return their paths."""
    written = []
    for name, frame in orchard_files().items():
        path = folder / name
        tmp = path.with_name(f".{name}.part")
        tmp.write_text(csv_text(frame), encoding="utf-8")
        tmp.replace(path)  # atomic: a reader never sees half a file
        written.append(path)
    return written


if __name__ == "__main__":
    out = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parent
    for p in main(out):
        print(p)
