"""JSON rendering: deterministic, strict (no NaN or infinity), contract names."""

from __future__ import annotations

import json
from typing import Any

from auditor.vocab import clean

__all__ = ["clean", "dumps"]


def dumps(document: dict[str, Any]) -> str:
    """The document as indented JSON text, ``allow_nan=False``, ending in a newline.

    Characters that act on a terminal (controls, bidirectional and zero-width ones)
    are written as ``\\uXXXX`` escapes: the same values, safe to print."""
    from auditor.render.sanitise import json_escaped

    return json_escaped(json.dumps(clean(document), indent=2, ensure_ascii=False, allow_nan=False)) + "\n"
