"""The HTML report: sections, escaping, self-containment, size, safe writing.

The panels here are hand-built (invented orchards) so that every expected count
is evident by construction; the contract shapes of the readiness and new-wave
documents come from shared/contract.md.
"""

from __future__ import annotations

import dataclasses
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from auditor.commands import report as report_command
from auditor.commands.compare import CompareResult
from auditor.commands.compare_values import (
    ColumnShift,
    PeriodPlacement,
    RowCounts,
    SchemaChanges,
    SourceNames,
    UnitFlow,
)
from auditor.commands.instruments import InstrumentsResult
from auditor.errors import AuditError
from auditor.render import html as report

SCRIPT_NAME = "<script>alert(1)</script>"
EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def orchard_frame() -> pl.DataFrame:
    """Six invented orchards over 2019-2023, built so that the structure is known:

    A, B every season; C 2019-2021 (leaves); D 2021-2023 (enters); E all but 2021
    (one gap); F 2020 only (a singleton); and A's 2020 row entered twice.
    22 rows, 6 units, 5 periods, 1 repeated key, 1 unit with a gap, 1 singleton.
    `rain_mm` is missing for every orchard in 2022 (a question not asked that season).
    """
    seasons = {
        "A": [2019, 2020, 2021, 2022, 2023, 2020],
        "B": [2019, 2020, 2021, 2022, 2023],
        "C": [2019, 2020, 2021],
        "D": [2021, 2022, 2023],
        "E": [2019, 2020, 2022, 2023],
        "F": [2020],
    }
    units = [u for u, ss in seasons.items() for _ in ss]
    season = [s for ss in seasons.values() for s in ss]
    rng = np.random.default_rng(7)
    n = len(units)
    area = {"A": 3, "B": 5, "C": 2, "D": 8, "E": 4, "F": 6}
    return pl.DataFrame(
        {
            "orchard": units,
            "season": season,
            "yield_t": rng.normal(10.0, 2.0, n),
            "area_ha": [area[u] for u in units],
            SCRIPT_NAME: rng.normal(0.0, 1.0, n),
            "rain_mm": [None if s == 2022 else float(500 + 10 * i) for i, s in enumerate(season)],
        }
    )


@pytest.fixture(scope="module")
def small_profile():
    from auditor.commands.profile import profile

    return profile(orchard_frame(), unit="orchard", time="season")


# Contract-shaped documents (shared/contract.md), hand-written.
INSTRUMENTS_DOC = {
    "tool": {"name": "panel-audit", "version": "0"},
    "roles": {"X1": ["rain_mm"], "X2": ["yield_t"], "Z1": ["const"], "Z2": ["area_ha"]},
    "not_identified": [],
    "order_condition": {"k1": 1, "g2": 1, "met": True},
    "strength": [
        {"endogenous": "area_ha", "role": "Z2", "instruments": ["rain_mm"], "partial_f": 23.4,
         "robust_f": 20.1, "partial_r2": 0.3, "df": [1, 4], "critical_value": 16.38, "verdict": "strong"}
    ],
    "candidates": [],
    "tests": {"mundlak": {"statistic": 1.2, "df": 1, "p": 0.27}, "overidentification": None},
    "estimates": {"within": {"coef": {"rain_mm": 0.01}, "se": {"rain_mm": 0.004}}, "hausman_taylor": None},
    "variance_components": {"sigma_u": 0.3, "sigma_e": 0.2, "theta_mean": 0.5},
    "findings": [{"check": "weak-instruments", "severity": "warning", "column": "area_ha", "count": 1,
                  "message": "a made-up finding for the test", "examples": []}],
}
# the renderers take typed results; a document read back from JSON is rebuilt first
INSTRUMENTS = InstrumentsResult.from_dict(INSTRUMENTS_DOC)
#: a compare result built by hand from its typed parts (the renderers read their attributes)
COMPARE_RESULT = CompareResult(
    schema=SchemaChanges(added=("pest_index",), removed=(), type_changed=()),
    units=UnitFlow(base=6, new=5, returning=4, entering=1, not_returning=2, returning_after_absence=0,
                   last_period=6, not_returning_from_last_period=2),
    periods=PeriodPlacement(base=(2019, 2020, 2021, 2022, 2023), new=(2024,), overlap=(), frequency="integer",
                            step=1, colliding_keys=0),
    columns=(ColumnShift(column="yield_t", compared_as="numeric", base_kind="time-varying",
                         reference="base period 2023", n_base=6, n_new=5, ks_statistic=0.4, ks_p=0.01,
                         ks_p_method="exact", psi=0.3, missing_base=0.0, missing_new=0.1),),
    reference="base period 2023",
    reference_period=2023,
    rows=RowCounts(base=22, new=5, base_reference=6, new_missing_keys=0),
    unit=("orchard",),
    time="season",
    sources=SourceNames(base="base.csv", new="new.csv"),
    wave_findings=(),
)


class _Collector(HTMLParser):
    """Every start tag with its attributes, and the text, as html.parser sees them."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []
        self.open: list[str] = []
        self.errors: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def parse(page: str) -> _Collector:
    c = _Collector()
    c.feed(page)
    c.close()
    return c


def section_ids(page: str) -> list[str]:
    return [a.get("id") for t, a in parse(page).tags if t == "section"]


# --- structure of the page -----------------------------------------------------------


def test_page_parses_and_holds_the_five_profile_sections(small_profile):
    page = report.render_html(small_profile)
    assert page.startswith("<!DOCTYPE html>")
    ids = section_ids(page)
    assert ids == ["summary", "findings", "structure", "variation", "missing"]


def test_readiness_and_new_wave_sections_appear_only_when_given(small_profile):
    page = report.render_html(small_profile, INSTRUMENTS, COMPARE_RESULT)
    ids = section_ids(page)
    assert ids == ["summary", "findings", "structure", "variation", "missing", "readiness", "new-wave"]
    assert 'id="fig-first-stage"' in page and 'id="fig-wave-shift"' in page


def test_summary_states_the_hand_built_counts(small_profile):
    # orchard_frame: 22 rows, 6 units, 5 periods, 2019 to 2023 (by construction)
    page = report.render_html(small_profile, figures=False)
    lede = re.search(r'<p class="pa-lede">(.*?)</p>', page, re.S).group(1)
    assert "22 rows on 6 units" in lede
    assert "5 periods, 2019 to 2023" in lede
    assert "1 row repeat a (unit, period) key" in lede.lower() or "1 row repeat" in lede.lower()


def test_summary_puts_the_most_serious_finding_first(small_profile):
    # the repeated (A, 2020) key is an error (contract.md: duplicate-keys is an error)
    page = report.render_html(small_profile, figures=False)
    top = re.search(r'<ol class="pa-top">(.*?)</ol>', page, re.S).group(1)
    first = re.search(r"<li>(.*?)</li>", top, re.S).group(1)
    assert 'class="pa-tag pa-error"' in first and "duplicate-keys" in first


def test_findings_of_other_results_are_merged_by_severity(small_profile):
    page = report.render_html(small_profile, INSTRUMENTS, None, figures=False)
    body = page[page.index('id="findings"'):page.index('id="structure"')]
    assert "a made-up finding for the test" in body
    assert "model readiness" in body  # the from column appears once findings come from two results


def test_patterns_are_period_ranges_not_strings_of_marks(small_profile):
    # DEVELOPERS.md: participation patterns are period ranges ("2011-2015, 2017")
    page = report.render_html(small_profile, figures=False)
    assert "2019-2020, 2022-2023" in page  # orchard E
    assert not re.search(r">[1.]{5}<", page)


# --- safety --------------------------------------------------------------------------


def test_script_column_name_appears_only_escaped(small_profile):
    page = report.render_html(small_profile)
    assert "<script" not in page.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert not any(t == "script" for t, _ in parse(page).tags)


def test_control_characters_in_names_are_shown_escaped():
    from auditor.commands.profile import profile

    frame = orchard_frame().rename({"yield_t": "yield\x1b[31m_t\x07"})
    page = report.render_html(profile(frame, unit="orchard", time="season"))
    assert "\x1b" not in page and "\x07" not in page
    # shown as code points (html-escaped), so the name stays recognisable and distinct
    assert "yield&lt;U+001B&gt;[31m_t&lt;U+0007&gt;" in page


def test_no_outside_resource_is_referenced(small_profile):
    page = report.render_html(small_profile, INSTRUMENTS, COMPARE_RESULT)
    for tag, attrs in parse(page).tags:
        assert tag not in {"script", "link", "iframe", "img", "object", "embed"}, tag
        for name, value in attrs.items():
            if name.startswith("xmlns"):  # XML namespace names, never fetched
                continue
            v = (value or "").strip().lower()
            assert not v.startswith(("http:", "https:", "//", "ftp:")), (tag, name, value)
    css = " ".join(re.findall(r"<style[^>]*>(.*?)</style>", page, re.S)).lower()
    assert "@import" not in css and "url(http" not in css and "url(//" not in css


def test_report_never_overwrites_its_input(tmp_path):
    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    before = data.read_bytes()
    with pytest.raises(AuditError) as err:
        report_command.write_report(data, unit="orchard", time="season", out=data, force=True)
    assert err.value.code == "output-is-input"
    assert data.read_bytes() == before


def test_report_never_overwrites_the_base_wave(tmp_path):
    base, new = EXAMPLES / "orchards.csv", EXAMPLES / "orchards_next_season.csv"
    with pytest.raises(AuditError) as err:
        report_command.write_report(new, unit="orchard_id", time="season", out=base, against=base, force=True)
    assert err.value.code == "output-is-input"


def test_report_keeps_an_existing_file_without_force(tmp_path):
    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    out = tmp_path / "audit.html"
    out.write_text("earlier report")
    with pytest.raises(AuditError) as err:
        report_command.write_report(data, unit="orchard", time="season", out=out)
    assert err.value.code == "output-exists"
    assert out.read_text() == "earlier report"
    report_command.write_report(data, unit="orchard", time="season", out=out, force=True)
    assert out.read_text().startswith("<!DOCTYPE html>")


def _files(folder: Path) -> list[str]:
    """Every entry in ``folder``, hidden temporary files included."""
    return sorted(p.name for p in folder.iterdir())


def test_renderer_failing_midway_leaves_no_partial_file(tmp_path, monkeypatch):
    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    out = tmp_path / "audit.html"

    def broken(*_a, **_k):
        raise RuntimeError("renderer stopped midway")

    monkeypatch.setattr(report, "_variation", broken)  # after summary, findings, structure
    with pytest.raises(RuntimeError):
        report_command.write_report(data, unit="orchard", time="season", out=out)
    assert not out.exists()
    assert _files(tmp_path) == ["orchards.csv"]  # no partial page, no temporary file


def test_write_interrupted_before_the_rename_keeps_the_old_file(tmp_path, monkeypatch):
    import auditor.io.outputs

    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    out = tmp_path / "audit.html"
    out.write_text("earlier report")

    def interrupted(*_a, **_k):
        raise KeyboardInterrupt

    monkeypatch.setattr(auditor.io.outputs.os, "replace", interrupted)
    with pytest.raises(KeyboardInterrupt):
        report_command.write_report(data, unit="orchard", time="season", out=out, force=True)
    assert out.read_text() == "earlier report"
    assert _files(tmp_path) == ["audit.html", "orchards.csv"]  # the temporary file is gone


def test_png_dir_receives_each_drawn_figure(tmp_path):
    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    pngs = tmp_path / "figures"
    report_command.write_report(data, unit="orchard", time="season", out=tmp_path / "a.html", png_dir=pngs)
    names = sorted(p.name for p in pngs.iterdir())
    assert names == sorted(["participation.png", "periods_per_unit.png", "entry_exit.png",
                            "within_share.png", "missing_map.png"])
    for p in pngs.iterdir():
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, 5.2)


def test_png_dir_that_is_a_file_is_refused(tmp_path):
    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    (tmp_path / "figs").write_text("x")
    with pytest.raises(AuditError) as err:
        report_command.write_report(data, unit="orchard", time="season", out=tmp_path / "a.html",
                            png_dir=tmp_path / "figs")
    assert err.value.code == "report-png-dir-not-folder"
    assert not (tmp_path / "a.html").exists()


def test_outcome_without_regressors_is_refused(tmp_path):
    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    with pytest.raises(AuditError) as err:
        report_command.write_report(data, unit="orchard", time="season", out=tmp_path / "a.html", outcome="yield_t")
    assert err.value.code == "report-model-needs-both"


def test_cli_report_over_its_input_exits_2_with_one_line(tmp_path, cli):
    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    run = cli("report", str(data), "--unit", "orchard", "--time", "season", "--out", str(data))
    assert run.returncode == 2
    assert run.stderr.startswith("panel-audit: error:") and run.stderr.count("\n") == 1
    assert "Traceback" not in run.stderr


def test_cli_report_writes_the_page_and_prints_its_path(tmp_path, cli):
    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    out = tmp_path / "audit.html"
    run = cli("report", str(data), "--unit", "orchard", "--time", "season", "--out", str(out), "--fail-on", "never")
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == str(out)
    assert section_ids(out.read_text(encoding="utf-8"))[:5] == [
        "summary", "findings", "structure", "variation", "missing"]


def test_cli_report_honours_fail_on(tmp_path, cli):
    # issue 14 item 5: the page is written either way; the exit code follows --fail-on
    # like the other commands (the contract's exit codes)
    from auditor.commands.profile import profile

    data = tmp_path / "orchards.csv"
    orchard_frame().write_csv(data)
    severities = {f.severity for f in profile(data, unit="orchard", time="season").findings}
    for fail_on, expected in (("never", 0), ("error", int("error" in severities)),
                              ("warning", int(bool({"error", "warning"} & severities)))):
        out = tmp_path / f"audit-{fail_on}.html"
        run = cli("report", str(data), "--unit", "orchard", "--time", "season", "--out", str(out),
                  "--fail-on", fail_on)
        assert run.returncode == expected, (fail_on, run.stderr)
        assert out.exists()
    assert {"error", "warning"} & severities  # the frame has something to fail on


# --- new wave through the real comparison ----------------------------------------------


def test_new_wave_report_from_the_shipped_example(tmp_path):
    out = tmp_path / "wave.html"
    report_command.write_report(EXAMPLES / "orchards_next_season.csv", unit="orchard_id", time="season",
                        out=out, against=EXAMPLES / "orchards.csv")
    page = out.read_text(encoding="utf-8")
    assert "new-wave" in section_ids(page)
    assert 'id="fig-shifted-distributions"' in page


DEMO_MODEL = {"outcome": "log_yield_ha", "regressors": ["rainfall_mm", "irrigation_h", "labour_days"],
              "correlated": ["labour_days"]}


@pytest.mark.parametrize("with_base", [False, True])
def test_report_reads_each_input_file_once(tmp_path, monkeypatch, with_base):
    # the profile and the model readiness share one Panel: counting the files the source
    # reader opens (auditor.io.sources.scan_source, which every input passes through)
    from auditor.io import sources

    opened: list[str] = []
    real = sources.scan_source

    def counting(path, *args, **kwargs):
        opened.append(Path(path).name)
        return real(path, *args, **kwargs)

    monkeypatch.setattr(sources, "scan_source", counting)
    against = EXAMPLES / "orchards.csv" if with_base else None
    data = EXAMPLES / ("orchards_next_season.csv" if with_base else "orchards.csv")
    report_command.write_report(data, unit="orchard_id", time="season", out=tmp_path / "r.html",
                                against=against, **DEMO_MODEL)
    expected = ["orchards.csv", "orchards_next_season.csv"] if with_base else ["orchards.csv"]
    assert sorted(opened) == expected


def test_shift_quantiles_match_numpy():
    # oracle: numpy.quantile with its default linear interpolation (NumPy reference, method "linear")
    rng = np.random.default_rng(3)
    base = pl.DataFrame({"x": rng.normal(0, 1, 500), "y": rng.normal(0, 1, 500)})
    new = pl.DataFrame({"x": rng.normal(1, 1, 300), "y": rng.normal(0, 1, 300)})
    shifts = [dataclasses.replace(COMPARE_RESULT.columns[0], column="x", ks_statistic=0.4),
              dataclasses.replace(COMPARE_RESULT.columns[0], column="y", ks_statistic=0.05)]
    q = report_command.shift_quantiles(base, new, shifts, columns=1, points=11)
    assert list(q) == ["x"]  # the most shifted column only
    probs = np.linspace(0, 1, 11)
    np.testing.assert_allclose(q["x"][0], np.quantile(base["x"].to_numpy(), probs), rtol=1e-12)
    np.testing.assert_allclose(q["x"][1], np.quantile(new["x"].to_numpy(), probs), rtol=1e-12)


# --- notebooks -------------------------------------------------------------------------


def test_profile_repr_html_is_a_fragment_of_the_same_renderer(small_profile):
    frag = small_profile._repr_html_()
    assert frag.startswith('<div class="pa-report">') and "<html" not in frag
    assert section_ids(frag) == ["summary", "findings", "structure", "variation", "missing"]
    assert "&lt;script&gt;" in frag and "<script" not in frag.lower()


def test_instruments_and_compare_fragments_render_their_sections():
    a = report.instruments_fragment(INSTRUMENTS)
    b = report.compare_fragment(COMPARE_RESULT)
    assert "readiness" in section_ids(a) and "new-wave" in section_ids(b)
    assert "<svg" in a and "<svg" in b


# --- size ------------------------------------------------------------------------------


def _wide_panel(units: int, periods: int, columns: int) -> pl.DataFrame:
    # random participation (thousands of distinct patterns) and long column names
    rng = np.random.default_rng(11)
    present = rng.random((units, periods)) < 0.6
    present[:, 0] |= ~present.any(axis=1)
    u, t = np.nonzero(present)
    cols = {f"measurement_of_something_long_and_descriptive_number_{j:03d}": rng.normal(size=u.size)
            for j in range(columns)}
    return pl.DataFrame({"orchard": u.astype(np.int64), "season": 2000 + t, **cols})


@pytest.fixture(scope="module")
def wide_profile():
    from auditor.commands.profile import profile

    return profile(_wide_panel(3000, 14, 60), unit="orchard", time="season")


def _settings(tmp_path: Path, text: str):
    from auditor.checks.config import load_settings

    path = tmp_path / "thresholds.yaml"
    path.write_text(text)
    return load_settings(path)


@pytest.mark.slow
def test_page_with_thousands_of_patterns_stays_small(wide_profile, tmp_path):
    assert wide_profile.details.patterns.height > 2000  # the input really has that many
    page = report.render_html(wide_profile, settings=_settings(tmp_path, "report:\n  columns: 20\n"))
    size = len(page.encode("utf-8"))
    assert size < 2_000_000, size
    assert "The first 20 of 60 columns are shown." in page  # the table says it was cut
    # nothing is missing in this panel, so the missing map is left out
    assert re.findall(r'<figure class="pa-fig" id="fig-([a-z-]+)"', page) == [
        "participation", "periods-per-unit", "entry-exit", "within-share"]


@pytest.mark.slow
def test_size_guard_lists_fewer_rows_until_the_page_fits(wide_profile, tmp_path):
    full = report.render_html(wide_profile, figures=False)
    limit = len(full.encode("utf-8")) * 3 // 4
    cut = report.render_html(wide_profile, figures=False,
                             settings=_settings(tmp_path, f"report:\n  max_bytes: {limit}\n"))
    assert len(cut.encode("utf-8")) <= limit < len(full.encode("utf-8"))
    assert "columns are shown" in cut and "columns are shown" not in full


def test_every_result_renders_in_a_notebook() -> None:
    # the profile, instruments and compare results share the report's renderer (_repr_html_)
    import numpy as np
    import polars as pl

    import auditor

    rng = np.random.default_rng(8)
    n, periods = 60, 4
    u = np.repeat(np.arange(n), periods)
    t = np.tile(np.arange(2001, 2001 + periods), n)
    df = pl.DataFrame(
        {"u": u, "t": t, "x": rng.normal(size=n * periods), "z": np.repeat(rng.normal(size=n), periods)}
    ).with_columns((pl.col("x") + pl.col("z") + rng.normal(size=n * periods)).alias("y"))
    base, new = df.filter(pl.col("t") < 2004), df.filter(pl.col("t") == 2004)
    for result in (
        auditor.profile(df, unit="u", time="t"),
        auditor.instruments(df, unit="u", time="t", outcome="y", regressors=["x", "z"], correlated=[]),
        auditor.compare(base, new, unit="u", time="t"),
    ):
        html = result._repr_html_()
        assert html.lstrip().startswith("<") and "<script" not in html
