"""The slope analysis under informative dropout, formatted for sharing."""

from __future__ import annotations

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.tables._format import TableRule, _format_fixed, _interval, _p_text

__all__ = ["dropout_table"]

_ANALYSIS_LABELS = {
    "joint": "Joint model of eGFR and dropout",
    "mixed": "Mixed model alone (dropout at random)",
    "delta_adjusted": "Delta-adjusted imputation",
    "stated_value_at_kidney_failure": "eGFR set at kidney failure",
}


@follows_input
def dropout_table(
    slopes: FrameLike, sensitivity: FrameLike | None = None, *, rule: TableRule | None = None
) -> pl.DataFrame:
    """The treatment difference in slope under each dropout assumption, one row each.

    ``slopes`` is a ``models/dropout_slopes`` table and ``sensitivity`` a
    ``models/dropout_sensitivity`` table
    (:func:`kidneycohort.models.joint.dropout_analysis`). Shown: the differences between
    groups from the joint model and the mixed model alone, the association of eGFR with
    the dropout hazard, the deltas of the delta-adjusted analysis's grid and extension
    (the tipping point, found by bisection, in the first row's ``note``) and the
    stated-value analysis. A row that is not estimable reads
    ``"NE"`` with its reason in ``note``.

    Returns
    -------
    polars.DataFrame
        ``analysis, assumption, contrast, quantity, estimate_ci, p, note`` as text.
    """
    rule = rule or TableRule()
    d = rule.estimate_decimals
    table = to_polars(slopes, "dropout_slopes")
    require_columns(table, ("model", "contrast", "quantity", "estimate"), "dropout_slopes")
    shown = table.filter(
        pl.col("contrast").str.contains(" - ") | (pl.col("quantity") == "association")
    ).select(
        pl.col("model").alias("analysis"),
        pl.when(pl.col("model") == "joint")
        .then(pl.lit("dropout depends on the current eGFR or slope"))
        .otherwise(pl.lit("dropout at random given the observed values"))
        .alias("assumption"),
        "contrast",
        "quantity",
        pl.col("estimate"),
        pl.col("lower"),
        pl.col("upper"),
        "p",
        "estimable",
        pl.col("note").fill_null("").alias("note"),
    )
    parts = [shown]
    if sensitivity is not None:
        other = to_polars(sensitivity, "dropout_sensitivity")
        # bisection steps stay in the model table; the tipping point is said once
        other = other.filter(pl.col("step").fill_null("") != "bisection").with_columns(
            pl.when(pl.int_range(pl.len()).over("analysis") > 0)
            .then(pl.lit(None, dtype=pl.Float64))
            .otherwise(pl.col("tipping_point"))
            .alias("tipping_point"),
            pl.when(pl.int_range(pl.len()).over("analysis", "note") > 0)
            .then(pl.lit(None, dtype=pl.String))
            .otherwise(pl.col("note"))
            .alias("note"),
        )
        parts.append(
            other.select(
                "analysis",
                pl.when(pl.col("analysis") == "delta_adjusted")
                .then(
                    pl.concat_str(
                        [pl.lit("delta = "), _format_fixed(pl.col("delta"), 2), pl.lit(" per year")]
                    )
                )
                .otherwise(pl.col("step").str.replace_all("_", " "))
                .alias("assumption"),
                "contrast",
                "quantity",
                "estimate",
                "lower",
                "upper",
                "p",
                "estimable",
                pl.concat_str(
                    [
                        pl.when(pl.col("tipping_point").is_not_null())
                        .then(
                            pl.concat_str(
                                [
                                    pl.lit("tipping point at delta = "),
                                    _format_fixed(pl.col("tipping_point"), 2),
                                ]
                            )
                        )
                        .otherwise(pl.lit("")),
                        pl.col("note").fill_null(""),
                    ],
                    separator="; ",
                )
                .str.strip_chars("; ")
                .alias("note"),
            )
        )
    rows = pl.concat(parts, how="vertical_relaxed")
    return rows.select(
        pl.col("analysis").replace(_ANALYSIS_LABELS),
        "assumption",
        pl.col("contrast").fill_null(""),
        pl.col("quantity").fill_null("").str.replace_all("_", " "),
        pl.when(pl.col("estimable"))
        .then(_interval(pl.col("estimate"), pl.col("lower"), pl.col("upper"), d))
        .otherwise(pl.lit("NE"))
        .alias("estimate_ci"),
        pl.when(pl.col("estimable"))
        .then(_p_text(pl.col("p"), rule))
        .otherwise(pl.lit("NE"))
        .alias("p"),
        "note",
    )
