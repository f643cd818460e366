"""Reading data files into polars, with clear errors.

Text formats (CSV, TSV, JSON lines) keep the unit key columns as text, so that
``007`` and ``7`` stay different units. Binary formats keep their stored types.
"""

from __future__ import annotations

import gzip
import os
import zlib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import polars as pl

from auditor.errors import fail

TEXT_SUFFIXES = {".csv": ",", ".tsv": "\t", ".txt": None}
PARQUET_SUFFIXES = {".parquet", ".pq"}
IPC_SUFFIXES = {".arrow", ".feather", ".ipc"}
JSONL_SUFFIXES = {".jsonl", ".ndjson"}


def file_format(path: Path) -> tuple[str, bool]:
    """The format name of ``path`` by its suffix and whether it is gzipped."""
    suffixes = [s.lower() for s in path.suffixes]
    gz = bool(suffixes) and suffixes[-1] == ".gz"
    last = suffixes[-2] if gz and len(suffixes) >= 2 else (suffixes[-1] if suffixes else "")
    if last in TEXT_SUFFIXES:
        return ("csv", gz)
    if last in PARQUET_SUFFIXES and not gz:
        return ("parquet", False)
    if last in IPC_SUFFIXES and not gz:
        return ("ipc", False)
    if last in JSONL_SUFFIXES:
        return ("jsonl", gz)
    raise fail("unsupported-format", path=path, suffix="".join(path.suffixes) or "(none)")


def _raw_bytes(path: Path, gz: bool) -> bytes:
    """The file's bytes, decompressed when ``gz``; the decompressed size is measured on
    the stream and refused (``too-large``) as soon as it passes the text limit, so a
    small file that inflates enormously never fills memory."""
    try:
        if not gz:
            return path.read_bytes()
        limit = text_limit()
        chunks: list[bytes] = []
        size = 0
        with gzip.open(path, "rb") as fh:
            while chunk := fh.read(GZIP_CHUNK):
                chunks.append(chunk)
                size += len(chunk)
                if limit and size > limit:
                    chunks.clear()
                    raise fail(
                        "too-large",
                        path=path,
                        size=f"more than {limit / 2**30:.1f} GiB of text once decompressed",
                        reason="text files are read whole; convert it to Parquet, which is streamed",
                    )
        return b"".join(chunks)
    except PermissionError:
        raise fail("unreadable-file", path=path, reason="permission denied") from None
    except (EOFError, gzip.BadGzipFile, zlib.error) as exc:
        raise fail("corrupt-file", path=path, format="gzip", reason=str(exc) or type(exc).__name__) from None
    except OSError as exc:
        raise fail("unreadable-file", path=path, reason=exc.strerror or str(exc)) from None


def _first_line(raw: bytes) -> bytes:
    end = raw.find(b"\n")
    return raw if end < 0 else raw[:end]


def _first_record(raw: bytes) -> bytes:
    """The bytes of the first record: up to the first newline outside quotes (an even
    number of quote characters before it; a doubled quote counts two)."""
    end, quotes = 0, 0
    while True:
        nl = raw.find(b"\n", end)
        if nl < 0:
            return raw
        quotes += raw.count(b'"', end, nl + 1)
        end = nl + 1
        if quotes % 2 == 0:
            return raw[:end]


def _sniff_separator(first: bytes, default: str | None) -> str:
    """The separator of a delimited file from its first line: the suffix's own when it
    occurs there, else the most frequent of comma, semicolon, tab and bar."""
    if default is not None and default.encode() in first:
        return default
    counts = {sep: first.count(sep.encode()) for sep in (",", ";", "\t", "|")}
    best = max(counts, key=lambda s: counts[s])
    return best if counts[best] > 0 else (default or ",")


def header_names(raw: bytes, separator: str) -> list[str]:
    """The column names of a delimited text (UTF-8 bytes) as polars parses its first
    record, quotes undone, surrounding spaces stripped, an empty cell as ''.

    The one reader of a text file's header: the names the key override is looked up
    in are the names the data is read under (``new_columns``), however long the header
    or whatever characters it holds."""
    try:
        first = pl.read_csv(
            raw, separator=separator, has_header=False, n_rows=1, infer_schema=False, truncate_ragged_lines=True
        )
    except pl.exceptions.PolarsError:
        return []
    if first.height == 0:
        return []
    return [("" if v is None else str(v)).strip() for v in first.row(0)]


def _read_text(path: Path, gz: bool, separator: str | None, text_columns: Sequence[str]) -> pl.DataFrame:
    raw = _raw_bytes(path, gz)
    if not raw.strip():
        raise fail("empty-file", path=path)
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    if not raw.isascii():
        try:
            raw.decode("utf-8")
        except UnicodeDecodeError:
            raw = raw.decode("latin-1").encode("utf-8")
    sep = _sniff_separator(_first_line(raw), separator)
    header = header_names(_first_record(raw), sep)
    if not header:
        raise fail("empty-file", path=path)
    seen: dict[str, int] = {}
    for h in header:
        seen[h] = seen.get(h, 0) + 1
    dup = sorted(h for h, c in seen.items() if c > 1)
    if dup:
        raise fail("duplicate-column-names", names=", ".join(f"'{d}'" for d in dup))
    overrides = {c: pl.String for c in text_columns if c in seen}
    last_error: Exception | None = None
    for infer in (10_000, None):
        try:
            df = pl.read_csv(
                raw,
                separator=sep,
                new_columns=header,
                schema_overrides=overrides,
                infer_schema_length=infer,
                encoding="utf8",
                null_values=["", "NA", "N/A", "null", "NULL"],
                try_parse_dates=False,
                truncate_ragged_lines=False,
            )
            break
        except pl.exceptions.PolarsError as exc:
            last_error = exc
    else:
        reason = str(last_error).strip().splitlines()[0] if last_error else "unknown problem"
        raise fail("corrupt-file", path=path, format="delimited text", reason=reason[:200])
    if df.columns != header:  # pragma: no cover - the reader renamed a column after all
        raise fail("corrupt-file", path=path, format="delimited text", reason="its header could not be read as given")
    return _non_finite_as_float(df, text_columns)


_NON_FINITE_TOKENS = ["inf", "+inf", "-inf", "infinity", "+infinity", "-infinity", "nan", "+nan", "-nan"]


def _non_finite_as_float(df: pl.DataFrame, text_columns: Sequence[str]) -> pl.DataFrame:
    # The CSV reader does not infer 'inf' or 'nan' as numbers, so a numeric column holding
    # them arrives as text. Read such a column as Float64 when every other value parses.
    candidates = [c for c, dt in df.schema.items() if dt == pl.String and c not in text_columns]
    if not candidates:
        return df
    probe = df.select(
        *[
            pl.col(c).str.strip_chars().str.to_lowercase().is_in(_NON_FINITE_TOKENS).any().alias(f"t:{c}")
            for c in candidates
        ],
        *[
            (pl.col(c).cast(pl.Float64, strict=False).is_null() & pl.col(c).is_not_null()).any().alias(f"b:{c}")
            for c in candidates
        ],
    ).row(0, named=True)
    numeric = [c for c in candidates if probe[f"t:{c}"] and not probe[f"b:{c}"]]
    if not numeric:
        return df
    return df.with_columns(pl.col(c).str.strip_chars().cast(pl.Float64) for c in numeric)


def _read_jsonl(path: Path, gz: bool, text_columns: Sequence[str]) -> pl.DataFrame:
    raw = _raw_bytes(path, gz)
    if not raw.strip():
        raise fail("empty-file", path=path)
    try:
        df = pl.read_ndjson(raw, infer_schema_length=None)
    except pl.exceptions.PolarsError as exc:
        reason = str(exc).strip().splitlines()[0]
        raise fail("corrupt-file", path=path, format="JSON lines", reason=reason[:200]) from None
    casts = [pl.col(c).cast(pl.String) for c in text_columns if c in df.columns and df.schema[c] != pl.String]
    return df.with_columns(casts) if casts else df


TEXT_MEMORY_SHARE = 0.5  # a text file is read whole: its run may use this share of memory
# Peak memory of a profile per byte of text read (6x to 7.4x measured on CSV panels of
# 120 MB and 200 MB: the text, the parsed frame, the codes and the numpy pass).
TEXT_PEAK_FACTOR = 8
GZIP_CHUNK = 1 << 20  # bytes decompressed at a time while the size is measured


def memory_bytes() -> int:
    """Total physical memory of this machine in bytes (0 when unknown)."""
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):  # pragma: no cover
        return 0


def text_limit() -> int:
    """The largest text (decompressed) read whole, in bytes: a run on it stays within
    ``TEXT_MEMORY_SHARE`` of this machine's memory; 0 when memory is unknown."""
    return int(TEXT_MEMORY_SHARE * memory_bytes() / TEXT_PEAK_FACTOR)


def _refuse_if_too_large(path: Path, gz: bool) -> None:
    # gzipped files are measured while they are decompressed (_raw_bytes)
    size = path.stat().st_size
    limit = text_limit()
    if not gz and limit and size > limit:
        raise fail(
            "too-large",
            path=path,
            size=f"{size / 2**30:.1f} GiB of text",
            reason="text files are read whole; convert it to Parquet, which is streamed",
        )


def scan_source(path: str | Path, text_columns: Sequence[str] = ()) -> pl.LazyFrame:
    """A lazy frame over one data file; text formats are read eagerly with keys as text.

    Raises ``file-not-found``, ``unsupported-format``, ``empty-file``,
    ``corrupt-file`` or ``unreadable-file`` with the path named.
    """
    p = Path(path)
    if not p.exists():
        raise fail("file-not-found", path=path)
    if p.is_dir():
        raise fail("not-a-file", path=path)
    fmt, gz = file_format(p)
    if fmt in ("csv", "jsonl"):
        _refuse_if_too_large(p, gz)
    if fmt == "csv":
        sep = TEXT_SUFFIXES.get([s.lower() for s in p.suffixes][-2 if gz else -1])
        return _read_text(p, gz, sep, text_columns).lazy()
    if fmt == "jsonl":
        return _read_jsonl(p, gz, text_columns).lazy()
    try:
        if p.stat().st_size == 0:
            raise fail("empty-file", path=path)
        if fmt == "parquet":
            lf = pl.scan_parquet(p)
        else:
            lf = pl.scan_ipc(p)
        lf.collect_schema()
    except pl.exceptions.PolarsError as exc:
        reason = str(exc).strip().splitlines()[0]
        raise fail("corrupt-file", path=path, format=fmt, reason=reason[:200]) from None
    except OSError as exc:
        raise fail("corrupt-file", path=path, format=fmt, reason=str(exc)[:200]) from None
    return lf


def resolve_inputs(data: Any) -> list[Path]:
    """The data files named by ``data``: a path, a folder, a glob or a list of paths."""
    return expand_inputs(data)[0]


def expand_inputs(data: Any) -> tuple[list[Path], list[Path]]:
    """(data files, files passed over) for ``data``: a path, a folder, a glob or a list.

    A path named explicitly is read whatever its supported suffix (``.txt`` too). A
    folder or a glob takes only the data formats of :data:`FOLDER_SUFFIXES`, never
    hidden files: a ``README.txt`` or ``notes.md`` beside the waves is passed over
    (and listed, so the profile can say so), not read as a wave.
    """
    import glob as globmod

    items = list(data) if isinstance(data, list | tuple) else [data]
    paths: list[Path] = []
    skipped: list[Path] = []
    for item in items:
        if not isinstance(item, str | Path):
            raise fail("unsupported-object", type=type(item).__name__)
        text = str(item)
        p = Path(text)
        if any(ch in text for ch in "*?[") and not p.exists():
            matched = sorted(Path(x) for x in globmod.glob(text))
            found = [x for x in matched if x.is_file() and _is_data_file(x)]
            if not found:
                raise fail("no-glob-match", pattern=text)
            paths.extend(found)
            skipped.extend(x for x in matched if x.is_file() and x not in found)
        elif p.is_dir():
            entries = sorted(x for x in p.iterdir() if x.is_file())
            found = [x for x in entries if _is_data_file(x)]
            if not found:
                raise fail("not-a-file", path=text)
            paths.extend(found)
            skipped.extend(x for x in entries if x not in found and not x.name.startswith("."))
        else:
            paths.append(p)
    return paths, skipped


# The formats a folder or a glob is read for (.txt only when a file is named explicitly).
FOLDER_SUFFIXES = {".csv", ".tsv", *PARQUET_SUFFIXES, *IPC_SUFFIXES, *JSONL_SUFFIXES}


def _is_data_file(p: Path) -> bool:
    if p.name.startswith("."):
        return False
    suffixes = [s.lower() for s in p.suffixes]
    if suffixes and suffixes[-1] == ".gz":
        suffixes = suffixes[:-1]
    if not suffixes or suffixes[-1] not in FOLDER_SUFFIXES:
        return False
    try:
        file_format(p)
    except Exception:
        return False
    return True


def scan_inputs(
    paths: Sequence[Path], text_columns: Sequence[str] = (), settings: Any = None
) -> tuple[pl.LazyFrame, list[Any], bool]:
    """One lazy frame over all ``paths``, schema findings, whether all files are binary.

    Several files are read as one panel with their schemas aligned: a column missing
    from a file is missing (null) in that file's rows; a column whose type differs
    between files gives one ``schema-mismatch`` finding naming the files and types, and
    is read as the types' common numeric type when all are numeric, else as text.
    ``settings`` (auditor.checks.config.Settings) sets the finding's severity.
    """
    frames = [scan_source(p, text_columns) for p in paths]
    binary = all(file_format(p)[0] in ("parquet", "ipc") for p in paths)
    if len(frames) == 1:
        return frames[0], [], binary
    schemas = [_typed_schema(p, lf) for p, lf in zip(paths, frames, strict=True)]
    targets, findings = _align_types(paths, schemas, settings)
    aligned = []
    for lf, sch in zip(frames, schemas, strict=True):
        casts = [
            pl.col(c).cast(targets[c])
            for c, dt in sch.items()
            if c in targets and dt != targets[c]
        ]
        aligned.append(lf.with_columns(casts) if casts else lf)
    return pl.concat(aligned, how="diagonal_relaxed"), findings, binary


def _typed_schema(path: Path, lf: pl.LazyFrame) -> dict[str, pl.DataType]:
    # Column types of one file. A text file's column that is empty in that file has no
    # type of its own (the reader calls it text): it takes the other files' type.
    schema = dict(lf.collect_schema())
    if file_format(path)[0] in ("csv", "jsonl"):
        df = lf.collect()  # already in memory: text files are read eagerly
        for c in df.columns:
            if df[c].null_count() == df.height:
                schema[c] = pl.Null()
    return schema


def _align_types(
    paths: Sequence[Path], schemas: Sequence[dict[str, pl.DataType]], settings: Any
) -> tuple[dict[str, pl.DataType], list[Any]]:
    from auditor.checks.findings import make

    order: list[str] = []
    for sch in schemas:
        order.extend(c for c in sch if c not in order)
    targets: dict[str, pl.DataType] = {}
    findings = []
    for c in order:
        by_type: dict[str, list[str]] = {}
        types: dict[str, pl.DataType] = {}
        for p, sch in zip(paths, schemas, strict=True):
            dt = sch.get(c)
            if dt is None or dt == pl.Null:
                continue
            by_type.setdefault(str(dt), []).append(p.name)
            types[str(dt)] = dt
        if len(by_type) == 0:
            targets[c] = pl.String()
            continue
        if len(by_type) == 1:
            targets[c] = next(iter(types.values()))
            continue
        dts = list(types.values())
        if all(dt.is_numeric() for dt in dts):
            target: pl.DataType = pl.Float64() if any(dt.is_float() for dt in dts) else pl.Int64()
        else:
            target = pl.String()
        targets[c] = target
        if all(dt.is_integer() for dt in dts) or all(dt.is_float() for dt in dts):
            continue  # only the storage width differs (Int32 / Int64): no finding
        parts = "; ".join(f"{t} in {', '.join(files)}" for t, files in by_type.items())
        findings.append(
            make(
                "schema-mismatch",
                settings,
                f"column '{c}' has different types across the input files ({parts}); "
                f"it is read as {target} in all of them, so check how each wave was exported",
                column=c,
                count=sum(len(f) for f in by_type.values()),
                examples=[
                    {"file": f, "dtype": t} for t, files in by_type.items() for f in files[:5]
                ],
            )
        )
    return targets, findings
