"""Thresholds and severities: the shipped defaults, overridden by a user's rules file.

A rules file is YAML. Its ``thresholds`` part (or, in a plain thresholds file, the
top level) holds the same sections and keys as ``rules/defaults.yaml``; its
``severities`` part maps check names to ``error``/``warning``/``note``. The
``panel`` and ``columns`` parts of a panel contract are read by auditor.contracts.rules.
"""

from __future__ import annotations

import copy
import math
import re
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

from auditor.checks.sections import (
    SECTIONS,
    CheckThresholds,
    CompareThresholds,
    InstrumentsThresholds,
    ProfileThresholds,
    ReportThresholds,
    read_section,
)
from auditor.errors import fail

RULES_MAX_BYTES = 1_000_000
CONTRACT_PARTS = ("panel", "columns")


def rules_dir() -> Path:
    """The folder holding defaults.yaml and stock_yogo.csv.

    Installed, it is the package's ``rules_data`` folder (a copy of the repository's
    ``rules/``); in a source tree, ``rules/`` itself.
    """
    here = Path(__file__).resolve().parent.parent  # the package folder
    installed = here / "rules_data"
    if (installed / "defaults.yaml").is_file():
        return installed
    return here.parent / "rules"


RULES_MAX_DEPTH = 64  # nesting levels of a rules file (contracts need five or six)
RULES_MAX_ALIASED = 100_000  # values aliases may add beyond those written out (billion laughs)
RULES_MAX_DIGITS = 100  # digits of a number in a rules file (an int128 bound has 39)


def read_yaml(path: str | Path) -> tuple[Any, Any]:
    """Read a YAML file safely; return (data, root node) for line lookups.

    Tags never construct objects: any explicit tag beyond the plain YAML types is refused.
    Before any node is built the event stream is checked: nesting deeper than
    ``RULES_MAX_DEPTH``, an alias inside the node it names (a loop that would never
    end), aliases that expand to more than ``RULES_MAX_ALIASED`` values and numbers of
    more than ``RULES_MAX_DIGITS`` digits are refused with their line. The file must be
    UTF-8 (or UTF-16/32 with a byte order mark), as YAML requires.
    """
    import yaml

    p = Path(path)
    if not p.is_file():
        raise fail("rules-not-found", path=path)
    size = p.stat().st_size
    if size > RULES_MAX_BYTES:
        raise fail("rules-too-large", path=path, size=size, limit=RULES_MAX_BYTES)
    text = _decode_rules(p.read_bytes(), path)
    loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)  # libyaml when present
    try:
        _check_events(yaml.parse(text, Loader=loader), path)
        node = yaml.compose(text, Loader=loader)
        if node is not None:
            _refuse_tags(node, path)
        data = loader(text).construct_document(node) if node is not None else None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = mark.line + 1 if mark is not None else "?"
        reason = str(getattr(exc, "problem", None) or exc).splitlines()[0]
        raise fail("rules-syntax", path=path, line=line, reason=reason) from None
    return data, node


def _decode_rules(raw: bytes, path: str | Path) -> str:
    """The text of a rules file: UTF-8 (a byte order mark allowed), or UTF-16/32 with one."""
    import codecs

    for bom, encoding in (
        (codecs.BOM_UTF32_LE, "utf-32"), (codecs.BOM_UTF32_BE, "utf-32"),
        (codecs.BOM_UTF16_LE, "utf-16"), (codecs.BOM_UTF16_BE, "utf-16"),
    ):  # fmt: skip
        if raw.startswith(bom):
            try:
                return raw.decode(encoding)
            except UnicodeDecodeError:
                break
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise fail("rules-encoding", path=path, line=line, byte=f"0x{raw[exc.start]:02X}") from None


_LONG_INTEGER = re.compile(r"[-+]?(0[xob])?[0-9a-fA-F_]+")


def _check_events(events: Any, path: str | Path) -> None:
    """Refuse deep nesting, recursive aliases, alias bombs and huge numbers, event by
    event (nothing is built, so none of them can exhaust time or memory here)."""
    import yaml

    open_nodes: list[list[Any]] = []  # per open collection: [anchor, values inside, expanded]
    finished: dict[str, int] = {}  # anchor -> values its node expands to
    aliased = 0

    def add(count: int) -> None:
        if open_nodes:
            open_nodes[-1][1] += count

    for ev in events:
        line = ev.start_mark.line + 1 if ev.start_mark is not None else "?"
        if isinstance(ev, yaml.CollectionStartEvent):
            open_nodes.append([ev.anchor, 1])
            if len(open_nodes) > RULES_MAX_DEPTH:
                raise fail("rules-too-deep", path=path, line=line, limit=RULES_MAX_DEPTH)
        elif isinstance(ev, yaml.CollectionEndEvent):
            anchor, count = open_nodes.pop()
            if anchor is not None:
                finished[anchor] = count
            add(count)
        elif isinstance(ev, yaml.ScalarEvent):
            if ev.anchor is not None:
                finished[ev.anchor] = 1
            if not ev.style and len(ev.value) > RULES_MAX_DIGITS and _LONG_INTEGER.fullmatch(ev.value):
                raise fail("rules-number-too-long", path=path, line=line, digits=len(ev.value), limit=RULES_MAX_DIGITS)
            add(1)
        elif isinstance(ev, yaml.AliasEvent):
            if any(node[0] == ev.anchor for node in open_nodes) and ev.anchor not in finished:
                raise fail("rules-alias-loop", path=path, line=line, alias=ev.anchor)
            count = finished.get(ev.anchor, 1)  # an unknown anchor: the composer says so
            aliased += count
            if aliased > RULES_MAX_ALIASED:
                raise fail("rules-alias-expansion", path=path, line=line, limit=RULES_MAX_ALIASED)
            add(count)


_PLAIN_TAGS = {
    "tag:yaml.org,2002:str",
    "tag:yaml.org,2002:int",
    "tag:yaml.org,2002:float",
    "tag:yaml.org,2002:bool",
    "tag:yaml.org,2002:null",
    "tag:yaml.org,2002:map",
    "tag:yaml.org,2002:seq",
    "tag:yaml.org,2002:timestamp",
}


def _refuse_tags(node: Any, path: str | Path) -> None:
    import yaml

    stack = [node]
    seen: set[int] = set()  # an aliased node is one node: visit it once
    while stack:
        n = stack.pop()
        if id(n) in seen:
            continue
        seen.add(id(n))
        if n.tag not in _PLAIN_TAGS:
            raise fail("rules-tag", path=path, line=n.start_mark.line + 1, tag=n.tag)
        if isinstance(n, yaml.MappingNode):
            for k, v in n.value:
                stack.extend((k, v))
        elif isinstance(n, yaml.SequenceNode):
            stack.extend(n.value)


def node_line(root: Any, *keys: str) -> int | str:
    """The 1-based line of the mapping entry at ``keys`` in a composed YAML tree, or '?'."""
    import yaml

    node = root
    line: int | str = "?"
    for key in keys:
        if not isinstance(node, yaml.MappingNode):
            return line
        for k, v in node.value:
            if getattr(k, "value", None) == key:
                line = k.start_mark.line + 1
                node = v
                break
        else:
            return line
    return line


@lru_cache(maxsize=1)
def _defaults() -> dict[str, Any]:
    import yaml

    loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)  # libyaml when present: 10x faster
    with open(rules_dir() / "defaults.yaml", encoding="utf-8") as fh:
        return yaml.load(fh, Loader=loader)


@dataclass(frozen=True)
class Settings:
    """Thresholds by section and severity overrides; ``contract`` holds a contract's other parts.

    ``thresholds`` is the validated mapping (the shipped defaults with a rules file's
    values merged in); it is read once, when the Settings is made, into one typed value
    per section (auditor.checks.sections): ``settings.profile.few_switchers``,
    ``settings.instruments.test_alpha``, ``settings.compare.psi_bins``,
    ``settings.report.max_bytes``, ``settings.check.examples``.
    """

    thresholds: dict[str, dict[str, Any]]
    severities: dict[str, str] = field(default_factory=dict)
    contract: dict[str, Any] = field(default_factory=dict)
    source: str | None = None
    profile: ProfileThresholds = field(init=False, repr=False, compare=False)
    instruments: InstrumentsThresholds = field(init=False, repr=False, compare=False)
    compare: CompareThresholds = field(init=False, repr=False, compare=False)
    report: ReportThresholds = field(init=False, repr=False, compare=False)
    check: CheckThresholds = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        for name, cls in SECTIONS.items():
            object.__setattr__(self, name, read_section(cls, self.thresholds[name]))

    def severity(self, check: str, default: str) -> str:
        """The severity for ``check``: the rules file's override or ``default``."""
        return self.severities.get(check, default)


def default_settings() -> Settings:
    """The shipped defaults."""
    d = copy.deepcopy(_defaults())
    sev = d.pop("severities", None) or {}
    return Settings(thresholds=d, severities=dict(sev))


def load_settings(path: str | Path | None) -> Settings:
    """Defaults overridden by the rules file at ``path`` (None: defaults only).

    Unknown sections or keys, and values of the wrong type, are errors naming the line.
    """
    base = default_settings()
    if path is None:
        return base
    data, root = read_yaml(path)
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise fail("rules-not-mapping", path=path, found=type(data).__name__)
    thresholds = copy.deepcopy(base.thresholds)
    severities = dict(base.severities)
    contract: dict[str, Any] = {}
    top_known = ["thresholds", "severities", *CONTRACT_PARTS, *thresholds.keys()]
    for key, value in data.items():
        if key == "thresholds":
            _merge_thresholds(thresholds, value, path, root, ("thresholds",))
        elif key in thresholds:  # a plain thresholds file: sections at the top level
            _merge_thresholds(thresholds, {key: value}, path, root, ())
        elif key == "severities":
            severities.update(_check_severities(value, path, root))
        elif key in CONTRACT_PARTS:
            contract[key] = value
        else:
            raise fail(
                "rules-unknown-key",
                path=path,
                line=node_line(root, str(key)),
                key=key,
                where="the top level",
                expected=", ".join(top_known),
            )
    return Settings(thresholds=thresholds, severities=severities, contract=contract, source=str(path))


def _merge_thresholds(
    target: dict[str, dict[str, Any]], value: Any, path: Any, root: Any, prefix: tuple[str, ...]
) -> None:
    if value is None:
        return
    if not isinstance(value, dict):
        raise fail(
            "rules-bad-value",
            path=path,
            line=node_line(root, *prefix),
            key=".".join(prefix) or "thresholds",
            expected="a mapping of sections",
            found=type(value).__name__,
        )
    for section, entries in value.items():
        if section not in target:
            raise fail(
                "rules-unknown-key",
                path=path,
                line=node_line(root, *prefix, str(section)),
                key=section,
                where="thresholds",
                expected=", ".join(target),
            )
        if not isinstance(entries, dict):
            raise fail(
                "rules-bad-value",
                path=path,
                line=node_line(root, *prefix, str(section)),
                key=section,
                expected="a mapping of thresholds",
                found=type(entries).__name__,
            )
        for key, v in entries.items():
            if key not in target[section]:
                raise fail(
                    "rules-unknown-key",
                    path=path,
                    line=node_line(root, *prefix, str(section), str(key)),
                    key=key,
                    where=f"thresholds.{section}",
                    expected=", ".join(target[section]),
                )
            old = target[section][key]
            if not _same_type(old, v):
                raise fail(
                    "rules-bad-value",
                    path=path,
                    line=node_line(root, *prefix, str(section), str(key)),
                    key=f"{section}.{key}",
                    expected=f"a {type(old).__name__}",
                    found=repr(v),
                )
            problem = range_problem(section, str(key), v)
            if problem is not None:
                raise fail(
                    "rules-bad-value",
                    path=path,
                    line=node_line(root, *prefix, str(section), str(key)),
                    key=f"{section}.{key}",
                    expected=problem,
                    found=repr(v),
                )
            target[section][key] = float(v) if isinstance(old, float) else v


_SHARE = (0.0, 1.0, "a share between 0 and 1")
_OPEN_SHARE = (0.0, 1.0, "a number above 0 and at most 1")
_PROBABILITY = (0.0, 1.0, "a level above 0 and below 1")
_COUNT = (0, None, "a whole number, 0 or more")
_POSITIVE = (0.0, None, "a number above 0")
_NON_NEGATIVE = (0.0, None, "a number, 0 or more")
_AT_LEAST_ONE = (1, None, "a whole number, 1 or more")
#: The values each threshold can take, (low, high, wording); a low or high of a share
#: or level that is excluded is listed in _EXCLUSIVE. Numbers must be finite (no .nan or .inf).
RANGES: dict[tuple[str, str], tuple[float | None, float | None, str]] = {
    ("profile", "float_tolerance"): (0.0, 1.0, "a tolerance of 0 or more and below 1"),
    ("profile", "nearly_invariant_units_share"): _SHARE,
    ("profile", "nearly_invariant_within_share"): _SHARE,
    ("profile", "near_constant_share"): _OPEN_SHARE,
    ("profile", "few_switchers"): _COUNT,
    ("profile", "absorbed_r2"): _OPEN_SHARE,
    ("profile", "absorbed_max_rows"): _AT_LEAST_ONE,
    ("profile", "high_missing_share"): _SHARE,
    ("profile", "examples"): _COUNT,
    ("profile", "patterns"): _COUNT,
    ("profile", "streaming_memory_share"): _OPEN_SHARE,
    ("instruments", "stock_yogo_size"): (10, 25, "one of 10, 15, 20 or 25"),
    ("instruments", "rule_of_thumb_f"): _POSITIVE,
    ("instruments", "lee_f"): _POSITIVE,
    ("instruments", "mundlak_alpha"): _PROBABILITY,
    ("instruments", "test_alpha"): _PROBABILITY,
    ("instruments", "weak_within_share"): _SHARE,
    ("instruments", "collinear_tol"): (0.0, 1.0, "a tolerance above 0 and below 1"),
    ("instruments", "exhaustive_candidates"): _COUNT,
    ("instruments", "examples"): _COUNT,
    ("instruments", "near_collinear_r2"): _OPEN_SHARE,
    ("instruments", "max_levels"): _AT_LEAST_ONE,
    ("instruments", "anderson_rubin_level"): _PROBABILITY,
    ("instruments", "richer_max_instruments"): _AT_LEAST_ONE,
    ("compare", "psi_shift"): _NON_NEGATIVE,
    ("compare", "jump_zero_share"): _OPEN_SHARE,
    ("compare", "step_share"): _OPEN_SHARE,
    ("compare", "jump_steps"): _POSITIVE,
    ("compare", "psi_bins"): (2, None, "a whole number, 2 or more"),
    ("compare", "psi_smoothing"): _POSITIVE,
    ("compare", "missing_jump"): _SHARE,
    ("compare", "jump_mads"): _POSITIVE,
    ("compare", "category_max_levels"): _COUNT,
    ("compare", "invariant_min_units"): _AT_LEAST_ONE,
    ("compare", "vanished_min_expected"): _NON_NEGATIVE,
    ("report", "findings"): _COUNT,
    ("report", "columns"): _COUNT,
    ("report", "pattern_rows"): _AT_LEAST_ONE,
    ("report", "figure_columns"): _AT_LEAST_ONE,
    ("report", "periods_table"): _COUNT,
    ("report", "shift_columns"): _COUNT,
    ("report", "quantiles"): (2, None, "a whole number, 2 or more (both ends of a distribution)"),
    ("report", "max_bytes"): (10_000, None, "a whole number of bytes, 10000 or more"),
    ("check", "examples"): _COUNT,
    ("check", "draft_max_levels"): _COUNT,
    ("check", "draft_units_slack"): _SHARE,
    ("check", "draft_range_slack"): _NON_NEGATIVE,
    ("check", "draft_trend_share"): _OPEN_SHARE,
    ("check", "draft_change_slack"): _NON_NEGATIVE,
    ("check", "draft_level_min_units"): _COUNT,
    ("check", "draft_missing_margin"): _SHARE,
    ("check", "draft_attrition_margin"): _SHARE,
}
_EXCLUSIVE: dict[tuple[str, str], tuple[bool, bool]] = {
    ("profile", "float_tolerance"): (False, True),
    ("profile", "near_constant_share"): (True, False),
    ("profile", "absorbed_r2"): (True, False),
    ("profile", "streaming_memory_share"): (True, False),
    ("instruments", "rule_of_thumb_f"): (True, False),
    ("instruments", "lee_f"): (True, False),
    ("instruments", "mundlak_alpha"): (True, True),
    ("instruments", "test_alpha"): (True, True),
    ("instruments", "anderson_rubin_level"): (True, True),
    ("instruments", "collinear_tol"): (True, True),
    ("compare", "psi_smoothing"): (True, False),
    ("compare", "jump_mads"): (True, False),
}


def range_problem(section: str, key: str, value: Any) -> str | None:
    """What ``value`` must be when it is outside the range of threshold ``section.key``
    (see :data:`RANGES`), or None when it is fine. Every number must be finite."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None  # types are checked against the default's
    low, high, wording = RANGES.get((section, key), (None, None, "a finite number"))
    if not math.isfinite(value):
        return wording
    if (section, key) == ("instruments", "stock_yogo_size"):
        return None if value in (10, 15, 20, 25) else wording
    open_low, open_high = _EXCLUSIVE.get((section, key), (False, False))
    if low is not None and (value < low or (open_low and value == low)):
        return wording
    if high is not None and (value > high or (open_high and value == high)):
        return wording
    return None


def _same_type(old: Any, new: Any) -> bool:
    if isinstance(old, bool) or isinstance(new, bool):
        return isinstance(old, bool) and isinstance(new, bool)
    if isinstance(old, float):
        return isinstance(new, int | float)
    return isinstance(new, type(old))


def _check_severities(value: Any, path: Any, root: Any) -> dict[str, str]:
    from auditor.checks.findings import CHECKS, SEVERITIES

    if value is None:
        return {}
    if not isinstance(value, dict):
        raise fail(
            "rules-bad-value",
            path=path,
            line=node_line(root, "severities"),
            key="severities",
            expected="a mapping of check names to severities",
            found=type(value).__name__,
        )
    out: dict[str, str] = {}
    for check, sev in value.items():
        if check not in CHECKS:
            raise fail(
                "rules-unknown-key",
                path=path,
                line=node_line(root, "severities", str(check)),
                key=check,
                where="severities",
                expected=", ".join(sorted(CHECKS)),
            )
        if sev not in SEVERITIES:
            raise fail(
                "rules-bad-value",
                path=path,
                line=node_line(root, "severities", str(check)),
                key=f"severities.{check}",
                expected="one of " + ", ".join(SEVERITIES),
                found=repr(sev),
            )
        out[str(check)] = str(sev)
    return out
