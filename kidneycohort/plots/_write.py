"""Drawing every figure a run folder has data for into ``figures/``."""

from __future__ import annotations

import json
import logging
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, Final

import matplotlib.pyplot as plt
import polars as pl

from kidneycohort.disclosure import DEFAULT_SMALL_CELL_THRESHOLD
from kidneycohort.errors import InputDataError
from kidneycohort.plots._attrition import attrition_figure
from kidneycohort.plots._kdigo import kdigo_grid_figure, transition_heatmap_figure
from kidneycohort.plots._style import (
    RAPID_DECLINE_PER_YEAR,
    _check_threshold,
    group_palette,
)
from kidneycohort.plots._survival import forest_figure, survival_figure
from kidneycohort.plots._trajectories import (
    egfr_trajectory_figure,
    model_trajectory_figure,
    slope_distribution_figure,
)

logger = logging.getLogger(__name__)


FIGURE_TITLES: Final[dict[str, str]] = {
    "attrition": "Data flow: rows read, excluded and analysed",
    "egfr_trajectories": "eGFR over time",
    "model_trajectories": "Fitted mean eGFR trajectories",
    "slope_distribution": "Per-patient eGFR slopes",
    "kdigo_grid": "Patients by KDIGO GFR and albuminuria category",
    "transition_matrix": "KDIGO category transitions",
    "forest_hazard_ratios": "Hazard ratios by endpoint",
    "survival": "Time to event",
}
"""Figure file stems written by :func:`write_figures` (``survival_<endpoint>`` per endpoint)."""


def read_manifest(run_dir: str | Path) -> dict[str, Any]:
    """The run folder's ``manifest.json`` as a dict ({} when absent).

    Raises
    ------
    InputDataError
        When the file exists but is not valid JSON.
    """
    path = Path(run_dir) / "manifest.json"
    if not path.is_file():
        return {}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise InputDataError(
            f"{path.name}: not valid JSON ({exc.msg} at line {exc.lineno}); "
            "re-run the pipeline to rewrite it"
        ) from exc
    return data if isinstance(data, dict) else {}


def find_setting(config: Any, key: str) -> Any:
    """First value of ``key`` anywhere in a nested config mapping (depth first), or None."""
    if isinstance(config, Mapping):
        if key in config:
            return config[key]
        for value in config.values():
            found = find_setting(value, key)
            if found is not None:
                return found
    elif isinstance(config, list):
        for value in config:
            found = find_setting(value, key)
            if found is not None:
                return found
    return None


def small_cell_threshold_of(manifest: Mapping[str, Any]) -> int:
    """``config.tables.small_cell_threshold`` of a manifest (default 10)."""
    tables = (manifest.get("config") or {}).get("tables") or {}
    value = (
        tables.get("small_cell_threshold", DEFAULT_SMALL_CELL_THRESHOLD)
        if isinstance(tables, Mapping)
        else DEFAULT_SMALL_CELL_THRESHOLD
    )
    return _check_threshold(int(value))


def patient_groups(run_dir: str | Path) -> pl.DataFrame | None:
    """``patient_id``, ``group`` of a run, from the first per-patient file that has both.

    Looks in ``baseline.parquet``, ``slopes.parquet``, ``endpoints.parquet`` and
    ``egfr.parquet``; None when no file carries a group.
    """
    run = Path(run_dir)
    for name in ("baseline", "slopes", "endpoints", "egfr"):
        path = run / f"{name}.parquet"
        if path.is_file():
            names = pl.read_parquet_schema(path)
            if "group" in names and "patient_id" in names:
                return (
                    pl.scan_parquet(path)
                    .select(pl.col("patient_id").cast(pl.String), pl.col("group").cast(pl.String))
                    .unique("patient_id", keep="first")
                    .collect()
                )
    return None


def patient_flow(run_dir: str | Path, equation: str | None = None) -> dict[str, int]:
    """Patient counts of the attrition flow: with lab results, with eGFR, with a baseline."""
    run = Path(run_dir)
    out: dict[str, int] = {}
    ids: list[pl.LazyFrame] = []
    if (run / "labs.parquet").is_file():
        ids.append(
            pl.scan_parquet(run / "labs.parquet").select(pl.col("patient_id").cast(pl.String))
        )
    if (run / "rejected_rows.csv").is_file():
        ids.append(
            pl.scan_csv(run / "rejected_rows.csv", infer_schema=False).select(
                pl.col("patient_id").cast(pl.String)
            )
        )
    if ids:
        out["with any lab row"] = int(
            pl.concat(ids).drop_nulls().unique().select(pl.len()).collect().item()
        )
    if (run / "egfr.parquet").is_file():
        egfr = pl.scan_parquet(run / "egfr.parquet").filter(
            pl.col("egfr").is_not_null() & pl.col("egfr").is_not_nan()
        )
        if equation is not None:
            egfr = egfr.filter(pl.col("equation") == equation)
        out["with eGFR"] = int(egfr.select(pl.col("patient_id").n_unique()).collect().item())
    if (run / "baseline.parquet").is_file():
        base = pl.scan_parquet(run / "baseline.parquet").filter(
            pl.col("baseline_egfr").is_not_null()
        )
        if equation is not None:
            base = base.filter(pl.col("equation") == equation)
        out["with a baseline (analysed)"] = int(
            base.select(pl.col("patient_id").n_unique()).collect().item()
        )
    return out


def _safe_stem(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).strip("_") or "unnamed"


def _save(plot: Any, figures: Path, stem: str, formats: Sequence[str], dpi: int) -> list[Path]:
    written = []
    for fmt in formats:
        path = figures / f"{stem}.{fmt}"
        plot.save(path, dpi=dpi, verbose=False)
        plt.close("all")
        written.append(path)
    return written


def rapid_decline_threshold(config: Mapping[str, Any]) -> float:
    """The slope (mL/min/1.73 m2 per year, negative) below which decline is rapid.

    The config's ``rapid_decline_per_year`` (``slopes.SlopeRule``) states a rate of fall,
    5 by default (KDIGO 2012: a sustained fall of more than 5 per year); the figures mark
    the slope ``-5``. Either sign in the config gives the same line.
    """
    rapid = find_setting(config, "rapid_decline_per_year")
    if isinstance(rapid, int | float) and not isinstance(rapid, bool):
        return -abs(float(rapid))
    return RAPID_DECLINE_PER_YEAR


def write_figures(
    run_dir: str | Path, *, formats: Sequence[str] = ("png", "svg"), dpi: int = 150
) -> list[Path]:
    """Draw every figure the run folder has data for into ``figures/`` (PNG and SVG).

    Files that a recipe does not make are simply absent and their figures are skipped.
    The primary equation (``manifest.study.primary_equation``), the small-cell threshold
    (``config.tables.small_cell_threshold``) and the spline knot (``knot_years``
    anywhere in the config) are read from ``manifest.json`` when present.

    Parameters
    ----------
    run_dir : path
        The run folder.
    formats : sequence of str
        File formats (matplotlib names).
    dpi : int
        Resolution of raster formats.

    Returns
    -------
    list of Path
        The files written, in drawing order.
    """
    run = Path(run_dir)
    if not run.is_dir():
        raise InputDataError(f"run_dir: '{run}' is not a folder; pass the run folder path")
    figures = run / "figures"
    figures.mkdir(exist_ok=True)
    manifest = read_manifest(run)
    threshold = small_cell_threshold_of(manifest)
    study = manifest.get("study") or {}
    equation = study.get("primary_equation") if isinstance(study, Mapping) else None
    groups = patient_groups(run)
    known_groups: set[str] = (
        set(groups["group"].drop_nulls().to_list()) if groups is not None else set()
    )
    for name in ("models/survival_curves.parquet", "models/trajectories.parquet"):
        if (run / name).is_file():
            known_groups |= set(
                pl.read_parquet(run / name, columns=["group"])["group"]
                .drop_nulls()
                .cast(pl.String)
                .to_list()
            )
    palette = group_palette(known_groups)
    written: list[Path] = []

    def pick_equation(df: pl.DataFrame) -> str | None:
        if "equation" not in df.columns:
            return None
        have = df["equation"].drop_nulls().unique().to_list()
        if equation in have:
            return str(equation)
        return str(sorted(have)[0]) if have else None

    accounting = manifest.get("accounting")
    if accounting:
        plot = attrition_figure(
            accounting,
            manifest.get("accounting_by_reason") or None,
            patients=patient_flow(run, equation) or None,
            small_cell_threshold=threshold,
        )
        written += _save(plot, figures, "attrition", formats, dpi)
    if (run / "egfr.parquet").is_file():
        egfr = pl.read_parquet(run / "egfr.parquet")
        plot = egfr_trajectory_figure(
            egfr,
            groups,
            equation=pick_equation(egfr),
            seed=int(manifest.get("seed") or 0),
            small_cell_threshold=threshold,
            palette=palette,
        )
        written += _save(plot, figures, "egfr_trajectories", formats, dpi)
    if (run / "models/trajectories.parquet").is_file():
        knot = find_setting(manifest.get("config") or {}, "knot_years")
        plot = model_trajectory_figure(
            pl.read_parquet(run / "models/trajectories.parquet"),
            knot_years=float(knot) if isinstance(knot, int | float) else None,
            palette=palette,
        )
        written += _save(plot, figures, "model_trajectories", formats, dpi)
    if (run / "slopes.parquet").is_file():
        slopes = pl.read_parquet(run / "slopes.parquet")
        plot = slope_distribution_figure(
            slopes,
            groups,
            equation=pick_equation(slopes),
            rapid_decline_threshold=rapid_decline_threshold(manifest.get("config") or {}),
            small_cell_threshold=threshold,
            palette=palette,
        )
        written += _save(plot, figures, "slope_distribution", formats, dpi)
    if (run / "models/kdigo_grid.parquet").is_file():
        plot = kdigo_grid_figure(
            pl.read_parquet(run / "models/kdigo_grid.parquet"), small_cell_threshold=threshold
        )
        written += _save(plot, figures, "kdigo_grid", formats, dpi)
    if (run / "models/transition_counts.parquet").is_file():
        counts = pl.read_parquet(run / "models/transition_counts.parquet")
        if counts.height:
            plot = transition_heatmap_figure(counts, small_cell_threshold=threshold)
            written += _save(plot, figures, "transition_matrix", formats, dpi)
    if (run / "models/survival_curves.parquet").is_file():
        curves = pl.read_parquet(run / "models/survival_curves.parquet")
        at_risk_path = run / "models/at_risk.parquet"
        at_risk = pl.read_parquet(at_risk_path) if at_risk_path.is_file() else None
        endpoints = (
            curves["endpoint"].drop_nulls().unique(maintain_order=True).to_list()
            if "endpoint" in curves.columns
            else [None]
        )
        for endpoint in endpoints:
            plot = survival_figure(
                curves,
                at_risk,
                endpoint=endpoint,
                small_cell_threshold=threshold,
                palette=palette,
            )
            stem = f"survival_{_safe_stem(str(endpoint))}" if endpoint else "survival"
            written += _save(plot, figures, stem, formats, dpi)
    if (run / "models/hazard_ratios.parquet").is_file():
        hrs = pl.read_parquet(run / "models/hazard_ratios.parquet")
        if hrs.height:
            written += _save(forest_figure(hrs), figures, "forest_hazard_ratios", formats, dpi)
    logger.info("wrote %d figure files to %s", len(written), figures)
    return written
