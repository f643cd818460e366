"""panel-auditor: a pre-estimation auditor for panel data.

The public API, every function data first and keys by keyword::

    profile(data, unit=..., time=...)                         -> ProfileResult
    instruments(data, unit=..., time=..., outcome=..., regressors=...) -> InstrumentsResult
    compare(base, new, unit=..., time=...)                    -> CompareResult
    check(data, rules=...)                                    -> CheckResult
    write_report(data, unit=..., time=..., out=...)           -> Path of the page

Bad input raises :class:`AuditError` (its ``code`` and one-line ``message`` are those of
``panel-audit: error: ...``). The names are imported on first use, so that
``import auditor`` and ``panel-audit --help`` stay fast; type checkers see them through
the ``TYPE_CHECKING`` imports below.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

from auditor.version import __version__

__all__ = [
    "AuditError",
    "CheckResult",
    "CompareResult",
    "InstrumentsResult",
    "ProfileResult",
    "__version__",
    "check",
    "compare",
    "instruments",
    "profile",
    "write_report",
]

if TYPE_CHECKING:  # pragma: no cover
    from auditor.commands.check import CheckResult, check
    from auditor.commands.compare import CompareResult, compare
    from auditor.commands.instruments import InstrumentsResult, instruments
    from auditor.commands.profile import ProfileResult, profile
    from auditor.commands.report import write_report
    from auditor.errors import AuditError

#: each public name and the module that defines it
_HOME = {
    "profile": "auditor.commands.profile",
    "ProfileResult": "auditor.commands.profile",
    "instruments": "auditor.commands.instruments",
    "InstrumentsResult": "auditor.commands.instruments",
    "compare": "auditor.commands.compare",
    "CompareResult": "auditor.commands.compare",
    "check": "auditor.commands.check",
    "CheckResult": "auditor.commands.check",
    "write_report": "auditor.commands.report",
    "AuditError": "auditor.errors",
}


def __getattr__(name: str) -> Any:
    home = _HOME.get(name)
    if home is None:
        raise AttributeError(f"module 'auditor' has no attribute {name!r}")
    value = getattr(import_module(home), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})
