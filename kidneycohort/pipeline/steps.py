"""The library's stages as pipeline steps.

Each step is a small adapter: it takes its tables and typed options from the
:class:`~kidneycohort.pipeline.registry.StepContext`, calls the stage function with
them, and returns the tables it declared. No derivation happens here, so a table in a
run folder equals the stage function's result on the same inputs.

Table names: ``patients``, ``raw_labs``, ``events`` (read from the sources);
``cohort`` and ``cohort_events`` (harmonised patients and events); run-folder tables
as named in :mod:`kidneycohort.run_folder`.
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Mapping
from typing import Any, Literal

import polars as pl
from pydantic import BaseModel, ConfigDict, Field

from kidneycohort import schemas
from kidneycohort.baseline import BaselineRule
from kidneycohort.endpoints import EndpointDefinition, EndpointRule
from kidneycohort.errors import (
    ConfigError,
    did_you_mean,
)
from kidneycohort.models.survival import evaluable_rows
from kidneycohort.pipeline.registry import StepContext, StepRegistry

logger = logging.getLogger(__name__)


def _records(frame: pl.DataFrame, keys: tuple[str, ...]) -> list[dict[str, Any]]:
    return frame.select([k for k in keys if k in frame.columns]).to_dicts()


def _add_harmonize(registry: StepRegistry) -> None:
    from kidneycohort.harmonize import HarmonizeRule, harmonize_tables

    @registry.register(
        "harmonize",
        needs=["raw_labs", "patients"],
        optional_needs=["events"],
        makes=["labs", "rejected_rows", "cohort", "cohort_events"],
        section="harmonize",
        options=HarmonizeRule,
        description="Raw labs -> labs in standard units; every unused row with a reason.",
    )
    def harmonize_step(ctx: StepContext) -> dict[str, Any]:
        """Harmonise labs, patients and events (kidneycohort.harmonize.harmonize)."""
        result = harmonize_tables(
            ctx.tables["raw_labs"],
            ctx.tables["patients"],
            ctx.tables.get("events"),
            rule=ctx.options,  # type: ignore[arg-type]
        )
        ctx.accounting.extend(
            _records(
                result.accounting,
                ("table", "rows_read", "rows_used", "rows_rejected", "rows_merged"),
            )
        )
        by_reason = result.accounting_by_reason
        ctx.accounting_by_reason.extend(
            _records(by_reason.filter(pl.col("outcome") == "rejected"), ("table", "reason", "rows"))
        )
        ctx.merged_by_reason.extend(
            _records(by_reason.filter(pl.col("outcome") == "merged"), ("table", "reason", "rows"))
        )
        # rejected_rows.csv lists every input row not used as it stands: rejected rows
        # and rows merged into another (duplicates, same-day results), by reason code
        unused = pl.concat(
            [
                result.rejected.select(list(schemas.REJECTED)),
                result.merged.select(list(schemas.REJECTED)),
            ],
            how="vertical_relaxed",
        )
        return {
            "labs": result.labs,
            "rejected_rows": unused,
            "cohort": result.patients,
            "cohort_events": result.events,
        }


def _add_baseline_and_slopes(registry: StepRegistry) -> None:
    from kidneycohort.baseline import BaselineRule, egfr_baseline
    from kidneycohort.slopes import SlopeRule, egfr_slopes
    from kidneycohort.value_filter import ValueFilterRule

    @registry.register(
        "baseline",
        needs=["egfr"],
        makes=["baseline"],
        section="baseline",
        options=BaselineRule,
        extra_sections={"value_filter": ValueFilterRule},
        description="Baseline eGFR per patient and equation (kidneycohort.baseline).",
    )
    def baseline_step(ctx: StepContext) -> dict[str, Any]:
        """Baseline eGFR per patient and equation."""
        value_filter = ctx.sections.get("value_filter")
        return {
            "baseline": egfr_baseline(
                ctx.tables["egfr"],
                rule=ctx.options,
                value_filter=value_filter,  # type: ignore[arg-type]
            )
        }

    @registry.register(
        "slopes",
        needs=["egfr"],
        makes=["slopes"],
        section="slopes",
        options=SlopeRule,
        extra_sections={"value_filter": ValueFilterRule},
        description="Per-patient least-squares eGFR slopes (kidneycohort.slopes).",
    )
    def slopes_step(ctx: StepContext) -> dict[str, Any]:
        """Per-patient eGFR slopes."""
        value_filter = ctx.sections.get("value_filter")
        return {
            "slopes": egfr_slopes(
                ctx.tables["egfr"],
                rule=ctx.options,
                value_filter=value_filter,  # type: ignore[arg-type]
            )
        }


def study_equations(sections: Mapping[str, Any]) -> list[str]:
    """Every equation the study's ``egfr`` section computes, in first-mention order."""
    egfr = sections.get("egfr")
    if egfr is None:
        return []
    return list(egfr.all_equations())


def primary_equation(
    sections: Mapping[str, Any],
    tables: Mapping[str, Any] | None = None,
    *,
    study: Any | None = None,
) -> str:
    """The study's primary eGFR equation: ``study.primary_equation``, else the first one.

    The first equation of ``egfr.equations`` (or of the first age band) is the default;
    without an ``egfr`` section the first equation in the ``egfr`` table is used.
    """
    study = study if study is not None else sections.get("study")
    chosen = getattr(study, "primary_equation", None)
    if chosen:
        return str(chosen)
    equations = study_equations(sections)
    if equations:
        return equations[0]
    if tables is not None and isinstance(tables.get("egfr"), pl.DataFrame):
        found = tables["egfr"]["equation"].drop_nulls().unique().sort().to_list()
        if found:
            return str(found[0])
    raise ConfigError("study.primary_equation: no equation chosen; set egfr.equations")


def _check_primary(config: Any) -> None:
    equations = study_equations(config.sections)
    chosen = config.study.primary_equation
    if chosen is not None and chosen not in equations:
        raise ConfigError(
            f"study.primary_equation: '{chosen}' is not one of the equations computed "
            f"(egfr.equations: {', '.join(equations)}){did_you_mean(chosen, equations)}; "
            "add it to egfr.equations or choose one of them"
        )


def _add_egfr(registry: StepRegistry) -> None:
    from kidneycohort.egfr import EgfrRule, compute_egfr

    @registry.register(
        "egfr",
        needs=["labs", "cohort"],
        makes=["egfr"],
        section="egfr",
        options=EgfrRule,
        check=_check_primary,
        description="eGFR by each chosen equation for every sample (kidneycohort.egfr).",
    )
    def egfr_step(ctx: StepContext) -> dict[str, Any]:
        """eGFR by each chosen equation for every creatinine / cystatin C sample."""
        return {"egfr": compute_egfr(ctx.tables["labs"], ctx.tables["cohort"], rule=ctx.options)}  # type: ignore[arg-type]


class EndpointsSection(BaseModel):
    """Endpoint definitions, their default rules and the data cut (config key ``endpoints``).

    The keys are the parameters of :func:`kidneycohort.endpoints.derive_endpoints`;
    ``definitions`` and ``rules`` are its own models. The endpoints are derived on the
    study's primary equation (``egfr.primary_equation``).
    """

    model_config = ConfigDict(extra="forbid")

    definitions: list[EndpointDefinition] = Field(
        min_length=1,
        description="Endpoint definitions, each with a `kind` (egfr_decline, egfr_below, "
        "kidney_failure, death, kidney_death, composite) and that kind's keys.",
    )
    rule: EndpointRule = Field(
        default_factory=EndpointRule,
        description="Confirmation and timing rules used by every definition without its own.",
    )
    data_cut: dt.date = Field(
        description="Data-cut date: nothing after it is used; every endpoint is censored at it."
    )


def _add_endpoints(registry: StepRegistry) -> None:
    from kidneycohort.endpoints import derive_endpoints

    @registry.register(
        "endpoints",
        needs=["egfr", "baseline", "cohort"],
        optional_needs=["cohort_events"],
        makes=["endpoints"],
        section="endpoints",
        options=EndpointsSection,
        description="Time-to-event rows per patient and endpoint (kidneycohort.endpoints).",
    )
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
            data_cut=opts.data_cut,
            rule=opts.rule,
        )
        return {"endpoints": table}


def _add_kdigo(registry: StepRegistry) -> None:
    from kidneycohort.kdigo import SustainRule, sustained_stages, transition_matrix, transitions
    from kidneycohort.value_filter import ValueFilterRule

    @registry.register(
        "kdigo",
        needs=["egfr", "labs", "cohort"],
        makes=["stages", "transitions", "transition_matrix", "models/transition_counts"],
        section="sustain",
        options=SustainRule,
        extra_sections={"value_filter": ValueFilterRule},
        description="Sustained KDIGO G and A stages and their transitions (kidneycohort.kdigo).",
    )
    def kdigo_step(ctx: StepContext) -> dict[str, Any]:
        """Sustained KDIGO stages, transitions and transition counts."""
        stages = sustained_stages(
            ctx.tables["egfr"],
            ctx.tables["labs"],
            ctx.tables["cohort"],
            rule=ctx.options,  # type: ignore[arg-type]
            value_filter=ctx.sections.get("value_filter"),  # type: ignore[arg-type]
        )
        matrix = transition_matrix(stages)
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
        return {
            "stages": stages,
            "transitions": transitions(stages),
            "transition_matrix": matrix,
            "models/transition_counts": counts,
        }


class KdigoGridSection(BaseModel):
    """Baseline KDIGO grid options (config key ``kdigo_grid``).

    The G category comes from the baseline eGFR of the primary equation (the
    ``baseline`` section's rule); the A category from a baseline UACR chosen by
    ``uacr_baseline`` (:func:`kidneycohort.baseline.uacr_baseline`).
    """

    model_config = ConfigDict(extra="forbid")

    uacr_baseline: BaselineRule = Field(
        default_factory=lambda: BaselineRule(method="mean_in_window", mean_type="geometric"),
        description="How the baseline UACR is chosen; default the geometric mean of the "
        "values in the year before index (UACR is right-skewed and varies day to day).",
    )


def _add_kdigo_grid(registry: StepRegistry) -> None:
    from kidneycohort import tables as tb
    from kidneycohort.baseline import uacr_baseline
    from kidneycohort.kdigo import baseline_categories, kdigo_grid_counts
    from kidneycohort.value_filter import ValueFilterRule

    @registry.register(
        "kdigo_grid",
        needs=["baseline", "labs", "cohort"],
        makes=["baseline_categories", "models/kdigo_grid", "tables/kdigo_grid"],
        section="kdigo_grid",
        options=KdigoGridSection,
        extra_sections={"value_filter": ValueFilterRule, "tables": tb.TableRule},
        description="Baseline KDIGO G x A category per patient and the prognosis grid counts.",
    )
    def kdigo_grid_step(ctx: StepContext) -> dict[str, Any]:
        """Baseline G and A categories per patient; patients per KDIGO grid cell."""
        opts = ctx.options
        assert isinstance(opts, KdigoGridSection)
        value_filter = ctx.sections.get("value_filter")
        uacr = uacr_baseline(
            ctx.tables["labs"],
            ctx.tables["cohort"],
            rule=opts.uacr_baseline,
            value_filter=value_filter,  # type: ignore[arg-type]
        )
        categories = baseline_categories(
            ctx.tables["baseline"], uacr, equation=primary_equation(ctx.sections, ctx.tables)
        )
        spec = ctx.sections.get("tables")
        return {
            "baseline_categories": categories,
            "models/kdigo_grid": kdigo_grid_counts(categories),
            "tables/kdigo_grid": tb.kdigo_grid_table(
                categories,
                spec=spec if isinstance(spec, tb.TableRule) else None,
            ),
        }


class KfreSection(BaseModel):
    """Kidney Failure Risk Equation at baseline (config key ``kfre``)."""

    model_config = ConfigDict(extra="forbid")

    region: Literal["north_american", "non_north_american"] = Field(
        "north_american",
        description="Baseline-survival set of the 2016 KFRE recalibration (Tangri 2016).",
    )
    lookback_days: float = Field(
        365.0,
        gt=0,
        description="How far before the index date the eGFR and UACR used may lie (days).",
    )
    thresholds_2y: list[float] = Field(
        default_factory=lambda: [0.10, 0.40],
        description="2-year risk thresholds counted in the summary table (fractions).",
    )
    thresholds_5y: list[float] = Field(
        default_factory=lambda: [0.03, 0.05],
        description="5-year risk thresholds counted in the summary table (fractions).",
    )


def _add_kfre(registry: StepRegistry) -> None:
    from kidneycohort import tables as tb
    from kidneycohort.kfre import kfre_at_baseline, kfre_summary_table
    from kidneycohort.models.survival import SurvivalRule
    from kidneycohort.value_filter import ValueFilterRule

    @registry.register(
        "kfre",
        needs=["egfr", "labs", "cohort"],
        makes=["kfre", "tables/kfre_summary"],
        section="kfre",
        options=KfreSection,
        extra_sections={"value_filter": ValueFilterRule, "tables": tb.TableRule},
        description="2- and 5-year KFRE risk per patient at baseline, with applicability.",
    )
    def kfre_step(ctx: StepContext) -> dict[str, Any]:
        """KFRE risk at the index date and its distribution by group."""
        opts = ctx.options
        assert isinstance(opts, KfreSection)
        survival = ctx.sections.get("survival")
        group = survival.group_column if isinstance(survival, SurvivalRule) else "group"
        rows = kfre_at_baseline(
            ctx.tables["egfr"],
            ctx.tables["labs"],
            ctx.tables["cohort"],
            equation=primary_equation(ctx.sections, ctx.tables),
            region=opts.region,
            lookback_days=opts.lookback_days,
            value_filter=ctx.sections.get("value_filter"),  # type: ignore[arg-type]
            group_column=group,
        )
        spec = ctx.sections.get("tables")
        summary = kfre_summary_table(
            rows,
            group_column=group,
            thresholds_2y=opts.thresholds_2y,
            thresholds_5y=opts.thresholds_5y,
            spec=spec if isinstance(spec, tb.TableRule) else None,
        )
        return {"kfre": rows, "tables/kfre_summary": summary}


def _add_report(registry: StepRegistry) -> None:
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


def _add_survival(registry: StepRegistry) -> None:
    from kidneycohort.models.survival import (
        SurvivalRule,
        hazard_ratio_table,
        survival_curves_by_endpoint,
    )

    def curves(ctx: StepContext, competing: bool) -> dict[str, Any]:
        rule = ctx.options
        assert isinstance(rule, SurvivalRule)
        curves, at_risk = survival_curves_by_endpoint(
            ctx.tables["endpoints"], ctx.tables["cohort"], competing=competing, rule=rule
        )
        return {"models/survival_curves": curves, "models/at_risk": at_risk}

    @registry.register(
        "kaplan_meier",
        needs=["endpoints", "cohort"],
        makes=["models/survival_curves", "models/at_risk"],
        section="survival",
        options=SurvivalRule,
        description="Kaplan–Meier curves per endpoint and group (kidneycohort.models.survival).",
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
    )
    def cox_step(ctx: StepContext) -> dict[str, Any]:
        """Cox hazard ratios (group, covariates, strata; subgroups) per endpoint."""
        return {
            "models/hazard_ratios": hazard_ratio_table(
                ctx.tables["endpoints"], ctx.tables["cohort"], rule=ctx.options
            )
        }


def _add_slope_model(registry: StepRegistry) -> None:
    from kidneycohort.models.mixed import SlopeModel, SlopeModelRule

    @registry.register(
        "slope_model",
        needs=["egfr", "cohort"],
        makes=["models/trajectories", "models/slope_summary", "slope_model_fit"],
        section="slope_model",
        options=SlopeModelRule,
        description="Linear mixed model of eGFR (one slope or two slopes with a knot) by group.",
    )
    def slope_model_step(ctx: StepContext) -> dict[str, Any]:
        """Mixed-model mean trajectories and slope contrasts (kidneycohort.models.mixed)."""
        spec = ctx.options
        assert isinstance(spec, SlopeModelRule)
        if spec.equation is None:
            spec = spec.model_copy(update={"equation": primary_equation(ctx.sections, ctx.tables)})
        model = SlopeModel(spec).fit(ctx.tables["egfr"], ctx.tables["cohort"])
        name = "two_slope" if spec.knot_years is not None else "one_slope"
        return {
            "models/trajectories": model.trajectories_.select(
                pl.lit(name).alias("model"), pl.all()
            ),
            "models/slope_summary": model.summary().select(pl.lit(name).alias("model"), pl.all()),
            "slope_model_fit": model,
        }


def _add_figures(registry: StepRegistry) -> None:
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


def _categories_for_table(categories: pl.DataFrame | None) -> pl.DataFrame | None:
    """Baseline categories in the layout ``tables.baseline_characteristics`` reads."""
    if categories is None or categories.is_empty():
        return None
    if "baseline_uacr_mg_g" in categories.columns:
        categories = categories.rename({"baseline_uacr_mg_g": "uacr_mg_g"})
    return categories


def _add_tables(registry: StepRegistry) -> None:
    from kidneycohort import tables as tb
    from kidneycohort.models.rates import incidence_rates
    from kidneycohort.models.survival import SurvivalRule

    def common(ctx: StepContext) -> dict[str, pl.DataFrame]:
        spec = ctx.options
        assert isinstance(spec, tb.TableRule)
        survival = ctx.sections.get("survival")
        survival = survival if isinstance(survival, SurvivalRule) else SurvivalRule()
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
                spec=spec,
            ),
            "tables/baseline_characteristics": tb.baseline_characteristics_table(
                cohort,
                ctx.tables["baseline"],
                # KDIGO G and A categories and UACR at baseline, when the recipe made them
                _categories_for_table(ctx.tables.get("baseline_categories")),
                group_column=survival.group_column,
                equation=primary_equation(ctx.sections, ctx.tables),
                spec=spec,
            ),
            # the shared table suppresses small cells; the exact rates stay in models/
            "tables/incidence_rates": tb.rate_comparison_table(
                endpoints,
                cohort,
                group_column=survival.group_column,
                reference_group=survival.reference_group,
                confidence=survival.confidence,
                spec=spec,
            ),
            "models/incidence_rates": incidence_rates(
                endpoints,
                cohort,
                group_column=survival.group_column,
                confidence=survival.confidence,
            ),
        }

    @registry.register(
        "trial_tables",
        optional_needs=["baseline_categories"],
        needs=["endpoints", "cohort", "baseline", "slope_model_fit"],
        makes=[
            "tables/endpoint_table",
            "tables/baseline_characteristics",
            "tables/incidence_rates",
            "models/incidence_rates",
            "tables/slope_table",
        ],
        section="tables",
        options=tb.TableRule,
        description="Endpoint, baseline, incidence-rate and slope tables (kidneycohort.tables).",
    )
    def trial_tables_step(ctx: StepContext) -> dict[str, Any]:
        """The trial's endpoint, baseline, incidence and slope tables."""
        out = common(ctx)
        out["tables/slope_table"] = tb.slope_table(ctx.tables["slope_model_fit"], spec=ctx.options)  # type: ignore[arg-type]
        return out

    @registry.register(
        "cohort_tables",
        optional_needs=["baseline_categories"],
        needs=["endpoints", "cohort", "baseline", "transitions"],
        makes=[
            "tables/endpoint_table",
            "tables/baseline_characteristics",
            "tables/incidence_rates",
            "models/incidence_rates",
            "tables/transition_matrix",
        ],
        section="tables",
        options=tb.TableRule,
        description="Endpoint, baseline, incidence-rate and G-transition tables (kidneycohort.tables).",
    )
    def cohort_tables_step(ctx: StepContext) -> dict[str, Any]:
        """The cohort's endpoint, baseline, incidence and transition tables."""
        out = common(ctx)
        out["tables/transition_matrix"] = tb.transition_table(
            ctx.tables["transitions"],
            axis="G",
            equation=primary_equation(ctx.sections, ctx.tables),
            spec=ctx.options,  # type: ignore[arg-type]
        )
        return out


def _add_adam(registry: StepRegistry) -> None:
    from kidneycohort.pipeline.adam_step import add_adam_step

    add_adam_step(registry)


_STAGES = (
    _add_harmonize,
    _add_egfr,
    _add_baseline_and_slopes,
    _add_endpoints,
    _add_kdigo,
    _add_kdigo_grid,
    _add_kfre,
    _add_adam,
    _add_survival,
    _add_slope_model,
    _add_tables,
    _add_figures,
    _add_report,
)


def build_registry() -> StepRegistry:
    """A registry holding every library stage as a step."""
    registry = StepRegistry()
    for add in _STAGES:
        add(registry)
    return registry
