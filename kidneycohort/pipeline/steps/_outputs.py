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


def _shared_tables(ctx: StepContext, disclosure: Any, *, cohort_tables: bool) -> dict[str, Any]:
    """Every shared table of the run, protected by ``disclosure`` (one ledger for all)."""
    from kidneycohort import tables as tb
    from kidneycohort.models.survival import SurvivalRule, evaluable_rows

    rule = ctx.options
    assert isinstance(rule, tb.TableRule)
    survival = section(ctx, "survival", SurvivalRule)
    endpoints = evaluable_rows(ctx.tables["endpoints"])
    cohort = ctx.tables["cohort"]
    equation = primary_equation(ctx.sections, ctx.tables)
    categories = _categories_for_table(ctx.tables.get("baseline_categories"))
    out: dict[str, Any] = {
        "tables/endpoint_table": tb.endpoint_table(
            endpoints,
            cohort,
            group_column=survival.group_column,
            reference_group=survival.reference_group,
            covariates=survival.covariates,
            strata=survival.strata,
            # the cox step's fits: one fit per endpoint per run, its warnings said once
            hazard_ratios=ctx.tables.get("models/hazard_ratios"),
            rule=rule,
            disclosure=disclosure,
        ),
        "tables/baseline_characteristics": tb.baseline_characteristics_table(
            cohort,
            ctx.tables["baseline"],
            # KDIGO G and A categories and UACR at baseline, when the recipe made them
            categories,
            group_column=survival.group_column,
            equation=equation,
            rule=rule,
            disclosure=disclosure,
        ),
        # the shared table protects small counts; the exact rates stay in models/
        "tables/incidence_rates": tb.rate_comparison_table(
            endpoints,
            cohort,
            group_column=survival.group_column,
            reference_group=survival.reference_group,
            confidence=survival.confidence,
            rule=rule,
            disclosure=disclosure,
        ),
    }
    out["tables/kdigo_grid"] = (
        tb.kdigo_grid_table(categories, rule=rule, disclosure=disclosure)
        if categories is not None
        else pl.DataFrame(
            schema={"g_category": pl.String, "a_category": pl.String, "n": pl.Int64}
        ).with_columns(pl.lit(None, dtype=pl.String).alias("n_display"))
    )
    out["tables/slope_table"] = tb.slope_table(
        ctx.tables["slope_model_fit"], rule=rule, disclosure=disclosure
    )
    hazards = ctx.tables.get("models/competing_hazard_ratios")
    out["tables/competing_risks"] = (
        tb.competing_risks_table(hazards, ctx.tables.get("models/competing_tests"), rule=rule)
        if hazards is not None
        else None  # no competing-risks analysis in this run: no table (not an empty one)
    )
    if cohort_tables:
        out["tables/kfre_summary"] = _kfre_summary(ctx, survival.group_column, disclosure)
        out["tables/transition_matrix"] = tb.transition_table(
            ctx.tables["transitions"], axis="G", equation=equation, rule=rule, disclosure=disclosure
        )
    return out


def _kfre_summary(ctx: StepContext, group: str | None, disclosure: Any) -> pl.DataFrame:
    """The KFRE summary table, when the run computed KFRE (empty otherwise)."""
    from kidneycohort.kfre import KfreRule, kfre_summary_table
    from kidneycohort.tables import TableRule

    table_rule = ctx.options
    assert isinstance(table_rule, TableRule)
    rows = ctx.tables.get("kfre")
    if rows is None:
        return pl.DataFrame(
            schema={"characteristic": pl.String, "statistic": pl.String, "level": pl.String}
        )
    return kfre_summary_table(
        rows,
        group_column=group,
        rule=section(ctx, "kfre", KfreRule),
        table_rule=table_rule,
        disclosure=disclosure,
    )


def _protected_tables(ctx: StepContext, *, cohort_tables: bool) -> dict[str, Any]:
    """The shared tables built twice: once to enter every count of people they print into
    one ledger, then, after one protection of the whole ledger, to print them
    (:class:`kidneycohort.disclosure.SharedDisclosure`), so no table gives away a count
    another hides. The exact (unprotected) rates go to ``models/``."""
    from kidneycohort.disclosure import SharedDisclosure
    from kidneycohort.models.rates import incidence_rates
    from kidneycohort.models.survival import SurvivalRule, evaluable_rows
    from kidneycohort.tables import TableRule

    rule = ctx.options
    assert isinstance(rule, TableRule)
    shared = SharedDisclosure(rule.small_cell_threshold)
    _shared_tables(ctx, shared, cohort_tables=cohort_tables)
    shared.finalize()
    out = _shared_tables(ctx, shared, cohort_tables=cohort_tables)
    survival = section(ctx, "survival", SurvivalRule)
    out["models/incidence_rates"] = incidence_rates(
        evaluable_rows(ctx.tables["endpoints"]),
        ctx.tables["cohort"],
        group_column=survival.group_column,
        confidence=survival.confidence,
    )

    return out


_COMMON = (
    "tables/endpoint_table",
    "tables/baseline_characteristics",
    "tables/incidence_rates",
    "models/incidence_rates",
    "tables/slope_table",
    "tables/kdigo_grid",
    "tables/competing_risks",
)


def add_tables(registry: StepRegistry) -> None:
    """Steps ``trial_tables`` and ``cohort_tables``."""
    from kidneycohort.tables import TableRule

    @registry.register(
        "trial_tables",
        optional_needs=[
            "baseline_categories",
            "models/hazard_ratios",
            "models/competing_hazard_ratios",
            "models/competing_tests",
        ],
        needs=["endpoints", "cohort", "baseline", "slope_model_fit"],
        makes=[*_COMMON],
        section="tables",
        options=TableRule,
        description="Endpoint, baseline, incidence-rate, KDIGO grid and slope tables, "
        "protected together (kidneycohort.tables, kidneycohort.disclosure).",
        cohort_level=True,
    )
    def trial_tables_step(ctx: StepContext) -> dict[str, Any]:
        """The trial's endpoint, baseline, incidence, KDIGO grid and slope tables."""
        return _protected_tables(ctx, cohort_tables=False)

    @registry.register(
        "cohort_tables",
        optional_needs=[
            "baseline_categories",
            "models/hazard_ratios",
            "models/competing_hazard_ratios",
            "models/competing_tests",
            "kfre",
        ],
        needs=["endpoints", "cohort", "baseline", "transitions", "slope_model_fit"],
        makes=[*_COMMON, "tables/transition_matrix", "tables/kfre_summary"],
        section="tables",
        options=TableRule,
        description="Endpoint, baseline, incidence-rate, KDIGO grid, G-transition and slope "
        "tables, protected together.",
        cohort_level=True,
    )
    def cohort_tables_step(ctx: StepContext) -> dict[str, Any]:
        """The cohort's endpoint, baseline, incidence, grid, transition and slope tables."""
        return _protected_tables(ctx, cohort_tables=True)


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
        cohort_level=True,
    )
    def figures_step(ctx: StepContext) -> dict[str, Any]:
        """Draw the figures from the run folder as written so far."""
        assert ctx.folder is not None
        files = write_figures(ctx.folder, rule=ctx.options)  # type: ignore[arg-type]
        names = [p.relative_to(ctx.run_dir).as_posix() for p in files]
        return {"figure_files": pl.DataFrame({"file": names}, schema={"file": pl.String})}


def add_report(registry: StepRegistry) -> None:
    """Step ``report``: the self-contained report of the run folder."""
    from kidneycohort.report import ReportRule, write_report

    @registry.register(
        "report",
        makes=["report_file"],
        section="report",
        options=ReportRule,
        reads_folder=True,
        description="report.html from the run folder as written so far (kidneycohort.report).",
        cohort_level=True,
    )
    def report_step(ctx: StepContext) -> dict[str, Any]:
        """Render the self-contained report of the run folder."""
        assert ctx.folder is not None
        path = write_report(ctx.folder)
        return {"report_file": pl.DataFrame({"file": [path.name]}, schema={"file": pl.String})}
