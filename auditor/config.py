"""Thresholds and severities: the shipped defaults, overridden by a user's rules file.

A rules file is YAML. Its ``thresholds`` part (or, in a plain thresholds file, the
top level) holds the same sections and keys as ``rules/defaults.yaml``; its
``severities`` part maps check names to ``error``/``warning``/``note``. The
``panel`` and ``columns`` parts of a panel contract are read by auditor.rules.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

from auditor.errors import fail

RULES_MAX_BYTES = 1_000_000
CONTRACT_PARTS = ("panel", "columns")


def rules_dir() -> Path:
    """The folder holding defaults.yaml and stock_yogo.csv.

    Installed, it is the package's ``rules_data`` folder (a copy of the repository's
    ``rules/``); in a source tree, ``rules/`` itself.
    """
    here = Path(__file__).resolve().parent
    installed = here / "rules_data"
    if (installed / "defaults.yaml").is_file():
        return installed
    return here.parent / "rules"


def read_yaml(path: str | Path) -> tuple[Any, Any]:
    """Read a YAML file safely; return (data, root node) for line lookups.

    Tags never construct objects: any explicit tag beyond the plain YAML types is refused.
    """
    import yaml

    p = Path(path)
    if not p.is_file():
        raise fail("rules-not-found", path=path)
    size = p.stat().st_size
    if size > RULES_MAX_BYTES:
        raise fail("rules-too-large", path=path, size=size, limit=RULES_MAX_BYTES)
    text = p.read_text(encoding="utf-8", errors="replace")
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = mark.line + 1 if mark is not None else "?"
        reason = str(getattr(exc, "problem", None) or exc).splitlines()[0]
        raise fail("rules-syntax", path=path, line=line, reason=reason) from None
    if node is not None:
        _refuse_tags(node, path)
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = mark.line + 1 if mark is not None else "?"
        reason = str(getattr(exc, "problem", None) or exc).splitlines()[0]
        raise fail("rules-syntax", path=path, line=line, reason=reason) from None
    return data, node


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
    while stack:
        n = stack.pop()
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
    """Thresholds by section and severity overrides; ``contract`` holds a contract's other parts."""

    thresholds: dict[str, dict[str, Any]]
    severities: dict[str, str] = field(default_factory=dict)
    contract: dict[str, Any] = field(default_factory=dict)
    source: str | None = None

    def get(self, section: str, key: str) -> Any:
        """The threshold ``key`` of ``section`` (e.g. ``get('profile', 'few_switchers')``)."""
        return self.thresholds[section][key]

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
            target[section][key] = float(v) if isinstance(old, float) else v


def _same_type(old: Any, new: Any) -> bool:
    if isinstance(old, bool) or isinstance(new, bool):
        return isinstance(old, bool) and isinstance(new, bool)
    if isinstance(old, float):
        return isinstance(new, int | float)
    return isinstance(new, type(old))


def _check_severities(value: Any, path: Any, root: Any) -> dict[str, str]:
    from auditor.findings import CHECKS, SEVERITIES

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
