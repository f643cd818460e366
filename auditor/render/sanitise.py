"""The one sanitiser every renderer uses for text taken from the data.

Column names, unit ids, category levels and file names can hold characters that act
instead of showing: terminal escape sequences (a window title, a cleared screen, a
hyperlink), C1 controls (an 8-bit CSI), bidirectional overrides that reverse what
follows, zero-width characters that make two different ids look the same, line and
paragraph separators. :func:`visible` writes each as ``<U+XXXX>``, so the text
cannot act on a terminal, a page or a figure and a hidden character shows (a value
that literally holds the text ``<U+202E>`` looks the same as one holding U+202E:
the JSON keeps them apart); the text (terminal), HTML (tables and inline SVG) and figure (PNG) renderers
all call it. :func:`json_escaped` writes the same characters as JSON ``\\uXXXX``
escapes, so the JSON document keeps every value exactly and still prints safely.

The characters are the Unicode categories Cc (controls, C0 and C1), Cf (format:
bidirectional controls, zero-width, soft hyphen, tags), Zl and Zp (line and
paragraph separators) and Cs (surrogates), as Unicode 15 lists them.
"""

from __future__ import annotations

import re
from typing import Any

# Ranges of Cc, Cf, Zl, Zp and Cs (tests/test_sanitise.py checks them against unicodedata).
ACTING = re.compile(
    "["
    "\x00-\x1f\x7f-\x9f\xad"
    "\u0600-\u0605\u061c\u06dd\u070f\u0890-\u0891\u08e2\u180e"
    "\u200b-\u200f\u2028-\u202e\u2060-\u2064\u2066-\u206f"
    "\ud800-\udfff\ufeff\ufff9-\ufffb"
    "\U000110bd\U000110cd\U00013430-\U0001343f\U0001bca0-\U0001bca3"
    "\U0001d173-\U0001d17a\U000e0001\U000e0020-\U000e007f"
    "]"
)


# json.dumps escapes C0 controls inside strings itself; outside strings its only
# controls are the newlines of the indentation, which must stay.
_JSON_ACTING = re.compile(ACTING.pattern.replace("\x00-\x1f", "", 1))


def _code_point(match: re.Match[str]) -> str:
    return f"<U+{ord(match.group()):04X}>"


def visible(text: Any) -> str:
    """``text`` (any value, as ``str``) with every acting character written ``<U+XXXX>``:
    one line that shows exactly which characters it holds."""
    s = "" if text is None else str(text)
    return ACTING.sub(_code_point, s) if not s.isascii() or not s.isprintable() else s


def _json_escape(match: re.Match[str]) -> str:
    c = ord(match.group())
    if c <= 0xFFFF:
        return f"\\u{c:04x}"
    c -= 0x10000
    return f"\\u{0xD800 + (c >> 10):04x}\\u{0xDC00 + (c & 0x3FF):04x}"


def json_escaped(text: str) -> str:
    """JSON text with every acting character written as a ``\\uXXXX`` escape (a pair for
    characters beyond U+FFFF); they can only occur inside strings, where an escape
    means the same character, so the document's values do not change."""
    return text if text.isascii() and "\x7f" not in text else _JSON_ACTING.sub(_json_escape, text)
