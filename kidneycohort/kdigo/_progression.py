"""CKD status and KDIGO progression: certain drop (a worse G category with a >= 25 % fall
from baseline) and rapid progression (KDIGO 2012 recommendation 2.1.3).
"""

from __future__ import annotations

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.errors import InputDataError
from kidneycohort.kdigo._categories import _RANK, gfr_category_expr
from kidneycohort.kdigo._sustained import _KEYS, SustainRule, _confirm, _gfr_results, _results
from kidneycohort.value_filter import ValueFilterRule

__all__ = ["ckd_status", "kdigo_progression"]


# ---- CKD and progression -------------------------------------------------------------------
@follows_input
def ckd_status(
    egfr: FrameLike | None = None,
    labs: FrameLike | None = None,
    patients: FrameLike | None = None,
    rule: SustainRule | None = None,
    value_filter: ValueFilterRule | None = None,
) -> pl.DataFrame:
    """CKD present by the KDIGO definition: eGFR < 60 or albuminuria A2+ for > 3 months.

    An eGFR below 60 (or a UACR in A2 or A3) counts when the first usable result at least
    ``rule.confirm_after_days`` later is also below 60 (also A2+). Unlike the category
    stages, the confirming value may be in another category (e.g. G3a then G3b): the
    definition is a threshold, not a category. Structural markers (imaging, biopsy,
    sediment) are outside laboratory tables and are not assessed.

    .. math:: \\text{CKD} \\iff \\exists\\, t: x_t < 60 \\land x_{t'} < 60,\\;
        t' = \\min\\{s : s \\ge t + 90\\,\\text{d}\\}

    Returns
    -------
    polars.DataFrame
        ``patient_id``, ``equation`` (null for patients with UACR only), ``ckd``,
        ``ckd_onset_date``, ``ckd_onset_years`` (the earliest first value of a
        confirmed pair), ``ckd_basis`` (``"egfr_below_60"``, ``"albuminuria_a2_plus"``,
        ``"egfr_and_albuminuria"``), ``egfr_criterion_date``,
        ``albuminuria_criterion_date``.
    """
    rule = rule or SustainRule()
    results = _results(egfr, labs, patients, rule, value_filter)
    abnormal = (
        pl.when(pl.col("category").is_null())
        .then(pl.lit(None, dtype=pl.String))
        .when(pl.col("axis") == "G")
        .then(
            pl.when(pl.col("category").is_in(["G1", "G2"]))
            .then(pl.lit("no"))
            .otherwise(pl.lit("yes"))
        )
        .otherwise(pl.when(pl.col("category") == "A1").then(pl.lit("no")).otherwise(pl.lit("yes")))
    )
    results = _confirm(results.with_columns(_abnormal=abnormal), rule, level="_abnormal")
    hits = results.filter(pl.col("confirmed").fill_null(False) & (pl.col("_abnormal") == "yes"))
    first = (
        hits.sort("_days")
        .group_by(_KEYS)
        .agg(_date=pl.col("sample_date").first(), _years=pl.col("years_from_index").first())
    )
    g_keys = (
        results.filter(pl.col("axis") == "G")
        .select("patient_id", "equation")
        .unique(maintain_order=True)
    )
    a_patients = (
        results.filter(pl.col("axis") == "A").select("patient_id").unique(maintain_order=True)
    )
    a_only = a_patients.join(g_keys.select("patient_id"), on="patient_id", how="anti")
    keys = pl.concat(
        [g_keys, a_only.with_columns(equation=pl.lit(None, dtype=pl.String))],
        how="vertical_relaxed",
    )
    g_first = first.filter(pl.col("axis") == "G").select(
        "patient_id",
        pl.col("_eq").alias("equation"),
        egfr_criterion_date="_date",
        _g_years="_years",
    )
    a_first = first.filter(pl.col("axis") == "A").select(
        "patient_id", albuminuria_criterion_date="_date", _a_years="_years"
    )
    out = keys.join(g_first, on=["patient_id", "equation"], how="left", maintain_order="left").join(
        a_first, on="patient_id", how="left", maintain_order="left"
    )
    g_hit = pl.col("_g_years").is_not_null()
    a_hit = pl.col("_a_years").is_not_null()
    a_first_in_time = a_hit & (~g_hit | (pl.col("_a_years") < pl.col("_g_years")))
    return out.select(
        "patient_id",
        "equation",
        ckd=g_hit | a_hit,
        ckd_onset_date=pl.when(a_first_in_time)
        .then(pl.col("albuminuria_criterion_date"))
        .otherwise(pl.col("egfr_criterion_date")),
        ckd_onset_years=pl.min_horizontal("_g_years", "_a_years"),
        ckd_basis=pl.when(g_hit & a_hit)
        .then(pl.lit("egfr_and_albuminuria"))
        .when(g_hit)
        .then(pl.lit("egfr_below_60"))
        .when(a_hit)
        .then(pl.lit("albuminuria_a2_plus")),
        egfr_criterion_date=pl.col("egfr_criterion_date").cast(pl.Date),
        albuminuria_criterion_date=pl.col("albuminuria_criterion_date").cast(pl.Date),
    )


@follows_input
def kdigo_progression(
    egfr: FrameLike,
    baseline: FrameLike,
    slopes: FrameLike | None = None,
    rule: SustainRule | None = None,
    value_filter: ValueFilterRule | None = None,
    decline_fraction: float = 0.25,
) -> pl.DataFrame:
    """KDIGO progression per patient and equation: certain drop and rapid progression.

    .. math::

        \\text{certain drop at } t \\iff G(x_t) \\succ G(x_0) \\;\\land\\;
        x_t \\le (1 - 0.25)\\,x_0 \\;\\land\\; G(x_t) \\text{ confirmed}

    with :math:`x_0` the baseline eGFR and :math:`t > 0` (after index).

    Parameters
    ----------
    egfr : polars or pandas DataFrame
        ``schemas.EGFR`` rows.
    baseline : polars or pandas DataFrame
        :func:`kidneycohort.baseline.egfr_baseline` output (``schemas.BASELINE``).
    slopes : polars or pandas DataFrame, optional
        :func:`kidneycohort.slopes.egfr_slopes` output; gives ``rapid_progression``.
    rule, value_filter
        As for :func:`category_results`.
    decline_fraction : float
        Fraction of baseline lost for a certain drop (KDIGO 2012: 0.25).

    Returns
    -------
    polars.DataFrame
        One row per baseline row: ``patient_id``, ``equation``, ``baseline_egfr``,
        ``baseline_category``, ``certain_drop`` (null without a baseline),
        ``certain_drop_date``, ``certain_drop_years``, ``certain_drop_category``,
        ``certain_drop_pct_decline``, ``slope_per_year``, ``rapid_progression``.
    """
    if not 0 < decline_fraction < 1:
        raise InputDataError(
            f"kdigo_progression: decline_fraction={decline_fraction} must be between 0 and 1 "
            "(e.g. 0.25 for KDIGO's 25 %)"
        )
    rule = rule or SustainRule()
    base = to_polars(baseline, "baseline")
    require_columns(base, ("patient_id", "equation", "baseline_egfr"), "baseline")
    base = base.select(
        pl.col("patient_id").cast(pl.String),
        pl.col("equation").cast(pl.String),
        pl.col("baseline_egfr").cast(pl.Float64),
    ).with_columns(baseline_category=gfr_category_expr("baseline_egfr"))
    results = _confirm(_gfr_results(egfr, value_filter), rule)
    rank = pl.col("category").replace_strict(_RANK, default=None, return_dtype=pl.Int8)
    base_rank = pl.col("baseline_category").replace_strict(
        _RANK, default=None, return_dtype=pl.Int8
    )
    drops = (
        results.join(base, on=["patient_id", "equation"], how="inner")
        .filter(
            pl.col("confirmed").fill_null(False)
            & (pl.col("years_from_index") > 0)
            & (rank > base_rank)
            & (pl.col("value") <= (1 - decline_fraction) * pl.col("baseline_egfr") + 1e-9)
        )
        .sort("_days", "value")
        .group_by("patient_id", "equation")
        .agg(
            certain_drop_date=pl.col("sample_date").first(),
            certain_drop_years=pl.col("years_from_index").first(),
            certain_drop_category=pl.col("category").first(),
            certain_drop_pct_decline=(
                100 * (1 - pl.col("value") / pl.col("baseline_egfr"))
            ).first(),
        )
    )
    out = base.join(drops, on=["patient_id", "equation"], how="left", maintain_order="left")
    out = out.with_columns(
        certain_drop=pl.when(pl.col("baseline_egfr").is_not_null()).then(
            pl.col("certain_drop_years").is_not_null()
        )
    )
    if slopes is not None:
        sl = to_polars(slopes, "slopes")
        require_columns(sl, ("patient_id", "equation", "slope_per_year", "rapid_decline"), "slopes")
        out = out.join(
            sl.select(
                pl.col("patient_id").cast(pl.String),
                pl.col("equation").cast(pl.String),
                "slope_per_year",
                pl.col("rapid_decline").alias("rapid_progression"),
            ),
            on=["patient_id", "equation"],
            how="left",
            maintain_order="left",
        )
    else:
        out = out.with_columns(
            slope_per_year=pl.lit(None, dtype=pl.Float64),
            rapid_progression=pl.lit(None, dtype=pl.Boolean),
        )
    return out.select(
        "patient_id",
        "equation",
        "baseline_egfr",
        "baseline_category",
        "certain_drop",
        pl.col("certain_drop_date").cast(pl.Date),
        "certain_drop_years",
        "certain_drop_category",
        "certain_drop_pct_decline",
        "slope_per_year",
        "rapid_progression",
    )
