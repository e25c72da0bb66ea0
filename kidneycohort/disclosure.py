"""Disclosure control: how counts of people are shown so that no small cell is revealed.

Data-use agreements commonly forbid showing a count of people between 1 and a threshold
(often 10; "cells below 11") in any shared output. Such a count is printed as
``"<11"`` (threshold + 1); zero stays ``"0"`` (an empty cell discloses nobody).
"""

from __future__ import annotations

from typing import Final

import polars as pl

__all__ = ["DEFAULT_SMALL_CELL_THRESHOLD", "small_cell_text", "small_count_text"]

DEFAULT_SMALL_CELL_THRESHOLD: Final = 10
"""Counts from 1 to this are not shown (common practice under data-use agreements)."""


def small_cell_text(counts: pl.Expr, threshold: int = DEFAULT_SMALL_CELL_THRESHOLD) -> pl.Expr:
    """Expression printing counts, with 1..``threshold`` shown as ``"<threshold+1>"``.

    Zero stays ``"0"`` (an empty cell discloses nobody); nulls stay null.
    """
    # the count comes first so that the result keeps the count's column name
    return (
        pl.when(counts.is_null() | ~counts.is_between(1, threshold))
        .then(counts.cast(pl.Int64).cast(pl.String))
        .otherwise(pl.lit(f"<{threshold + 1}"))
    )


def small_count_text(n: int, threshold: int = DEFAULT_SMALL_CELL_THRESHOLD) -> str:
    """One count as text: ``"<threshold+1>"`` for 1..``threshold``, else with separators.

    >>> small_count_text(7), small_count_text(0), small_count_text(1234)
    ('<11', '0', '1,234')
    """
    return f"<{threshold + 1}" if 1 <= n <= threshold else f"{n:,}"
