"""The ADaM export as a pipeline step (config key ``adam``).

A thin adapter, like the other steps: it hands the
harmonised patients, eGFR, baseline and endpoints to the builders of
:mod:`kidneycohort.adam` and returns ``adam_tte`` (written as ``adam_tte.csv`` /
``.parquet``); ADSL, ADEGFR and ADTTE go to ``adam/`` in the run folder as SAS transport
v5 and Dataset-JSON v1.1 files with ``adam/spec.csv``.
"""

from __future__ import annotations

import logging
from typing import Any

import polars as pl

from kidneycohort.adam import AdamRule
from kidneycohort.errors import ConfigError
from kidneycohort.pipeline.registry import StepContext, StepRegistry

__all__ = ["add_adam"]

logger = logging.getLogger(__name__)


def _group_and_order(ctx: StepContext, cohort: pl.DataFrame) -> tuple[pl.DataFrame, list[str]]:
    """The cohort with ``group`` from the study's group column, and the arm order: the
    reference group first, then the others in text order."""
    from kidneycohort.pipeline.steps._facts import group_column, reference_group

    column = group_column(ctx)
    if column is None:
        subjects = cohort.with_columns(pl.lit("all").alias("group"))
        return subjects, ["all"]
    if column not in cohort.columns:
        raise ConfigError(
            f"study.group_column: the treatment column '{column}' is not in the patients "
            "table; map it in data.patients.columns"
        )
    subjects = cohort.with_columns(pl.col(column).cast(pl.String).alias("group"))
    arms = sorted(subjects["group"].drop_nulls().unique().to_list())
    reference = reference_group(ctx)
    if reference in arms:
        arms.remove(reference)
        arms.insert(0, reference)
    return subjects, arms


def _kidney_failure_dates(endpoints: pl.DataFrame, definitions: list[Any]) -> pl.DataFrame:
    """First kidney-failure date per patient as the endpoint rules counted it."""
    names = [d.name for d in definitions if d.kind == "kidney_failure"]
    return (
        endpoints.filter(pl.col("endpoint").is_in(names) & (pl.col("event") == 1))
        .group_by("patient_id")
        .agg(pl.col("end_date").min().alias("kidney_failure_date"))
    )


def _albuminuria(ctx: StepContext, equation: str) -> pl.DataFrame | None:
    categories = ctx.tables.get("baseline_categories")
    if not isinstance(categories, pl.DataFrame) or "a_category" not in categories.columns:
        return None
    if "equation" in categories.columns:
        categories = categories.filter(pl.col("equation") == equation)
    return categories.select("patient_id", "a_category").unique("patient_id", keep="first")


def add_adam(registry: StepRegistry) -> None:
    """Register ``adam_export`` in ``registry``."""

    @registry.register(
        "adam_export",
        needs=["endpoints", "cohort", "egfr", "baseline"],
        optional_needs=["baseline_categories"],
        makes=["adam_tte", "adam_datasets"],
        section="adam",
        options=AdamRule,
        description="CDISC ADaM datasets: ADTTE (adam_tte.csv/.parquet) and ADSL, ADEGFR, "
        "ADTTE as XPT and Dataset-JSON in adam/ with a spec sheet.",
        cohort_level=True,
    )
    def adam_step(ctx: StepContext) -> dict[str, Any]:
        """ADSL, ADEGFR and ADTTE (every randomised subject, with treatment and flags)."""
        from kidneycohort.adam import adegfr_dataset, adsl_dataset, adtte_dataset, write_adam
        from kidneycohort.adam._bds import paramcd
        from kidneycohort.pipeline.steps._derive import EndpointsSection
        from kidneycohort.pipeline.steps._facts import primary_equation, study_data_cut

        opts = ctx.options
        assert isinstance(opts, AdamRule)
        endpoints = ctx.sections.get("endpoints")
        if not isinstance(endpoints, EndpointsSection):
            raise ConfigError("adam: the ADaM export needs the 'endpoints' section; add it")
        study = ctx.sections.get("study")
        study_id = str(opts.study_id if opts.study_id is not None else getattr(study, "name", ""))
        table = ctx.tables["endpoints"]
        skipped = table.filter(pl.col("event").is_null())
        if skipped.height:
            by_reason = skipped.group_by("reason").len().sort("reason")
            logger.info(
                "ADaM export: not-evaluable rows censored at their origin, by reason: %s",
                ", ".join(f"{r}: {n}" for r, n in by_reason.rows()),
            )
        subjects, arms = _group_and_order(ctx, ctx.tables["cohort"])
        equation = primary_equation(ctx.sections, ctx.tables)
        egfr_ds = adegfr_dataset(
            ctx.tables["egfr"],
            ctx.tables["baseline"],
            subjects,
            visit_windows=opts.visit_windows,
            paramcds=opts.paramcds,
            arm_order=arms,
            study_id=study_id,
        )
        # SRCSEQ of eGFR-dated ADTTE rows: the collected records of the primary equation
        primary = egfr_ds.data.filter(
            (pl.col("PARAMCD") == paramcd(equation, opts.paramcds)) & pl.col("DTYPE").is_null()
        )
        tte = adtte_dataset(
            table,
            endpoints.definitions,
            subjects=subjects,
            egfr_records=primary,
            arm_order=arms,
            study_id=study_id,
            time_unit=opts.time_unit,
            count_start_day=opts.count_start_day,
        )
        adsl = adsl_dataset(
            subjects,
            ctx.tables["baseline"],
            equation=equation,
            data_cut=study_data_cut(ctx),
            kidney_failure_dates=_kidney_failure_dates(table, list(endpoints.definitions)),
            albuminuria_categories=_albuminuria(ctx, equation),
            arm_order=arms,
            study_id=study_id,
        )
        datasets = [adsl, egfr_ds, tte]
        if opts.files:
            write_adam(datasets, ctx.run_dir / "adam", study_oid=study_id)
        return {"adam_tte": tte.data, "adam_datasets": datasets}
