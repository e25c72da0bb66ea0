"""Per-patient derivation steps: baseline, slopes, endpoints, KDIGO stages and grid, KFRE."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import polars as pl
from pydantic import Field

from kidneycohort._batches import by_patient_ranges
from kidneycohort._rules import RuleModel
from kidneycohort.endpoints import EndpointDefinition, EndpointRule
from kidneycohort.errors import InputDataError
from kidneycohort.pipeline.registry import StepContext, StepRegistry
from kidneycohort.pipeline.steps._facts import (
    check_data_cut,
    group_column,
    primary_equation,
    study_data_cut,
)
from kidneycohort.value_filter import ValueFilterRule

__all__ = [
    "EndpointsSection",
    "add_baseline_and_slopes",
    "add_endpoints",
    "add_kdigo",
    "add_kdigo_grid",
    "add_kfre",
]


def add_baseline_and_slopes(registry: StepRegistry) -> None:
    """Steps ``baseline`` and ``slopes``."""
    from kidneycohort.baseline import BaselineRule, egfr_baseline
    from kidneycohort.slopes import SlopeRule, egfr_slopes

    def baseline_step(ctx: StepContext) -> dict[str, Any]:
        """Baseline eGFR per patient and equation."""
        value_filter = ctx.sections.get("value_filter")

        def derive(tables: Mapping[str, pl.DataFrame]) -> pl.DataFrame:
            return egfr_baseline(tables["egfr"], rule=ctx.options, value_filter=value_filter)  # type: ignore[arg-type]

        return {"baseline": _per_patient_equation(derive, ctx)}

    registry.register_patient_wise(
        "baseline",
        per_patient=baseline_step,
        needs=["egfr"],
        makes=["baseline"],
        section="baseline",
        options=BaselineRule,
        extra_sections={"value_filter": ValueFilterRule},
        description="Baseline eGFR per patient and equation (kidneycohort.baseline).",
    )

    def slopes_step(ctx: StepContext) -> dict[str, Any]:
        """Per-patient eGFR slopes."""
        value_filter = ctx.sections.get("value_filter")

        def derive(tables: Mapping[str, pl.DataFrame]) -> pl.DataFrame:
            return egfr_slopes(tables["egfr"], rule=ctx.options, value_filter=value_filter)  # type: ignore[arg-type]

        return {"slopes": _per_patient_equation(derive, ctx)}

    registry.register_patient_wise(
        "slopes",
        per_patient=slopes_step,
        needs=["egfr"],
        makes=["slopes"],
        section="slopes",
        options=SlopeRule,
        extra_sections={"value_filter": ValueFilterRule},
        description="Per-patient least-squares eGFR slopes (kidneycohort.slopes).",
    )


def _per_patient_equation(
    derive: Callable[[Mapping[str, pl.DataFrame]], pl.DataFrame], ctx: StepContext
) -> pl.DataFrame:
    """One row per patient and equation of the eGFR table, in its first-seen order,
    derived one range of patients at a time (the value filter's working tables of a
    million patients' eGFR rows are gigabytes)."""
    return by_patient_ranges(
        derive, {"egfr": ctx.tables["egfr"]}, order_of="egfr", keys=["patient_id", "equation"]
    )


class EndpointsSection(RuleModel):
    """Endpoint definitions and their default rule (config key ``endpoints``).

    A part of the study config only (no stage function takes it whole): the keys are
    arguments of :func:`kidneycohort.endpoints.derive_endpoints`, ``definitions`` and
    ``rule`` its own models. The endpoints are derived on the study's primary equation
    and censored at the study's data cut (``study.data_cut``).
    """

    definitions: list[EndpointDefinition] = Field(
        min_length=1,
        description="Endpoint definitions, each with a `kind` (egfr_decline, egfr_below, "
        "kidney_failure, death, kidney_death, composite) and that kind's keys.",
    )
    rule: EndpointRule = Field(
        default_factory=EndpointRule,
        description="Confirmation and timing rule used by every definition without its own.",
    )


def add_endpoints(registry: StepRegistry) -> None:
    """Step ``endpoints``: time-to-event rows per patient and definition."""
    from kidneycohort.endpoints import derive_endpoints

    def endpoints_step(ctx: StepContext) -> dict[str, Any]:
        """Time-to-event rows, one per patient per endpoint definition."""
        opts = ctx.options
        assert isinstance(opts, EndpointsSection)
        table = derive_endpoints(
            ctx.tables["egfr"],
            ctx.tables["baseline"],
            ctx.tables["cohort"],
            ctx.tables.get("cohort_events"),
            opts.definitions,
            equation=primary_equation(ctx.sections, ctx.tables),
            data_cut=study_data_cut(ctx),
            rule=opts.rule,
        )
        return {"endpoints": table}

    registry.register_patient_wise(
        "endpoints",
        per_patient=endpoints_step,
        needs=["egfr", "baseline", "cohort"],
        optional_needs=["cohort_events"],
        makes=["endpoints"],
        section="endpoints",
        options=EndpointsSection,
        check=check_data_cut,
        description="Time-to-event rows per patient and endpoint (kidneycohort.endpoints).",
    )


def add_kdigo(registry: StepRegistry) -> None:
    """Step ``kdigo``: sustained KDIGO stages, transitions and their counts."""
    from kidneycohort.kdigo import SustainRule, sustained_stages, transition_matrix, transitions

    def kdigo_step(ctx: StepContext) -> dict[str, Any]:
        """Sustained KDIGO stages and transitions per patient."""
        stages = sustained_stages(
            ctx.tables["egfr"],
            ctx.tables["labs"],
            ctx.tables["cohort"],
            rule=ctx.options,  # type: ignore[arg-type]
            value_filter=ctx.sections.get("value_filter"),  # type: ignore[arg-type]
        )
        return {"stages": stages, "transitions": transitions(stages)}

    def kdigo_counts(ctx: StepContext, made: Mapping[str, Any]) -> dict[str, Any]:
        """Transition counts and rates over the cohort, from everyone's stages."""
        matrix = transition_matrix(made["stages"])
        primary = primary_equation(ctx.sections, ctx.tables)
        # the figure reads one matrix per axis: G on the primary equation, and A
        counts = matrix.filter(
            ((pl.col("axis") == "G") & (pl.col("equation") == primary)) | (pl.col("axis") == "A")
        ).select(
            "axis",
            "from_category",
            "to_category",
            pl.col("n_transitions").alias("n"),
            "rate_per_100_person_years",
        )
        return {"transition_matrix": matrix, "models/transition_counts": counts}

    registry.register_patient_wise(
        "kdigo",
        per_patient=kdigo_step,
        cohort=kdigo_counts,
        cohort_makes=["transition_matrix", "models/transition_counts"],
        needs=["egfr", "labs", "cohort"],
        makes=["stages", "transitions", "transition_matrix", "models/transition_counts"],
        section="sustain",
        options=SustainRule,
        extra_sections={"value_filter": ValueFilterRule},
        description="Sustained KDIGO G and A stages and their transitions (kidneycohort.kdigo).",
    )


def add_kdigo_grid(registry: StepRegistry) -> None:
    """Step ``kdigo_grid``: KDIGO G and A categories at baseline and the grid counts."""
    from kidneycohort.baseline import uacr_baseline
    from kidneycohort.kdigo import KdigoGridRule, baseline_categories, kdigo_grid_counts
    from kidneycohort.tables import TableRule

    def kdigo_grid_step(ctx: StepContext) -> dict[str, Any]:
        """Baseline G and A categories per patient."""
        opts = ctx.options
        assert isinstance(opts, KdigoGridRule)
        uacr = uacr_baseline(
            ctx.tables["labs"],
            ctx.tables["cohort"],
            rule=opts.uacr_baseline,
            value_filter=ctx.sections.get("value_filter"),  # type: ignore[arg-type]
        )
        categories = baseline_categories(
            ctx.tables["baseline"], uacr, equation=primary_equation(ctx.sections, ctx.tables)
        )
        return {"baseline_categories": categories}

    def kdigo_grid_cells(ctx: StepContext, made: Mapping[str, Any]) -> dict[str, Any]:
        """Patients per KDIGO grid cell, from everyone's baseline categories."""
        return {"models/kdigo_grid": kdigo_grid_counts(made["baseline_categories"])}

    registry.register_patient_wise(
        "kdigo_grid",
        per_patient=kdigo_grid_step,
        cohort=kdigo_grid_cells,
        cohort_makes=["models/kdigo_grid"],
        needs=["baseline", "labs", "cohort"],
        makes=["baseline_categories", "models/kdigo_grid"],
        section="kdigo_grid",
        options=KdigoGridRule,
        extra_sections={"value_filter": ValueFilterRule, "tables": TableRule},
        description="Baseline KDIGO G x A category per patient and the prognosis grid counts.",
    )


def add_kfre(registry: StepRegistry) -> None:
    """Step ``kfre``: KFRE risk at baseline per patient."""
    from kidneycohort.kfre import KfreRule, kfre_at_baseline
    from kidneycohort.tables import TableRule

    def kfre_step(ctx: StepContext) -> dict[str, Any]:
        """KFRE risk at the index date and its distribution by group."""
        group = group_column(ctx)
        equation = primary_equation(ctx.sections, ctx.tables)

        def derive(tables: Mapping[str, pl.DataFrame]) -> pl.DataFrame:
            return kfre_at_baseline(
                tables["egfr"],
                tables["labs"],
                tables["cohort"],
                equation=equation,
                rule=ctx.options,  # type: ignore[arg-type]
                value_filter=ctx.sections.get("value_filter"),  # type: ignore[arg-type]
                group_column=group,
            )

        # one row per patient of the cohort, in its order, one range of patients at a
        # time; a range without a row of the equation is no error of the cohort's
        rows = by_patient_ranges(
            derive,
            {k: ctx.tables[k] for k in ("egfr", "labs", "cohort")},
            order_of="cohort",
            keys=["patient_id"],
            whole_on=(InputDataError,),
        )
        # its summary table is printed by the tables step, protected with the others
        return {"kfre": rows}

    registry.register_patient_wise(
        "kfre",
        per_patient=kfre_step,
        needs=["egfr", "labs", "cohort"],
        makes=["kfre"],
        section="kfre",
        options=KfreRule,
        extra_sections={"value_filter": ValueFilterRule, "tables": TableRule},
        description="2- and 5-year KFRE risk per patient at baseline, with applicability.",
    )
