"""Model steps: Kaplan–Meier, Aalen–Johansen and Cox per endpoint; the eGFR slope model;
the slope analysis under informative dropout."""

from __future__ import annotations

from typing import Any

import polars as pl

from kidneycohort.pipeline.registry import StepContext, StepRegistry
from kidneycohort.pipeline.steps._facts import primary_equation
from kidneycohort.schemas import MODEL_SLOPES
from kidneycohort.value_filter import ValueFilterRule, apply_value_filter

__all__ = ["add_dropout_analysis", "add_slope_model", "add_survival"]


def add_survival(registry: StepRegistry) -> None:
    """Steps ``kaplan_meier``, ``cumulative_incidence`` and ``cox``."""
    from kidneycohort.models.survival import (
        SurvivalRule,
        hazard_ratio_table,
        survival_curves_by_endpoint,
    )

    def curves(ctx: StepContext, competing: bool) -> dict[str, Any]:
        curves, at_risk = survival_curves_by_endpoint(
            ctx.tables["endpoints"],
            ctx.tables["cohort"],
            competing=competing,
            rule=ctx.options,  # type: ignore[arg-type]
        )
        return {"models/survival_curves": curves, "models/at_risk": at_risk}

    @registry.register(
        "kaplan_meier",
        needs=["endpoints", "cohort"],
        makes=["models/survival_curves", "models/at_risk"],
        section="survival",
        options=SurvivalRule,
        description="Kaplan–Meier curves per endpoint and group (kidneycohort.models.survival).",
        cohort_level=True,
    )
    def kaplan_meier_step(ctx: StepContext) -> dict[str, Any]:
        """Kaplan–Meier curves and numbers at risk per endpoint and group."""
        return curves(ctx, competing=False)

    @registry.register(
        "cumulative_incidence",
        needs=["endpoints", "cohort"],
        makes=["models/survival_curves", "models/at_risk"],
        section="survival",
        options=SurvivalRule,
        description="Aalen–Johansen cumulative incidence with death competing, per endpoint.",
        cohort_level=True,
    )
    def cumulative_incidence_step(ctx: StepContext) -> dict[str, Any]:
        """Aalen–Johansen cumulative incidence per endpoint and group."""
        return curves(ctx, competing=True)

    @registry.register(
        "cox",
        needs=["endpoints", "cohort"],
        makes=["models/hazard_ratios"],
        section="survival",
        options=SurvivalRule,
        description="Cox hazard ratios per endpoint with the proportional-hazards test.",
        cohort_level=True,
    )
    def cox_step(ctx: StepContext) -> dict[str, Any]:
        """Cox hazard ratios (group, covariates, strata; subgroups) per endpoint."""
        table = hazard_ratio_table(
            ctx.tables["endpoints"],
            ctx.tables["cohort"],
            rule=ctx.options,  # type: ignore[arg-type]
        )
        return {"models/hazard_ratios": table}

    @registry.register(
        "competing_risks",
        needs=["endpoints", "cohort"],
        makes=["models/competing_hazard_ratios", "models/competing_tests"],
        section="survival",
        options=SurvivalRule,
        description="Fine–Gray and cause-specific hazard ratios side by side, with Gray's "
        "test, for endpoints with death competing (survival.competing_risks).",
        cohort_level=True,
    )
    def competing_risks_step(ctx: StepContext) -> dict[str, Any]:
        """Competing-risks regression of the endpoints death competes with."""
        from kidneycohort.models.competing import competing_risks_tables

        hazards, tests = competing_risks_tables(
            ctx.tables["endpoints"],
            ctx.tables["cohort"],
            ctx.options,  # type: ignore[arg-type]
        )
        return {"models/competing_hazard_ratios": hazards, "models/competing_tests": tests}


def add_slope_model(registry: StepRegistry) -> None:
    """Step ``slope_model``: the linear mixed model of eGFR by group."""
    from kidneycohort.models.mixed import SlopeModel, SlopeModelRule

    @registry.register(
        "slope_model",
        needs=["egfr", "cohort"],
        makes=[
            "models/trajectories",
            "models/slope_summary",
            "models/slope_model_fit",
            "model_slopes",
            "slope_model_fit",
        ],
        section="slope_model",
        options=SlopeModelRule,
        extra_sections={"value_filter": ValueFilterRule},
        description="Linear mixed model of eGFR (one slope or two slopes with a knot) by group.",
        cohort_level=True,
    )
    def slope_model_step(ctx: StepContext) -> dict[str, Any]:
        """Mixed-model mean trajectories and slope contrasts (kidneycohort.models.mixed)."""
        rule = ctx.options
        assert isinstance(rule, SlopeModelRule)
        if rule.equation is None:
            rule = rule.model_copy(update={"equation": primary_equation(ctx.sections, ctx.tables)})
        # the values the per-patient slopes and baselines use, no others
        value_filter = ctx.sections.get("value_filter")
        assert value_filter is None or isinstance(value_filter, ValueFilterRule)
        model = SlopeModel(rule).fit(
            ctx.tables["egfr"], ctx.tables["cohort"], value_filter=value_filter
        )
        name = "two_slope" if rule.knot_years is not None else "one_slope"
        return {
            "models/trajectories": model.trajectories_.select(
                pl.lit(name).alias("model"), pl.all()
            ),
            "models/slope_summary": model.summary().select(pl.lit(name).alias("model"), pl.all()),
            "models/slope_model_fit": model.fit_record(name),
            # per-patient model slopes need the exact engine's Henderson equations
            "model_slopes": model.patient_slopes()
            if model.engine_ == "exact"
            else pl.DataFrame(schema=MODEL_SLOPES),
            "slope_model_fit": model,
        }


def add_dropout_analysis(registry: StepRegistry) -> None:
    """Step ``dropout_analysis``: the slope analysis under informative dropout."""
    from kidneycohort.models.joint import DropoutAnalysisRule, dropout_analysis

    @registry.register(
        "dropout_analysis",
        needs=["egfr", "cohort", "endpoints"],
        makes=[
            "models/dropout_slopes",
            "models/dropout_sensitivity",
            "models/dropout_methods",
            "tables/dropout_analysis",
        ],
        section="dropout_analysis",
        options=DropoutAnalysisRule,
        extra_sections={"value_filter": ValueFilterRule},
        cohort_level=True,
        description="Joint model of eGFR slope and dropout beside the mixed model alone; "
        "delta-adjusted tipping point; eGFR set to a stated value at kidney failure.",
    )
    def dropout_analysis_step(ctx: StepContext) -> dict[str, Any]:
        """The joint model and the sensitivity analyses (kidneycohort.models.joint)."""
        from kidneycohort.disclosure import small_count_text
        from kidneycohort.models._design import one_equation
        from kidneycohort.tables import TableRule, dropout_table

        rule = ctx.options
        assert isinstance(rule, DropoutAnalysisRule)
        update: dict[str, Any] = {}
        if rule.equation is None:
            update["equation"] = primary_equation(ctx.sections, ctx.tables)
        slope_rule = ctx.sections.get("slope_model")
        if "knot_years" not in rule.model_fields_set and slope_rule is not None:
            # the same slopes as the slope model unless the section says otherwise
            update["knot_years"] = getattr(slope_rule, "knot_years", None)
        rule = rule.model_copy(update=update)
        tables_rule = ctx.sections.get("tables")
        table_rule = tables_rule if isinstance(tables_rule, TableRule) else TableRule()
        threshold = table_rule.small_cell_threshold
        # the values the baselines and slopes use: the models leave out the rows the
        # study's value filter marks (each counted under its reason)
        egfr = ctx.tables["egfr"]
        value_filter = ctx.sections.get("value_filter")
        if isinstance(value_filter, ValueFilterRule):
            # flagged on the modelled equation's rows only (the flags are per sample)
            egfr = apply_value_filter(one_equation(egfr, rule.equation), value_filter)
        result = dropout_analysis(
            egfr,
            ctx.tables["cohort"],
            ctx.tables["endpoints"],
            rule=rule,
            count_text=lambda n: small_count_text(n, threshold),
        )
        methods = pl.DataFrame({"paragraph": list(result.methods)}, schema={"paragraph": pl.String})
        return {
            "models/dropout_slopes": result.slopes,
            "models/dropout_sensitivity": result.sensitivity,
            "models/dropout_methods": methods,
            "tables/dropout_analysis": dropout_table(
                result.slopes, result.sensitivity, rule=table_rule
            ),
        }
