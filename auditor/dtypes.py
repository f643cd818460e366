"""One vocabulary of column types: dtype names and families, missing and non-finite values.

Every layer asks here what a polars dtype is called, which family it belongs to and what
counts as missing, so that no two modules disagree by accident. Where two documents of
the contract already spell a type differently, both spellings are here, named:

- :func:`profile_dtype_name`: the profile's ``columns[].dtype`` (an Enum is "categorical",
  as a Categorical is);
- :func:`compare_dtype_name`: compare's ``schema.type_changed`` and its messages (an Enum is
  "enum", so that a change from Categorical to Enum can be named).

Missing values come in two strengths, also named: :func:`null_or_nan` (null, or NaN in a
float column: compare's missing shares, where an infinity is a value that moved) and
:func:`null_or_non_finite` (null, NaN or an infinity: model readiness, where no fit can use
an infinite value).
"""

from __future__ import annotations

import polars as pl


def profile_dtype_name(dtype: pl.DataType) -> str:
    """The profile's short lower-case name of a dtype (``float64``, ``int64``, ``string``,
    ``datetime``; Categorical and Enum both ``categorical``)."""
    if isinstance(dtype, pl.Categorical | pl.Enum):
        return "categorical"
    if isinstance(dtype, pl.Datetime):
        return "datetime"
    return str(dtype).lower()


def compare_dtype_name(dtype: pl.DataType) -> str:
    """Compare's short lower-case name of a dtype: as :func:`profile_dtype_name`, but an Enum
    is ``enum``."""
    if isinstance(dtype, pl.Enum):
        return "enum"
    return profile_dtype_name(dtype)


def type_family(dtype: pl.DataType) -> str | None:
    """The family of a dtype, the contract's type names: ``boolean``, ``integer``, ``float``
    (decimals too), ``text`` (strings, categoricals, enums), ``date``, ``datetime``; None
    for any other dtype."""
    if dtype == pl.Boolean:
        return "boolean"
    if dtype.is_integer():
        return "integer"
    if dtype.is_float() or isinstance(dtype, pl.Decimal):
        return "float"
    if dtype == pl.String or isinstance(dtype, pl.Categorical | pl.Enum):
        return "text"
    if dtype == pl.Date:
        return "date"
    if isinstance(dtype, pl.Datetime):
        return "datetime"
    return None


def null_or_nan(col: str, dtype: pl.DataType) -> pl.Expr:
    """True where ``col`` is null, or NaN in a float column (infinities are values)."""
    e = pl.col(col).is_null()
    if dtype.is_float():
        e = e | pl.col(col).is_nan()
    return e


def null_or_non_finite(col: str, dtype: pl.DataType) -> pl.Expr:
    """True where ``col`` is null, or NaN or infinite in a float column."""
    e = pl.col(col).is_null()
    if dtype.is_float():
        e = e | ~pl.col(col).is_finite()
    return e
