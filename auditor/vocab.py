"""One vocabulary for every layer: values made JSON-ready, and the words for p-values.

``clean`` turns a result's values into the JSON document's (non-finite floats become
None, dates ISO text); ``format_p`` and ``p_phrase`` write a p-value the same way in
every message and renderer.
"""

from __future__ import annotations

import math
from datetime import date, datetime
from typing import Any

#: p-values below this are written as "< 1e-16" in text (the JSON keeps the full value)
P_FLOOR = 1e-16


def clean(value: Any) -> Any:
    """``value`` made JSON-ready: non-finite floats become None, dates ISO text, tuples lists."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [clean(v) for v in value]
    if isinstance(value, datetime | date):
        return value.isoformat()
    if hasattr(value, "item") and not isinstance(value, str | bytes):  # numpy scalars
        return clean(value.item())
    if value is None or isinstance(value, str | int | bool):
        return value
    return str(value)


def format_p(p: float | None, digits: int = 3) -> str:
    """A p-value for text: significant digits, scientific when small, never "0"."""
    if p is None or p != p:
        return "-"
    if p < P_FLOOR:
        return "< 1e-16"
    if p < 1e-3:
        return f"{p:.{digits - 1}e}"
    return f"{p:.{digits}g}"


def p_phrase(p: float | None, digits: int = 3) -> str:
    """``p = 0.0015`` or ``p < 1e-16`` for a sentence (never ``p = < 1e-16``)."""
    text = format_p(p, digits)
    return f"p {text}" if text.startswith("<") else f"p = {text}"
