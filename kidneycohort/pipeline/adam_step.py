"""The ADaM export as a pipeline step (config key ``adam``).

A thin adapter, like the steps in :mod:`kidneycohort.pipeline.steps`: it hands the
endpoints and the harmonised patients to :func:`kidneycohort.adam.adtte_dataset` and
returns ``adam_tte`` (written as ``adam_tte.csv`` / ``.parquet``).
"""

from __future__ import annotations

import logging
from typing import Any, Literal

import polars as pl
from pydantic import BaseModel, ConfigDict, Field

from kidneycohort.errors import ConfigError
from kidneycohort.pipeline.registry import StepContext, StepRegistry

logger = logging.getLogger(__name__)


class AdamSection(BaseModel):
    """ADaM export (config key ``adam``): the parameters of the ADaM dataset builders."""

    model_config = ConfigDict(extra="forbid")

    study_id: str | None = Field(None, description="STUDYID of every row; default `study.name`.")
    time_unit: Literal["days", "years"] = Field("days", description="Unit of ADTTE.AVAL.")
    count_start_day: bool = Field(
        True, description="In days, count the origin date as day 1 (AVAL = ADT - STARTDT + 1)."
    )


def _group_and_order(ctx: StepContext, cohort: pl.DataFrame) -> tuple[pl.DataFrame, list[str]]:
    """The cohort with ``group`` taken from the survival section's group column, and the
    arm order: the reference group first, then the others in text order."""
    from kidneycohort.models.survival import SurvivalSpec

    survival = ctx.sections.get("survival")
    spec = survival if isinstance(survival, SurvivalSpec) else SurvivalSpec()
    column = spec.group_column
    if column not in cohort.columns:
        raise ConfigError(
            f"adam: the treatment column '{column}' (survival.group_column) is not in the "
            "patients table; map it in data.patients.columns"
        )
    subjects = cohort.with_columns(pl.col(column).cast(pl.String).alias("group"))
    arms = sorted(subjects["group"].drop_nulls().unique().to_list())
    if spec.reference_group in arms:
        arms.remove(spec.reference_group)
        arms.insert(0, spec.reference_group)
    return subjects, arms


def add_adam_step(registry: StepRegistry) -> None:
    """Register ``adam_export`` in ``registry``."""

    @registry.register(
        "adam_export",
        needs=["endpoints", "cohort"],
        makes=["adam_tte"],
        section="adam",
        options=AdamSection,
        description="The endpoints as a CDISC ADaM time-to-event dataset (adam_tte.csv/.parquet).",
    )
    def adam_step(ctx: StepContext) -> dict[str, Any]:
        """ADTTE: every randomised subject per endpoint, with treatment and flags."""
        from kidneycohort.adam import to_adam_tte
        from kidneycohort.pipeline.steps import EndpointsSection

        opts = ctx.options
        assert isinstance(opts, AdamSection)
        endpoints = ctx.sections.get("endpoints")
        if not isinstance(endpoints, EndpointsSection):
            raise ConfigError("adam: the ADaM export needs the 'endpoints' section; add it")
        study = ctx.sections.get("study")
        study_id = opts.study_id if opts.study_id is not None else getattr(study, "name", "")
        table = ctx.tables["endpoints"]
        skipped = table.filter(pl.col("event").is_null())
        if skipped.height:
            by_reason = skipped.group_by("reason").len().sort("reason")
            logger.info(
                "ADaM export: not-evaluable rows censored at their origin, by reason: %s",
                ", ".join(f"{r}: {n}" for r, n in by_reason.rows()),
            )
        subjects, arms = _group_and_order(ctx, ctx.tables["cohort"])
        return {
            "adam_tte": to_adam_tte(
                table,
                endpoints.definitions,
                subjects=subjects,
                arm_order=arms,
                study_id=str(study_id),
                time_unit=opts.time_unit,
                count_start_day=opts.count_start_day,
            )
        }
