"""Table options and cell formatting: counts, percentages, intervals, p values, and small-cell
protection with complementary suppression.
"""

from __future__ import annotations

from collections.abc import Sequence

import polars as pl
from pydantic import Field

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort._rules import RuleModel

__all__ = [
    "OVERALL",
    "_DASH",
    "_MISSING_LEVEL",
    "TableRule",
    "_count_text",
    "_format_fixed",
    "_interval",
    "_is_small",
    "_p_text",
    "suppress_small_counts",
    "suppression_footnote",
    "suppression_label",
]

_DASH = "–"


_MISSING_LEVEL = "missing"

OVERALL = "Overall"
"""The column (or row) of all patients, beside the groups."""


class TableRule(RuleModel):
    """Options of the output tables (config key ``tables``)."""

    small_cell_threshold: int = Field(
        10,
        ge=0,
        description="Counts from 1 to this value are shown as '<threshold+1>' (0 turns suppression off).",
    )
    decimals: int = Field(
        1, ge=0, le=6, description="Decimals of means, SDs, medians and percentages."
    )
    estimate_decimals: int = Field(
        2, ge=0, le=6, description="Decimals of rates, slopes and hazard ratios."
    )
    p_decimals: int = Field(
        3, ge=1, le=6, description="Decimals of p values (smaller shown as '<0.001')."
    )
    skew_threshold: float = Field(
        1.0,
        gt=0,
        description="Numeric covariates with |skewness| above this are summarised as median [IQR].",
    )


def suppression_label(rule: TableRule | None = None) -> str:
    """The text shown for a suppressed count, e.g. ``"<11"``."""
    rule = rule or TableRule()
    return f"<{rule.small_cell_threshold + 1}"


def suppression_footnote(rule: TableRule | None = None) -> str:
    """Footnote explaining small-cell suppression, for every aggregate table
    (:func:`kidneycohort.disclosure.disclosure_footnote`)."""
    from kidneycohort.disclosure import disclosure_footnote

    return disclosure_footnote((rule or TableRule()).small_cell_threshold)


def _is_small(count: pl.Expr, rule: TableRule) -> pl.Expr:
    return (count >= 1) & (count <= rule.small_cell_threshold)


def _count_text(count: pl.Expr, rule: TableRule, hide: pl.Expr | None = None) -> pl.Expr:
    hidden = _is_small(count, rule) if hide is None else hide
    return (
        pl.when(count.is_null())
        .then(pl.lit(_DASH))
        .when(hidden)
        .then(pl.lit(suppression_label(rule)))
        .otherwise(count.cast(pl.Int64).cast(pl.String))
    )


def _format_fixed(expr: pl.Expr, decimals: int) -> pl.Expr:
    scale = 10**decimals
    rounded = (expr * scale).round(0)
    sign = pl.when(rounded < 0).then(pl.lit("-")).otherwise(pl.lit(""))
    magnitude = rounded.abs().cast(pl.Int64)
    whole = (magnitude // scale).cast(pl.String)
    if decimals == 0:
        text = pl.concat_str([sign, whole])
    else:
        fraction = (magnitude % scale).cast(pl.String).str.zfill(decimals)
        text = pl.concat_str([sign, whole, pl.lit("."), fraction])
    return (
        pl.when(expr.is_null() | expr.is_nan())
        .then(pl.lit(_DASH))
        .when(expr.is_infinite())
        .then(pl.lit("inf"))
        .otherwise(text)
    )


def _p_text(expr: pl.Expr, rule: TableRule) -> pl.Expr:
    floor = 10.0 ** (-rule.p_decimals)
    return (
        pl.when(expr.is_null() | expr.is_nan())
        .then(pl.lit(_DASH))
        .when(expr < floor)
        .then(pl.lit(f"<{floor:.{rule.p_decimals}f}"))
        .otherwise(_format_fixed(expr, rule.p_decimals))
    )


def _interval(estimate: pl.Expr, lower: pl.Expr, upper: pl.Expr, decimals: int) -> pl.Expr:
    return pl.concat_str(
        [
            _format_fixed(estimate, decimals),
            pl.lit(" ("),
            _format_fixed(lower, decimals),
            pl.lit(" to "),
            _format_fixed(upper, decimals),
            pl.lit(")"),
        ]
    )


def suppress_small_counts(
    frame: FrameLike, count_columns: Sequence[str], *, rule: TableRule | None = None
) -> pl.DataFrame:
    """Return ``frame`` with each of ``count_columns`` as text, counts from 1 to the
    threshold replaced by the suppression label (``"<11"``)."""
    rule = rule or TableRule()
    table = to_polars(frame, "table")
    require_columns(table, count_columns, "table")
    return table.with_columns(_count_text(pl.col(c), rule).alias(c) for c in count_columns)
