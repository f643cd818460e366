"""The package's version and the ``tool`` object every JSON document starts with."""

from __future__ import annotations

__version__ = "0.1.0"


def tool_info() -> dict[str, str]:
    """The ``tool`` object every JSON document starts with."""
    return {"name": "panel-audit", "version": __version__}
