"""The competing-risks table: subdistribution and cause-specific hazard ratios side by side."""

from __future__ import annotations

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.tables._format import _DASH, TableRule, _interval, _p_text

__all__ = ["competing_risks_table"]

_MODELS = {"subdistribution": "Fine–Gray", "cause_specific": "cause-specific Cox"}


@follows_input
def competing_risks_table(
    hazards: FrameLike, tests: FrameLike | None = None, *, rule: TableRule | None = None
) -> pl.DataFrame:
    """Per endpoint and term: the subdistribution hazard ratio (Fine–Gray: the effect on
    the cumulative incidence) beside the cause-specific one (Cox with the competing event
    censoring: the effect on the rate among patients free of both), and Gray's test.

    ``hazards`` is a ``models/competing_hazard_ratios`` table
    (:func:`kidneycohort.models.competing.competing_risks_tables`), ``tests`` its
    ``models/competing_tests``. Only the endpoint's own cause is shown (the competing
    event's cause-specific model stays in the model table). A ratio that is not estimable
    reads ``"NE"`` with its reason in ``note``.

    Returns
    -------
    polars.DataFrame
        ``endpoint, term, subdistribution_hr, subdistribution_p, cause_specific_hr,
        cause_specific_p, gray_test_p, note`` as text.
    """
    rule = rule or TableRule()
    table = to_polars(hazards, "competing_hazard_ratios")
    require_columns(table, ("endpoint", "model", "cause", "term", "hr", "estimable"), "hazards")
    own = table.filter(pl.col("cause") == pl.col("endpoint"))
    d = rule.estimate_decimals
    shown = own.select(
        "endpoint",
        "term",
        "model",
        pl.when(pl.col("estimable"))
        .then(_interval(pl.col("hr"), pl.col("hr_lower"), pl.col("hr_upper"), d))
        .otherwise(pl.lit("NE"))
        .alias("hr_text"),
        pl.when(pl.col("estimable"))
        .then(_p_text(pl.col("p"), rule))
        .otherwise(pl.lit(""))
        .alias("p_text"),
        pl.when(~pl.col("estimable"))
        .then(
            pl.concat_str(
                [
                    pl.lit("NE ("),
                    pl.col("model").replace_strict(_MODELS, default=pl.col("model")),
                    pl.lit("): "),
                    pl.col("reason").fill_null("not estimable"),
                ]
            )
        )
        .alias("note"),
    )
    wide = shown.pivot(on="model", index=["endpoint", "term"], values=["hr_text", "p_text"])
    columns = {
        f"{value}_{model}": f"{model}_{name}"
        for model in _MODELS
        for value, name in (("hr_text", "hr"), ("p_text", "p"))
    }
    for column in columns:
        if column not in wide.columns:
            wide = wide.with_columns(pl.lit(_DASH).alias(column))
    notes = shown.group_by("endpoint", "term", maintain_order=True).agg(
        pl.col("note").drop_nulls().str.join("; ")
    )
    out = wide.rename(columns).join(notes, on=["endpoint", "term"], how="left")
    gray = (
        to_polars(tests, "competing_tests").select("endpoint", pl.col("p").alias("_gray"))
        if tests is not None
        else pl.DataFrame(schema={"endpoint": pl.String, "_gray": pl.Float64})
    )
    return (
        out.join(gray, on="endpoint", how="left")
        .with_columns(_p_text(pl.col("_gray"), rule).alias("gray_test_p"))
        .select(
            *["endpoint", "term"], *columns.values(), "gray_test_p", pl.col("note").fill_null("")
        )
        .sort("endpoint", maintain_order=True)
    )
