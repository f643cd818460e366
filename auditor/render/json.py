"""JSON rendering: deterministic, strict (no NaN or infinity), contract names."""

from __future__ import annotations

import json
import math
from datetime import date, datetime
from typing import Any


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


def dumps(document: dict[str, Any]) -> str:
    """The document as indented JSON text, ``allow_nan=False``, ending in a newline.

    Characters that act on a terminal (controls, bidirectional and zero-width ones)
    are written as ``\\uXXXX`` escapes: the same values, safe to print."""
    from auditor.render.sanitise import json_escaped

    return json_escaped(json.dumps(clean(document), indent=2, ensure_ascii=False, allow_nan=False)) + "\n"
