"""Row identity and row outcomes: source row numbers, the first failing check of each row
(its reason code and detail), exact duplicates, and the rejected and merged row tables.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import polars as pl

from kidneycohort.errors import InputDataError

__all__ = [
    "Check",
    "_assumption_counts",
    "_cascade",
    "_date_text",
    "_exact_duplicates",
    "_in_source_order",
    "_lazy",
    "_merged_rows",
    "_rejected_rows",
    "_text",
    "_with_row_identity",
]


def _lazy(data: Any, name: str) -> pl.LazyFrame:
    if isinstance(data, pl.LazyFrame):
        return data
    if isinstance(data, pl.DataFrame):
        return data.lazy()
    import pandas as pd

    if isinstance(data, pd.DataFrame):
        return pl.from_pandas(data).lazy()
    raise InputDataError(
        f"{name}: expected a polars or pandas DataFrame, got {type(data).__name__}"
    )


def _text(column: str) -> pl.Expr:
    """A column as stripped text, empty text as null."""
    t = pl.col(column).cast(pl.String).str.strip_chars()
    return pl.when(t != "").then(t)


def _with_row_identity(frame: pl.LazyFrame, table: str) -> pl.LazyFrame:
    names = frame.collect_schema().names()
    frame = frame.with_row_index("_rid")
    exprs = []
    if "source_row" not in names:
        exprs.append((pl.col("_rid").cast(pl.Int64) + 1).alias("source_row"))
    else:
        exprs.append(pl.col("source_row").cast(pl.Int64))
    if "source" not in names:
        exprs.append(pl.lit(table, pl.String).alias("source"))
    else:
        exprs.append(pl.col("source").cast(pl.String).fill_null(table))
    if "assumption" not in names:
        exprs.append(pl.lit(None, pl.String).alias("assumption"))
    return frame.with_columns(exprs)


Check = tuple[pl.Expr, str, pl.Expr]  # (failing condition, reason code, detail text)


def _cascade(checks: list[Check]) -> pl.Expr:
    """First failing check wins: the ``_reason`` expression (null when all pass).

    Works on small integers (the index of each failing check, then the smallest) and
    names the code last, which is much cheaper than a chain of text branches.
    """
    failing = [
        pl.when(condition.fill_null(False)).then(pl.lit(i, pl.UInt8))
        for i, (condition, _, _) in enumerate(checks)
    ]
    names = {i: code for i, (_, code, _) in enumerate(checks)}
    return (
        pl.min_horizontal(failing)
        .replace_strict(names, default=None, return_dtype=pl.String)
        .alias("_reason")
    )


def _detail(checks: list[Check]) -> pl.Expr:
    """The readable detail of ``_reason``; evaluated on rejected rows only (cheap)."""
    detail: Any = pl
    for _, code, text in checks:
        detail = detail.when(pl.col("_reason") == code).then(text)
    return detail.otherwise(pl.lit(None, pl.String))


def _date_text(expr: pl.Expr) -> pl.Expr:
    return expr.cast(pl.Date).cast(pl.String)


def _first_distinct(frame: pl.DataFrame, keys: list[str]) -> pl.Series:
    """True on the first row (in frame order) of each group of identical ``keys``."""
    return frame.select(pl.struct(keys).is_first_distinct()).to_series()


def _merged_rows(
    frame: pl.DataFrame, mask: pl.Series, reason: str, table: str, detail: pl.Expr
) -> pl.DataFrame:
    return frame.filter(mask).select(
        pl.lit(table).alias("table"),
        "source",
        "source_row",
        "patient_id",
        pl.lit(reason).alias("reason"),
        detail.alias("detail"),
    )


def _rejected_rows(frame: pl.DataFrame, table: str, checks: list[Check]) -> pl.DataFrame:
    return frame.filter(pl.col("_reason").is_not_null()).select(
        pl.lit(table).alias("table"),
        "source",
        "source_row",
        "patient_id",
        pl.col("_reason").alias("reason"),
        _detail(checks).alias("detail"),
    )


def _exact_duplicates(
    frame: pl.DataFrame, keys: list[str], table: str
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Split ``frame`` (sorted by source, source_row) into first copies and merged rows.

    Rows are compared exactly on ``keys``; a hash of the keys only narrows the search to
    candidate groups first, so the exact comparison runs on few rows.
    """
    hashed = frame.select(pl.struct(keys).hash().alias("_h")).to_series()
    candidate = hashed.is_duplicated()
    if not candidate.any():
        empty = _merged_rows(
            frame.head(0), pl.Series([], dtype=pl.Boolean), "exact_duplicate", table, pl.lit("")
        )
        return frame, empty
    positions = np.flatnonzero(candidate.to_numpy())
    subset = frame[positions]
    subset_first = _first_distinct(subset, keys).to_numpy()
    first_np = np.ones(frame.height, dtype=bool)
    first_np[positions[~subset_first]] = False
    first = pl.Series(first_np)
    kept_as = subset.filter(pl.Series(subset_first)).select(
        *keys, pl.format("{}:{}", "source", "source_row").alias("_kept_as")
    )
    dupes = frame.filter(~first).join(kept_as, on=keys, how="left", nulls_equal=True)
    merged = _merged_rows(
        dupes,
        pl.repeat(True, dupes.height, eager=True),
        "exact_duplicate",
        table,
        pl.format("identical to row {}", pl.col("_kept_as")),
    )
    return frame.filter(first), merged


def _in_source_order(frame: pl.DataFrame) -> pl.DataFrame:
    """Sort by (source, source_row, _rid) unless the rows already are in that order."""
    one_source = frame["source"].n_unique() <= 1
    if one_source and frame["source_row"].is_sorted() and frame["_rid"].is_sorted():
        return frame
    return frame.sort("source", "source_row", "_rid")


def _assumption_counts(frame: pl.DataFrame, table: str) -> pl.DataFrame:
    return (
        frame.filter(pl.col("assumption").is_not_null())
        .group_by("source", "assumption")
        .agg(pl.len().cast(pl.Int64).alias("rows"))
        .select(pl.lit(table).alias("table"), "source", "assumption", "rows")
    )
