"""Figures for the report, drawn with matplotlib in the project's own style.

Every figure answers one question, stated in its title, and is drawn from small
aggregated tables (patterns, counts per period, per-column shares): never one
mark per row of data, so a figure stays small whatever the panel's size.

matplotlib is imported inside the functions only (``_mpl``), so that importing
this module costs nothing until a figure is drawn. Figures are built as
``matplotlib.figure.Figure`` objects without pyplot, so nothing is kept in a
global figure registry.
"""

from __future__ import annotations

import functools
import io
import re
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import polars as pl

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

    from auditor.commands.compare_values import ColumnShift
    from auditor.commands.instruments_values import FitCoefficients, UnitStrength

# Okabe & Ito (2008), "Color Universal Design": a palette that stays distinct
# under the common colour-vision deficiencies.
INK = "#1F2430"
MUTED = "#6B7280"
PAPER = "#FFFFFF"
RULE = "#D9DDE3"
BLUE = "#0072B2"
SKY = "#56B4E9"
GREEN = "#009E73"
ORANGE = "#E69F00"
VERMILLION = "#D55E00"
PURPLE = "#CC79A7"
GREY = "#9AA0A6"
ABSENT = "#EEF0F3"

KIND_COLOURS: dict[str, str] = {
    "time-varying": BLUE,
    "nearly-time-invariant": ORANGE,
    "time-invariant": VERMILLION,
    "period-only": PURPLE,
    "constant": GREY,
}

VERDICT_COLOURS: dict[str, str] = {
    "strong": BLUE,
    "weak": VERMILLION,
    "not-identified": GREY,
}

# The project's figure style: light rules on the value axis only, no box,
# left-aligned question titles, text kept as text in SVG (small and searchable).
STYLE: dict[str, Any] = {
    "font.size": 8.5,
    "axes.titlesize": 10.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlepad": 10.0,
    "axes.labelsize": 8.5,
    "axes.labelcolor": INK,
    "axes.edgecolor": RULE,
    "axes.linewidth": 0.8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.facecolor": PAPER,
    "axes.grid": False,
    "grid.color": RULE,
    "grid.linewidth": 0.6,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "xtick.major.size": 2.5,
    "ytick.major.size": 2.5,
    "legend.frameon": False,
    "legend.fontsize": 8.0,
    "figure.facecolor": PAPER,
    "savefig.facecolor": PAPER,
    "text.color": INK,
    "svg.fonttype": "none",
    "path.simplify": True,
}

WIDTH = 9.0  # inches; the report's column width
MAX_BARS = 120  # beyond this many bars a series is drawn as one filled area (small, fast SVG)


def _mpl() -> Any:
    """Import matplotlib on the Agg backend (no display needed) and return it."""
    import matplotlib

    matplotlib.use("Agg")
    return matplotlib


def _styled(build: Any) -> Any:
    """Run a figure function under the project's style (rcParams are read as artists are made)."""

    @functools.wraps(build)
    def run(*args: Any, **kwargs: Any) -> Any:
        mpl = _mpl()
        with mpl.rc_context(STYLE):
            return build(*args, **kwargs)

    return run


def _new_figure(height: float, *, nrows: int = 1, height_ratios: Sequence[float] | None = None) -> Figure:
    _mpl()
    from matplotlib.figure import Figure

    fig = Figure(figsize=(WIDTH, height), layout="constrained")
    if nrows == 1:
        fig.add_subplot(1, 1, 1)
    else:
        fig.subplots(nrows, 1, sharex=True, gridspec_kw={"height_ratios": height_ratios})
    return fig


def plain(text: Any, limit: int = 36) -> str:
    """``text`` made safe for a figure label: acting characters shown as ``<U+XXXX>``
    (the one sanitiser, auditor.render.sanitise), ``$`` taken literally (no math
    mode), shortened to ``limit`` characters with an ellipsis."""
    from auditor.render.sanitise import visible

    s = visible(text)
    if len(s) > limit:
        s = s[: limit - 1] + "\u2026"
    return s.replace("$", r"\$")


def _tick_positions(n: int, most: int = 14) -> list[int]:
    """At most ``most`` evenly spread positions out of 0..n-1, first and last kept."""
    if n <= most:
        return list(range(n))
    step = -(-n // most)
    ticks = list(range(0, n, step))
    if ticks[-1] != n - 1 and n - 1 - ticks[-1] >= step / 2:
        ticks.append(n - 1)
    return ticks


def _period_axis(ax: Any, labels: Sequence[Any], axis: str = "x") -> None:
    pos = _tick_positions(len(labels))
    text = [plain(labels[i], 12) for i in pos]
    rotate = max((len(t) for t in text), default=0) > 5 or len(pos) > 10
    if axis == "x":
        ax.set_xticks(pos, text, rotation=45 if rotate else 0, ha="right" if rotate else "center")
    else:
        ax.set_yticks(pos, text)


def _empty(fig: Figure, ax: Any, title: str, note: str) -> Figure:
    ax.set_title(title)
    ax.set_axis_off()
    ax.text(0.5, 0.5, note, ha="center", va="center", color=MUTED, transform=ax.transAxes)
    return fig


# --- structure -----------------------------------------------------------------


@_styled
def participation(
    patterns: pl.DataFrame, period_values: Sequence[Any], *, max_rows: int = 30
) -> Figure:
    """Which periods do units take part in? One band per participation pattern.

    ``patterns`` has ``periods`` (list of period indices into ``period_values``)
    and ``units``. The ``max_rows`` most common patterns get a band each, its
    height proportional to its unit count; the rest share one last band coloured
    by the share of its units present in each period. Returns the Figure; the
    y axis runs over the share of units (0-100 %).
    """
    _mpl()
    import numpy as np
    from matplotlib.colors import LinearSegmentedColormap

    title = "Which periods do the units take part in?"
    n_periods = len(period_values)
    fig = _new_figure(4.0)
    ax = fig.axes[0]
    if patterns.height == 0 or n_periods == 0:
        return _empty(fig, ax, title, "no units with both keys present")
    ordered = patterns.sort("units", descending=True, maintain_order=True)
    total = int(ordered["units"].sum())
    top = ordered.head(max_rows)
    rest = ordered.slice(max_rows)
    rest_units = int(rest["units"].sum()) if rest.height else 0

    # presence matrix of the top patterns, built without a loop over units
    idx = top.with_row_index("__row").explode("periods").drop_nulls("periods")
    rows = idx["__row"].to_numpy()
    cols = idx["periods"].cast(pl.Int64).to_numpy()
    n_rows = top.height + (1 if rest_units else 0)
    grid = np.zeros((n_rows, n_periods))
    grid[rows, cols] = 1.0
    if rest_units:
        share = (
            rest.explode("periods")
            .drop_nulls("periods")
            .group_by("periods")
            .agg(pl.col("units").sum())
        )
        grid[-1, share["periods"].cast(pl.Int64).to_numpy()] = share["units"].to_numpy() / rest_units
    heights = np.append(top["units"].to_numpy().astype(float), [rest_units] if rest_units else [])
    edges = np.concatenate([[0.0], np.cumsum(heights)]) / total * 100.0

    cmap = LinearSegmentedColormap.from_list("presence", [ABSENT, SKY, BLUE])
    xs = np.arange(n_periods + 1) - 0.5
    mesh = ax.pcolormesh(
        xs, edges, grid, cmap=cmap, vmin=0.0, vmax=1.0, shading="flat",
        edgecolors=PAPER, linewidth=0.4 if n_periods <= 60 else 0.0,
        rasterized=n_rows * n_periods > 3000,
    )
    ax.set_ylim(100.0, 0.0)
    ax.set_xlim(-0.5, n_periods - 0.5)
    _period_axis(ax, period_values)
    ax.set_xlabel("period")
    ax.set_ylabel("share of units (%)")
    ax.set_title(title)
    ax.spines["left"].set_visible(False)
    ax.spines["bottom"].set_visible(False)
    # unit counts beside the bands tall enough to carry a label (a right-hand axis,
    # so the layout makes room for them)
    counts = ax.twinx()
    counts.set_ylim(100.0, 0.0)
    mids, texts = [], []
    for i, h in enumerate(heights):
        if edges[i + 1] - edges[i] >= 4.0:
            mids.append((edges[i] + edges[i + 1]) / 2)
            if rest_units and i == n_rows - 1:
                texts.append(f"{int(h):,} units in {rest.height:,} other patterns")
            else:
                texts.append(f"{int(h):,} units")
    counts.set_yticks(mids, texts)
    counts.tick_params(axis="y", length=0, labelsize=7.5, labelcolor=MUTED)
    for side in ("left", "bottom", "right"):
        counts.spines[side].set_visible(False)
    bar = fig.colorbar(mesh, ax=[ax, counts], fraction=0.025, pad=0.01, aspect=30)
    bar.set_label("share of the band's units present")
    bar.outline.set_visible(False)
    return fig


@_styled
def periods_per_unit(obs_per_unit: pl.DataFrame, n_periods: int) -> Figure:
    """How many periods is each unit observed in? Bars of units by T_i.

    ``obs_per_unit`` has ``t_i`` (periods observed) and ``units``. Units seen
    once are drawn in vermillion (they add nothing to a within fit), units seen
    in every period in blue. Returns the Figure; x runs over 1..``n_periods``.
    """
    _mpl()
    import numpy as np

    title = "In how many periods is each unit observed?"
    fig = _new_figure(3.0)
    ax = fig.axes[0]
    if obs_per_unit.height == 0:
        return _empty(fig, ax, title, "no units")
    t = obs_per_unit["t_i"].cast(pl.Int64).to_numpy()
    u = obs_per_unit["units"].cast(pl.Int64).to_numpy()
    top = max(n_periods, int(t.max()))
    if t.size <= MAX_BARS:
        colours = [VERMILLION if ti == 1 else (BLUE if ti == n_periods else SKY) for ti in t.tolist()]
        ax.bar(t, u, width=0.8, color=colours, linewidth=0)
    else:  # many distinct counts: one filled area instead of a bar each
        heights = np.zeros(top)
        heights[t - 1] = u
        ax.fill_between(np.arange(1, top + 1), heights, step="mid", color=SKY, linewidth=0, rasterized=True)
        for ti, colour in ((1, VERMILLION), (n_periods, BLUE)):
            if heights[ti - 1]:
                ax.bar([ti], [heights[ti - 1]], width=max(1.0, top / 150), color=colour, linewidth=0)
    ax.set_xlim(0.4, top + 0.6)
    ax.set_xticks(_tick_positions_from_one(top))
    ax.set_xlabel("periods observed (T_i)")
    ax.set_ylabel("units")
    ax.yaxis.grid(True)
    ax.set_axisbelow(True)
    ax.set_title(title)
    _thousands(ax.yaxis)
    from matplotlib.patches import Patch

    handles = [Patch(color=SKY, label="some periods")]
    if (t == 1).any():
        handles.insert(0, Patch(color=VERMILLION, label="once (no within variation)"))
    if (t == n_periods).any():
        handles.append(Patch(color=BLUE, label="every period"))
    ax.legend(handles=handles, loc="upper left", ncols=len(handles))
    return fig


def _tick_positions_from_one(top: int) -> list[int]:
    return [p + 1 for p in _tick_positions(top, most=16)]


def _thousands(axis: Any) -> None:
    from matplotlib.ticker import FuncFormatter

    axis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:,.0f}"))


@_styled
def entry_exit(attrition: Sequence[Mapping[str, Any]]) -> Figure:
    """How many units are present, entering and leaving in each period?

    ``attrition`` is the contract's list of ``{period, present, entering,
    leaving, returning}``. Upper panel: units present. Lower panel: entering and
    returning units above zero, leaving units below, in whole units. The first
    period's units are the starting cohort (not entries) and the last period's
    leavers are not yet known (null in the JSON): neither edge is drawn as a
    movement. Returns the Figure.
    """
    _mpl()
    import numpy as np

    title = "How many units are present, entering and leaving in each period?"
    fig = _new_figure(4.2, nrows=2, height_ratios=[1.0, 1.15])
    top, low = fig.axes
    if not attrition:
        return _empty(fig, top, title, "no periods")
    labels = [a["period"] for a in attrition]
    n = len(labels)
    x = np.arange(n)
    present = np.array([a.get("present", 0) or 0 for a in attrition], dtype=float)
    entering = np.array([a.get("entering", 0) or 0 for a in attrition], dtype=float)
    leaving = np.array([a.get("leaving", 0) or 0 for a in attrition], dtype=float)
    returning = np.array([a.get("returning", 0) or 0 for a in attrition], dtype=float)

    many = n > MAX_BARS
    top.fill_between(x, present, step=None, color=SKY, alpha=0.35, linewidth=0, rasterized=many)
    top.plot(x, present, color=BLUE, linewidth=1.6, marker="o" if n <= 40 else None, markersize=3,
             rasterized=many)
    top.set_ylim(0, max(present.max(), 1) * 1.12)
    top.set_ylabel("units present")
    top.yaxis.grid(True)
    top.set_axisbelow(True)
    _thousands(top.yaxis)
    top.set_title(title)

    # The first period's units are the panel's starting cohort, not entries, and who leaves
    # after the last period is not yet known: neither edge is drawn as a movement.
    ent = entering.copy()
    ent[0] = 0.0
    lea = leaving.copy()
    lea[-1] = 0.0
    ret = returning
    w = 0.8 if n <= 60 else 1.0
    if n <= MAX_BARS:
        low.bar(x, ent, width=w, color=GREEN, linewidth=0, label="entering")
        low.bar(x, ret, width=w, bottom=ent, color=ORANGE, linewidth=0, label="returning after a gap")
        low.bar(x, -lea, width=w, color=VERMILLION, linewidth=0, label="leaving (last period seen)")
    else:  # many periods: one filled area per series instead of a bar each
        # (fill_between makes one polygon per series; its limits update fast)
        low.fill_between(x, ent, step="mid", color=GREEN, linewidth=0, label="entering", rasterized=True)
        low.fill_between(x, ent, ent + ret, step="mid", color=ORANGE, linewidth=0,
                         label="returning after a gap", rasterized=True)
        low.fill_between(x, -lea, step="mid", color=VERMILLION, linewidth=0,
                         label="leaving (last period seen)", rasterized=True)
    low.axhline(0, color=INK, linewidth=0.6)
    top_in = float(max((ent + ret).max(initial=0), lea.max(initial=0)))
    if top_in == 0:
        low.set_ylim(-1, 1)
        low.set_yticks([0])
        low.text((n - 1) / 2, 0.5, "no unit enters, returns or leaves inside the panel's span", ha="center",
                 va="center", fontsize=7.5, color=MUTED)
    else:
        low.set_ylim(-top_in * 1.15, top_in * 1.15)
        from matplotlib.ticker import MaxNLocator

        low.yaxis.set_major_locator(MaxNLocator(nbins=5, integer=True, symmetric=True))
    low.text(0, 0, " start", ha="left", va="bottom", fontsize=6.5, color=MUTED, rotation=90)
    low.text(n - 1, 0, "not yet known ", ha="right", va="top", fontsize=6.5, color=MUTED, rotation=90)
    low.set_ylabel("units in (+) / out (\u2212)")
    low.yaxis.grid(True)
    low.set_axisbelow(True)
    from matplotlib.ticker import FuncFormatter

    low.yaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{abs(v):,.0f}"))
    fig.legend(*low.get_legend_handles_labels(), loc="outside lower center", ncols=3)
    low.set_xlim(-0.6, n - 0.4)
    _period_axis(low, labels)
    low.set_xlabel("period")
    return fig


# --- variation -----------------------------------------------------------------


@_styled
def within_shares(columns: pl.DataFrame, *, max_columns: int = 40) -> Figure:
    """How much of each column's variation is within units? Bars coloured by kind.

    ``columns`` has ``name``, ``kind`` and ``within_share`` (0-1, null for
    non-numeric columns, which are left out). When more than ``max_columns``
    columns qualify, the ones with the lowest within share are drawn (they are
    the ones a fixed-effects fit struggles with). Returns the Figure; x runs 0-1.
    """
    _mpl()
    import numpy as np

    title = "How much of each column's variation lies within units?"
    rows = (
        columns.select("name", "kind", "within_share")
        .filter(pl.col("within_share").is_not_null() & pl.col("within_share").is_finite())
        .sort(["within_share", "name"])
    )
    shown = rows.head(max_columns)
    fig = _new_figure(max(1.6, 0.9 + 0.22 * max(shown.height, 1)))
    ax = fig.axes[0]
    if shown.height == 0:
        return _empty(fig, ax, title, "no numeric column with variation")
    shown = shown.reverse()  # lowest share at the top
    y = np.arange(shown.height)
    share = shown["within_share"].to_numpy()
    kinds = shown["kind"].to_list()
    ax.barh(y, share, height=0.68, color=[KIND_COLOURS.get(k, GREY) for k in kinds], linewidth=0)
    ax.set_yticks(y, [plain(n, 30) for n in shown["name"].to_list()])
    ax.set_xlim(0.0, 1.0)
    ax.set_ylim(-0.6, shown.height - 0.4)
    ax.set_xlabel("within share of the total sum of squares")
    ax.xaxis.grid(True)
    ax.set_axisbelow(True)
    from matplotlib.ticker import PercentFormatter

    ax.xaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
    ax.set_title(title if rows.height <= max_columns
                 else f"{title} ({max_columns} lowest of {rows.height})")
    from matplotlib.patches import Patch

    present = [k for k in KIND_COLOURS if k in set(kinds)]
    for yi, v in zip(y, share, strict=True):
        ax.text(v, yi, f" {(v if v > 0 else 0.0):.1%}", va="center", ha="left", fontsize=7, color=MUTED)
    fig.legend(handles=[Patch(color=KIND_COLOURS[k], label=k) for k in present],
               loc="outside lower center", ncols=len(present))
    return fig


# --- missing data ----------------------------------------------------------------


@_styled
def missing_map(
    missing_by_period: pl.DataFrame,
    period_values: Sequence[Any],
    *,
    max_columns: int = 40,
) -> Figure:
    """Where are values missing? A heat map of the missing share by column and period.

    ``missing_by_period`` has ``column``, ``period`` (label) and
    ``missing_share`` (0-1). Only columns with something missing are drawn, the
    ``max_columns`` with the highest average share first; a cell missing
    entirely is crossed when the map is small enough to read. Returns the Figure.
    """
    _mpl()
    import numpy as np
    from matplotlib.colors import LinearSegmentedColormap, PowerNorm

    title = "Where are values missing, by column and period?"
    labels = [str(p) for p in period_values]
    frame = missing_by_period.with_columns(pl.col("period").cast(pl.String))
    order = (
        frame.group_by("column")
        .agg(pl.col("missing_share").mean().alias("avg"), pl.col("missing_share").max().alias("top"))
        .filter(pl.col("top") > 0)
        .sort(["avg", "column"], descending=[True, False])
    )
    total_missing_columns = order.height
    order = order.head(max_columns).with_row_index("__row")
    fig = _new_figure(max(1.8, 1.2 + 0.2 * max(order.height, 1)))
    ax = fig.axes[0]
    if order.height == 0:
        return _empty(fig, ax, title, "no missing values in any column")
    pos = pl.DataFrame({"period": labels, "__col": np.arange(len(labels), dtype=np.int64)})
    cells = frame.join(order.select("column", "__row"), on="column").join(pos, on="period")
    grid = np.full((order.height, len(labels)), np.nan)
    grid[cells["__row"].to_numpy(), cells["__col"].to_numpy()] = cells["missing_share"].to_numpy()
    cmap = LinearSegmentedColormap.from_list(
        "missing", ["#F7F8FA", "#F5D28A", ORANGE, VERMILLION, "#5A1E00"]
    ).with_extremes(bad=PAPER)
    # a square-root scale, so that a few percent missing is visible beside 100 %
    image = ax.imshow(grid, aspect="auto", cmap=cmap, norm=PowerNorm(0.5, vmin=0.0, vmax=1.0),
                      interpolation="nearest")
    ax.set_yticks(np.arange(order.height), [plain(c, 30) for c in order["column"].to_list()])
    _period_axis(ax, labels)
    if grid.size <= 900:
        r, c = np.nonzero(grid >= 1.0)
        ax.scatter(c, r, marker="x", s=14, color=PAPER, linewidths=1.0)
    ax.set_xlabel("period")
    for side in ("left", "bottom"):
        ax.spines[side].set_visible(False)
    shown = title if total_missing_columns <= max_columns else (
        f"{title} ({max_columns} of {total_missing_columns} columns)")
    ax.set_title(shown)
    bar = fig.colorbar(image, ax=ax, fraction=0.04, pad=0.02)
    bar.set_label("missing share")
    bar.outline.set_visible(False)
    from matplotlib.ticker import PercentFormatter

    bar.set_ticks([0.0, 0.05, 0.25, 0.5, 1.0])
    bar.formatter = PercentFormatter(1.0, decimals=0)
    bar.update_ticks()
    return fig


# --- model readiness ---------------------------------------------------------------


@_styled
def first_stage_strength(
    strength: Sequence[UnitStrength],
    *,
    rule_of_thumb: float = 10.0,
    t_test_bound: float = 104.7,
) -> Figure:
    """Are the excluded instruments strong enough? Each first-stage F on a log scale.

    ``strength`` is the instruments result's strength rows (``endogenous``, ``instruments``,
    ``partial_f``, ``critical_value``, ``verdict`` are read). Each bar is one first-stage
    F, its colour the verdict; a black tick marks that row's Stock-Yogo critical
    value; dashed lines mark ``rule_of_thumb`` (Staiger & Stock 1997) and
    ``t_test_bound`` (Lee, McCrary, Moreira & Porter 2022). Returns the Figure.
    """
    _mpl()
    import numpy as np

    title = "Are the excluded instruments strong enough?"
    rows = [r for r in strength if r.partial_f is not None]
    fig = _new_figure(max(1.9, 1.3 + 0.34 * max(len(rows), 1)))
    ax = fig.axes[0]
    if not rows:
        return _empty(fig, ax, title, "no first stage could be computed")
    y = np.arange(len(rows))[::-1]
    f = np.array([max(float(r.partial_f or 0.0), 1e-3) for r in rows])
    colours = [VERDICT_COLOURS.get(str(r.verdict), GREY) for r in rows]
    ax.barh(y, f, height=0.6, color=colours, linewidth=0, left=0)
    labels = []
    for r in rows:
        inst = ", ".join(str(i) for i in r.instruments)
        labels.append(plain(f"{r.endogenous} \u2190 {inst}", 40))
    ax.set_yticks(y, labels)
    ax.set_xscale("log")
    crit = [r.critical_value for r in rows]
    values = list(f) + [rule_of_thumb, t_test_bound] + [c for c in crit if c is not None]
    ax.set_xlim(min(0.5, min(values) / 2), max(values) * 2.5)
    ax.set_ylim(-0.7, len(rows) - 0.3)
    for yi, c in zip(y, crit, strict=True):
        if c is not None:
            ax.plot([c, c], [yi - 0.42, yi + 0.42], color=INK, linewidth=2.0, solid_capstyle="butt")
    ax.axvline(rule_of_thumb, color=MUTED, linestyle=(0, (4, 3)), linewidth=1.0)
    ax.axvline(t_test_bound, color=MUTED, linestyle=(0, (1, 2)), linewidth=1.2)
    top = len(rows) - 0.35
    ax.text(rule_of_thumb, top, f" F = {rule_of_thumb:g}", va="bottom", ha="left", fontsize=7, color=MUTED)
    ax.text(t_test_bound, top, f" F = {t_test_bound:g}", va="bottom", ha="left", fontsize=7, color=MUTED)
    for yi, fi in zip(y, f, strict=True):
        ax.text(fi, yi, f" {fi:,.1f}", va="center", ha="left", fontsize=7.5, color=INK)
    ax.set_xlabel("first-stage F (log scale)")
    from matplotlib.ticker import FuncFormatter, NullFormatter

    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:,.10g}"))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.xaxis.grid(True, which="major")
    ax.set_axisbelow(True)
    ax.set_title(title)
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    seen = [v for v in VERDICT_COLOURS if v in {str(r.verdict) for r in rows}]
    handles = [Patch(color=VERDICT_COLOURS[v], label=v) for v in seen]
    handles.append(Line2D([], [], color=INK, linewidth=2.0, label="Stock-Yogo critical value"))
    handles.append(Line2D([], [], color=MUTED, linestyle=(0, (4, 3)), label="rule of thumb"))
    handles.append(Line2D([], [], color=MUTED, linestyle=(0, (1, 2)), label="t-test size bound"))
    fig.legend(handles=handles, loc="outside lower center", ncols=len(handles))
    return fig


@_styled
def anderson_rubin_set(strength: Sequence[UnitStrength], estimates: FitCoefficients | None) -> Figure:
    """Where can the correlated fixed coefficient lie? The Anderson-Rubin set beside the
    Hausman-Taylor 95% interval (estimate +- 1.96 classical standard errors), on the coefficient's axis.

    ``strength`` rows carry ``anderson_rubin`` (``intervals`` with None for an infinite end,
    ``kind``); ``estimates`` is the result's ``estimates.hausman_taylor``. A ray is drawn to the
    edge of the axis with an arrow head; an empty set is said in words. Returns the Figure.
    """
    _mpl()
    title = "Where can the correlated fixed coefficient lie?"
    sets = [(r, r.anderson_rubin) for r in strength if r.anderson_rubin is not None]
    fig = _new_figure(max(1.9, 1.3 + 0.55 * max(len(sets), 1)))
    ax = fig.axes[0]
    if not sets:
        return _empty(fig, ax, title, "no Anderson-Rubin set was computed")
    coef = estimates.coef if estimates is not None else {}
    se = estimates.se if estimates is not None else {}
    finite: list[float] = []
    for r, ar in sets:
        for lo, hi in ar.intervals:
            finite += [v for v in (lo, hi) if v is not None]
        c, s = coef.get(r.endogenous), se.get(r.endogenous)
        if c is not None and s is not None:
            finite += [c - 1.96 * s, c + 1.96 * s]
    lo_ax, hi_ax = (min(finite), max(finite)) if finite else (-1.0, 1.0)
    pad = 0.25 * max(hi_ax - lo_ax, 1e-9)
    lo_ax, hi_ax = lo_ax - pad, hi_ax + pad
    labels = []
    for i, (r, ar) in enumerate(sets):
        y = len(sets) - 1 - i
        for lo, hi in ar.intervals:
            a, b = (lo_ax if lo is None else lo), (hi_ax if hi is None else hi)
            ax.plot([a, b], [y + 0.12, y + 0.12], color=BLUE, linewidth=5, solid_capstyle="butt")
            for end, edge, head in ((lo, lo_ax, "<"), (hi, hi_ax, ">")):
                if end is None:
                    ax.plot([edge], [y + 0.12], marker=head, color=BLUE, markersize=7)
        if ar.kind == "empty":
            ax.text((lo_ax + hi_ax) / 2, y + 0.12, "empty set: the instruments reject the model at every value",
                    ha="center", va="center", fontsize=7.5, color=VERMILLION)
        c, s = coef.get(r.endogenous), se.get(r.endogenous)
        if c is not None and s is not None:
            ax.plot([c - 1.96 * s, c + 1.96 * s], [y - 0.18, y - 0.18], color=ORANGE, linewidth=3,
                    solid_capstyle="butt")
            ax.plot([c], [y - 0.18], marker="o", color=INK, markersize=4)
        labels.append(plain(r.endogenous, 30))
    ax.set_yticks(list(range(len(sets)))[::-1], labels)
    ax.set_ylim(-0.7, len(sets) - 0.3)
    ax.set_xlim(lo_ax, hi_ax)
    ax.xaxis.grid(True)
    ax.set_axisbelow(True)
    ax.set_xlabel("coefficient")
    ax.set_title(title)
    from matplotlib.lines import Line2D

    first = sets[0][1].level
    level = int(round(100 * float(first if first is not None else 0.95)))
    handles = [Line2D([], [], color=BLUE, linewidth=5, label=f"Anderson-Rubin {level}% set"),
               Line2D([], [], color=ORANGE, linewidth=3, label="Hausman-Taylor 95% interval")]
    fig.legend(handles=handles, loc="outside lower center", ncols=2)
    return fig


# --- new wave ----------------------------------------------------------------------


@_styled
def wave_shift(columns: Sequence[ColumnShift], *, max_columns: int = 30) -> Figure:
    """Which columns changed distribution in the new wave? KS statistic per column.

    ``columns`` are a compare result's ColumnShift rows (``CompareResult.columns``:
    ``column``, ``ks_statistic``, ``ks_p`` are read). Bars are the two-sample Kolmogorov-Smirnov statistic
    (the largest gap between the two cumulative distributions, 0-1), the
    ``max_columns`` largest drawn; darker bars have ks_p below 0.05. Returns the Figure.
    """
    _mpl()
    import numpy as np

    title = "Which columns changed distribution in the new wave?"
    rows = sorted(
        (r for r in columns if r.ks_statistic is not None),
        key=lambda r: (-float(r.ks_statistic or 0.0), str(r.column)),
    )[:max_columns]
    fig = _new_figure(max(1.7, 1.0 + 0.22 * max(len(rows), 1)))
    ax = fig.axes[0]
    if not rows:
        return _empty(fig, ax, title, "no numeric column in both waves")
    y = np.arange(len(rows))[::-1]
    ks = np.array([float(r.ks_statistic or 0.0) for r in rows])
    sig = [r.ks_p is not None and float(r.ks_p) < 0.05 for r in rows]
    ax.barh(y, ks, height=0.66, color=[VERMILLION if s else SKY for s in sig], linewidth=0)
    ax.set_yticks(y, [plain(r.column, 30) for r in rows])
    ax.set_xlim(0, max(0.1, float(ks.max()) * 1.15))
    ax.set_ylim(-0.6, len(rows) - 0.4)
    ax.set_xlabel("Kolmogorov-Smirnov statistic (largest gap between the two distributions)")
    ax.xaxis.grid(True)
    ax.set_axisbelow(True)
    ax.set_title(title)
    from matplotlib.patches import Patch

    ax.legend(handles=[Patch(color=VERMILLION, label="p < 0.05"), Patch(color=SKY, label="p \u2265 0.05")],
              loc="lower right")
    return fig


@_styled
def shifted_distributions(
    quantiles: Mapping[str, tuple[Sequence[float], Sequence[float]]],
    *,
    ks: Mapping[str, float] | None = None,
) -> Figure:
    """How did the most shifted columns move? Cumulative distributions, base against new.

    ``quantiles`` maps a column name to (base quantiles, new quantiles), each a
    sorted sequence at evenly spaced probabilities 0..1 (the renderer computes
    them with polars, never from all rows in the figure). One small panel per
    column; ``ks`` adds the KS statistic to the panel's title. Returns the Figure.
    """
    _mpl()
    import numpy as np
    from matplotlib.figure import Figure

    title = "How did the most shifted columns move between waves?"
    names = list(quantiles)
    n = max(len(names), 1)
    ncols = min(n, 2)
    nrows = -(-n // ncols)
    fig = Figure(figsize=(WIDTH, 0.6 + 2.1 * nrows), layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
    if not names:
        for a in axes[1:]:
            a.set_axis_off()
        return _empty(fig, axes[0], title, "no shifted numeric column")
    fig.suptitle(title, x=0.01, ha="left", fontweight="bold", fontsize=10.5)
    fig.supxlabel("value", fontsize=8.5)
    for ax, name in zip(axes, names, strict=False):
        base, new = (np.asarray(q, dtype=float) for q in quantiles[name])
        pb = np.linspace(0.0, 1.0, base.size)
        pn = np.linspace(0.0, 1.0, new.size)
        ax.plot(base, pb, color=BLUE, linewidth=1.6, drawstyle="steps-post", label="base, last period")
        ax.plot(new, pn, color=VERMILLION, linewidth=1.6, linestyle=(0, (5, 2)),
                drawstyle="steps-post", label="new wave")
        head = plain(name, 30)
        if ks and name in ks and ks[name] is not None:
            head += f"  (KS {float(ks[name]):.2f})"
        ax.set_title(head, fontsize=9, fontweight="normal")
        ax.set_ylim(0, 1)
        ax.set_ylabel("share of rows at or below")
        ax.yaxis.grid(True)
        ax.set_axisbelow(True)
    fig.legend(*axes[0].get_legend_handles_labels(), loc="outside upper right", ncols=2)
    for ax in axes[len(names):]:
        ax.set_axis_off()
    return fig


# --- output ------------------------------------------------------------------------

_METADATA = re.compile(r"<metadata>.*?</metadata>\s*", re.S)
_SIZE = re.compile(r'<svg([^>]*?)\swidth="[^"]*"\sheight="[^"]*"')


def to_svg(fig: Figure, *, name: str) -> str:
    """The figure as an inline ``<svg>`` element (text), scaled to its container.

    ``name`` salts the element ids so that several figures can share one page.
    """
    mpl = _mpl()
    buf = io.StringIO()
    with mpl.rc_context({**STYLE, "svg.hashsalt": f"pa-{name}"}):
        fig.savefig(buf, format="svg", dpi=110, metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    start = text.find("<svg")
    svg = text[start:]
    # the RDF metadata block names vocabularies by URL; the page needs none of it
    svg = _METADATA.sub("", svg, count=1)
    # element ids unique on a page holding several figures
    tag = re.sub(r"[^A-Za-z0-9-]", "-", name)
    svg = svg.replace(' id="', f' id="{tag}-').replace('href="#', f'href="#{tag}-')
    svg = svg.replace("url(#", f"url(#{tag}-")
    svg = _SIZE.sub(r'<svg\1 class="pa-figure" role="img" preserveAspectRatio="xMidYMid meet"', svg, count=1)
    return svg


def to_png(fig: Figure, *, dpi: int = 200) -> bytes:
    """The figure as PNG bytes at ``dpi`` dots per inch (for a paper)."""
    mpl = _mpl()
    buf = io.BytesIO()
    with mpl.rc_context(STYLE):
        fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return buf.getvalue()
