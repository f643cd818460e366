"""The typed thresholds (auditor.checks.sections) agree with rules/defaults.yaml, and a rules
file's values reach them.

The oracle is the shipped file itself, read here with PyYAML: every section of it has one
class, every key one field of the same name in the same order, of the type the file's value
has (an integer default is an ``int`` field, a decimal one a ``float`` field).
"""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path
from typing import get_type_hints

import pytest
import yaml

from auditor.checks.config import default_settings, load_settings, rules_dir
from auditor.checks.sections import SECTIONS, ProfileThresholds, read_section

PACKAGE = Path(__file__).resolve().parent.parent / "auditor"


def _file() -> dict:
    with open(rules_dir() / "defaults.yaml", encoding="utf-8") as fh:
        data = yaml.safe_load(fh)
    data.pop("severities", None)
    return data


def test_one_class_per_section_of_the_file() -> None:
    assert list(SECTIONS) == list(_file())


@pytest.mark.parametrize("section", list(_file()))
def test_fields_are_the_keys_in_order_with_their_types(section: str) -> None:
    values = _file()[section]
    cls = SECTIONS[section]
    assert [f.name for f in dataclasses.fields(cls)] == list(values)
    hints = get_type_hints(cls)
    for key, value in values.items():
        assert hints[key] is type(value), f"{section}.{key}: field {hints[key].__name__}, file {type(value).__name__}"


def test_defaults_are_read_once_into_the_sections() -> None:
    s = default_settings()
    for section, values in _file().items():
        typed = getattr(s, section)
        assert dataclasses.asdict(typed) == values


def test_a_rules_file_reaches_the_typed_sections(tmp_path: Path) -> None:
    rules = tmp_path / "rules.yaml"
    # an integer where the default is a decimal is accepted and becomes a float
    rules.write_text("profile:\n  few_switchers: 7\n  high_missing_share: 1\ncompare:\n  psi_bins: 20\n")
    s = load_settings(rules)
    assert s.profile.few_switchers == 7 and isinstance(s.profile.few_switchers, int)
    assert s.profile.high_missing_share == 1.0 and isinstance(s.profile.high_missing_share, float)
    assert s.compare.psi_bins == 20
    assert s.instruments.test_alpha == 0.05  # untouched sections keep the defaults


def test_replace_reads_the_sections_again() -> None:
    s = default_settings()
    thresholds = {k: dict(v) for k, v in s.thresholds.items()}
    thresholds["check"]["examples"] = 99
    assert dataclasses.replace(s, thresholds=thresholds).check.examples == 99
    assert s.check.examples == 5


def test_a_section_that_disagrees_with_its_class_is_refused() -> None:
    values = dict(_file()["profile"])
    values.pop("patterns")
    with pytest.raises(ValueError, match="missing \\['patterns'\\]"):
        read_section(ProfileThresholds, values)
    with pytest.raises(ValueError, match="unknown \\['extra'\\]"):
        read_section(ProfileThresholds, {**_file()["profile"], "extra": 1})


def test_no_threshold_is_looked_up_by_string() -> None:
    # the sections are the one way to read a threshold: no settings.get(...) and no
    # thresholds["section"] lookups outside auditor/checks/ (which builds them)
    pattern = re.compile(r"settings\.get\(|\.thresholds\[|\.thresholds\.get\(")
    found = [f"{p.relative_to(PACKAGE)}:{i}" for p in PACKAGE.rglob("*.py") if p.parent.name != "checks"
             for i, line in enumerate(p.read_text(encoding="utf-8").splitlines(), 1) if pattern.search(line)]
    assert found == []
