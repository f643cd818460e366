"""Onboarding wave after wave (issue 14): a contract drafted from the waves so far passes a
clean next wave and fails each planted fault; compare judges the wave against what the
panel already knows; the report of the appended panel.

The panel is invented for these tests (tests/libraries.py: a fictional network of lending
libraries, seeded): a base of six yearly waves, a clean next wave from the same process,
and one faulty variant per fault, each caught by the command that should catch it.

Oracles, named beside each check:
- the planted sizes of tests/libraries.py (PLANTED), with the affected keys recomputed here
  from the frames with plain polars filters;
- scipy.stats.ks_2samp called on the same samples (a reference library);
- stability indices computed by hand from bin counts written out in the test;
- plain row and unit counts of the two input frames for the appended panel.
"""

from __future__ import annotations

import math
import re
import sys
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import yaml
from conftest import run_cli

sys.path.insert(0, str(Path(__file__).resolve().parent))
import libraries as L  # noqa: E402

from auditor.commands.check import check  # noqa: E402
from auditor.commands.compare import change_scale, compare, numeric_psi  # noqa: E402
from auditor.commands.draft import draft  # noqa: E402

KEYS = {"unit": "library_id", "time": "year"}


@pytest.fixture(scope="module")
def panel():
    return L.waves()


@pytest.fixture(scope="module")
def files(panel, tmp_path_factory):
    base, clean = panel
    folder = tmp_path_factory.mktemp("libraries")
    paths = {"base": folder / "base.csv", "clean": folder / "next.csv"}
    base.write_csv(paths["base"])
    clean.write_csv(paths["clean"])
    for fault in L.FAULTS:
        paths[fault] = folder / f"{fault}.csv"
        L.faulty(fault, base, clean).write_csv(paths[fault])
    contract = folder / "contract.yaml"
    run = run_cli("rules", "draft", str(paths["base"]), "--unit", "library_id", "--time", "year", "--out", str(contract))
    assert run.returncode == 0, run.stderr
    paths["contract"] = contract
    return paths


def _rules(result, rule, column=None, across=None):
    return [r for r in result.rules if r.rule == rule and r.column == column
            and (across is None or r.across_waves == across)]


def _one(result, rule, column=None, across=None):
    (hit,) = _rules(result, rule, column, across)
    return hit


def _findings(result, check_name, column=None):
    return [f for f in result.findings if f.check == check_name and (column is None or f.column == column)]


# --- the clean next wave --------------------------------------------------------------------


def test_clean_next_wave_passes_the_drafted_contract_alone_and_across_waves(files):
    alone = run_cli("check", str(files["clean"]), "--rules", str(files["contract"]))
    assert alone.returncode == 0, alone.stdout
    across = run_cli("check", str(files["clean"]), "--rules", str(files["contract"]), "--against", str(files["base"]))
    assert across.returncode == 0, across.stdout
    assert "overlapping_keys (across waves)" in across.stdout and "invariant (across waves)" in across.stdout


def test_the_base_passes_its_own_draft(files):
    assert check(files["base"], rules=files["contract"]).passed


def test_clean_next_wave_gets_no_warning_from_compare(panel):
    base, clean = panel
    res = compare(base, clean, **KEYS)
    assert [f.check for f in res.findings if f.severity in ("error", "warning")] == []
    cols = {c.column: c for c in res.columns}
    # the age grows by one a year for every library: judged against that step, not as a shift
    assert cols["building_age"].expected_step == 1 and cols["building_age"].less_step is True
    assert cols["building_age"].implausible_jumps == 0
    # the zero-inflated hours: the scale of the non-zero changes, and no library implausible
    assert cols["weekly_hours"].within.change_scale_method == "non-zero mad"
    assert cols["weekly_hours"].implausible_jumps == 0
    assert cols["book_price"].periods_with_several_values == 0


def test_the_draft_is_written_for_the_next_delivery(files, panel):
    base, _ = panel
    doc = yaml.safe_load(files["contract"].read_text(encoding="utf-8"))
    p, c = doc["panel"], doc["columns"]
    assert p["period_range"] == {"first": 2016} and p["step"] == 1 and "periods" not in p
    last_units = base.filter(pl.col("year") == 2021)["library_id"].n_unique()  # polars oracle
    assert p["min_units"] == math.floor(last_units * 0.8)
    # trends: no upper bound, the trend stated instead
    assert "max" not in c["building_age"] and c["building_age"]["monotone"] == "increasing"
    assert c["building_age"]["max_change_per_period"] == 1
    assert "max" not in c["book_price"] and c["book_price"]["follows_period"] is True
    # a closed code list for the fixed district; none for the counts
    assert c["district"]["allowed"] == sorted(L.DISTRICTS) and c["district"]["invariant"] is True
    assert "allowed" not in c["loans"] and c["has_wifi"]["allowed"] == [0, 1]
    # ranges widened beyond what the base holds, never across zero
    assert c["loans"]["min"] == 0 and c["loans"]["max"] > base["loans"].max()


def test_every_drafted_rule_says_what_it_was_learned_from(files):
    text = files["contract"].read_text(encoding="utf-8")
    rule = re.compile(r"^\s+([a-z_]+): ")
    for line in text.splitlines():
        m = rule.match(line)
        if not m or m.group(1) in ("unit", "time", "max") or line.rstrip().endswith(":"):
            continue
        assert "#" in line, line


# --- one fault at a time --------------------------------------------------------------------


def test_a_numeric_column_arriving_as_text_fails_its_type_rule_not_the_tool(files):
    run = run_cli("check", str(files["loans-as-text"]), "--rules", str(files["contract"]), "--json")
    assert run.returncode == 1, run.stderr  # a broken delivery, not a broken tool (exit 2)
    import json

    rules = {(r["rule"], r["column"]): r for r in json.loads(run.stdout)["rules"]}
    typed = rules[("type", "loans")]
    assert not typed["passed"] and "String" in typed["message"] and "'n/a'" in typed["message"]
    assert [e["loans"] for e in typed["examples"]] == ["n/a"]
    for rule in ("min", "max"):
        assert rules[(rule, "loans")]["evaluated"] is False and rules[(rule, "loans")]["failing"] is None
    assert rules[("max_missing", "loans")]["evaluated"] and rules[("max_missing", "loans")]["passed"]
    assert all(r["passed"] for k, r in rules.items() if k[1] != "loans")  # every other rule ran and holds


def test_a_changed_fixed_answer_is_caught_across_the_boundary_only(files, panel):
    base, clean = panel
    bad = L.faulty("district-changed", base, clean)
    changed = (bad.join(clean, on="library_id", suffix="_was")
               .filter(pl.col("district") != pl.col("district_was"))["library_id"].sort().to_list())
    assert len(changed) == L.PLANTED["district-changed"]
    res = check(files["district-changed"], rules=files["contract"], against=files["base"])
    assert _one(res, "invariant", "district", across=False).passed  # one period: nothing changes inside it
    across = _one(res, "invariant", "district", across=True)
    assert across.failing == len(changed)
    assert sorted(e["library_id"] for e in across.examples) == changed
    cmp = compare(base, bad, **KEYS)
    (f,) = _findings(cmp, "invariant-changed", "district")
    assert f.count == len(changed)


def test_an_age_that_rises_by_31_in_one_year_is_a_jump(files, panel):
    base, clean = panel
    bad = L.faulty("age-jump", base, clean)
    jumped = (bad.join(clean, on="library_id", suffix="_was")
              .filter(pl.col("building_age") != pl.col("building_age_was"))["library_id"].sort().to_list())
    cmp = compare(base, bad, **KEYS)
    (f,) = _findings(cmp, "implausible-jump", "building_age")
    assert f.count == len(jumped) == L.PLANTED["age-jump"]
    assert sorted(e["library_id"] for e in f.examples) == jumped
    assert {e["steps_off"] for e in f.examples} == {30.0}  # +31 where +1 was expected
    res = check(files["age-jump"], rules=files["contract"], against=files["base"])
    assert _one(res, "max_change_per_period", "building_age", across=True).failing == len(jumped)
    assert _one(res, "monotone", "building_age", across=True).passed


def test_keys_the_base_already_holds(files, panel):
    base, clean = panel
    res = check(files["overlapping"], rules=files["contract"], against=files["base"])
    hit = _one(res, "overlapping_keys", across=True)
    assert hit.failing == L.PLANTED["overlapping"] and not hit.passed
    cmp = compare(base, L.faulty("overlapping", base, clean), **KEYS)
    (f,) = _findings(cmp, "overlapping-periods")
    assert f.count == L.PLANTED["overlapping"] and f.severity == "error"


def test_a_skipped_wave_is_named_in_the_verdict_and_breaks_the_step_across(files):
    run = run_cli("compare", str(files["base"]), str(files["skipped-year"]), "--unit", "library_id", "--time", "year")
    verdict = next(line for line in run.stdout.splitlines() if "verdict" in line)
    assert "new period 2023 skips 2022" in verdict
    res = check(files["skipped-year"], rules=files["contract"], against=files["base"])
    step = _one(res, "step", across=True)
    assert not step.passed and "2022" in step.message
    assert _one(res, "step", across=False).passed  # one period inside the delivery: no step to judge


def test_a_near_constant_reference_that_moves_below_itself_is_a_shift(panel):
    # 97% of the reference holds 0.50; the wave cuts every fee by 0.10. With the cut point
    # 0.50 closing the bin on its left the old bins put 0.40 beside 0.50 (PSI 0).
    base, clean = panel
    cmp = compare(base, L.faulty("fee-cut", base, clean), **KEYS)
    (f,) = _findings(cmp, "distribution-shift", "loan_fee")
    assert f.count == clean.height


def test_hours_typed_ten_times_too_high_are_jumps_on_the_zero_inflated_scale(panel):
    base, clean = panel
    bad = L.faulty("hours-tenfold", base, clean)
    cmp = compare(base, bad, **KEYS)
    (f,) = _findings(cmp, "implausible-jump", "weekly_hours")
    tenfold = (bad.join(clean, on="library_id", suffix="_was")
               .filter(pl.col("weekly_hours") != pl.col("weekly_hours_was"))["library_id"].sort().to_list())
    assert f.count == len(tenfold) == L.PLANTED["hours-tenfold"]
    assert "non-zero mad" in f.message


def test_a_national_price_that_differs_between_libraries(files, panel):
    base, clean = panel
    cmp = compare(base, L.faulty("price-split", base, clean), **KEYS)
    (f,) = _findings(cmp, "period-value-differs", "book_price")
    assert f.count == 1 and f.examples[0]["values"] == 2
    assert not _findings(cmp, "distribution-shift", "book_price")  # a price that moves with the year is fine
    res = check(files["price-split"], rules=files["contract"])
    assert _one(res, "follows_period", "book_price").failing == 1


def test_a_question_left_unanswered(files, panel):
    base, clean = panel
    bad = L.faulty("visits-missing", base, clean)
    cmp = compare(base, bad, **KEYS)
    (f,) = _findings(cmp, "missing-jump", "visits")
    assert f.count == bad["visits"].null_count()  # polars oracle
    res = check(files["visits-missing"], rules=files["contract"])
    assert _one(res, "max_missing", "visits").failing == bad["visits"].null_count()


# --- the report of the appended panel -------------------------------------------------------


def test_report_against_base_profiles_the_appended_panel(files, panel, tmp_path):
    from auditor.commands.report import write_report

    base, clean = panel
    out = tmp_path / "wave.html"
    found: list = []
    write_report(files["clean"], **KEYS, out=out, against=files["base"], outcome="loans",
                 regressors=["visits", "weekly_hours", "founded"], correlated=[], period_effects=True,
                 collect_findings=found)
    page = out.read_text(encoding="utf-8")
    rows = base.height + clean.height  # plain counts of the two inputs
    units = pl.concat([base["library_id"], clean["library_id"]]).n_unique()
    assert f"The panel holds {rows:,} rows on {units:,} units" in page
    assert 'id="new-wave"' in page and 'id="readiness"' in page
    assert "period=2022" in page  # the model readiness ran on base + new (the new year's dummy)
    assert found and all(hasattr(f, "severity") for f in found)


def test_cli_report_takes_period_effects_and_treat_as_invariant(files, tmp_path):
    out = tmp_path / "r.html"
    run = run_cli("report", str(files["clean"]), "--against", str(files["base"]), "--unit", "library_id",
                  "--time", "year", "--out", str(out), "--outcome", "loans", "--regressors",
                  "visits,weekly_hours,building_age,founded", "--correlated", "", "--period-effects",
                  "--treat-as-invariant", "building_age", "--fail-on", "never")
    assert run.returncode == 0, run.stderr
    assert "treated-as-invariant" in out.read_text(encoding="utf-8")


# --- stability index: hand computations -----------------------------------------------------


def _psi(p_counts, q_counts, smoothing=0.5):
    p = np.asarray(p_counts, float) + smoothing
    q = np.asarray(q_counts, float) + smoothing
    p, q = p / p.sum(), q / q.sum()
    return float(np.sum((q - p) * np.log(q / p)))


def test_psi_with_ties_at_the_cut_points_equals_a_hand_computation():
    # Reference: 1 x4, 2 x4, 3 x2 (n = 10, sorted x[0..9]), 4 bins: numpy's linear
    # quantiles at 0.25, 0.5, 0.75 sit at positions 2.25, 4.5 and 6.75: between x[2] and
    # x[3] (both 1), x[4] and x[5] (both 2), x[6] and x[7] (both 2). Cut points [1, 2]
    # once the repeat is merged; each holds a tie of 4 >= 10/4 values, so each is a bin of
    # its own. Bins: (-inf, 1) | {1} | (1, 2) | {2} | (2, inf)
    #   reference counts:       0  |  4  |   0    |  4  |    2
    #   new [1, 2, 2.5, 3 x7]:  0  |  1  |   0    |  1  |    8
    # the bins empty on both sides are left out. (Bins closed on the right would put the
    # reference's 1s and 2s into two bins and lose nothing here, but a wave moving from 2
    # down to 1.5 would stay in the bin (1, 2] with them.)
    ref = np.array([1, 1, 1, 1, 2, 2, 2, 2, 3, 3], float)
    new = np.array([1, 2, 2.5, 3, 3, 3, 3, 3, 3, 3], float)
    assert np.quantile(ref, [0.25, 0.5, 0.75]).tolist() == [1.0, 2.0, 2.0]
    hand = _psi([4, 4, 2], [1, 1, 8])
    assert numeric_psi(ref, new, bins=4, smoothing=0.5) == pytest.approx(hand, rel=1e-12)


@pytest.mark.parametrize("direction", [-1.0, 1.0])
def test_psi_of_a_constant_reference_moving_either_way(direction):
    # Reference: 20 values of 5.0; its only cut point 5.0 is its own bin, between the
    # values below and above. New: 10 values at 5 + direction. Bins below | {5} | above:
    # reference 0 | 20 | 0, new 10 | 0 | 0 (moving down) or 0 | 0 | 10 (moving up); the
    # third bin is empty on both sides and left out, so both directions give one index.
    ref = np.full(20, 5.0)
    new = np.full(10, 5.0 + direction)
    hand = _psi([0, 20], [10, 0])
    assert numeric_psi(ref, new, bins=10) == pytest.approx(hand, rel=1e-12)
    assert hand > 2  # far above the 0.25 cut-off (common practice)


def test_psi_of_a_continuous_reference_is_unchanged_by_point_bins():
    # 1..10 against the hand case of test_compare.py: no cut point is a value of the reference
    got = numeric_psi(np.arange(1, 11), np.array([1, 1, 1, 1, 1, 2, 2, 3, 10, 10]), bins=10)
    p = [0.1] * 10
    q = [5.5 / 15, 2.5 / 15, 1.5 / 15] + [0.5 / 15] * 6 + [2.5 / 15]
    assert got == pytest.approx(sum((b - a) * math.log(b / a) for a, b in zip(p, q, strict=True)), rel=1e-12)


# --- the jump scale ---------------------------------------------------------------------------


def test_jump_scale_is_the_mad_when_it_can_be():
    d = np.array([-3.0, -1, 0.5, 1, 2, 4, 9])
    centre, scale, method = change_scale(d, zero_share=0.2)
    med = np.median(d)
    assert (centre, method) == (med, "mad")
    assert scale == pytest.approx(1.4826 * np.median(np.abs(d - med)))  # common practice factor


def test_jump_scale_of_zero_inflated_changes_uses_the_non_zero_ones():
    # 45 zeros, 10 quarter-hour corrections, 45 real changes: the MAD of all collapses to
    # 0.25 (the corrections sit at the median of |d|), that of the non-zero ones does not
    rng = np.random.default_rng(2)
    d = np.concatenate([np.zeros(45), np.tile([-0.25, 0.25], 5), rng.normal(0, 6, 45)])
    assert np.median(np.abs(d - np.median(d))) <= 0.25
    nz = d[d != 0]
    centre, scale, method = change_scale(d, zero_share=0.2)
    assert method == "non-zero mad"
    assert scale == pytest.approx(1.4826 * np.median(np.abs(nz - np.median(nz))))


def test_jump_scale_never_collapses_to_zero():
    # 96 of 100 changes are exactly +1: MAD 0 -> the trimmed sd (central 90%) is 0 too ->
    # the sd of all of them
    d = np.array([1.0] * 96 + [3.0, -1.0, 5.0, 2.0])
    centre, scale, method = change_scale(d, zero_share=0.2)
    assert method == "sd" and scale == pytest.approx(np.std(d, ddof=1)) and centre == 1.0
    # every change +2: the step itself
    assert change_scale(np.full(30, 2.0), zero_share=0.2) == (2.0, 2.0, "step")
    # nothing ever changed: no scale, said so
    assert change_scale(np.zeros(10), zero_share=0.2) == (0.0, None, "none")


def test_a_column_stepping_by_one_for_everybody_is_no_shift_and_a_31_rise_is_a_jump():
    # the case: with every base change exactly +1 the old jump check was silently off
    n = 200
    base = pl.DataFrame({"id": np.repeat(np.arange(n), 4), "t": np.tile([1, 2, 3, 4], n)}).with_columns(
        (pl.col("id") % 40 + pl.col("t")).alias("age"))
    new = pl.DataFrame({"id": np.arange(n), "t": 5}).with_columns((pl.col("id") % 40 + 5).alias("age"))
    res = compare(base, new, unit="id", time="t")
    assert not [f for f in res.findings if f.severity != "note"]
    col = next(c for c in res.columns if c.column == "age")
    assert col.psi == 0 and col.ks_statistic == 0  # compared less its step: identical
    jumped = new.with_columns(pl.when(pl.col("id") < 2).then(pl.col("age") + 30).otherwise(pl.col("age")))
    (f,) = [f for f in compare(base, jumped, unit="id", time="t").findings if f.check == "implausible-jump"]
    assert f.count == 2
    # the cut: more than jump_steps (2) steps from the expected +1: +4 in a year is a jump, +3 is not
    near = new.with_columns(pl.when(pl.col("id") < 3).then(pl.col("age") + 3)
                            .when(pl.col("id") < 6).then(pl.col("age") + 2).otherwise(pl.col("age")))
    (f,) = [f for f in compare(base, near, unit="id", time="t").findings if f.check == "implausible-jump"]
    assert f.count == 3 and {e["steps_off"] for e in f.examples} == {3.0}


def test_a_step_is_learnt_per_period_across_gaps():
    # a fifth of the units skip period 3: their change from period 2 to 4 is +2 over two
    # periods, still one step a period; the wave after a unit's absence expects +2
    n = 200
    rows = pl.DataFrame({"id": np.repeat(np.arange(n), 5), "t": np.tile([1, 2, 3, 4, 5], n)})
    base = rows.filter(~((pl.col("id") % 5 == 0) & (pl.col("t") == 3)) & (pl.col("t") < 5)).with_columns(
        (pl.col("id") % 30 + pl.col("t")).alias("age"))
    assert base.height == n * 4 - n // 5
    new = pl.DataFrame({"id": np.arange(n), "t": 5}).with_columns((pl.col("id") % 30 + 5).alias("age"))
    res = compare(base, new, unit="id", time="t")
    col = next(c for c in res.columns if c.column == "age")
    assert col.expected_step == 1 and col.implausible_jumps == 0


def test_a_column_stepping_down_keeps_the_sign_of_its_step():
    # seasons left on a lease count down by one a season for every unit (hand-built): the
    # step is -1, its size 1, and a wave that counts on has no jump while a reset does
    n = 200
    base = pl.DataFrame({"id": np.repeat(np.arange(n), 4), "t": np.tile([1, 2, 3, 4], n)}).with_columns(
        (pl.col("id") % 40 + 20 - pl.col("t")).alias("lease_left"))
    new = pl.DataFrame({"id": np.arange(n), "t": 5}).with_columns((pl.col("id") % 40 + 15).alias("lease_left"))
    col = next(c for c in compare(base, new, unit="id", time="t").columns if c.column == "lease_left")
    assert col.expected_step == -1 and col.within.change_median == -1 and col.within.change_scale == 1
    assert col.implausible_jumps == 0 and col.psi == 0  # compared less its step: identical
    reset = new.with_columns(pl.when(pl.col("id") < 4).then(pl.lit(30)).otherwise(pl.col("lease_left"))
                             .alias("lease_left"))
    col = next(c for c in compare(base, reset, unit="id", time="t").columns if c.column == "lease_left")
    assert col.implausible_jumps == 4


# --- p-values and warnings --------------------------------------------------------------------


def test_ks_p_values_keep_significant_digits_and_equal_scipy():
    from scipy import stats

    rng = np.random.default_rng(4)
    base = pl.DataFrame({"id": np.arange(300), "t": 1, "x": rng.normal(0, 1, 300)})
    new = pl.DataFrame({"id": np.arange(300), "t": 2, "x": rng.normal(1.2, 1, 300)})
    col = next(c for c in compare(base, new, unit="id", time="t").columns if c.column == "x")
    ref = stats.ks_2samp(base["x"].to_numpy(), new["x"].to_numpy())  # scipy, method auto
    assert 0 < ref.pvalue < 1e-20
    assert col.ks_p > 0 and col.ks_p == pytest.approx(ref.pvalue, rel=1e-5, abs=0)  # 2e-36 is not 0.0
    assert col.ks_p_method == "exact"


def test_scipys_warning_is_caught_and_the_method_said(monkeypatch):
    import warnings

    import scipy.stats

    from auditor.commands import compare as waves

    real = scipy.stats.ks_2samp

    def noisy(a, b):
        warnings.warn("ks_2samp: Exact calculation unsuccessful. Switching to method=asymp.", RuntimeWarning,
                      stacklevel=2)
        return real(a, b, method="asymp")

    monkeypatch.setattr(scipy.stats, "ks_2samp", noisy)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a warning leaking out would raise here
        _, _, method = waves.ks_two_sample(np.arange(50.0), np.arange(50.0) + 0.5)
    assert method == "asymptotic"


def test_compare_prints_nothing_on_stderr(files):
    run = run_cli("compare", str(files["base"]), str(files["fee-cut"]), "--unit", "library_id", "--time", "year")
    assert run.returncode == 0 and run.stderr == ""


# --- wording ----------------------------------------------------------------------------------


def test_wording_of_plurals_and_nearly_invariant_columns(files, panel):
    base, clean = panel
    # a nearly time-invariant column (two libraries change founding year once) that changes
    # again in the wave
    returning = clean.filter(pl.col("library_id").is_in(base["library_id"].implode()))["library_id"].sort()
    two, third = returning.head(2).to_list(), returning[2]
    nearly = base.with_columns(pl.when(pl.col("library_id").is_in(two) & (pl.col("year") == 2016))
                               .then(pl.col("founded") - 1).otherwise(pl.col("founded")))
    moved = clean.with_columns(pl.when(pl.col("library_id") == third).then(1500).otherwise(pl.col("founded")).alias("founded"))
    res = compare(nearly, moved, **KEYS)
    (f,) = _findings(res, "invariant-changed", "founded")
    assert "nearly time-invariant" in f.message and "only 2 units" in f.message
    assert "1 returning unit reports" in f.message
    from auditor.render.text_compare import render

    text = render(compare(base, clean.with_columns(
        pl.when(pl.int_range(pl.len()) == 0).then(pl.lit("harbour")).otherwise(pl.col("district")).alias("district")),
        **KEYS))
    assert "1 new level" in text and "1 new levels" not in text


def test_nearly_invariant_by_its_within_share_does_not_speak_of_rare_changes(panel):
    import auditor

    base, _ = panel
    prof = auditor.profile(base, **KEYS)
    (f,) = [f for f in prof.findings if f.check == "nearly-time-invariant" and f.column == "building_age"]
    assert "rare" not in f.message and "only a little" in f.message


def test_a_binary_column_with_few_switchers_gets_one_finding():
    import auditor

    n = 100
    df = pl.DataFrame({"id": np.repeat(np.arange(n), 3), "t": np.tile([1, 2, 3], n)}).with_columns(
        ((pl.col("id") < 3) & (pl.col("t") == 3)).cast(pl.Int64).alias("flag"),
        (pl.col("id") * 1.5 + pl.col("t") ** 2).alias("x"))
    found = [f.check for f in auditor.profile(df, unit="id", time="t").findings if f.column == "flag"]
    assert "few-switchers" in found and "nearly-time-invariant" not in found


# --- issue 19 items in this code --------------------------------------------------------------


@pytest.mark.parametrize("period", [20190101, 10**12])
def test_a_mistyped_period_is_counted_not_listed(period):
    # issue 19 item 11: the old code listed every skipped period (20 million labels, 2.5 GB;
    # 10**12 never ended). Python allocations stay small whatever the gap.
    import tracemalloc

    base = pl.DataFrame({"id": np.repeat(np.arange(20), 4), "year": np.tile([2015, 2016, 2017, 2018], 20),
                         "x": np.arange(80.0)})
    new = pl.DataFrame({"id": np.arange(20), "year": [2019] * 19 + [period], "x": np.arange(20.0)})
    tracemalloc.start()
    try:
        res = compare(base, new, unit="id", time="year")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 50 * 2**20, peak
    (f,) = [f for f in res.findings if f.check == "unexpected-period"]
    assert f"skips {period - 2020:,} periods (2020, 2021, 2022, ...)" in f.message


def test_row_rules_on_key_columns_and_moves_of_the_time_key_run(tmp_path):
    # issue 19 item 14: a failing row rule on a key column, and monotone / max_change on the
    # time key, ended in "internal problem (DuplicateError)"
    frame = pl.DataFrame({"shop": ["S-01", "S-02", "X-3", "S-04"] * 2, "year": [2020] * 4 + [2022] * 4,
                          "sales": [1.0] * 8})
    path = tmp_path / "c.yaml"
    path.write_text("panel: {unit: shop, time: year}\ncolumns:\n  shop: {pattern: 'S-[0-9]{2}'}\n"
                    "  year: {monotone: decreasing, max_change: 1}\n", encoding="utf-8")
    res = check(frame, rules=path)
    pattern = _one(res, "pattern", "shop")
    assert pattern.failing == 2 and {e["shop"] for e in pattern.examples} == {"X-3"}
    assert _one(res, "monotone", "year").failing == 4 and _one(res, "max_change", "year").failing == 4
    assert _one(res, "monotone", "year").examples[0]["year"] == 2022


def test_the_readme_example_contract_with_a_failing_pattern_runs(tmp_path):
    # the shipped example contract with its key pattern made to fail (issue 19 item 14)
    root = Path(__file__).resolve().parent.parent / "examples"
    text = (root / "orchards_contract.yaml").read_text(encoding="utf-8").replace("OR-[0-9]{4}", "OR-[0-9]{3}")
    path = tmp_path / "c.yaml"
    path.write_text(text, encoding="utf-8")
    run = run_cli("check", str(root / "orchards.csv"), "--rules", str(path))
    assert run.returncode == 1 and "pattern" in run.stdout and run.stderr == ""


@pytest.mark.parametrize("rule", ["min: .nan", "max: .inf", "max_change: .nan", "max_change_per_period: -.inf",
                                  "allowed: [1, .nan]", "max_missing: .nan"])
def test_non_finite_thresholds_are_an_invalid_contract(tmp_path, rule):
    # issue 19 item 19: max_change: .nan always held, min: .nan failed every row
    path = tmp_path / "c.yaml"
    path.write_text(f"panel: {{unit: id, time: t}}\ncolumns:\n  x: {{{rule}}}\n", encoding="utf-8")
    data = tmp_path / "d.csv"
    pl.DataFrame({"id": [1, 1, 2], "t": [1, 2, 1], "x": [1.0, 2.0, 3.0]}).write_csv(data)
    run = run_cli("check", str(data), "--rules", str(path))
    assert run.returncode == 2 and run.stderr.startswith("panel-audit: error:") and run.stderr.count("\n") == 1
    assert "columns.x" in run.stderr and "line 3" in run.stderr


def _passes_own_draft(frame: pl.DataFrame, tmp_path: Path) -> None:
    text = draft(frame, unit="id", time="t")
    path = tmp_path / "own.yaml"
    path.write_text(text, encoding="utf-8")
    res = check(frame, rules=path)
    assert res.passed, ([(r.rule, r.column, r.message) for r in res.rules if not r.passed], text)


def test_integer_extremes_and_uint64_pass_their_own_draft(tmp_path):
    # issue 19 item 17: float casts made int64 extremes and uint64 values fail their own bounds
    i64 = np.iinfo(np.int64)
    frame = pl.DataFrame({
        "id": [1, 1, 2, 2], "t": [1, 2, 1, 2],
        "big": pl.Series([i64.max, i64.max - 1, i64.min, i64.min + 1], dtype=pl.Int64),
        "top": pl.Series([i64.max] * 4, dtype=pl.Int64),
        "u": pl.Series([2**64 - 1, 2**64 - 2, 2**63, 0], dtype=pl.UInt64),
        "gappy": pl.Series([2**62 + 1, None, 2**62, 2**62 + 3], dtype=pl.Int64),
    })
    _passes_own_draft(frame, tmp_path)
    doc = yaml.safe_load(draft(frame, unit="id", time="t"))
    assert doc["columns"]["top"]["min"] == doc["columns"]["top"]["max"] == i64.max  # one value, exactly
    # and the exact bounds still catch a value one past them
    path = tmp_path / "tight.yaml"
    path.write_text("panel: {unit: id, time: t}\ncolumns:\n  u: {max: 18446744073709551614}\n", encoding="utf-8")
    assert _one(check(frame, rules=path), "max", "u").failing == 1


def test_a_decimal_column_passes_its_own_draft(tmp_path):
    from decimal import Decimal

    frame = pl.DataFrame({"id": [1, 1, 2, 2], "t": [1, 2, 1, 2],
                          "price": pl.Series([Decimal("0.00"), Decimal("0.10"), Decimal("12.34"), None],
                                             dtype=pl.Decimal(10, 2))})
    _passes_own_draft(frame, tmp_path)
    assert isinstance(yaml.safe_load(draft(frame, unit="id", time="t"))["columns"]["price"]["min"], int | float)


def test_a_one_period_delivery_passes_the_step_rule(tmp_path):
    frame = pl.DataFrame({"id": [1, 2, 3], "t": [2024] * 3, "x": [1.0, 2.0, 3.0]})
    path = tmp_path / "c.yaml"
    path.write_text("panel: {unit: id, time: t, step: 1}\n", encoding="utf-8")
    assert _one(check(frame, rules=path), "step").passed


def test_check_against_a_folder_of_waves_reads_only_what_the_rules_need(files, panel, tmp_path):
    base, clean = panel
    folder = tmp_path / "waves"
    folder.mkdir()
    for year in L.BASE_YEARS:
        base.filter(pl.col("year") == year).write_parquet(folder / f"{year}.parquet")
    res = check(L.faulty("district-changed", base, clean), rules=files["contract"], against=folder)
    assert _one(res, "invariant", "district", across=True).failing == L.PLANTED["district-changed"]
    assert res.base_source is not None and "6 files" in res.base_source


def test_an_invalid_against_base_is_one_clear_error(files, tmp_path):
    run = run_cli("check", str(files["clean"]), "--rules", str(files["contract"]), "--against",
                  str(tmp_path / "absent.csv"))
    assert run.returncode == 2 and run.stderr.startswith("panel-audit: error:") and run.stderr.count("\n") == 1


def test_draft_passes_its_own_data_as_a_property_over_column_types(tmp_path_factory):
    # issue 19 item 17 as a property: whatever the column types, a draft holds on its data
    import datetime as dt
    from decimal import Decimal

    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    i64 = np.iinfo(np.int64)
    kinds = {
        "int64": (st.integers(int(i64.min), int(i64.max)), pl.Int64),
        "uint64": (st.integers(0, 2**64 - 1), pl.UInt64),
        "int8": (st.integers(-128, 127), pl.Int8),
        "float": (st.floats(allow_nan=True, allow_infinity=True, width=64), pl.Float64),
        "float32": (st.floats(allow_nan=False, allow_infinity=False, width=32), pl.Float32),
        "decimal": (st.decimals(min_value=Decimal("-999999.99"), max_value=Decimal("999999.99"), places=2,
                                allow_nan=False, allow_infinity=False), pl.Decimal(10, 2)),
        "bool": (st.booleans(), pl.Boolean),
        "text": (st.text(alphabet="abcxyz-_ 7", max_size=4), pl.String),
        "date": (st.dates(dt.date(1900, 1, 1), dt.date(2100, 12, 31)), pl.Date),
        "datetime": (st.datetimes(dt.datetime(1900, 1, 1), dt.datetime(2100, 1, 1)), pl.Datetime("us")),
    }
    folder = tmp_path_factory.mktemp("property")

    @st.composite
    def panels(draw):
        units = draw(st.integers(1, 4))
        periods = draw(st.integers(1, 3))
        n = units * periods
        chosen = draw(st.lists(st.sampled_from(sorted(kinds)), min_size=1, max_size=3, unique=True))
        cols = {}
        for name in chosen:
            strategy, dtype = kinds[name]
            values = draw(st.lists(st.one_of(st.none(), strategy), min_size=n, max_size=n))
            cols[f"c_{name}"] = pl.Series(values, dtype=dtype)
        keys = {"id": np.repeat(np.arange(units), periods), "t": np.tile(np.arange(2000, 2000 + periods), units)}
        return pl.DataFrame({**keys, **cols})

    @settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(panels())
    def holds(frame):
        _passes_own_draft(frame, folder)

    holds()



def test_profile_of_a_narrow_integer_column_spanning_its_type(tmp_path):
    # found by the property above: Int8 values -128 and 0 wrapped around in their own type
    # when tallied (the moments kernel), and the profile ended in an internal problem
    import auditor

    f = pl.DataFrame({"id": [0, 1, 2, 3], "t": [2000] * 4, "c": pl.Series([None, 127, 0, -128], dtype=pl.Int8)})
    row = auditor.profile(f, unit="id", time="t").columns.row(0, named=True)
    assert row["distinct"] == f["c"].drop_nulls().n_unique() == 3  # polars oracle


def test_psi_bin_counts_equal_a_value_by_value_classification():
    # oracle: each value placed by hand (a plain loop over the bins' definition) against the
    # sorted-search counts, on discrete data with ties at the cut points
    from auditor.commands.compare import psi_bins, psi_counts

    rng = np.random.default_rng(9)
    ref = rng.integers(0, 6, 400).astype(float)
    new = rng.integers(-1, 8, 300).astype(float)
    edges, point = psi_bins(ref, 10)
    expected = np.zeros(2 * edges.size + 1, dtype=int)
    for v in new:
        for j, e in enumerate(edges):
            if point[j] and v == e:
                expected[2 * j + 1] += 1
                break
            if v < e or (v == e and not point[j]):
                expected[2 * j] += 1
                break
        else:
            expected[-1] += 1
    assert psi_counts(new, edges, point).tolist() == expected.tolist()
    assert point.any()  # integer data: ties at the cut points


def test_invariant_counts_equal_pandas_over_column_types():
    # oracle: pandas group-by nunique (an independent library) per column type; floats by
    # the tolerance rule of methods.md written out with pandas min, max and mean
    import datetime as dt

    from auditor.contracts.rules import invariant_counts
    from auditor.io.load import load_panel

    rng = np.random.default_rng(12)
    n_units, periods = 300, 4
    n = n_units * periods
    unit = np.repeat(np.arange(n_units), periods)

    def sometimes(values, p=0.03):
        flip = rng.random(n) < p
        return np.where(flip, np.roll(values, 1), values)

    fixed = np.repeat(rng.integers(0, 5, n_units), periods)
    frame = pl.DataFrame({
        "u": unit, "t": np.tile(np.arange(periods), n_units),
        "text": pl.Series(sometimes(np.array(["a", "b", "c", "d", "e"])[fixed])).set(
            pl.Series(rng.random(n) < 0.1), None),
        "cat": pl.Series(sometimes(np.array(["p", "q", "r", "s", "t"])[fixed])).cast(pl.Categorical),
        "day": pl.Series([dt.date(2000, 1, 1) + dt.timedelta(days=int(v)) for v in sometimes(fixed * 40)]),
        "flag": pl.Series(sometimes(fixed % 2 == 0)),
        "num": pl.Series(np.where(rng.random(n) < 0.05, np.nan, sometimes(fixed * 1.5) + rng.normal(0, 1e-12, n))),
        "huge": pl.Series(sometimes(fixed + 2**60), dtype=pl.Int64),
    })
    panel = load_panel(frame, "u", "t")
    got = invariant_counts(panel, ["text", "cat", "day", "flag", "num", "huge"], 1e-9)
    pdf = frame.with_columns(pl.col("cat").cast(pl.String), pl.col("num").fill_nan(None)).to_pandas()
    g = pdf.groupby("u")
    for c in ("text", "cat", "day", "flag", "huge"):
        assert got[c] == int((g[c].nunique() > 1).sum()), c
    spread = g["num"].max() - g["num"].min()
    assert got["num"] == int((spread > 1e-9 * (1 + g["num"].mean().abs())).sum())
    assert all(v > 0 for v in got.values())  # every column has changing units to count
