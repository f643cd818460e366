"""Each figure function on a small hand-built input: its title asks a question, its
axes carry the expected labels, and the marks span exactly the data given.

Expected values follow from the inputs by construction (stated beside each check).
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import polars as pl
import pytest

from auditor.commands.compare_values import ColumnShift
from auditor.commands.instruments_values import UnitStrength
from auditor.render import figures as fg


def shift(column: str, ks: float | None, p: float | None) -> ColumnShift:
    """A compare result's column row built by hand (the figure reads only column, KS and p)."""
    return ColumnShift(column=column, compared_as="numeric", base_kind="time-varying", reference="base period 1",
                       n_base=10, n_new=10, ks_statistic=ks, ks_p=p, ks_p_method="exact", psi=None,
                       missing_base=0.0, missing_new=0.0)

SEASONS = [2019, 2020, 2021, 2022, 2023]


def patterns(rows: list[tuple[list[int], int]]) -> pl.DataFrame:
    return pl.DataFrame(
        {"periods": [p for p, _ in rows], "units": [u for _, u in rows]},
        schema={"periods": pl.List(pl.UInt32), "units": pl.Int64},
    )


def tick_labels(ax, axis="x") -> list[str]:
    ticks = ax.get_xticklabels() if axis == "x" else ax.get_yticklabels()
    return [t.get_text() for t in ticks]


def labels_bottom_up(ax) -> list[str]:
    """The y tick labels in the order they are drawn, from the bottom of the axes up."""
    pairs = sorted(zip(ax.get_yticks(), tick_labels(ax, "y"), strict=True))
    return [text for _, text in pairs]


def bar_patches(ax):
    from matplotlib.patches import Rectangle

    return [p for p in ax.patches if isinstance(p, Rectangle)]


def test_every_title_is_a_question():
    figs = [
        fg.participation(patterns([([0, 1], 1)]), [1, 2]),
        fg.periods_per_unit(pl.DataFrame({"t_i": [1], "units": [1]}), 1),
        fg.entry_exit([{"period": 1, "present": 1, "entering": 1, "leaving": 1, "returning": 0}]),
        fg.within_shares(pl.DataFrame({"name": ["a"], "kind": ["time-varying"], "within_share": [0.5]})),
        fg.missing_map(pl.DataFrame({"column": ["a"], "period": ["1"], "missing_share": [0.5]}), [1]),
        fg.first_stage_strength([UnitStrength(endogenous="z", instruments=("x",), partial_f=12.0,
                                              critical_value=16.38, verdict="weak")]),
        fg.wave_shift([shift("a", 0.2, 0.01)]),
    ]
    for f in figs:
        assert f.axes[0].get_title(loc="left").endswith("?"), f.axes[0].get_title(loc="left")
    sd = fg.shifted_distributions({"a": ([0.0, 1.0], [0.5, 1.5])})
    assert sd.get_suptitle().endswith("?")


def test_participation_bands_are_as_tall_as_their_unit_share():
    # 6 units in every season, 3 in the first two, 1 in the last: bands 60 %, 30 %, 10 %
    fig = fg.participation(patterns([([0, 1, 2, 3, 4], 6), ([0, 1], 3), ([4], 1)]), SEASONS)
    ax = fig.axes[0]
    mesh = ax.collections[0]
    cells = np.asarray(mesh.get_array()).reshape(3, 5)
    np.testing.assert_array_equal(cells, [[1, 1, 1, 1, 1], [1, 1, 0, 0, 0], [0, 0, 0, 0, 1]])
    ys = np.unique(mesh.get_coordinates()[:, :, 1])
    np.testing.assert_allclose(ys, [0.0, 60.0, 90.0, 100.0])
    assert ax.get_ylim() == (100.0, 0.0)
    assert ax.get_xlim() == (-0.5, 4.5)
    assert tick_labels(ax) == [str(s) for s in SEASONS]
    assert ax.get_xlabel() == "period" and ax.get_ylabel() == "share of units (%)"


def test_participation_folds_rare_patterns_into_one_shaded_band():
    # top band: 8 units always; the other two patterns (1 unit in 2019 only, 1 in 2019-2020)
    # share the last band: 2019 present for 2 of 2, 2020 for 1 of 2, later seasons for none
    fig = fg.participation(patterns([([0, 1, 2, 3, 4], 8), ([0], 1), ([0, 1], 1)]), SEASONS, max_rows=1)
    cells = np.asarray(fig.axes[0].collections[0].get_array()).reshape(2, 5)
    np.testing.assert_allclose(cells[1], [1.0, 0.5, 0.0, 0.0, 0.0])
    labels = tick_labels(fig.axes[1], "y")  # the unit counts beside the bands
    assert "8 units" in labels and "2 units in 2 other patterns" in labels


def test_participation_stays_small_for_a_million_units():
    # 4,096 distinct patterns over 12 periods holding 1,000,000 units: one band per drawn
    # pattern (30) plus one, never one mark per unit
    rng = np.random.default_rng(5)
    masks = np.arange(1, 4097)
    rows = [([int(i) for i in range(12) if m >> i & 1], 1) for m in masks]
    counts = rng.multinomial(1_000_000 - 4096, np.full(4096, 1 / 4096)) + 1
    frame = patterns([(p, int(c)) for (p, _), c in zip(rows, counts, strict=True)])
    fig = fg.participation(frame, list(range(2001, 2013)))
    cells = np.asarray(fig.axes[0].collections[0].get_array())
    assert cells.size == 31 * 12
    assert len(fg.to_svg(fig, name="p")) < 200_000


def test_periods_per_unit_bars_are_the_counts_given():
    counts = pl.DataFrame({"t_i": [1, 3, 5], "units": [2, 4, 10]})
    fig = fg.periods_per_unit(counts, 5)
    ax = fig.axes[0]
    bars = bar_patches(ax)
    assert [round(b.get_x() + b.get_width() / 2) for b in bars] == [1, 3, 5]
    assert [b.get_height() for b in bars] == [2, 4, 10]
    assert ax.get_xlim() == (0.4, 5.6)
    assert ax.get_xlabel() == "periods observed (T_i)" and ax.get_ylabel() == "units"
    # once-seen units in vermillion, every-period units in blue (Okabe-Ito colours)
    from matplotlib.colors import to_hex

    assert [to_hex(b.get_facecolor()) for b in bars] == [fg.VERMILLION.lower(), fg.SKY.lower(), fg.BLUE.lower()]


ATTRITION = [
    {"period": 2019, "present": 4, "entering": 4, "leaving": 0, "returning": 0},
    {"period": 2020, "present": 5, "entering": 1, "leaving": 1, "returning": 0},
    {"period": 2021, "present": 4, "entering": 1, "leaving": 1, "returning": 0},
    {"period": 2022, "present": 4, "entering": 0, "leaving": 0, "returning": 1},
    {"period": 2023, "present": 4, "entering": 0, "leaving": None, "returning": 0},
]


def test_entry_exit_draws_present_line_and_signed_bars():
    fig = fg.entry_exit(ATTRITION)
    top, low = fig.axes[:2]
    line = top.get_lines()[0]
    np.testing.assert_array_equal(line.get_ydata(), [4, 5, 4, 4, 4])
    assert top.get_ylabel() == "units present"
    assert low.get_xlabel() == "period"
    assert tick_labels(low) == [str(a["period"]) for a in ATTRITION]
    heights = [b.get_height() for b in bar_patches(low)]
    # the first period's 4 units are the starting cohort, not entries; the last period's leavers
    # are not yet known (null): neither edge is drawn as a movement
    assert heights[:5] == [0, 1, 1, 0, 0]
    assert [abs(h) for h in heights[-5:]] == [0, 1, 1, 0, 0]
    texts = [t.get_text().strip() for t in low.texts]
    assert "start" in texts and "not yet known" in texts
    # whole units on the axis (a balanced panel used to show ticks 1, 0, 0, 0, 1)
    assert all(float(t).is_integer() for t in low.get_yticks())


def test_entry_exit_of_a_balanced_panel_says_nobody_moves():
    balanced = [{"period": p, "present": 4, "entering": 4 if p == 2019 else 0, "leaving": None if p == 2022 else 0,
                 "returning": 0} for p in range(2019, 2023)]
    low = fg.entry_exit(balanced).axes[1]
    assert list(low.get_yticks()) == [0]
    assert any("no unit enters" in t.get_text() for t in low.texts)


def test_within_shares_sorted_and_coloured_by_kind():
    cols = pl.DataFrame({
        "name": ["yield_t", "area_ha", "price", "grade"],
        "kind": ["time-varying", "time-invariant", "period-only", "time-varying"],
        "within_share": [0.4, 0.0, 0.9, None],
    })
    fig = fg.within_shares(cols)
    ax = fig.axes[0]
    bars = bar_patches(ax)
    assert [b.get_width() for b in bars] == [0.9, 0.4, 0.0]  # drawn bottom up: lowest share on top
    assert labels_bottom_up(ax) == ["price", "yield_t", "area_ha"]  # no bar for a non-numeric column
    from matplotlib.colors import to_hex

    assert [to_hex(b.get_facecolor()) for b in bars] == [
        fg.KIND_COLOURS["period-only"].lower(), fg.KIND_COLOURS["time-varying"].lower(),
        fg.KIND_COLOURS["time-invariant"].lower()]
    assert ax.get_xlim() == (0.0, 1.0)
    assert ax.get_xlabel() == "within share of the total sum of squares"


def test_within_shares_keeps_the_lowest_when_there_are_too_many():
    cols = pl.DataFrame({"name": [f"c{i}" for i in range(10)], "kind": ["time-varying"] * 10,
                         "within_share": [i / 10 for i in range(10)]})
    ax = fg.within_shares(cols, max_columns=3).axes[0]
    assert sorted(b.get_width() for b in bar_patches(ax)) == [0.0, 0.1, 0.2]
    assert "3 lowest of 10" in ax.get_title(loc="left")


def test_missing_map_cells_follow_the_table():
    table = pl.DataFrame({
        "column": ["rain"] * 3 + ["yield"] * 3 + ["area"] * 3,
        "period": ["2019", "2020", "2021"] * 3,
        "missing_share": [0.0, 1.0, 0.0, 0.1, 0.2, 0.3, 0.0, 0.0, 0.0],
    })
    fig = fg.missing_map(table, [2019, 2020, 2021])
    ax = fig.axes[0]
    image = ax.get_images()[0].get_array()
    # ordered by average share: rain (1/3) before yield (0.2); area (nothing missing) left out
    assert tick_labels(ax, "y") == ["rain", "yield"]
    np.testing.assert_allclose(np.asarray(image), [[0.0, 1.0, 0.0], [0.1, 0.2, 0.3]])
    assert tick_labels(ax) == ["2019", "2020", "2021"]
    crosses = ax.collections[0].get_offsets()
    np.testing.assert_array_equal(np.asarray(crosses), [[1, 0]])  # rain, 2020: entirely missing


def test_missing_map_says_so_when_nothing_is_missing():
    table = pl.DataFrame({"column": ["a"], "period": ["1"], "missing_share": [0.0]})
    ax = fg.missing_map(table, [1]).axes[0]
    assert "no missing values" in ax.texts[0].get_text()


def test_first_stage_marks_rule_of_thumb_and_size_bound():
    # F = 10: Staiger and Stock (1997); 104.7: Lee, McCrary, Moreira and Porter (2022), value
    # from memory as in shared/check-values.md; 19.93: Stock and Yogo (2005) Table 5.2, one
    # endogenous regressor, two instruments, 10 % maximal size (from memory, check-values.md)
    rows = [
        UnitStrength(endogenous="schooling", instruments=("hours", "tenure"), partial_f=35.2,
                     critical_value=19.93, verdict="strong"),
        UnitStrength(endogenous="union", instruments=("hours",), partial_f=4.1, critical_value=16.38,
                     verdict="weak"),
    ]
    fig = fg.first_stage_strength(rows, rule_of_thumb=10.0, t_test_bound=104.7)
    ax = fig.axes[0]
    assert ax.get_xscale() == "log"
    assert sorted(b.get_width() for b in bar_patches(ax)) == [4.1, 35.2]
    vertical = sorted({line.get_xdata()[0] for line in ax.get_lines()})
    assert vertical == [10.0, 16.38, 19.93, 104.7]
    lo, hi = ax.get_xlim()
    assert lo <= 4.1 and hi >= 104.7
    assert ax.get_xlabel() == "first-stage F (log scale)"
    assert labels_bottom_up(ax) == ["union \u2190 hours", "schooling \u2190 hours, tenure"]


def test_wave_shift_orders_columns_by_ks_statistic():
    cols = [shift("a", 0.05, 0.5), shift("b", 0.30, 0.001), shift("c", None, None)]
    ax = fg.wave_shift(cols).axes[0]
    assert labels_bottom_up(ax) == ["a", "b"]  # largest at the top
    assert sorted(b.get_width() for b in bar_patches(ax)) == [0.05, 0.30]
    assert ax.get_xlim()[0] == 0


def test_wave_shift_marks_the_columns_whose_ks_p_is_below_5_percent():
    # the cut of 0.05 is common practice for the two-sample KS test; a p of 0.2 is not marked
    from matplotlib.colors import to_hex

    ax = fg.wave_shift([shift("a", 0.10, 0.2), shift("b", 0.30, 0.01), shift("c", 0.05, 0.05)]).axes[0]
    colour = {round(b.get_width(), 2): to_hex(b.get_facecolor()).upper() for b in bar_patches(ax)}
    assert colour == {0.10: fg.SKY, 0.30: fg.VERMILLION, 0.05: fg.SKY}


def test_shifted_distributions_draw_one_panel_per_column():
    q = {"yield_t": ([1.0, 2.0, 3.0], [2.0, 3.0, 4.0]), "rain": ([0.0, 5.0], [1.0, 6.0])}
    fig = fg.shifted_distributions(q, ks={"yield_t": 0.33})
    drawn = [a for a in fig.axes if a.get_lines()]
    assert len(drawn) == 2
    base, new = drawn[0].get_lines()
    np.testing.assert_array_equal(base.get_xdata(), [1.0, 2.0, 3.0])
    np.testing.assert_array_equal(new.get_ydata(), [0.0, 0.5, 1.0])
    assert drawn[0].get_title(loc="left").startswith("yield_t") and "KS 0.33" in drawn[0].get_title(loc="left")
    assert drawn[0].get_ylim() == (0.0, 1.0)


def test_labels_from_the_data_are_plain_text_in_the_svg():
    cols = pl.DataFrame({"name": ["<script>alert(1)</script>", "cost_$_$"], "kind": ["time-varying"] * 2,
                         "within_share": [0.2, 0.3]})
    svg = fg.to_svg(fg.within_shares(cols), name="w")
    assert "<script" not in svg
    assert "&lt;script&gt;" in svg
    assert "cost_$_$" in svg  # taken literally, not as math


def test_png_output_is_a_png():
    png = fg.to_png(fg.wave_shift([shift("a", 0.2, 0.01)]), dpi=50)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)


@pytest.mark.parametrize("module", ["auditor.render.figures", "auditor.render.html"])
def test_importing_the_report_modules_does_not_import_matplotlib(module):
    code = f"import sys, {module}; print('matplotlib' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_many_periods_stay_small_in_svg():
    # 3,000 daily periods: the entry/exit and periods-per-unit series become one filled
    # area each (no bar per period), and the whole SVG stays small
    n = 3000
    attrition = [{"period": i, "present": 1000 + i, "entering": 5, "leaving": 4, "returning": 1}
                 for i in range(n)]
    fig = fg.entry_exit(attrition)
    assert len(bar_patches(fig.axes[1])) == 0
    assert fig.axes[1].get_xlim()[1] >= n - 1
    assert len(fg.to_svg(fig, name="e")) < 150_000
    counts = pl.DataFrame({"t_i": np.arange(1, n + 1), "units": np.full(n, 3)})
    ppu = fg.periods_per_unit(counts, n)
    assert ppu.axes[0].get_xlim() == (0.4, n + 0.6)
    assert len(fg.to_svg(ppu, name="p")) < 150_000


def test_anderson_rubin_figure_draws_the_set_and_the_classical_95_interval():
    # made-up numbers; the orange bar is estimate +- 1.96 classical standard errors (the normal
    # 95% interval, common practice), not the clustered ones; a ray reaches the axis edge
    from matplotlib.colors import to_hex

    from auditor.commands.instruments_values import ConfidenceSet, FitCoefficients

    rows = [UnitStrength(endogenous="area_ha", anderson_rubin=ConfidenceSet(level=0.9, intervals=((0.5, None),),
                                                                            kind="ray"))]
    est = FitCoefficients(coef={"area_ha": 1.0}, se={"area_ha": 0.25}, se_cluster={"area_ha": 2.0})
    fig = fg.anderson_rubin_set(rows, est)
    ax = fig.axes[0]
    orange = [ln for ln in ax.get_lines() if to_hex(ln.get_color()) == fg.ORANGE.lower()]
    assert len(orange) == 1
    np.testing.assert_allclose(orange[0].get_xdata(), [1.0 - 1.96 * 0.25, 1.0 + 1.96 * 0.25])
    blue = [ln for ln in ax.get_lines() if to_hex(ln.get_color()) == fg.BLUE.lower() and len(ln.get_xdata()) == 2]
    lo, hi = ax.get_xlim()
    assert blue[0].get_xdata()[0] == 0.5 and blue[0].get_xdata()[1] == pytest.approx(hi)
    assert labels_bottom_up(ax) == ["area_ha"]
    assert any("90% set" in t.get_text() for t in fig.legends[0].get_texts())
