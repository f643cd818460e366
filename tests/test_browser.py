"""A real browser renders the report: a headless screenshot that is not blank.

`.ci/run` installs Debian's `chromium` when it is missing; the test skips, saying
why, only when no such browser is on PATH.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import numpy as np
import polars as pl
import pytest

BROWSERS = ("chromium", "chromium-browser")
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
)


def _browser() -> str | None:
    for name in BROWSERS:
        found = shutil.which(name)
        if found:
            return found
    return None


def _panel() -> pl.DataFrame:
    # invented orchards: 40 units over 2016-2023, a quarter of them leaving after 2019
    rng = np.random.default_rng(2)
    units = np.repeat(np.arange(40), 8)
    seasons = np.tile(np.arange(2016, 2024), 40)
    keep = ~((units % 4 == 0) & (seasons > 2019))
    n = int(keep.sum())
    return pl.DataFrame({
        "orchard": units[keep],
        "season": seasons[keep],
        "yield_t": rng.normal(12, 3, n),
        "area_ha": (units[keep] % 7 + 1).astype(float),
        "<script>alert(1)</script>": rng.normal(size=n),
    })


@pytest.mark.browser
def test_headless_browser_renders_a_report_that_is_not_blank(tmp_path: Path):
    browser = _browser()
    if browser is None:
        pytest.skip("no chromium on PATH: .ci/run installs Debian's chromium with apt-get when it can")
    from auditor.commands.report import write_report

    data = tmp_path / "orchards.parquet"
    _panel().write_parquet(data)
    page = write_report(data, unit="orchard", time="season", out=tmp_path / "report.html")
    shot = tmp_path / "shot.png"
    profile_dir = tmp_path / "browser-profile"  # a fresh user data folder for this run only
    cmd = [browser, *FLAGS, f"--user-data-dir={profile_dir}", f"--screenshot={shot}",
           "--window-size=1200,2000", page.resolve().as_uri()]
    run = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    assert shot.exists(), f"no screenshot; browser exit {run.returncode}: {run.stderr[-500:]}"

    from PIL import Image

    image = np.asarray(Image.open(shot).convert("RGB"))
    assert image.shape == (2000, 1200, 3)
    colours = np.unique(image.reshape(-1, 3), axis=0)
    assert len(colours) > 50, len(colours)  # text, tags and figures: far more than a few colours
    not_white = (image < 245).any(axis=2)
    assert not_white.mean() > 0.03, not_white.mean()
    # the heading is drawn near the top, and the participation figure's blue lower down
    assert not_white[:120].mean() > 0.005
    blue = (np.abs(image.astype(int) - (0, 114, 178)).sum(axis=2) < 40)  # Okabe-Ito blue
    assert blue.sum() > 1000, blue.sum()
