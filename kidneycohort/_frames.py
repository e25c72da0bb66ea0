"""One parser for table arguments: every stage accepts polars or pandas alike."""

from __future__ import annotations

import functools
from collections.abc import Callable, Iterable, Mapping
from typing import TYPE_CHECKING, Any, TypeAlias, TypeVar, cast

import polars as pl

from kidneycohort.errors import InputDataError, did_you_mean

if TYPE_CHECKING:  # pandas is imported only when a pandas table arrives
    import pandas as pd

__all__ = [
    "FrameLike",
    "as_float",
    "as_int",
    "conform",
    "follows_input",
    "require_columns",
    "to_polars",
]

FrameLike: TypeAlias = "pl.DataFrame | pl.LazyFrame | pd.DataFrame"


def to_polars(data: FrameLike, name: str = "table") -> pl.DataFrame:
    """Return ``data`` as an eager polars DataFrame.

    Accepts a polars DataFrame or LazyFrame, or a pandas DataFrame (converted once at
    the boundary). ``name`` is used in error messages.
    """
    if isinstance(data, pl.DataFrame):
        return data
    if isinstance(data, pl.LazyFrame):
        return data.collect()
    import pandas as pd

    if isinstance(data, pd.DataFrame):
        return pl.from_pandas(data)
    raise InputDataError(
        f"{name}: expected a polars or pandas DataFrame, got {type(data).__name__}"
    )


def as_float(value: object, what: str) -> float:
    """``value`` (a polars scalar such as ``Series.max()``) as a float.

    Raises :class:`TypeError` naming ``what`` when it is not a real number (a null, a
    date, text): the caller expected a number there.
    """
    if isinstance(value, int | float) and not isinstance(value, bool):
        return float(value)
    raise TypeError(f"{what}: expected a number, got {type(value).__name__} {value!r}")


def as_int(value: object, what: str) -> int:
    """``value`` (a polars scalar such as ``Series.max()``) as an int.

    Raises :class:`TypeError` naming ``what`` when it is not an integer (a null, a
    float, a date, text): the caller expected an integer there.
    """
    if isinstance(value, int) and not isinstance(value, bool):
        return value
    raise TypeError(f"{what}: expected an integer, got {type(value).__name__} {value!r}")


def require_columns(df: pl.DataFrame | pl.LazyFrame, columns: Iterable[str], name: str) -> None:
    """Raise :class:`InputDataError` naming the first missing column (with a suggestion)."""
    have = df.collect_schema().names() if isinstance(df, pl.LazyFrame) else df.columns
    for column in columns:
        if column not in have:
            raise InputDataError(
                f"{name}: missing required column '{column}'{did_you_mean(column, have)}"
            )


def conform(df: pl.DataFrame, schema: Mapping[str, pl.DataType]) -> pl.DataFrame:
    """Select ``schema``'s columns in order, adding missing ones as nulls, casting types.

    ISO-8601 text in a date or datetime column is parsed (polars 2 no longer casts text
    to dates); other casts are polars' ordinary strict casts.
    """
    return df.select([_cast_column(df, c, t).alias(c) for c, t in schema.items()])


def _cast_column(df: pl.DataFrame, column: str, dtype: pl.DataType) -> pl.Expr:
    if column not in df.columns:
        return pl.lit(None).cast(dtype)
    expr = pl.col(column)
    if df.schema[column] == pl.String:
        if dtype == pl.Date:
            return expr.str.to_date(strict=True)
        if isinstance(dtype, pl.Datetime):
            return expr.str.to_datetime(time_unit=dtype.time_unit, strict=True)
    return expr.cast(dtype)


F = TypeVar("F", bound=Callable[..., Any])


def _is_pandas_frame(value: object) -> bool:
    """A pandas DataFrame, told without importing pandas."""
    return type(value).__name__ == "DataFrame" and type(value).__module__.startswith("pandas")


def _as_pandas(result: Any) -> Any:
    if isinstance(result, pl.DataFrame):
        return result.to_pandas()
    if isinstance(result, tuple):
        return tuple(_as_pandas(part) for part in result)
    return result


def follows_input(func: F) -> F:
    """Tables in, the same kind of tables out: a function given a pandas DataFrame (as
    any argument) returns pandas DataFrames; given polars, polars.

    The work is done in polars either way; the conversion happens once, at the return.
    """

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        result = func(*args, **kwargs)
        if any(_is_pandas_frame(a) for a in (*args, *kwargs.values())):
            return _as_pandas(result)
        return result

    return cast(F, wrapper)
