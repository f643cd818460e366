"""Writing output files safely: never over an input, never over a file without force, atomically."""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterable
from pathlib import Path

from auditor.errors import fail


def check_output_path(path: str | Path, *, force: bool, inputs: Iterable[str | Path] = ()) -> Path:
    """Validate that ``path`` may be written; return it resolved.

    Raises ``output-is-input`` when it is one of ``inputs`` (always, even with force)
    and ``output-exists`` when it exists and ``force`` is false.
    """
    out = Path(path)
    resolved = out.resolve()
    for item in inputs:
        try:
            same = Path(item).resolve() == resolved
        except (OSError, TypeError):  # pragma: no cover - unusual inputs
            same = False
        if same:
            raise fail("output-is-input", path=path)
    if out.exists() and not force:
        raise fail("output-exists", path=path)
    return out


def write_atomic(
    path: str | Path,
    data: bytes | str,
    *,
    force: bool = False,
    inputs: Iterable[str | Path] = (),
) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder, then rename.

    An interrupted write leaves no partial file at ``path``. Returns the path written.
    """
    out = check_output_path(path, force=force, inputs=inputs)
    payload = data.encode("utf-8") if isinstance(data, str) else data
    folder = out.parent if str(out.parent) else Path(".")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".part", dir=folder)
    except OSError as exc:
        raise fail("output-unwritable", path=path, reason=exc.strerror or str(exc)) from None
    try:
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp creates 0600; give the usual permissions
        with os.fdopen(fd, "wb") as fh:
            fh.write(payload)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, out)
    except BaseException as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(exc, OSError):
            raise fail("output-unwritable", path=path, reason=exc.strerror or str(exc)) from None
        raise
    return out
