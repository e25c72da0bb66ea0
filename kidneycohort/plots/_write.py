"""Drawing every figure a run folder has data for into ``figures/``, and the figure rule."""

from __future__ import annotations

import logging
import re
from pathlib import Path
from typing import Any, Final, Literal, overload

import matplotlib as mpl
import matplotlib.pyplot as plt
import polars as pl
from plotnine import labs
from pydantic import Field

from kidneycohort._rules import RuleModel, resolve_rules
from kidneycohort.labels import display_label, label_map
from kidneycohort.plots._attrition import attrition_figure
from kidneycohort.plots._kdigo import kdigo_grid_figure, transition_heatmap_figure
from kidneycohort.plots._patient_flow import flow_note, patient_flow_figure
from kidneycohort.plots._slopes import slope_distribution_figure
from kidneycohort.plots._style import check_threshold, group_palette
from kidneycohort.plots._survival import forest_figure, survival_figure
from kidneycohort.plots._survival_panel import SurvivalScale, censor_marks, hazard_ratio_lines
from kidneycohort.plots._trajectories import egfr_trajectory_figure, model_trajectory_figure
from kidneycohort.run_folder import RunFolder

__all__ = ["FIGURE_TITLES", "FigureRule", "draw_figures", "write_figures"]

logger = logging.getLogger(__name__)


FIGURE_TITLES: Final[dict[str, str]] = {
    "patient_flow": "Patient flow by group",
    "attrition": "Rows read, excluded and used by input table",
    "egfr_trajectories": "eGFR over time",
    "model_trajectories": "Fitted mean eGFR trajectories",
    "slope_distribution": "Per-patient eGFR slopes",
    "kdigo_grid": "Patients by KDIGO GFR and albuminuria category",
    "transition_matrix": "KDIGO category transitions",
    "forest_hazard_ratios": "Hazard ratios by endpoint",
    "forest_competing_risks": "Competing risks: Fine–Gray and cause-specific hazard ratios",
    "survival": "Time to event",
}
"""Figure file stems written by :func:`write_figures` (``survival_<endpoint>`` per endpoint)."""


FigureFormat = Literal["png", "svg", "pdf"]
_DEFAULT_FORMATS: tuple[FigureFormat, ...] = ("png", "svg")


class FigureRule(RuleModel):
    """Figure options (config key ``figures``)."""

    formats: list[FigureFormat] = Field(
        default_factory=lambda: list(_DEFAULT_FORMATS),
        min_length=1,
        description="File formats of every figure (each figure is drawn once, saved in each).",
    )
    dpi: int = Field(150, ge=50, le=1200, description="Resolution of raster formats.")
    survival_scale: SurvivalScale = Field(
        "as_estimated",
        description="Survival figures: curves as estimated (Kaplan–Meier event-free "
        "probability or Aalen–Johansen cumulative incidence), 'event_free' (falling) or "
        "'cumulative' (rising, 1 - Kaplan–Meier where the curve is a survival curve).",
    )


def _safe_stem(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).strip("_") or "unnamed"


def _save(plot: Any, figures: Path, stem: str, rule: FigureRule) -> list[Path]:
    """Draw ``plot`` once and save it in every format of ``rule``."""
    paths = [figures / f"{stem}.{fmt}" for fmt in rule.formats]
    view = plot.save_helper(filename=paths[0], dpi=rule.dpi, verbose=False)
    extra = {k: v for k, v in view.kwargs.items() if k not in ("fname", "format")}
    try:
        with mpl.rc_context(plot.theme.rcParams):
            for path, fmt in zip(paths, rule.formats, strict=True):
                view.figure.savefig(path, format=fmt, **extra)
    finally:
        plt.close(view.figure)
    return paths


class _Display:
    """How a run's codes read in its figures: display labels, reference group, equation."""

    def __init__(self, run: RunFolder, extra: dict[str, str] | None = None) -> None:
        config = run.manifest.config
        self.labels = label_map(config)
        self.labels.update((config.get("report") or {}).get("labels") or {})
        self.labels.update(extra or {})
        self.reference = (config.get("study") or {}).get("reference_group")
        self.primary = run.primary_equation

    def equation(self, equation: str | None) -> str | None:
        """The subtitle naming the eGFR equation of a figure."""
        if not equation:
            return None
        return f"eGFR by {display_label(equation, self.labels)}"

    @overload
    def groups(self, df: pl.DataFrame) -> pl.DataFrame: ...

    @overload
    def groups(self, df: None) -> None: ...

    @overload
    def groups(self, df: pl.DataFrame | None) -> pl.DataFrame | None: ...

    def groups(self, df: pl.DataFrame | None) -> pl.DataFrame | None:
        """``df`` with its group codes replaced by their display labels."""
        if df is None or "group" not in df.columns or not self.labels:
            return df
        codes = [str(g) for g in df["group"].drop_nulls().unique()]
        shown = {g: display_label(g, self.labels) for g in codes if g in self.labels}
        if not shown:
            return df
        return df.with_columns(
            pl.col("group").cast(pl.String).replace_strict(shown, default=pl.col("group"))
        )

    def palette(self, palette: dict[str, str]) -> dict[str, str]:
        return {
            display_label(g, self.labels) if g in self.labels else g: c for g, c in palette.items()
        }


def _pick_equation(df: pl.DataFrame, preferred: str | None) -> str | None:
    """``preferred`` when the table has it, else the first equation it holds."""
    if "equation" not in df.columns:
        return None
    have = df["equation"].drop_nulls().unique().to_list()
    if preferred in have:
        return preferred
    return str(sorted(have)[0]) if have else None


def _attrition(run: RunFolder, threshold: int) -> Any | None:
    manifest = run.manifest
    if not manifest.accounting:
        return None
    return attrition_figure(
        [a.model_dump() for a in manifest.accounting],
        [r.model_dump() for r in manifest.accounting_by_reason] or None,
        small_cell_threshold=threshold,
    )


def _patient_flow(run: RunFolder, threshold: int, shown: _Display) -> Any | None:
    """The CONSORT-style flow by group, counts protected with the baseline table's N
    (printed there, so kept here)."""
    flow = run.patient_flow_by_group(shown.primary)
    if flow.is_empty():
        return None
    elsewhere: list[tuple[str, str]] = []
    table = run.table_or_none("tables/baseline_characteristics")
    if table is not None and "characteristic" in table.columns:
        n_row = table.filter(pl.col("characteristic") == "N")
        printed = {c: str(n_row[c][0]) for c in table.columns if n_row.height}
        elsewhere = [
            (g, s) for g, s, n in flow.rows() if printed.get(g) == str(n) and s == flow["step"][-1]
        ]
    unknown = sum(
        r.rows
        for r in run.manifest.accounting_by_reason
        if r.table == "labs" and r.reason == "unknown_patient"
    )
    return patient_flow_figure(
        flow,
        labels=shown.labels,
        small_cell_threshold=threshold,
        shown_elsewhere=elsewhere,
        note=flow_note(unknown),
    )


def _lab_figures(
    run: RunFolder, palette: dict[str, str], threshold: int, shown: _Display
) -> dict[str, Any]:
    """eGFR over time, model trajectories and the slope distribution."""
    out: dict[str, Any] = {}
    groups = shown.groups(run.patient_groups())
    if run.has("egfr"):
        # one equation's rows and the columns the figure reads: the lab-level table is
        # the largest of the run
        scan = run.scan("egfr")
        have = scan.collect_schema().names()
        equation = None
        if "equation" in have:
            equation = _pick_equation(scan.select("equation").unique().collect(), shown.primary)
            if equation is not None:
                scan = scan.filter(pl.col("equation") == equation)
        egfr_columns = ("patient_id", "equation", "years_from_index", "egfr", "egfr_unit", "group")
        egfr = scan.select([c for c in egfr_columns if c in have]).collect()
        out["egfr_trajectories"] = egfr_trajectory_figure(
            shown.groups(egfr),
            groups,
            equation=equation,
            seed=run.seed,
            small_cell_threshold=threshold,
            palette=palette,
        ) + labs(subtitle=shown.equation(equation))
    if run.has("models/trajectories"):
        trajectories = run.table("models/trajectories")
        equation = (
            _pick_equation(trajectories, shown.primary)
            if "equation" in trajectories.columns
            else shown.primary
        )
        out["model_trajectories"] = model_trajectory_figure(
            shown.groups(trajectories), knot_years=run.knot_years, palette=palette
        ) + labs(subtitle=shown.equation(equation))
    if run.has("slopes"):
        have = run.scan("slopes").collect_schema().names()
        slope_columns = ("patient_id", "equation", "slope_per_year", "eligible", "group")
        slopes = run.table("slopes", [c for c in slope_columns if c in have])
        equation = _pick_equation(slopes, shown.primary)
        out["slope_distribution"] = slope_distribution_figure(
            shown.groups(slopes),
            groups,
            equation=equation,
            rapid_decline_threshold=run.rapid_decline_slope,
            small_cell_threshold=threshold,
            palette=palette,
        ) + labs(subtitle=shown.equation(equation))
    return out


def _kdigo_figures(run: RunFolder, threshold: int, shown: _Display) -> dict[str, Any]:
    out: dict[str, Any] = {}
    subtitle = shown.equation(shown.primary)
    # the shared (protected) tables when the run has them: a figure hides what they hide
    grid = next(
        (
            n
            for n in ("tables/kdigo_grid", "models/kdigo_grid")
            if run.has(n) and run.table(n).height
        ),
        None,
    )
    if grid is not None:
        out["kdigo_grid"] = kdigo_grid_figure(
            run.table(grid), small_cell_threshold=threshold
        ) + labs(subtitle=subtitle)
    transitions = next(
        (n for n in ("tables/transition_matrix", "models/transition_counts") if run.has(n)), None
    )
    if transitions is not None:
        counts = run.table(transitions)
        if counts.height:
            out["transition_matrix"] = transition_heatmap_figure(
                counts, small_cell_threshold=threshold
            ) + labs(subtitle=subtitle)
    return out


def _survival_figures(
    run: RunFolder, palette: dict[str, str], threshold: int, shown: _Display, rule: FigureRule
) -> dict[str, Any]:
    out: dict[str, Any] = {}
    hazard_ratios = run.table_or_none("models/hazard_ratios")
    subtitle = shown.equation(shown.primary)
    if run.has("models/survival_curves"):
        curves = run.table("models/survival_curves")
        at_risk = run.table_or_none("models/at_risk")
        endpoints = run.table_or_none("endpoints")
        for endpoint in curves["endpoint"].drop_nulls().unique(maintain_order=True).to_list():
            measure = curves.filter(pl.col("endpoint") == endpoint)["measure"].drop_nulls()
            censored = (
                censor_marks(
                    endpoints,
                    endpoint=endpoint,
                    competing_is_event=measure.len() > 0 and measure[0] == "cumulative_incidence",
                )
                if endpoints is not None and {"years", "event"} <= set(endpoints.columns)
                else None
            )
            out[f"survival_{_safe_stem(str(endpoint))}"] = survival_figure(
                shown.groups(curves),
                shown.groups(at_risk),
                endpoint=endpoint,
                small_cell_threshold=threshold,
                palette=palette,
                title=f"Time to {display_label(str(endpoint), shown.labels)}",
                censored=shown.groups(censored),
                hazard_ratio_text=hazard_ratio_lines(
                    hazard_ratios, str(endpoint), labels=shown.labels, reference=shown.reference
                ),
                scale=rule.survival_scale,
                subtitle=subtitle,
            )
    if hazard_ratios is not None and hazard_ratios.height:
        out["forest_hazard_ratios"] = forest_figure(
            hazard_ratios,
            labels=shown.labels,
            reference_group=shown.reference,
            subtitle=subtitle,
        )
    if run.has("models/competing_hazard_ratios"):
        competing = competing_forest_rows(run.table("models/competing_hazard_ratios"))
        if competing.height:
            out["forest_competing_risks"] = forest_figure(
                competing,
                labels=shown.labels,
                reference_group=shown.reference,
                title=FIGURE_TITLES["forest_competing_risks"],
                subtitle=subtitle,
            )
    return out


def competing_forest_rows(hazards: pl.DataFrame) -> pl.DataFrame:
    """The endpoint's subdistribution and cause-specific hazard ratios as forest rows,
    one under the other for each term (``subgroup`` names the model)."""
    own = hazards.filter(pl.col("cause") == pl.col("endpoint"))
    model = pl.col("model").replace_strict(
        {"subdistribution": "Fine–Gray", "cause_specific": "cause-specific"},
        default=pl.col("model"),
    )
    return own.sort("endpoint", "term", "model", descending=[False, False, True]).select(
        "endpoint",
        "term",
        model.alias("subgroup"),
        "hr",
        "hr_lower",
        "hr_upper",
        "p",
        "estimable",
        "reason",
    )


def draw_figures(
    run_dir: str | Path | RunFolder, rule: FigureRule | None = None, **options: Any
) -> dict[str, Any]:
    """Every figure the run folder has data for, as plotnine objects by file stem
    (not saved; :func:`write_figures` saves them).

    Titles, legends and forest-plot rows use the run's display labels
    (:func:`kidneycohort.labels.label_map` and ``report.labels``), and each figure drawn
    from eGFR names its equation in the subtitle.

    Parameters
    ----------
    run_dir
        The run folder (a path, or a :class:`~kidneycohort.run_folder.RunFolder`).
    rule
        :class:`FigureRule`; keyword ``options`` override its fields.

    Returns
    -------
    dict
        ``{stem: plotnine.ggplot}`` in drawing order.
    """
    resolved = resolve_rules(FigureRule, rule, options, "draw_figures")
    run = run_dir if isinstance(run_dir, RunFolder) else RunFolder(run_dir)
    threshold = check_threshold(run.small_cell_threshold)
    shown = _Display(run)
    palette = shown.palette(group_palette(run.group_labels()))
    plots: dict[str, Any] = {}
    patient_flow = _patient_flow(run, threshold, shown)
    if patient_flow is not None:
        plots["patient_flow"] = patient_flow
    attrition = _attrition(run, threshold)
    if attrition is not None:
        plots["attrition"] = attrition
    plots |= _lab_figures(run, palette, threshold, shown)
    plots |= _kdigo_figures(run, threshold, shown)
    plots |= _survival_figures(run, palette, threshold, shown, resolved)
    return plots


def write_figures(
    run_dir: str | Path | RunFolder, rule: FigureRule | None = None, **options: Any
) -> list[Path]:
    """Draw every figure the run folder has data for into ``figures/``.

    Files that a recipe does not make are simply absent and their figures are skipped.
    The primary equation, the small-cell threshold, the spline knot and the
    rapid-decline rate come from the run's manifest (:class:`RunFolder`).

    Parameters
    ----------
    run_dir
        The run folder (a path, or a :class:`~kidneycohort.run_folder.RunFolder`).
    rule
        :class:`FigureRule` (formats, dpi, survival scale); keyword ``options`` override
        its fields.

    Returns
    -------
    list of Path
        The files written, in drawing order.
    """
    resolved = resolve_rules(FigureRule, rule, options, "write_figures")
    run = run_dir if isinstance(run_dir, RunFolder) else RunFolder(run_dir)
    figures = run.path / "figures"
    figures.mkdir(exist_ok=True)
    written: list[Path] = []
    for stem, plot in draw_figures(run, resolved).items():
        written += _save(plot, figures, stem, resolved)
    logger.info("wrote %d figure files to %s", len(written), figures)
    return written
