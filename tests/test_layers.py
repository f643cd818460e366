"""The package's layers: imports point down only, and no module imports itself through others.

Walks ``auditor/`` with ``ast`` (no module is imported), builds the graph of imports
between the package's modules (module-level, function-level and ``TYPE_CHECKING``
imports alike: all of them name a dependency) and fails on

- any cycle (a strongly connected set of two or more modules), and
- any import of a module in a higher layer than the importer's.

Layers, lowest first (DEVELOPERS.md, "Architecture map"):

0. base: ``auditor.errors``, ``auditor.progress``, ``auditor.version``, ``auditor.vocab``, ``auditor.dtypes``
1. ``auditor.checks``: the Finding value, thresholds, the finding catalogue, the contract file
2. ``auditor.io``: inputs to a validated panel, the period grid, outputs written whole
3. ``auditor.stats``: the moments kernel, its engines and every statistic
4. ``auditor.contracts``: a contract's rules judged on a panel, and drafted from one
5. ``auditor.render``: text, JSON, HTML, figures and CSV details of results
6. ``auditor.commands``: one module per command; assembles results, hands them to renderers
7. the entry points: ``auditor`` (the public API), ``auditor.cli``, ``auditor.__main__``

A module may import its own layer and any layer below it, with one exception written
out here: renderers (5) may not import statistics (3) or contract evaluation (4),
whatever their rank: they render values computed elsewhere.

One kind of upward import is allowed, and only this one: a renderer may name the result
type it renders (``ProfileResult``, ``CompareResult``, ``InstrumentsResult``,
``CheckResult``, ``RuleResult``) inside ``if TYPE_CHECKING:``, for its annotations. Such
an import never runs, so it cannot form a cycle; the cycle check uses the imports that
run. The results' parts are typed values defined beside their command
(``auditor.commands.instruments_values`` for ``InstrumentsResult``: its strength rows, tests,
estimates and the rest; ``auditor.commands.compare_values`` for ``CompareResult``: its schema,
units, periods and per-column rows); renderers read their attributes and may name those types
the same way.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "auditor"

LAYERS = {
    "auditor.errors": 0, "auditor.progress": 0, "auditor.version": 0, "auditor.vocab": 0, "auditor.dtypes": 0,
    "auditor.checks": 1,
    "auditor.io": 2,
    "auditor.stats": 3,
    "auditor.contracts": 4,
    "auditor.render": 5,
    "auditor.commands": 6,
    "auditor": 7, "auditor.cli": 7, "auditor.__main__": 7,
}
#: importer layer -> layers it may not import even though they are lower
FORBIDDEN_BELOW = {"auditor.render": ("auditor.stats", "auditor.contracts")}


def _name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


MODULES = {_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _layer_of(module: str) -> str:
    parts = module.split(".")
    for n in range(len(parts), 0, -1):
        key = ".".join(parts[:n])
        if key in LAYERS:
            return key
    raise AssertionError(f"{module} is in no layer: add it to LAYERS (and to DEVELOPERS.md)")


#: the result types a renderer may import for its annotations (see the module's docstring)
RESULT_TYPES = frozenset({
    "ProfileResult", "CompareResult", "InstrumentsResult", "CheckResult", "RuleResult",
    # the typed parts of InstrumentsResult (auditor.commands.instruments_values)
    "SampleSummary", "RoleColumns", "ColumnUse", "SetAside", "NearCollinear", "OrderCondition", "ConfidenceSet",
    "UnitStrength", "X2Strength", "Candidate", "SuggestedSet", "ReferenceF", "ChiSquareTest", "MeanEffect",
    "MundlakTest", "AttritionTest", "SarganByEstimator", "ContrastsWithHT", "SpecificationTests", "FitCoefficients",
    "Estimates", "VarianceComponents",
    # the compare result's typed parts (auditor/commands/compare_values.py)
    "ColumnShift", "SchemaChanges", "TypeChange", "UnitFlow", "PeriodPlacement", "RowCounts", "SourceNames",
    "FixedValueCheck", "JumpCheck", "SharedValueCheck", "LevelCheck",
})


def _type_only_nodes(tree: ast.AST) -> set[int]:
    """ids of the import statements inside ``if TYPE_CHECKING:`` blocks."""
    ids: set[int] = set()
    for node in ast.walk(tree):
        test = getattr(node, "test", None)
        if isinstance(node, ast.If) and (
            (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING")
            or (isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")
        ):
            ids.update(id(n) for b in node.body for n in ast.walk(b) if isinstance(n, ast.Import | ast.ImportFrom))
    return ids


def _type_only_results(module: str) -> set[str]:
    """The package modules ``module`` imports only for result-type annotations."""
    tree = ast.parse(MODULES[module].read_text(encoding="utf-8"))
    typed = _type_only_nodes(tree)
    found = set()
    for node in ast.walk(tree):
        if id(node) in typed and isinstance(node, ast.ImportFrom) and node.module in MODULES:
            if {a.name for a in node.names} <= RESULT_TYPES:
                found.add(node.module)
    return found


def imports_of(module: str, *, runtime_only: bool = False) -> set[str]:
    """The package modules ``module`` imports anywhere in its source (with ``runtime_only``:
    leaving out the imports inside ``if TYPE_CHECKING:``)."""
    tree = ast.parse(MODULES[module].read_text(encoding="utf-8"))
    skip = _type_only_nodes(tree) if runtime_only else set()
    found: set[str] = set()
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.split(".")[0] == "auditor")
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            if node.module.split(".")[0] != "auditor":
                continue
            for alias in node.names:  # `from auditor.stats import models` imports the submodule
                sub = f"{node.module}.{alias.name}"
                found.add(sub if sub in MODULES else node.module)
        elif isinstance(node, ast.ImportFrom) and node.level:
            raise AssertionError(f"{module}: a relative import; the package uses absolute ones")
    found.discard(module)
    return {m for m in found if m in MODULES or _raise_unknown(module, m)}


def _raise_unknown(module: str, target: str) -> bool:
    raise AssertionError(f"{module} imports {target}, which is not a module of the package")


GRAPH = {m: imports_of(m) for m in MODULES}
RUNTIME = {m: imports_of(m, runtime_only=True) for m in MODULES}
#: per renderer, the modules it imports only for result-type annotations (never also at run time)
TYPE_ONLY_RESULTS = {m: _type_only_results(m) - RUNTIME[m] for m in MODULES if m.startswith("auditor.render.")}


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected sets of two or more modules (Tarjan's algorithm, iterative)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []
    for root in sorted(graph):
        if root in index:
            continue
        work = [(root, iter(sorted(graph[root])))]
        index[root] = low[root] = len(index)
        stack.append(root)
        on_stack.add(root)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in index:
                    index[child] = low[child] = len(index)
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(sorted(graph[child]))))
                elif child in on_stack:
                    low[node] = min(low[node], index[child])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                members = []
                while True:
                    top = stack.pop()
                    on_stack.discard(top)
                    members.append(top)
                    if top == node:
                        break
                if len(members) > 1:
                    found.append(sorted(members))
    return found


def upward_imports(graph: dict[str, set[str]], allowed: dict[str, set[str]] | None = None) -> list[str]:
    """Every import that points up a layer, or across a forbidden one, as 'a -> b'
    (``allowed``: per module, the targets it imports only for result-type annotations)."""
    bad = []
    for module, targets in sorted(graph.items()):
        own = _layer_of(module)
        for target in sorted(targets - (allowed or {}).get(module, set())):
            theirs = _layer_of(target)
            if LAYERS[theirs] > LAYERS[own] or theirs in FORBIDDEN_BELOW.get(own, ()):
                bad.append(f"{module} -> {target}")
    return bad


def test_no_import_cycles() -> None:
    assert _cycles(RUNTIME) == []


def test_imports_point_down_only() -> None:
    assert upward_imports(GRAPH, TYPE_ONLY_RESULTS) == []


def test_the_type_only_allowance_is_narrow() -> None:
    # only renderers, only result types, only under TYPE_CHECKING: a renderer that imported
    # a command's function (or a result type at run time) would be an upward import
    assert all(m.startswith("auditor.render.") for m in TYPE_ONLY_RESULTS)
    # every allowed name is a result class the package defines (RuleResult lives in auditor.contracts.rules,
    # the others in auditor.commands)
    defined = {node.name for m, path in MODULES.items() if m.startswith(("auditor.commands.", "auditor.contracts."))
               for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))) if isinstance(node, ast.ClassDef)}
    assert RESULT_TYPES <= defined, sorted(RESULT_TYPES - defined)
    assert upward_imports({"auditor.render.x": {"auditor.commands.y"}}, {"auditor.render.x": set()}) == [
        "auditor.render.x -> auditor.commands.y"]


def test_the_walker_sees_function_level_imports_and_cycles() -> None:
    # the checks on a made-up graph: a cycle through three modules, an upward import
    graph = {"auditor.io.a": {"auditor.stats.b"}, "auditor.stats.b": {"auditor.io.c"}, "auditor.io.c": {"auditor.io.a"}}
    assert _cycles(graph) == [["auditor.io.a", "auditor.io.c", "auditor.stats.b"]]
    assert upward_imports(graph) == ["auditor.io.a -> auditor.stats.b"]
    assert upward_imports({"auditor.render.x": {"auditor.stats.y"}}) == ["auditor.render.x -> auditor.stats.y"]
    # and on the package: cli imports the commands inside its functions only
    assert any(t.startswith("auditor.commands.") for t in GRAPH["auditor.cli"])


@pytest.mark.parametrize("module", sorted(MODULES))
def test_every_module_has_a_layer(module: str) -> None:
    assert _layer_of(module) in LAYERS
