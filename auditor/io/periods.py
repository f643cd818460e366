"""Period keys: integers, dates, datetimes and text that parses as either.

Parsing runs on the distinct time values only (a few dozen even for a large
panel) and yields, for each value, a position on an inferred frequency scale
(a year, a quarter count, a month count, a week or day count) and a label.
"""

from __future__ import annotations

import re
from collections import Counter
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any

import polars as pl

from auditor.errors import fail, short_list

_EPOCH = date(1970, 1, 1)
_QUARTER = re.compile(r"^\s*(\d{4})\s*[-_ ]?\s*[Qq]([1-4])\s*$")
_MONTH = re.compile(r"^\s*(\d{4})[-/](\d{1,2})\s*$")
_INT = re.compile(r"^\s*[+-]?\d+\s*$")
_DATE_FORMATS = ("%Y-%m-%d", "%Y/%m/%d", "%d.%m.%Y", "%Y%m%d")


@dataclass(frozen=True)
class PeriodScale:
    """The distinct time values mapped onto positions.

    ``values`` are the raw distinct values (as read), ``positions`` their integer
    positions on the scale of ``frequency``, ``labels`` their JSON-ready labels.
    """

    frequency: str
    values: tuple[Any, ...]
    positions: tuple[int, ...]
    labels: tuple[Any, ...]


def _date_frequency(days: list[date]) -> str:
    if all(d.month == 1 and d.day == 1 for d in days):
        return "year"
    if all(d.day == 1 and d.month in (1, 4, 7, 10) for d in days):
        return "quarter"
    if all(d.day == 1 for d in days):
        return "month"
    if len({d.weekday() for d in days}) == 1 and len(days) > 1:
        return "week"
    return "day"


def _date_position(d: date, freq: str) -> int:
    if freq == "year":
        return d.year
    if freq == "quarter":
        return d.year * 4 + (d.month - 1) // 3
    if freq == "month":
        return d.year * 12 + d.month - 1
    if freq == "week":
        return (d - _EPOCH).days // 7
    return (d - _EPOCH).days


def _date_label(d: date, freq: str) -> Any:
    if freq == "year":
        return d.year
    if freq == "quarter":
        return f"{d.year}Q{(d.month - 1) // 3 + 1}"
    if freq == "month":
        return f"{d.year:04d}-{d.month:02d}"
    return d.isoformat()


def _from_dates(values: list[Any], days: list[date]) -> PeriodScale:
    freq = _date_frequency(days)
    return PeriodScale(
        frequency=freq,
        values=tuple(values),
        positions=tuple(_date_position(d, freq) for d in days),
        labels=tuple(_date_label(d, freq) for d in days),
    )


def _parse_text(text: str) -> date | int | None:
    if _INT.match(text):
        return int(text)
    m = _QUARTER.match(text)
    if m:
        return date(int(m.group(1)), 3 * (int(m.group(2)) - 1) + 1, 1)
    m = _MONTH.match(text)
    if m and 1 <= int(m.group(2)) <= 12:
        return date(int(m.group(1)), int(m.group(2)), 1)
    stripped = text.strip()
    for fmt in _DATE_FORMATS:
        try:
            return datetime.strptime(stripped, fmt).date()
        except ValueError:
            continue
    try:
        dt = datetime.fromisoformat(stripped)
    except ValueError:
        return None
    return dt.date() if dt.time() == datetime.min.time() else None


def scale_for(column: str, distinct: pl.Series) -> PeriodScale:
    """Positions and labels for the distinct non-null values of a time column.

    Raises ``time-unorderable`` (text that is neither a number nor a date) or
    ``time-fractional`` (numbers with a fractional part).
    """
    dtype = distinct.dtype
    values = distinct.to_list()
    if dtype.is_integer():
        ints = [int(v) for v in values]
        return PeriodScale("integer", tuple(values), tuple(ints), tuple(ints))
    if dtype.is_float():
        finite = distinct.filter(distinct.is_finite())
        bad = [v for v in values if v is None or v != v or v in (float("inf"), float("-inf"))]
        frac = finite.filter(finite != finite.round(0)).to_list()
        if bad:
            raise fail("time-unorderable", column=column, examples=short_list(bad, 3))
        if frac:
            raise fail("time-fractional", column=column, examples=short_list(sorted(frac)[:3], 3))
        ints = [int(v) for v in values]
        return PeriodScale("integer", tuple(values), tuple(ints), tuple(ints))
    if dtype == pl.Date:
        return _from_dates(values, values)
    if isinstance(dtype, pl.Datetime):
        if all(v.time() == datetime.min.time() for v in values):
            return _from_dates(values, [v.date() for v in values])
        base = datetime(1970, 1, 1, tzinfo=values[0].tzinfo)
        secs = [int((v - base) / timedelta(seconds=1)) for v in values]
        return PeriodScale("datetime", tuple(values), tuple(secs), tuple(v.isoformat() for v in values))
    if dtype == pl.Boolean:
        raise fail("time-unorderable", column=column, examples=short_list(values[:3], 3))
    # text (or anything else shown as text)
    texts = [str(v) for v in values]
    parsed = [_parse_text(t) for t in texts]
    failed = [t for t, p in zip(texts, parsed, strict=True) if p is None]
    if failed:
        raise fail("time-unorderable", column=column, examples=short_list([repr(t) for t in failed[:3]], 3))
    if all(isinstance(p, int) for p in parsed):
        ints = [int(p) for p in parsed]  # type: ignore[arg-type]
        return PeriodScale("integer", tuple(values), tuple(ints), tuple(ints))
    if all(isinstance(p, date) for p in parsed):
        return _from_dates(values, parsed)  # type: ignore[arg-type]
    mixed = [t for t, p in zip(texts, parsed, strict=True) if isinstance(p, int)][:2]
    mixed += [t for t, p in zip(texts, parsed, strict=True) if isinstance(p, date)][:1]
    raise fail("time-unorderable", column=column, examples=short_list([repr(t) for t in mixed], 3))


def grid_step(positions: list[int]) -> tuple[int | None, list[tuple[int, int]]]:
    """The grid's step (the most common difference) and the neighbouring pairs that skip it.

    ``positions`` must be sorted and distinct. A single period has step None.
    """
    if len(positions) < 2:
        return None, []
    diffs = [b - a for a, b in zip(positions, positions[1:], strict=False)]
    counts = Counter(diffs)
    step = min(counts, key=lambda d: (-counts[d], d))
    irregular = [
        (a, b) for a, b in zip(positions, positions[1:], strict=False) if b - a != step
    ]
    return step, irregular
