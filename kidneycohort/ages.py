"""Ages, derived one way everywhere: from the dates when the dates exist.

A patient's age at the index date is the exact age from ``birth_date`` and
``index_date`` (days / 365.25) whenever both dates are known; a given
``age_at_index`` is used only for patients without them. An ``age_at_index`` column
that is present but empty therefore never hides ages the dates give (every stage —
eGFR, the baseline table, KFRE, ADaM — reads the same expression).
"""

from __future__ import annotations

from collections.abc import Iterable

import polars as pl

from kidneycohort.schemas import DAYS_PER_YEAR

__all__ = ["age_at_index_expr", "age_on_expr", "has_age"]


def _exact_years(start: pl.Expr, end: pl.Expr) -> pl.Expr:
    return (end.cast(pl.Date) - start.cast(pl.Date)).dt.total_days() / DAYS_PER_YEAR


def age_at_index_expr(columns: Iterable[str]) -> pl.Expr:
    r"""Age at the index date in exact years, for a table with ``columns``.

    .. math:: \text{age} = (\text{index\_date} - \text{birth\_date})_{\text{days}} / 365.25

    where both dates are known, else ``age_at_index``; null when neither is known.

    >>> import datetime as dt
    >>> people = pl.DataFrame({"birth_date": [dt.date(1950, 1, 1), None],
    ...                        "index_date": [dt.date(2020, 1, 1), dt.date(2020, 1, 1)],
    ...                        "age_at_index": [None, 61.5]})
    >>> people.select(age_at_index_expr(people.columns).round(2).alias("age"))["age"].to_list()
    [70.0, 61.5]
    """
    names = set(columns)
    parts: list[pl.Expr] = []
    if {"birth_date", "index_date"} <= names:
        parts.append(_exact_years(pl.col("birth_date"), pl.col("index_date")))
    if "age_at_index" in names:
        parts.append(pl.col("age_at_index").cast(pl.Float64))
    if not parts:
        return pl.lit(None, dtype=pl.Float64)
    return pl.coalesce(parts) if len(parts) > 1 else parts[0]


def age_on_expr(columns: Iterable[str], date: pl.Expr) -> pl.Expr:
    """Age in exact years on ``date``: from the birth date, else the age at index plus
    the time from the index date (the same precedence as :func:`age_at_index_expr`)."""
    names = set(columns)
    parts: list[pl.Expr] = []
    if "birth_date" in names:
        parts.append(_exact_years(pl.col("birth_date"), date))
    if {"age_at_index", "index_date"} <= names:
        parts.append(
            pl.col("age_at_index").cast(pl.Float64) + _exact_years(pl.col("index_date"), date)
        )
    if not parts:
        return pl.lit(None, dtype=pl.Float64)
    return pl.coalesce(parts) if len(parts) > 1 else parts[0]


def has_age(columns: Iterable[str]) -> bool:
    """Whether a table with ``columns`` can give an age (dates or ``age_at_index``)."""
    names = set(columns)
    return {"birth_date", "index_date"} <= names or "age_at_index" in names
