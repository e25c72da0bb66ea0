"""Operating characteristics from the per-trial estimates, with Monte Carlo errors.

For each scenario, endpoint and sample size, over the :math:`R` simulated trials:

- rejection rate :math:`\\hat p = r / R` (power under the effect, type I error under
  the null), Monte Carlo SE :math:`\\sqrt{\\hat p (1 - \\hat p) / R}`; a trial whose
  estimate is not estimable counts as not rejecting;
- over the :math:`R_e` estimable trials: mean estimate, bias against the true value
  with Monte Carlo SE :math:`s / \\sqrt{R_e}` (:math:`s` the empirical SD of the
  estimates), mean model SE, coverage of the confidence interval with Monte Carlo SE
  :math:`\\sqrt{\\hat c (1 - \\hat c) / R_e}`;
- mean numbers of events per trial (time-to-event endpoints).

(Morris TP, White IR, Crowther MJ. Using simulation studies to evaluate statistical
methods. Stat Med 2019;38:2074-2102, doi:10.1002/sim.8086, Table 6.) A quantity that
cannot be computed is null with its reason in ``note``, never a number.
"""

from __future__ import annotations

import polars as pl

__all__ = ["SUMMARY_COLUMNS", "summarise_estimates"]

SUMMARY_COLUMNS = (
    "scenario",
    "analysis",
    "endpoint",
    "sample_size",
    "trials",
    "estimable_trials",
    "rejections",
    "rejection_rate",
    "rejection_rate_mc_se",
    "true_value",
    "mean_estimate",
    "bias",
    "bias_mc_se",
    "empirical_se",
    "mean_model_se",
    "coverage",
    "coverage_mc_se",
    "mean_events",
    "mean_events_control",
    "mean_events_treatment",
    "note",
)


def summarise_estimates(estimates: pl.DataFrame) -> pl.DataFrame:
    """One row per scenario, analysis, endpoint and sample size (:data:`SUMMARY_COLUMNS`).

    ``estimates`` holds the per-trial rows with a ``true_value`` column (null where the
    scenario has no known true value for the endpoint).
    """
    ok = pl.col("estimable")
    covered = (pl.col("lower") <= pl.col("true_value")) & (pl.col("true_value") <= pl.col("upper"))
    grouped = estimates.group_by("scenario", "analysis", "endpoint", "sample_size").agg(
        pl.len().cast(pl.Int64).alias("trials"),
        ok.sum().cast(pl.Int64).alias("estimable_trials"),
        pl.col("rejected").sum().cast(pl.Int64).alias("rejections"),
        pl.col("true_value").first().alias("true_value"),
        pl.col("estimate").filter(ok).mean().alias("mean_estimate"),
        pl.col("estimate").filter(ok).std().alias("empirical_se"),
        pl.col("se").filter(ok).mean().alias("mean_model_se"),
        covered.filter(ok).cast(pl.Float64).mean().alias("coverage"),
        (pl.col("events_control") + pl.col("events_treatment"))
        .cast(pl.Float64)
        .mean()
        .alias("mean_events"),
        pl.col("events_control").cast(pl.Float64).mean().alias("mean_events_control"),
        pl.col("events_treatment").cast(pl.Float64).mean().alias("mean_events_treatment"),
        pl.col("reason").drop_nulls().mode().first().alias("_reason"),
    )
    rate = pl.col("rejections") / pl.col("trials")
    n_ok = pl.col("estimable_trials")
    no_truth = pl.col("true_value").is_null() | pl.col("true_value").is_nan()
    out = grouped.with_columns(
        rate.alias("rejection_rate"),
        (rate * (1 - rate) / pl.col("trials")).sqrt().alias("rejection_rate_mc_se"),
        pl.when(no_truth | (n_ok == 0))
        .then(None)
        .otherwise(pl.col("mean_estimate") - pl.col("true_value"))
        .alias("bias"),
        pl.when(no_truth | (n_ok < 2))
        .then(None)
        .otherwise(pl.col("empirical_se") / n_ok.sqrt())
        .alias("bias_mc_se"),
        pl.when(no_truth | (n_ok == 0)).then(None).otherwise(pl.col("coverage")).alias("coverage"),
        pl.when(no_truth | (n_ok == 0))
        .then(None)
        .otherwise((pl.col("coverage") * (1 - pl.col("coverage")) / n_ok).sqrt())
        .alias("coverage_mc_se"),
        _note(no_truth, n_ok).alias("note"),
    )
    order = {"effect": 0, "null": 1}
    return out.sort(
        pl.col("scenario").replace_strict(order, default=2),
        pl.col("analysis"),
        pl.col("endpoint"),
        pl.col("sample_size"),
    ).select(SUMMARY_COLUMNS)


def _note(no_truth: pl.Expr, n_ok: pl.Expr) -> pl.Expr:
    parts = [
        pl.when(n_ok < pl.col("trials")).then(
            pl.format(
                "{} of {} trials not estimable (most often: {})",
                pl.col("trials") - n_ok,
                pl.col("trials"),
                pl.col("_reason"),
            )
        ),
        pl.when(no_truth).then(
            pl.lit(
                "bias and coverage not estimable: no true value of this estimate in the "
                "scenario (a hazard ratio has none in closed form; set "
                "design.reference_patients for a large-trial reference)"
            )
        ),
    ]
    return pl.concat_str(parts, separator="; ", ignore_nulls=True).replace("", None)
