"""Output steps: the shared tables, the figures and the report."""

from __future__ import annotations

from typing import Any

import polars as pl

from kidneycohort.pipeline.registry import StepContext, StepRegistry
from kidneycohort.pipeline.steps._facts import primary_equation, section

__all__ = ["add_figures", "add_report", "add_tables"]


def _categories_for_table(categories: pl.DataFrame | None) -> pl.DataFrame | None:
    """Baseline categories in the layout ``baseline_characteristics_table`` reads."""
    if categories is None or categories.is_empty():
        return None
    if "baseline_uacr_mg_g" in categories.columns:
        categories = categories.rename({"baseline_uacr_mg_g": "uacr_mg_g"})
    return categories


def _common_tables(ctx: StepContext) -> dict[str, pl.DataFrame]:
    from kidneycohort import tables as tb
    from kidneycohort.models.rates import incidence_rates
    from kidneycohort.models.survival import SurvivalRule, evaluable_rows

    rule = ctx.options
    assert isinstance(rule, tb.TableRule)
    survival = section(ctx, "survival", SurvivalRule)
    endpoints = evaluable_rows(ctx.tables["endpoints"])
    cohort = ctx.tables["cohort"]
    return {
        "tables/endpoint_table": tb.endpoint_table(
            endpoints,
            cohort,
            group_column=survival.group_column,
            reference_group=survival.reference_group,
            covariates=survival.covariates,
            strata=survival.strata,
            rule=rule,
        ),
        "tables/baseline_characteristics": tb.baseline_characteristics_table(
            cohort,
            ctx.tables["baseline"],
            # KDIGO G and A categories and UACR at baseline, when the recipe made them
            _categories_for_table(ctx.tables.get("baseline_categories")),
            group_column=survival.group_column,
            equation=primary_equation(ctx.sections, ctx.tables),
            rule=rule,
        ),
        # the shared table suppresses small cells; the exact rates stay in models/
        "tables/incidence_rates": tb.rate_comparison_table(
            endpoints,
            cohort,
            group_column=survival.group_column,
            reference_group=survival.reference_group,
            confidence=survival.confidence,
            rule=rule,
        ),
        "models/incidence_rates": incidence_rates(
            endpoints,
            cohort,
            group_column=survival.group_column,
            confidence=survival.confidence,
        ),
    }


_COMMON = (
    "tables/endpoint_table",
    "tables/baseline_characteristics",
    "tables/incidence_rates",
    "models/incidence_rates",
)


def add_tables(registry: StepRegistry) -> None:
    """Steps ``trial_tables`` and ``cohort_tables``."""
    from kidneycohort.tables import TableRule, slope_table, transition_table

    @registry.register(
        "trial_tables",
        optional_needs=["baseline_categories"],
        needs=["endpoints", "cohort", "baseline", "slope_model_fit"],
        makes=[*_COMMON, "tables/slope_table"],
        section="tables",
        options=TableRule,
        description="Endpoint, baseline, incidence-rate and slope tables (kidneycohort.tables).",
    )
    def trial_tables_step(ctx: StepContext) -> dict[str, Any]:
        """The trial's endpoint, baseline, incidence and slope tables."""
        out = _common_tables(ctx)
        out["tables/slope_table"] = slope_table(ctx.tables["slope_model_fit"], rule=ctx.options)  # type: ignore[arg-type]
        return out

    @registry.register(
        "cohort_tables",
        optional_needs=["baseline_categories"],
        needs=["endpoints", "cohort", "baseline", "transitions", "slope_model_fit"],
        makes=[*_COMMON, "tables/transition_matrix", "tables/slope_table"],
        section="tables",
        options=TableRule,
        description="Endpoint, baseline, incidence-rate, G-transition and slope tables.",
    )
    def cohort_tables_step(ctx: StepContext) -> dict[str, Any]:
        """The cohort's endpoint, baseline, incidence and transition tables."""
        out = _common_tables(ctx)
        out["tables/transition_matrix"] = transition_table(
            ctx.tables["transitions"],
            axis="G",
            equation=primary_equation(ctx.sections, ctx.tables),
            rule=ctx.options,  # type: ignore[arg-type]
        )
        out["tables/slope_table"] = slope_table(ctx.tables["slope_model_fit"], rule=ctx.options)  # type: ignore[arg-type]
        return out


def add_figures(registry: StepRegistry) -> None:
    """Step ``figures``: every figure the run folder has data for."""
    from kidneycohort.plots import FigureRule, write_figures

    @registry.register(
        "figures",
        makes=["figure_files"],
        section="figures",
        options=FigureRule,
        reads_folder=True,
        description="Every figure the run folder has data for, into figures/ (kidneycohort.plots).",
    )
    def figures_step(ctx: StepContext) -> dict[str, Any]:
        """Draw the figures from the run folder as written so far."""
        assert ctx.folder is not None
        files = write_figures(ctx.folder, rule=ctx.options)  # type: ignore[arg-type]
        names = [p.relative_to(ctx.run_dir).as_posix() for p in files]
        return {"figure_files": pl.DataFrame({"file": names}, schema={"file": pl.String})}


def add_report(registry: StepRegistry) -> None:
    """Step ``report``: the self-contained report of the run folder."""
    from kidneycohort.report import write_report

    @registry.register(
        "report",
        makes=["report_file"],
        reads_folder=True,
        description="report.html from the run folder as written so far (kidneycohort.report).",
    )
    def report_step(ctx: StepContext) -> dict[str, Any]:
        """Render the self-contained report of the run folder."""
        assert ctx.folder is not None
        path = write_report(ctx.folder)
        return {"report_file": pl.DataFrame({"file": [path.name]}, schema={"file": pl.String})}
