"""No function or method in ``auditor/`` is longer than 100 lines (issue 16).

A long function is split into named steps; the line count is the function's span in the
source (decorators excluded, docstring and comments included), read with ``ast``.
Classes are not counted: a class is a set of functions.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "auditor"
LIMIT = 100


def long_functions(source: str, limit: int = LIMIT) -> list[tuple[str, int]]:
    """(name, lines) of every function or method in ``source`` longer than ``limit`` lines."""
    out = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
            lines = node.end_lineno - node.lineno + 1
            if lines > limit:
                out.append((node.name, lines))
    return out


def test_no_function_over_100_lines() -> None:
    found = [f"{path.relative_to(PACKAGE.parent)}: {name} ({n} lines)"
             for path in sorted(PACKAGE.rglob("*.py"))
             for name, n in long_functions(path.read_text(encoding="utf-8"))]
    assert found == []


def test_the_count_sees_methods_and_nested_functions() -> None:
    body = "\n".join(f"        x{i} = {i}" for i in range(LIMIT))
    source = f"class A:\n    def method(self):\n{body}\n\n\ndef short():\n    def inner():\n{body}\n"
    # the method and the nested function hold 1 + LIMIT lines; the outer one 2 + LIMIT
    assert sorted(long_functions(source)) == [("inner", LIMIT + 1), ("method", LIMIT + 1), ("short", LIMIT + 2)]
    assert long_functions("def f():\n    return 1\n") == []
