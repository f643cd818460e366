"""The JSON and YAML documents of the demo and benchmark panels, their text outputs and their
HTML reports are byte-identical to the golden files.

This is a regression guard for refactoring (issue 16: the package laid out in folders),
not an oracle of correctness: the golden files in tests/data/golden/ were written by the
code itself (tests/data/golden/make_golden.py, at the commit named in the README there),
so they only say that a change of layout changed no output. A change that is meant to
alter a document regenerates the files with the script and says so in its commit.

Nothing is dropped before the comparison: no document has a field that changes between
runs (the ``tool`` object holds only the name and the version, no timing; paths are
relative to the scratch folder the documents are computed in). The HTML reports' one
changing line, the time they were written, is replaced by ``<when>`` in the generator
(``WRITTEN``); the text outputs are written at a fixed width of 100 columns without
colour. A version bump changes
``tool.version`` and the draft's header line, and needs the files regenerated.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

GOLDEN = Path(__file__).resolve().parent / "data" / "golden"


def _generator():
    spec = importlib.util.spec_from_file_location("make_golden", GOLDEN / "make_golden.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def documents(tmp_path_factory: pytest.TempPathFactory) -> dict[str, bytes]:
    return _generator().documents(tmp_path_factory.mktemp("golden"))


EXPECTED = sorted(p.name for p in GOLDEN.iterdir() if p.suffix in (".json", ".yaml", ".txt", ".html"))


def test_every_golden_file_is_regenerated(documents: dict[str, bytes]) -> None:
    assert len(EXPECTED) == 19
    assert sorted(documents) == EXPECTED


@pytest.mark.parametrize("name", EXPECTED)
def test_document_bytes_unchanged(documents: dict[str, bytes], name: str) -> None:
    golden = (GOLDEN / name).read_bytes()
    now = documents[name]
    if now != golden:
        a, b = golden.decode().splitlines(), now.decode().splitlines()
        first = next((i for i, (x, y) in enumerate(zip(a, b, strict=False)) if x != y), min(len(a), len(b)))
        pytest.fail(f"{name} differs from the golden file first at line {first + 1}: "
                    f"{a[first] if first < len(a) else '<end>'!r} -> {b[first] if first < len(b) else '<end>'!r}")
