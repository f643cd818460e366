"""panel-auditor: a pre-estimation auditor for panel data.

The public entry points are imported lazily so that ``import auditor`` and
``panel-audit --help`` stay fast.
"""

from __future__ import annotations

import sys
import types
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

__all__ = ["profile", "instruments", "compare", "check", "__version__"]

if TYPE_CHECKING:  # pragma: no cover
    from auditor.commands.profile import profile as profile


def __getattr__(name: str) -> Any:
    if name == "profile":
        from auditor.commands.profile import profile

        return profile
    if name == "instruments":
        from auditor.commands.instruments import instruments

        return instruments
    if name == "compare":
        from auditor.commands.compare import compare

        return compare
    if name == "check":
        from auditor.checks.rules import check

        return check
    raise AttributeError(f"module 'auditor' has no attribute {name!r}")


class _Package(types.ModuleType):
    """Keeps ``auditor.commands.profile`` the function after the submodule of that name is imported.

    Importing ``auditor.commands.profile`` (the module) would otherwise bind the module over
    the public function; ``from auditor.commands.profile import ...`` still works through
    ``sys.modules``.
    """

    def __setattr__(self, name: str, value: Any) -> None:
        if name == "profile" and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package
