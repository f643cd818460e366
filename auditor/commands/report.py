"""`panel-audit report`: audit a panel (profile, model readiness, a new wave) and write the HTML page.

The command runs the profile, and when asked model readiness and the comparison of a new
wave, then hands the results to the renderer (auditor.render.html) and publishes the page
and its figures together (auditor.io.outputs).
"""

from __future__ import annotations

import contextlib
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from auditor.errors import fail
from auditor.render.html import FIGURE_FILES, Limits, build_figures, render_html

if TYPE_CHECKING:  # pragma: no cover
    from auditor.checks.config import Settings
    from auditor.checks.findings import Finding
    from auditor.commands.compare_values import ColumnShift
    from auditor.io.outputs import OutputSet


def write_report(
    data: Any,
    *,
    unit: str | Sequence[str],
    time: str,
    out: str | Path,
    outcome: str | None = None,
    regressors: Sequence[str] | None = None,
    correlated: Sequence[str] | None = None,
    against: Any = None,
    png_dir: str | Path | None = None,
    settings: Settings | str | Path | None = None,
    force: bool = False,
    period_effects: bool = False,
    treat_as_invariant: Sequence[str] = (),
    outputs: OutputSet | None = None,
    engine: str = "auto",
    scheduler: str | None = None,
    collect_findings: list[Finding] | None = None,
) -> Path:
    """Audit ``data``, write the HTML report to ``out`` and return the path written.

    Runs the profile, and the instruments check when ``outcome`` and
    ``regressors`` are given (with ``period_effects`` and ``treat_as_invariant`` as
    for ``instruments``). With ``against`` (the panel so far) ``data`` is the new
    wave: the profile and the model readiness describe the appended panel (base +
    new), and the new-wave section compares the wave with the base. With ``png_dir``
    each figure is also written there as a PNG (names in ``FIGURE_FILES``). Refuses
    (exit 2) to write over an input (the data files, the base, a rules file), over a
    symbolic link, one path twice, or over an existing file unless ``force``. The page
    and the figures are published together or not at all (auditor.io.outputs), so a full
    disk or an interrupt leaves no partial file and no page without its figures.
    ``outputs``: the caller's OutputSet, which then also publishes and keeps them.
    ``engine`` and ``scheduler`` as in :func:`auditor.commands.profile.profile` (with ``dask`` and
    ``against``, the base's profile runs on the cluster and the appended panel's sections
    on this machine). ``collect_findings``: a list that receives every Finding the page
    shows (profile, model readiness and new wave), e.g. for an exit code.
    """
    from auditor.checks.config import Settings as _Settings
    from auditor.checks.config import load_settings
    from auditor.io.outputs import OutputSet, input_files

    own = outputs is None
    if outputs is None:
        rules = settings if isinstance(settings, str | Path) else None
        outputs = OutputSet(force=force, inputs=input_files(data, against, files=[rules]))
    with contextlib.ExitStack() as stack:
        if own:
            stack.enter_context(outputs)
        if not isinstance(settings, _Settings):
            settings = load_settings(settings)
        out_path = outputs.claim(out, "the report (--out)")
        png_path = Path(png_dir) if png_dir is not None else None
        if png_path is not None:
            if png_path.exists() and not png_path.is_dir():
                raise fail("report-png-dir-not-folder", path=png_dir)
            for file in FIGURE_FILES.values():
                outputs.claim(png_path / file, "a figure of --png-dir")
        if (outcome is None) != (not regressors):
            raise fail("report-model-needs-both")
        result, inst, comp, quantiles, lim = _report_parts(
            data, unit, time, outcome, regressors, correlated, against, settings, period_effects, treat_as_invariant,
            engine, scheduler)
        drawn = build_figures(result, inst, comp, quantiles=quantiles, limits=lim)
        page = render_html(result, inst, comp, figures=drawn, settings=settings)
        outputs.stage(out_path, page)
        if png_path is not None:
            from auditor.render.figures import to_png

            for name, fig in drawn.items():
                outputs.stage(png_path / FIGURE_FILES[name], to_png(fig))
        outputs.publish()
    if collect_findings is not None:
        collect_findings.extend((*result.findings, *(inst.findings if inst is not None else ()),
                                 *(comp.wave_findings if comp is not None else ())))
    return out_path


def _report_parts(data: Any, unit: Any, time: str, outcome: str | None, regressors: Sequence[str] | None,
                  correlated: Sequence[str] | None, against: Any, settings: Settings, period_effects: bool,
                  treat_as_invariant: Sequence[str], engine: str = "auto",
                  scheduler: str | None = None) -> tuple[Any, Any, Any, Any, Limits]:
    """The profile (of base + new with ``against``), model readiness and the comparison behind
    a report. The input is read once: the profile and the model readiness share one Panel
    (the appended one with ``against``); only on a dask cluster does each run its own passes."""
    from auditor.commands.instruments import ModelSpec, instruments, instruments_panel
    from auditor.commands.profile import profile, profile_panel
    from auditor.stats.engines import resolve_engine

    comp = None
    quantiles = None
    lim = Limits.from_settings(settings)
    wanted = outcome is not None and bool(regressors)
    spec = ModelSpec.of(outcome or "", regressors or (), correlated, period_effects, treat_as_invariant)
    inst = None
    if against is not None:
        from auditor.commands.compare import compare
        from auditor.io.load import PERIOD_ID

        comp = compare(against, data, unit=unit, time=time, settings=settings, appended=True, engine=engine,
                       scheduler=scheduler)
        if comp.appended is None or comp.sides is None:
            raise RuntimeError("compare(appended=True) returned no appended panel")
        result = profile_panel(comp.appended, settings)
        base, new = comp.sides
        # like with like, as compare does: the new wave against the base's last period
        last = base.frame.filter(base.frame[PERIOD_ID] == base.n_periods - 1)
        quantiles = shift_quantiles(last, new.frame, comp.columns, columns=lim.shift_columns, points=lim.quantiles)
        panel = comp.appended
    elif (name := resolve_engine(engine, None, scheduler)) == "dask":
        result = profile(data, unit=unit, time=time, settings=settings, engine=engine, scheduler=scheduler)
        if wanted:
            inst = instruments(data, unit=unit, time=time, outcome=spec.outcome, regressors=spec.regressors,
                               correlated=spec.correlated, period_effects=spec.period_effects,
                               treat_as_invariant=spec.treat_as_invariant, settings=settings, engine=engine,
                               scheduler=scheduler)
        return result, inst, comp, quantiles, lim
    else:
        from auditor.io.load import load_panel

        panel = load_panel(data, unit, time, streaming={"memory": False, "streaming": True}.get(name),
                           settings=settings)
        result = profile_panel(panel, settings)
    if wanted:
        inst = instruments_panel(panel, spec, settings)
    return result, inst, comp, quantiles, lim


def shift_quantiles(
    base: Any, new: Any, shifts: Sequence[ColumnShift], *, columns: int = 4, points: int = 101
) -> dict[str, tuple[list[float], list[float]]]:
    """Quantiles of the ``columns`` most shifted numeric columns in both waves.

    ``base`` and ``new`` are polars frames; the columns are those with the
    largest ``ks_statistic`` among ``shifts`` (``CompareResult.columns``). Returns, per
    column, (base, new) values at ``points`` evenly spaced probabilities 0..1,
    computed by polars in one select per frame (never a loop over rows).
    """
    import polars as pl

    rows = sorted(
        (c for c in shifts if c.ks_statistic is not None),
        key=lambda c: -float(c.ks_statistic or 0.0),
    )
    names = [c.column for c in rows if c.column in base.columns and c.column in new.columns]
    names = [n for n in names if base.schema[n].is_numeric() and new.schema[n].is_numeric()][:columns]
    if not names:
        return {}
    probs = [i / (points - 1) for i in range(points)]

    def q(frame: pl.DataFrame) -> dict[str, list[float]]:
        exprs = [
            pl.col(n).cast(pl.Float64).filter(pl.col(n).cast(pl.Float64).is_finite())
            .quantile(p, interpolation="linear").alias(f"{i}:{j}")
            for i, n in enumerate(names) for j, p in enumerate(probs)
        ]
        row = frame.select(exprs).row(0)
        return {n: [row[i * points + j] for j in range(points)] for i, n in enumerate(names)}

    qb, qn = q(base), q(new)
    out: dict[str, tuple[list[float], list[float]]] = {}
    for n in names:
        b = [v for v in qb[n] if v is not None]
        w = [v for v in qn[n] if v is not None]
        if b and w:
            out[n] = (b, w)
    return out
