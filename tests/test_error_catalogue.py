"""The error catalogue (issue 8, item 7): every ``panel-audit: error:`` message is listed in
``auditor.errors.CATALOGUE``, and every entry is triggered by at least one test.

The loading, argument, rules-file and output entries are triggered here, one test
each. Other commands' entries are triggered by their own tests; tests/conftest.py
records every code raised in-process and every error line a CLI subprocess prints,
and the two coverage tests at the end of a full run judge the record.
"""

from __future__ import annotations

import re
import string
from pathlib import Path

import polars as pl
import pytest
from conftest import CLI_ERROR_LINES, SESSION, TRIGGERED_CODES, run_cli

from auditor.errors import CATALOGUE, AuditError

AWKWARD = Path(__file__).resolve().parent / "data" / "awkward"
GOOD = AWKWARD / "bom.csv"  # a small valid panel keyed orchard_id / season

# Entries that no code path can raise today. Each is a finding reported on issue 8; when
# one becomes reachable (or is removed), this set must change with it.
UNREACHABLE: dict[str, str] = {}


def _code(action) -> str:
    with pytest.raises(AuditError) as err:
        action()
    return err.value.code


def _profile(data, unit="orchard_id", time="season", **kw):
    from auditor.commands.profile import profile

    return profile(data, unit=unit, time=time, **kw)


def _settings(path):
    from auditor.checks.config import load_settings

    return load_settings(path)


def _small() -> pl.DataFrame:
    return pl.DataFrame({"orchard_id": ["a", "a", "b"], "season": [1, 2, 1], "y": [1.0, 2.0, 3.0]})


# --- arguments and loading -----------------------------------------------------------------


def test_too_large_text_file_is_refused(monkeypatch, tmp_path):
    # a machine with 1 KiB of memory: the small CSV counts as larger than half of it
    import auditor.io.sources

    monkeypatch.setattr(auditor.io.sources, "memory_bytes", lambda: 1024)
    p = tmp_path / "big.csv"
    p.write_text("orchard_id,season,y\n" + "a,1,1.0\n" * 200)
    assert _code(lambda: _profile(p)) == "too-large"


def test_internal_problem_and_out_of_memory_lines(monkeypatch, capsys):
    # the catch-all lines of the CLI are catalogue entries too
    import sys

    import auditor.cli

    profile_module = sys.modules["auditor.commands.profile"]
    for exc, code_text in ((RuntimeError("boom"), "internal problem (RuntimeError: boom)"), (MemoryError(), "does not fit in memory")):
        def broken(*a, _exc=exc, **k):
            raise _exc

        monkeypatch.setattr(profile_module, "profile", broken)
        rc = auditor.cli.main(["profile", str(GOOD), "--unit", "orchard_id", "--time", "season"])
        err = capsys.readouterr().err
        assert rc == 2 and err.startswith("panel-audit: error:") and code_text in err


def test_unknown_schema_name():
    from auditor.commands.schema import schema

    assert _code(lambda: schema("report")) == "unknown-schema"


def test_bad_argument_empty_unit():
    assert _code(lambda: _profile(_small(), unit=" , ")) == "bad-argument"


def test_file_not_found(tmp_path):
    assert _code(lambda: _profile(tmp_path / "absent.csv")) == "file-not-found"


def test_not_a_file_folder_without_data(tmp_path):
    (tmp_path / "notes.txt.bak").write_text("not data")
    assert _code(lambda: _profile(tmp_path)) == "not-a-file"


def test_unreadable_file(tmp_path, monkeypatch):
    # Tests may run as root, for whom a mode-000 file is still readable; simulate the
    # operating system's refusal instead.
    path = tmp_path / "locked.csv"
    path.write_text("orchard_id,season\na,1\n")

    def refuse(self):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(Path, "read_bytes", refuse)
    assert _code(lambda: _profile(path)) == "unreadable-file"


def test_unsupported_format(tmp_path):
    path = tmp_path / "panel.xlsx"
    path.write_bytes(b"PK\x03\x04")
    assert _code(lambda: _profile(path)) == "unsupported-format"


def test_corrupt_file(tmp_path):
    path = tmp_path / "panel.parquet"
    path.write_bytes(b"this is not parquet at all")
    assert _code(lambda: _profile(path)) == "corrupt-file"


def test_empty_file():
    assert _code(lambda: _profile(AWKWARD / "header_only.csv")) == "empty-file"


def test_empty_frame():
    empty = _small().head(0)
    assert _code(lambda: _profile(empty)) == "empty-frame"


def test_unsupported_object():
    assert _code(lambda: _profile(12345)) == "unsupported-object"


def test_unknown_column():
    assert _code(lambda: _profile(GOOD, unit="orchard")) == "unknown-column"


def test_key_all_null():
    frame = pl.DataFrame({"orchard_id": [None, None], "season": [1, 2], "y": [1.0, 2.0]},
                         schema_overrides={"orchard_id": pl.String})
    assert _code(lambda: _profile(frame)) == "key-all-null"


def test_key_repeated():
    assert _code(lambda: _profile(_small(), unit="orchard_id,orchard_id")) == "key-repeated"


def test_unit_is_time():
    assert _code(lambda: _profile(_small(), unit="season", time="season")) == "unit-is-time"


def test_time_unorderable():
    assert _code(lambda: _profile(AWKWARD / "time_words.csv")) == "time-unorderable"


def test_time_fractional():
    assert _code(lambda: _profile(AWKWARD / "time_fractional.csv")) == "time-fractional"


def test_duplicate_column_names():
    assert _code(lambda: _profile(AWKWARD / "duplicate_columns.csv")) == "duplicate-column-names"


def test_no_glob_match(tmp_path):
    assert _code(lambda: _profile(str(tmp_path / "wave_*.csv"))) == "no-glob-match"


# --- rules and threshold files ---------------------------------------------------------------


def test_rules_not_found(tmp_path):
    assert _code(lambda: _settings(tmp_path / "absent.yaml")) == "rules-not-found"


def test_rules_too_large(tmp_path):
    from auditor.checks.config import RULES_MAX_BYTES

    path = tmp_path / "big.yaml"
    path.write_text("# padding\n" * (RULES_MAX_BYTES // 10 + 1))
    assert _code(lambda: _settings(path)) == "rules-too-large"


def test_rules_syntax(tmp_path):
    path = tmp_path / "broken.yaml"
    path.write_text("profile:\n  few_switchers: [1, 2\n")
    assert _code(lambda: _settings(path)) == "rules-syntax"


def test_rules_tag(tmp_path):
    # a tag that would construct a Python object under an unsafe loader
    path = tmp_path / "tagged.yaml"
    path.write_text("profile: !!python/object/apply:os.system ['true']\n")
    assert _code(lambda: _settings(path)) == "rules-tag"


def test_rules_not_mapping(tmp_path):
    path = tmp_path / "list.yaml"
    path.write_text("- a\n- b\n")
    assert _code(lambda: _settings(path)) == "rules-not-mapping"


def test_rules_unknown_key(tmp_path):
    path = tmp_path / "unknown.yaml"
    path.write_text("profile:\n  no_such_threshold: 3\n")
    assert _code(lambda: _settings(path)) == "rules-unknown-key"


def test_rules_bad_value(tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text("profile:\n  few_switchers: many\n")
    assert _code(lambda: _settings(path)) == "rules-bad-value"


# --- output --------------------------------------------------------------------------------


def test_output_exists(tmp_path):
    from auditor.io.outputs import write_atomic

    target = tmp_path / "out.json"
    target.write_text("kept")
    assert _code(lambda: write_atomic(target, "new")) == "output-exists"
    assert target.read_text() == "kept"


def test_output_is_input(tmp_path):
    from auditor.io.outputs import write_atomic

    src = tmp_path / "panel.csv"
    src.write_text("orchard_id,season\na,1\n")
    assert _code(lambda: write_atomic(src, "x", force=True, inputs=[src])) == "output-is-input"
    assert src.read_text() == "orchard_id,season\na,1\n"


def test_output_unwritable(tmp_path):
    from auditor.io.outputs import write_atomic

    blocker = tmp_path / "a-file"
    blocker.write_text("")
    assert _code(lambda: write_atomic(blocker / "out.json", "x")) == "output-unwritable"


# --- other commands' entries that their own tests did not trigger ----------------------------


def test_instruments_regressor_unusable():
    # a date column cannot enter a regression (instruments validates roles before fitting)
    from datetime import date

    import auditor

    frame = pl.DataFrame({
        "orchard_id": ["a", "a", "b", "b"], "season": [1, 2, 1, 2], "y": [1.0, 2.0, 3.0, 5.0],
        "planted_on": [date(2001, 3, 1)] * 4,
    })
    code = _code(lambda: auditor.instruments(frame, unit="orchard_id", time="season", outcome="y",
                                             regressors=["planted_on"], correlated=None))
    assert code == "instruments-regressor-unusable"


# --- the command line prints each as one line --------------------------------------------------


@pytest.mark.parametrize(
    ("args", "expected"),
    [
        (["profile", str(AWKWARD / "absent.csv"), "--unit", "orchard_id", "--time", "season"], "no such file"),
        (["profile", str(GOOD), "--unit", "orchard", "--time", "season"], "column 'orchard' not found"),
        (["profile", str(GOOD), "--unit", "orchard_id", "--time", "season", "--rules", str(AWKWARD / "no.yaml")],
         "rules file"),
        (["profile", str(GOOD), "--unit", "orchard_id"], "--time"),  # argument parser
    ],
)
def test_cli_prints_one_error_line_and_exits_2(args, expected):
    proc = run_cli(*args, timeout=60)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    lines = proc.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("panel-audit: error: ")
    assert expected in lines[0]


# --- coverage of the whole catalogue (run last, judged on a full run) -------------------------


def _template_pattern(template: str) -> re.Pattern[str]:
    parts = []
    for literal, field, _spec, _conv in string.Formatter().parse(template):
        parts.append(re.escape(literal))
        if field is not None:
            parts.append("(.*)")
    return re.compile("".join(parts), re.DOTALL)


PATTERNS = {code: _template_pattern(t) for code, t in CATALOGUE.items() if t != "{detail}"}
GENERIC = {code for code, t in CATALOGUE.items() if t == "{detail}"}
ARGPARSE_LINE = re.compile(r".*; see 'panel-audit[^']*--help'$")
PREFIX = "panel-audit: error: "


def _codes_of(line: str) -> set[str]:
    text = line.removeprefix(PREFIX)
    return {code for code, pat in PATTERNS.items() if pat.fullmatch(text)}


def _generic_details() -> list[re.Pattern[str]]:
    # The texts passed to a '{detail}' entry, read from the source: fail("bad-argument",
    # detail="...") with a literal (f-string fields become wildcards).
    found = []
    codes = "|".join(map(re.escape, GENERIC))
    call = re.compile(r'fail\(\s*"(' + codes + r')",\s*detail=(f?)"((?:[^"\\]|\\.)*)"')
    for src in (Path(__file__).resolve().parent.parent / "auditor").rglob("*.py"):
        for _code_name, is_f, text in call.findall(src.read_text(encoding="utf-8")):
            pattern = re.escape(text)
            if is_f:
                pattern = re.sub(r"\\\{[^}]*\\\}", "(.*)", pattern)
            found.append(re.compile(pattern, re.DOTALL))
    return found


def test_generic_details_are_read_from_the_source():
    # load.py raises bad-argument with this literal detail when --time is blank
    assert any(d.fullmatch("--time needs a column name") for d in _generic_details())


def test_template_matching_recognises_a_known_line():
    # the matcher the coverage tests rely on, checked on a line written out by hand
    assert _codes_of(PREFIX + "column 'yr' not found; columns are: firm, year") == {"unknown-column"}
    assert _codes_of(PREFIX + "something no template says") == set()


def test_every_catalogue_entry_is_triggered():
    if not SESSION["full_suite"]:
        pytest.skip("catalogue coverage is judged on a run of the whole suite")
    seen = set(TRIGGERED_CODES)
    for line in CLI_ERROR_LINES:
        seen |= _codes_of(line)
    if any(ARGPARSE_LINE.fullmatch(line) for line in CLI_ERROR_LINES):
        seen |= GENERIC
    never = sorted(set(CATALOGUE) - seen)
    assert never == sorted(UNREACHABLE), f"catalogue entries no test triggers: {never}"


def test_every_cli_error_line_is_in_the_catalogue():
    if not SESSION["full_suite"]:
        pytest.skip("judged on a run of the whole suite")
    # A line is accounted for when it fills a catalogue template or is the argument
    # parser's usage error; 'internal problem' lines and any other text are not.
    details = _generic_details()
    stray = [
        line for line in CLI_ERROR_LINES
        if not _codes_of(line) and not ARGPARSE_LINE.fullmatch(line)
        and not any(d.fullmatch(line.removeprefix(PREFIX)) for d in details)
    ]
    assert not stray, f"error lines outside the catalogue: {stray[:5]}"
