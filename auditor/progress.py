"""A small progress display on stderr for long work.

Shown only when the command line turns it on (stderr is a terminal and --json is
not given); silent otherwise, and always silent in the Python API.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager

_state = {"on": False, "start": 0.0, "width": 0}


def enable(on: bool) -> None:
    """Turn the display on or off for this process."""
    _state["on"] = bool(on)
    _state["start"] = time.perf_counter()


@contextmanager
def step(label: str) -> Iterator[None]:
    """Show ``label`` with the elapsed time while the block runs; clear the line after."""
    if not _state["on"]:
        yield
        return
    elapsed = time.perf_counter() - float(_state["start"])
    text = f"panel-audit: {label} … ({elapsed:.1f} s)"
    if not sys.stderr.isatty():  # asked for with --progress: one line a step, for a log
        sys.stderr.write(text + "\n")
        sys.stderr.flush()
        yield
        return
    sys.stderr.write("\r" + text.ljust(int(_state["width"])))
    sys.stderr.flush()
    _state["width"] = len(text)
    try:
        yield
    finally:
        sys.stderr.write("\r" + " " * int(_state["width"]) + "\r")
        sys.stderr.flush()
        _state["width"] = 0
