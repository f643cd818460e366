"""`panel-audit rules draft`: a starting contract for the next delivery, learned from the waves so far.

The command reads and profiles the panel; auditor.contracts.drafting turns the profile's
column facts into the commented YAML (what each rule is learned from is described there).
"""

from __future__ import annotations

from typing import Any

from auditor.checks.config import Settings, default_settings
from auditor.commands.profile import profile_panel
from auditor.contracts.drafting import contract_text
from auditor.io.load import load_panel


def draft(
    data: Any,
    *,
    unit: str | list[str],
    time: str,
    settings: Settings | None = None,
) -> str:
    """A contract for the next delivery learned from ``data`` (the waves so far), as YAML text.

    Returns the text of the rules file: a ``panel`` part and a ``columns`` part, each
    rule commented with the evidence behind it. Raises AuditError (exit 2) when
    ``data`` cannot be used as a panel.
    """
    settings = settings or default_settings()
    panel = load_panel(data, unit, time, settings=settings)
    return contract_text(panel, profile_panel(panel, settings).columns.to_dicts(), settings)
