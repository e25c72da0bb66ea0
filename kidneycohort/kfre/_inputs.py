"""The KFRE inputs of each patient at a chosen time, and the risk at the index date."""

from __future__ import annotations

from typing import Any, Final

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort._rules import resolve_rules
from kidneycohort.ages import age_at_index_expr, has_age
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kfre._equation import KFRE_REASONS, add_kfre_risk
from kidneycohort.kfre._rule import KfreRule
from kidneycohort.schemas import DAYS_PER_YEAR
from kidneycohort.uacr import uacr_timeline
from kidneycohort.value_filter import ValueFilterRule, usable_egfr

__all__ = ["KFRE_SUMMARY_REASONS", "ON_KFRT", "kfre_at_baseline", "kfre_inputs"]


@follows_input
def kfre_inputs(
    egfr: FrameLike,
    labs: FrameLike,
    patients: FrameLike,
    equation: str,
    at_years: float | FrameLike = 0.0,
    lookback_days: float = 365.0,
    value_filter: ValueFilterRule | None = None,
) -> pl.DataFrame:
    """The KFRE inputs of each patient at a chosen time: the latest values before it.

    For each patient the latest usable eGFR (of ``equation``) and the latest UACR in
    ``[at - lookback_days, at]`` are taken; age is the age at ``at``.

    Parameters
    ----------
    egfr : polars or pandas DataFrame
        ``schemas.EGFR`` rows.
    labs : polars or pandas DataFrame
        Harmonised labs with UACR rows (see :func:`kidneycohort.uacr.uacr_timeline`).
    patients : polars or pandas DataFrame
        ``patient_id``, ``sex`` and ``age_at_index`` or (``birth_date``, ``index_date``).
    equation : str
        The eGFR equation id to use (KFRE was developed with CKD-EPI/MDRD creatinine eGFR).
    at_years : float or DataFrame
        Years from index of the assessment (0: at index); or a table of ``patient_id``,
        ``at_years`` giving one time per patient.
    lookback_days : float
        How far back a value may be.
    value_filter : ValueFilterRule, optional
        eGFR results it excludes are not used.

    Returns
    -------
    polars.DataFrame
        ``patient_id``, ``at_years``, ``age_years``, ``sex``, ``egfr``, ``egfr_years``,
        ``uacr_mg_g``, ``uacr_years``: one row per patient of ``patients``.
    """
    pts = to_polars(patients, "patients")
    require_columns(pts, ("patient_id", "sex"), "patients")
    pts = pts.with_columns(pl.col("patient_id").cast(pl.String))
    if isinstance(at_years, int | float):
        at = pts.select("patient_id", at_years=pl.lit(float(at_years)))
    else:
        at = to_polars(at_years, "at_years")
        require_columns(at, ("patient_id", "at_years"), "at_years")
        at = at.select(pl.col("patient_id").cast(pl.String), pl.col("at_years").cast(pl.Float64))
    if not has_age(pts.columns):
        raise InputDataError(
            "patients: missing column 'age_at_index' (or 'birth_date' with 'index_date') "
            "needed for the KFRE age"
        )
    age_at_index = age_at_index_expr(pts.columns)
    out = at.join(
        pts.select("patient_id", "sex", _age0=age_at_index), on="patient_id", how="left"
    ).with_columns(age_years=pl.col("_age0") + pl.col("at_years"))
    lookback = lookback_days / DAYS_PER_YEAR
    eg = usable_egfr(egfr, value_filter)
    known = eg["equation"].unique().to_list()
    if equation not in known:
        raise InputDataError(
            f"egfr: no rows for equation {equation!r}{did_you_mean(equation, known)}"
        )
    eg = eg.filter((pl.col("equation") == equation) & pl.col("_finite") & ~pl.col("excluded"))
    eg = eg.select("patient_id", "years_from_index", pl.col("egfr").alias("_v"))
    ua = uacr_timeline(labs, patients).filter(
        pl.col("uacr_mg_g").is_not_null() & pl.col("years_from_index").is_not_null()
    )
    ua = ua.select("patient_id", "years_from_index", pl.col("uacr_mg_g").alias("_v"))
    for name, values in (("egfr", eg), ("uacr_mg_g", ua)):
        latest = (
            values.join(at, on="patient_id")
            .filter(
                (pl.col("years_from_index") <= pl.col("at_years") + 1e-9)
                & (pl.col("years_from_index") >= pl.col("at_years") - lookback - 1e-9)
            )
            .sort("patient_id", "years_from_index", "_v")
            .group_by("patient_id")
            .agg(pl.col("_v").last().alias(name), pl.col("years_from_index").last().alias("_t"))
        )
        out = out.join(latest, on="patient_id", how="left", maintain_order="left").rename(
            {"_t": "egfr_years" if name == "egfr" else "uacr_years"}
        )
    return out.select(
        "patient_id",
        "at_years",
        "age_years",
        "sex",
        "egfr",
        "egfr_years",
        "uacr_mg_g",
        "uacr_years",
    )


ON_KFRT: Final = "on_kfrt_at_baseline"
"""Extra ``kfre_reason``: kidney replacement therapy began on or before the assessment."""


KFRE_SUMMARY_REASONS: Final[dict[str, str]] = {
    **KFRE_REASONS,
    ON_KFRT: "kidney replacement therapy already started: the equation does not apply",
}


# ---- KFRE at baseline ---------------------------------------------------------------------
@follows_input
def kfre_at_baseline(
    egfr: FrameLike,
    labs: FrameLike,
    cohort: FrameLike,
    *,
    equation: str,
    rule: KfreRule | None = None,
    value_filter: ValueFilterRule | None = None,
    group_column: str | None = "group",
    **options: Any,
) -> pl.DataFrame:
    """Two- and five-year KFRE risk of each patient at the index date.

    The inputs are the latest usable eGFR of ``equation`` and the latest UACR within
    ``lookback_days`` before (or on) the index date, and the age at index
    (:func:`kidneycohort.kfre.kfre_inputs`); the risk is the 4-variable KFRE
    (:func:`kidneycohort.kfre.add_kfre_risk`, Tangri 2011 with the 2016 regional baseline
    survivals):

    .. math:: \\text{risk}(t) = 1 - S_0(t)^{\\exp(\\eta)}

    Applicability is stated per patient: ``kfre_applicable`` is true when a risk was
    computed, and ``kfre_reason`` names why not (:data:`KFRE_SUMMARY_REASONS`). Besides
    the checks of :func:`~kidneycohort.kfre.kfre`, a patient whose ``kfrt_date`` is on
    or before the index date is already on kidney replacement therapy and gets
    ``on_kfrt_at_baseline`` (the equation predicts the start of it).

    Parameters
    ----------
    egfr, labs, cohort : polars or pandas DataFrame
        ``egfr.parquet`` rows, harmonised labs (UACR in mg/g) and harmonised patients.
    equation : str
        The eGFR equation (the study's primary one).
    rule : KfreRule, optional
        Region of the baseline survivals and the look-back; keyword ``options`` override
        its fields.
    value_filter
        Passed to the KFRE functions.
    group_column : str or None
        A ``cohort`` column copied to the output (the grouping of :func:`kfre_summary_table`).

    Returns
    -------
    polars.DataFrame
        One row per patient of ``cohort``: ``patient_id``, ``equation``,
        the inputs (``at_years``, ``age_years``, ``sex``, ``egfr``, ``egfr_years``,
        ``uacr_mg_g``, ``uacr_years``), ``kfre_2y``, ``kfre_5y``, ``kfre_region``,
        ``kfre_applicable``, ``kfre_reason``.
    """
    resolved = resolve_rules(KfreRule, rule, options, "kfre_at_baseline")
    pts = to_polars(cohort, "cohort")
    require_columns(pts, ("patient_id",), "cohort")
    inputs = kfre_inputs(
        egfr,
        labs,
        pts,
        equation,
        at_years=0.0,
        lookback_days=resolved.lookback_days,
        value_filter=value_filter,
    )
    risk = add_kfre_risk(inputs, region=resolved.region)
    pts = pts.with_columns(pl.col("patient_id").cast(pl.String))
    extra = [pl.col("patient_id")]
    if group_column is not None and group_column in pts.columns:
        extra.append(pl.col(group_column).cast(pl.String))
    on_kfrt = pl.lit(False)
    if "kfrt_date" in pts.columns and "index_date" in pts.columns:
        on_kfrt = (
            pl.col("kfrt_date").cast(pl.Date) <= pl.col("index_date").cast(pl.Date)
        ).fill_null(False)
    extra.append(on_kfrt.alias("_on_kfrt"))
    out = risk.join(
        pts.select(extra).unique("patient_id", keep="first", maintain_order=True),
        on="patient_id",
        how="left",
        maintain_order="left",
    )
    reason = pl.when(pl.col("_on_kfrt")).then(pl.lit(ON_KFRT)).otherwise(pl.col("kfre_reason"))
    out = out.with_columns(
        kfre_reason=reason,
        kfre_2y=pl.when(pl.col("_on_kfrt")).then(None).otherwise(pl.col("kfre_2y")),
        kfre_5y=pl.when(pl.col("_on_kfrt")).then(None).otherwise(pl.col("kfre_5y")),
        equation=pl.lit(equation, dtype=pl.String),
    ).with_columns(kfre_applicable=pl.col("kfre_reason").is_null())
    group = [group_column] if group_column is not None and group_column in out.columns else []
    return out.select(
        "patient_id",
        "equation",
        "at_years",
        "age_years",
        "sex",
        "egfr",
        "egfr_years",
        "uacr_mg_g",
        "uacr_years",
        "kfre_2y",
        "kfre_5y",
        "kfre_region",
        "kfre_applicable",
        "kfre_reason",
        *group,
    )
