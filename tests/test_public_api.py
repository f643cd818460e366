"""The public API of ``import auditor`` (issue 16, item 4): five functions, their result types
and AuditError, imported on first use; and ``python -m auditor`` as the command."""

from __future__ import annotations

import inspect
import subprocess
import sys
from pathlib import Path

import auditor

EXAMPLE = Path(__file__).resolve().parent.parent / "examples" / "orchards.csv"
FUNCTIONS = ("profile", "instruments", "compare", "check", "write_report")


def test_every_public_name_resolves_to_its_definition() -> None:
    for name in auditor.__all__:
        value = getattr(auditor, name)
        if name != "__version__":
            assert value.__name__ == name, name
            assert value.__module__.startswith("auditor."), name
    assert issubclass(auditor.AuditError, Exception)
    assert type(auditor.profile(EXAMPLE, unit="orchard_id", time="season")) is auditor.ProfileResult


def test_data_first_then_keyword_only_keys() -> None:
    for name in FUNCTIONS:
        params = list(inspect.signature(getattr(auditor, name)).parameters.values())
        first = params[0]
        assert first.name in ("data", "base"), name
        assert first.kind is inspect.Parameter.POSITIONAL_OR_KEYWORD
        keyword_only = {p.name for p in params if p.kind is inspect.Parameter.KEYWORD_ONLY}
        keys = {"unit", "time"} if name != "check" else {"rules"}
        assert keys <= keyword_only, name
        # compare's second argument is the new wave; every other function takes one data argument
        positional = [p.name for p in params if p.kind is not inspect.Parameter.KEYWORD_ONLY]
        assert positional == (["base", "new"] if name == "compare" else ["data"]), name


def test_an_unknown_name_is_an_attribute_error() -> None:
    try:
        auditor.no_such_thing  # noqa: B018
    except AttributeError as exc:
        assert "no_such_thing" in str(exc)
    else:  # pragma: no cover
        raise AssertionError("no AttributeError")


def test_import_auditor_loads_no_heavy_library_and_python_m_auditor_runs() -> None:
    code = "import sys, auditor; print([m for m in ('polars', 'numpy', 'pandas') if m in sys.modules])"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
    run = subprocess.run([sys.executable, "-m", "auditor", "--version"], capture_output=True, text=True)
    assert run.returncode == 0 and run.stdout.startswith("panel-audit ")
