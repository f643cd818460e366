"""compare's stages are functions and frozen values, not one object filled in step by step.

Walks auditor/commands/compare*.py with ``ast`` (nothing is imported): no class of
those modules sets an attribute of ``self`` outside its ``__init__`` (a stage returns
what it computes instead of leaving it on an object for the next stage), and no class
there is over 300 lines.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

COMMANDS = Path(__file__).resolve().parent.parent / "auditor" / "commands"
MODULES = sorted(COMMANDS.glob("compare*.py"))


def _assigned_attributes(fn: ast.FunctionDef | ast.AsyncFunctionDef) -> list[str]:
    """``self.x`` targets of plain, augmented and annotated assignments anywhere in ``fn``
    (nested functions included: a closure writing ``self.x`` is the same thing)."""
    found = []
    for node in ast.walk(fn):
        targets: list[ast.expr] = []
        if isinstance(node, ast.Assign):
            targets = list(node.targets)
        elif isinstance(node, ast.AugAssign | ast.AnnAssign):
            targets = [node.target]
        for t in targets:
            for sub in ast.walk(t):  # tuple targets: self.a, self.b = ...
                if isinstance(sub, ast.Attribute) and isinstance(sub.value, ast.Name) and sub.value.id == "self":
                    found.append(sub.attr)
    return found


def offences(source: str) -> list[str]:
    """'Class.method sets self.x' for every attribute set outside ``__init__``, and
    'Class is N lines' for a class over 300 lines."""
    out = []
    for cls in [n for n in ast.walk(ast.parse(source)) if isinstance(n, ast.ClassDef)]:
        length = (cls.end_lineno or cls.lineno) - cls.lineno + 1
        if length > 300:
            out.append(f"{cls.name} is {length} lines")
        for fn in cls.body:
            if isinstance(fn, ast.FunctionDef | ast.AsyncFunctionDef) and fn.name != "__init__":
                out.extend(f"{cls.name}.{fn.name} sets self.{a}" for a in _assigned_attributes(fn))
    return out


def test_the_modules_are_found():
    names = {p.name for p in MODULES}
    assert {"compare.py", "compare_align.py", "compare_values.py"} <= names


@pytest.mark.parametrize("path", MODULES, ids=lambda p: p.name)
def test_no_attribute_is_set_outside_init_and_no_class_is_long(path: Path):
    assert offences(path.read_text(encoding="utf-8")) == []


def test_the_walker_finds_what_it_looks_for():
    # a made-up class: two attributes set by a method (one through a tuple, one in a closure)
    source = (
        "class Run:\n"
        "    def __init__(self):\n        self.ok = 1\n"
        "    def stage(self):\n        self.a, self.b = 1, 2\n"
        "        def inner():\n            self.c += 1\n"
        + "".join(f"    x{i} = {i}\n" for i in range(300))
    )
    assert offences(source) == ["Run is 307 lines", "Run.stage sets self.a", "Run.stage sets self.b",
                                "Run.stage sets self.c"]


# --- a stage on its own: the stages take values, so they can be tested without a run ------


def test_fixed_or_changing_follows_the_share_of_units_that_change():
    # a hand-built profile table: of 60 units seen twice, 3 change 'soil' (5%, the shipped
    # profile.nearly_invariant_units_share: still fixed) and 4 change 'slope' (6.7%:
    # checked for jumps instead); 'elev' is time-invariant but seen twice in 1 unit only
    from types import SimpleNamespace

    import polars as pl

    from auditor.checks.config import default_settings
    from auditor.commands.compare_columns import base_kinds, fixed_and_changing

    table = pl.DataFrame({
        "name": ["soil", "slope", "elev"],
        "kind": ["nearly-time-invariant", "nearly-time-invariant", "time-invariant"],
        "distinct": [4, 9, 30],
        "units_changing": [3, 4, 0],
        "units_observed_twice": [60, 60, 1],
    })
    kinds = base_kinds(SimpleNamespace(columns=table))
    assert kinds.changing_share == {"soil": 3 / 60, "slope": 4 / 60, "elev": 0.0}
    assert kinds.distinct == {"soil": 4, "slope": 9, "elev": 30}
    sides = SimpleNamespace(compared=("soil", "slope", "elev"), numeric=("soil", "slope", "elev"))
    inv, jump = fixed_and_changing(sides, kinds, default_settings())  # type: ignore[arg-type]
    assert inv == ["soil"] and jump == ["slope"]  # elev: too few repeat observations to call it fixed
