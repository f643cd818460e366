"""Writing output files safely: never over an input, never over a file without force,
never through a symbolic link, all of a run's files or none of them.

A run names its outputs first (:meth:`OutputSet.claim`, before any work, so a bad
path fails fast), writes each to a hidden temporary file beside its target
(:meth:`OutputSet.stage`, flushed to disk), then publishes them together
(:meth:`OutputSet.publish`). Without ``force`` a file is published by a hard link,
which fails when the target appeared in the meantime (another run, the same
``--out``): of two runs racing for one new path, exactly one wins. With ``force`` the
old file is kept under a hidden name until the run ends, so a later failure (a full
disk for the next figure, a standard output that cannot be written) puts it back.
Interrupt signals are held while files are published or put back, so an interrupted
run leaves either its complete outputs or the files as they were, never a part.
"""

from __future__ import annotations

import contextlib
import errno
import os
import signal
import tempfile
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from auditor.errors import broken, fail

# os.link is refused on some file systems (FAT, some network and FUSE mounts)
_NO_LINKS = {errno.EPERM, errno.EXDEV, errno.EMLINK, getattr(errno, "ENOTSUP", -1), getattr(errno, "EOPNOTSUPP", -1)}


class Interrupted(BaseException):
    """Raised in the main thread by SIGTERM or SIGHUP, as Ctrl-C raises KeyboardInterrupt:
    every ``finally`` and cleanup on the way out runs."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


_held = {"depth": 0, "pending": []}


def on_signal(signum: int, _frame: Any = None) -> None:
    """The command's handler of SIGINT, SIGTERM and SIGHUP: KeyboardInterrupt or
    :class:`Interrupted` at once, or, inside :func:`signals_held`, when the block ends."""
    if _held["depth"]:
        _held["pending"].append(signum)
        return
    if signum == signal.SIGINT:
        raise KeyboardInterrupt
    raise Interrupted(signum)


@contextlib.contextmanager
def signals_held() -> Iterator[None]:
    """Defer the interrupt of :func:`on_signal` to the end of the block (files are being
    published or put back: the block must run whole). Python runs signal handlers in the
    main thread whichever thread the signal reached, so a flag holds them, not a mask."""
    _held["depth"] += 1
    try:
        yield
    finally:
        _held["depth"] -= 1
        if not _held["depth"] and _held["pending"]:
            signum = _held["pending"][0]
            _held["pending"].clear()
            on_signal(signum)


def input_files(*data: Any, files: Iterable[Any] = ()) -> list[Path]:
    """Every file a run reads: each of ``data`` (a path, folder, glob or list of them)
    expanded as the loader expands it, plus the single ``files`` (a rules file, a
    contract). Frames and None are skipped; a path that does not resolve is kept as
    given (the run fails on it later with its own error)."""
    from auditor.io.sources import resolve_inputs

    found: list[Path] = []
    for item in data:
        if item is None or hasattr(item, "columns"):  # a data frame: nothing on disk
            continue
        try:
            found.extend(resolve_inputs(item))
        except Exception:  # the loader reports it properly when the run reads it
            items = item if isinstance(item, list | tuple) else [item]
            found.extend(Path(str(i)) for i in items)
    found.extend(Path(str(f)) for f in files if f is not None)
    return found


def _same_file(a: Path, b: Path) -> bool:
    """Whether ``a`` and ``b`` name one file: the same resolved path, or the same inode
    (a hard link, a second mount of one folder)."""
    try:
        if a.resolve() == b.resolve():
            return True
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except (OSError, RuntimeError, ValueError):  # a link loop, an unreadable folder
        return False


def _reason(exc: OSError) -> str:
    return exc.strerror or str(exc)


@dataclass
class _Entry:
    path: Path
    role: str = "an output"
    tmp: Path | None = None
    backup: Path | None = None
    published: bool = False
    inode: tuple[int, int] | None = None


@dataclass
class OutputSet:
    """The files one run writes, published together or not at all (see the module text).

    Use it as a context manager: leaving the block normally keeps what was published;
    leaving it by an exception (or an interrupt) removes the staged files and undoes
    every publication.
    """

    force: bool = False
    inputs: list[Path] = field(default_factory=list)
    _entries: dict[Path, _Entry] = field(default_factory=dict)

    def __enter__(self) -> OutputSet:
        return self

    def __exit__(self, kind: Any, value: Any, tb: Any) -> None:
        if kind is None:
            self.commit()
        else:
            self.discard()

    def claim(self, path: str | Path, role: str = "an output") -> Path:
        """Check that ``path`` may be written by this run as ``role`` (for messages:
        "--out", "a figure of --png-dir"); return it.

        Raises ``output-is-input`` (any input of the run, whatever ``force`` says),
        ``output-twice`` (another output of this run), ``output-is-link`` (a symbolic
        link, even a dangling one), ``output-exists`` (without ``force``) and
        ``output-unwritable`` (a folder)."""
        out = Path(path)
        for item in self.inputs:
            if _same_file(out, Path(item)):
                raise fail("output-is-input", path=path)
        for other, entry in self._entries.items():
            if _same_file(out, other):
                raise fail("output-twice", path=path, first=entry.role, second=role)
        if out.is_symlink():
            raise fail("output-is-link", path=path)
        if out.is_dir():
            raise fail("output-unwritable", path=path, reason="it is a folder")
        if out.exists() and not self.force:
            raise fail("output-exists", path=path)
        self._entries[out] = _Entry(out, role)
        return out

    def stage(self, path: str | Path, data: bytes | str) -> Path:
        """Write ``data`` to a hidden temporary file beside ``path`` (claimed here if not
        yet), flushed to disk; ``path`` itself is untouched until :meth:`publish`."""
        out = Path(path)
        entry = self._entries.get(out)
        if entry is None:
            self.claim(out)
            entry = self._entries[out]
        if entry.tmp is not None:
            raise fail("output-twice", path=path, first=entry.role, second=entry.role)
        payload = data.encode("utf-8") if isinstance(data, str) else data
        folder = out.parent if str(out.parent) else Path(".")
        try:
            folder.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".part", dir=folder)
        except OSError as exc:
            raise fail("output-unwritable", path=path, reason=_reason(exc)) from None
        entry.tmp = Path(tmp)
        try:
            umask = os.umask(0)
            os.umask(umask)
            os.chmod(tmp, 0o666 & ~umask)  # mkstemp creates 0600; give the usual permissions
            with os.fdopen(fd, "wb") as fh:
                fh.write(payload)
                fh.flush()
                os.fsync(fh.fileno())
        except BaseException as exc:
            with signals_held():
                _unlink(entry.tmp)
                entry.tmp = None
            if isinstance(exc, OSError):
                raise fail("output-unwritable", path=path, reason=_reason(exc)) from None
            raise
        return out

    def publish(self) -> list[Path]:
        """Put every staged file in place; on any failure undo them all and raise.

        Raises ``output-exists`` when a target appeared since it was claimed (without
        ``force``), ``output-is-input`` when it became an input, ``output-unwritable``
        for other failures. Returns the paths published, in claim order."""
        with signals_held():
            try:
                for entry in self._entries.values():
                    if entry.tmp is not None and not entry.published:
                        self._publish_one(entry)
            except BaseException:
                self._undo()
                raise
        return [e.path for e in self._entries.values() if e.published]

    def _publish_one(self, entry: _Entry) -> None:
        out, tmp = entry.path, entry.tmp
        if tmp is None:
            raise broken("tmp is not None")
        for item in self.inputs:  # a glob may match more files now than when claimed
            if _same_file(out, Path(item)):
                raise fail("output-is-input", path=out)
        if out.is_symlink():
            raise fail("output-is-link", path=out)
        try:
            try:
                _link_new(tmp, out)
                _unlink(tmp)
            except FileExistsError:
                if not self.force:
                    raise
                entry.backup = _keep_aside(out)
                os.replace(tmp, out)
        except FileExistsError:
            raise fail("output-exists", path=out) from None
        except OSError as exc:
            raise fail("output-unwritable", path=out, reason=_reason(exc)) from None
        entry.tmp = None
        entry.published = True
        st = os.stat(out)
        entry.inode = (st.st_dev, st.st_ino)

    def commit(self) -> None:
        """Keep what was published: drop the old files kept aside and any unpublished
        temporary file."""
        with signals_held():
            for entry in self._entries.values():
                _unlink(entry.backup)
                _unlink(entry.tmp)
                entry.backup = entry.tmp = None
            self._entries.clear()

    def discard(self) -> None:
        """Remove staged files and undo every publication (old files put back)."""
        with signals_held():
            self._undo()
            self._entries.clear()

    def _undo(self) -> None:
        for entry in self._entries.values():
            _unlink(entry.tmp)
            entry.tmp = None
            if entry.published:
                try:
                    st = os.stat(entry.path)
                    ours = (st.st_dev, st.st_ino) == entry.inode
                except OSError:
                    ours = False
                if entry.backup is not None:
                    try:
                        os.replace(entry.backup, entry.path)
                        entry.backup = None
                    except OSError:  # the old file stays under its hidden name, not lost
                        pass
                elif ours:  # never remove a file someone else put there since
                    _unlink(entry.path)
                entry.published = False
            else:  # not replaced: the second name of the untouched file goes
                _unlink(entry.backup)
                entry.backup = None


def _link_new(tmp: Path, out: Path) -> None:
    """Make ``out`` the file ``tmp``, failing with FileExistsError when ``out`` exists."""
    try:
        os.link(tmp, out)
    except FileExistsError:
        raise
    except OSError as exc:
        if exc.errno not in _NO_LINKS:
            raise
        # No hard links here: reserve the name exclusively, then rename onto it.
        fd = os.open(out, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666)
        os.close(fd)
        os.replace(tmp, out)


def _keep_aside(out: Path) -> Path | None:
    """A hidden second name for the existing ``out`` (a hard link), so that it can be
    put back; None when the file system has no hard links."""
    for attempt in range(100):
        aside = out.with_name(f".{out.name}.{os.getpid()}.{attempt}.old")
        try:
            os.link(out, aside)
            return aside
        except FileExistsError:
            continue
        except OSError as exc:
            if exc.errno in _NO_LINKS:
                return None
            raise
    return None


def _unlink(path: Path | None) -> None:
    if path is not None:
        with contextlib.suppress(OSError):
            os.unlink(path)


def check_output_path(path: str | Path, *, force: bool, inputs: Iterable[str | Path] = ()) -> Path:
    """Validate that ``path`` may be written (see :meth:`OutputSet.claim`); return it."""
    return OutputSet(force=force, inputs=[Path(str(i)) for i in inputs]).claim(path)


def write_atomic(
    path: str | Path,
    data: bytes | str,
    *,
    force: bool = False,
    inputs: Iterable[str | Path] = (),
) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder, published
    by a link (or, with ``force``, a rename). An interrupted write leaves no partial
    file at ``path``. Returns the path written."""
    with OutputSet(force=force, inputs=[Path(str(i)) for i in inputs]) as outs:
        out = outs.stage(path, data)
        outs.publish()
    return out
