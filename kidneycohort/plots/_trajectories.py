"""eGFR over time: binned means with a faint sample of patients, and model-based mean
trajectories (the slope distribution is in ``_slopes``).
"""

from __future__ import annotations

import logging
from collections.abc import Mapping

import numpy as np
import polars as pl
from plotnine import (
    aes,
    annotate,
    facet_wrap,
    geom_line,
    geom_point,
    geom_ribbon,
    geom_vline,
    ggplot,
    labs,
    scale_color_manual,
    scale_fill_manual,
)
from scipy import stats

from kidneycohort._frames import FrameLike, as_float, require_columns, to_polars
from kidneycohort.disclosure import DEFAULT_SMALL_CELL_THRESHOLD
from kidneycohort.errors import InputDataError
from kidneycohort.plots._style import (
    EGFR_UNIT_LABEL,
    base_theme,
    check_threshold,
    egfr_unit,
    palette_for,
    pick,
    with_groups,
    wrap,
)

__all__ = [
    "egfr_time_bins",
    "egfr_trajectory_figure",
    "model_trajectory_figure",
]

logger = logging.getLogger(__name__)


def egfr_time_bins(
    egfr: FrameLike,
    groups: FrameLike | None = None,
    *,
    equation: str | None = None,
    bin_years: float = 0.25,
    confidence: float = 0.95,
) -> pl.DataFrame:
    """Group mean eGFR and its confidence interval per time bin (the trajectory figure's data).

    Each value is assigned to the nearest multiple of ``bin_years`` (so a scheduled visit
    and its window share a bin); a patient's values in one bin are averaged first, so
    each patient counts once per bin. The interval is Student's t around the mean of the
    patient means:

    .. math::

        \\bar y_b \\pm t_{1-\\alpha/2,\\,n_b-1}\\, s_b / \\sqrt{n_b}

    Parameters
    ----------
    egfr : DataFrame
        ``egfr.parquet`` layout: ``patient_id``, ``years_from_index``, ``egfr``
        (``equation`` when several equations are present).
    groups : DataFrame, optional
        ``patient_id``, ``group``. Without it, a ``group`` column of ``egfr`` is used, or
        everybody is one group.
    equation : str, optional
        Which equation to summarise; needed when ``egfr`` holds several.
    bin_years : float
        Width of the time bins in years (0.25 = quarterly visits).
    confidence : float
        Confidence level of the interval.

    Returns
    -------
    polars.DataFrame
        ``group``, ``bin``, ``years`` (bin centre), ``n_patients``, ``n_values``,
        ``mean``, ``sd``, ``lower``, ``upper`` (null interval when ``n_patients < 2``).
        Not-computable eGFR values (null/NaN) and values from a qualified result
        (``qualified``: reported as ``"<x"``/``">x"``, a limit) are not summarised; their
        count is logged.

    Raises
    ------
    InputDataError
        Missing columns, an unknown equation, a non-positive bin width.
    """
    df = to_polars(egfr, "egfr")
    require_columns(df, ("patient_id", "years_from_index", "egfr"), "egfr")
    if not bin_years > 0:
        raise InputDataError(f"bin_years: expected a positive width in years, got {bin_years!r}")
    if not 0 < confidence < 1:
        raise InputDataError(f"confidence: expected a level in (0, 1), got {confidence!r}")
    df = pick(df, "equation", equation, "egfr")
    df = with_groups(df, groups, "egfr")
    usable = pl.col("egfr").is_not_null() & pl.col("egfr").is_not_nan()
    usable = usable & pl.col("years_from_index").is_not_null()
    if "qualified" in df.columns:
        # a result reported as "<x" or ">x" is a limit: never drawn as an exact value
        usable = usable & ~pl.col("qualified").fill_null(False)
    n_unusable = df.height - df.filter(usable).height
    if n_unusable:
        logger.info(
            "egfr: %d values not computable, undated or from a qualified result ('<x'), "
            "not summarised",
            n_unusable,
        )
    per_patient = (
        df.filter(usable)
        .with_columns(bin=(pl.col("years_from_index") / bin_years).round(0).cast(pl.Int64))
        .group_by("group", "bin", "patient_id")
        .agg(value=pl.col("egfr").mean(), n=pl.len())
    )
    out = (
        per_patient.group_by("group", "bin")
        .agg(
            n_patients=pl.len().cast(pl.Int64),
            n_values=pl.col("n").sum().cast(pl.Int64),
            mean=pl.col("value").mean(),
            sd=pl.col("value").std(ddof=1),
        )
        .with_columns(years=pl.col("bin") * bin_years)
        .sort("group", "bin")
    )
    dof = out["n_patients"].to_numpy().astype(float) - 1.0
    with np.errstate(invalid="ignore"):
        t = np.where(dof >= 1, stats.t.ppf(0.5 + confidence / 2, np.maximum(dof, 1.0)), np.nan)
    half = pl.Series("t", t) * out["sd"] / out["n_patients"].cast(pl.Float64).sqrt()
    out = out.with_columns(
        lower=(pl.col("mean") - half).fill_nan(None), upper=(pl.col("mean") + half).fill_nan(None)
    )
    return out.select(
        "group", "bin", "years", "n_patients", "n_values", "mean", "sd", "lower", "upper"
    )


def _sample_patients(df: pl.DataFrame, per_group: int, seed: int) -> pl.DataFrame:
    """A reproducible random sample of patients per group (hash rank, no loop)."""
    if per_group <= 0:
        return df.clear()
    chosen = (
        df.select("group", "patient_id")
        .unique()
        .with_columns(
            rank=pl.col("patient_id").hash(seed).rank("ordinal").over("group"),
        )
        .filter(pl.col("rank") <= per_group)
        .select("patient_id")
    )
    return df.join(chosen, on="patient_id", how="semi")


def egfr_trajectory_figure(
    egfr: FrameLike,
    groups: FrameLike | None = None,
    *,
    equation: str | None = None,
    bin_years: float = 0.25,
    sample_patients: int = 25,
    seed: int = 0,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
    palette: Mapping[str, str] | None = None,
) -> ggplot:
    """Individual eGFR series (a faint random sample) with each group's mean and 95 % CI.

    The mean and interval come from :func:`egfr_time_bins`. Bins with fewer patients
    than ``small_cell_threshold + 1`` are not drawn (the caption says so).

    Parameters
    ----------
    egfr, groups, equation, bin_years
        As in :func:`egfr_time_bins`.
    sample_patients : int
        Individual series drawn per group (0: none).
    seed : int
        Seed of the sample.
    small_cell_threshold : int
        Bins with 1..threshold patients are hidden.
    palette : mapping, optional
        ``{group: colour}``; default :func:`group_palette`.

    Returns
    -------
    plotnine.ggplot
    """
    threshold = check_threshold(small_cell_threshold)
    df = pick(to_polars(egfr, "egfr"), "equation", equation, "egfr")
    bins = egfr_time_bins(df, groups, bin_years=bin_years)
    df = with_groups(df, groups, "egfr")
    colours = palette_for(df, palette)
    shown = bins.filter(pl.col("n_patients") > threshold)
    ribbon = shown.filter(pl.col("lower").is_not_null() & pl.col("upper").is_not_null())
    lines = _sample_patients(
        df.filter(
            pl.col("egfr").is_not_null()
            & pl.col("egfr").is_not_nan()
            & pl.col("years_from_index").is_not_null()
        ),
        sample_patients,
        seed,
    ).sort("patient_id", "years_from_index")
    caption = (
        f"Thick lines: mean of patient means per {bin_years:g}-year bin with 95% CI; "
        f"faint lines: {lines['patient_id'].n_unique()} patients drawn at random (up to "
        f"{sample_patients} per group, seed {seed})."
    )
    if threshold > 0:
        caption += f" Bins with fewer than {threshold + 1} patients are not shown."
    plot = ggplot() + base_theme()
    if lines.height:
        plot += geom_line(
            data=lines.to_pandas(),
            mapping=aes("years_from_index", "egfr", group="patient_id", colour="group"),
            alpha=0.18,
            size=0.4,
        )
    if ribbon.height:
        plot += geom_ribbon(
            data=ribbon.to_pandas(),
            mapping=aes("years", ymin="lower", ymax="upper", fill="group"),
            alpha=0.25,
        )
    if shown.height:
        frame = shown.to_pandas()
        plot += geom_line(data=frame, mapping=aes("years", "mean", colour="group"), size=1.1)
        plot += geom_point(data=frame, mapping=aes("years", "mean", colour="group"), size=1.6)
    if not (lines.height or shown.height):
        plot += annotate("text", x=0, y=0, label="No eGFR values to show")
    plot += scale_color_manual(values=colours, name="Group")
    plot += scale_fill_manual(values=colours, name="Group")
    plot += labs(
        x="Years from index",
        y=f"eGFR ({egfr_unit(df)})",
        title="eGFR over time",
        caption=wrap(caption),
    )
    return plot


def _label_height(df: pl.DataFrame) -> float:
    """Height of the phase labels: the highest finite upper bound, else the highest mean.

    Upper bounds may be null or NaN throughout (an interval that could not be estimated).
    """
    for column in ("upper", "mean"):
        if column in df.columns:
            values = df[column].cast(pl.Float64)
            highest = values.filter(values.is_finite()).max()
            if highest is not None:
                return as_float(highest, f"trajectories: highest {column}")
    return 0.0


def model_trajectory_figure(
    trajectories: FrameLike,
    *,
    knot_years: float | None = None,
    palette: Mapping[str, str] | None = None,
) -> ggplot:
    """Fitted mean eGFR trajectories of the slope model per group, with 95 % CI bands.

    With a linear spline model (knot at ``knot_years``, commonly 3 months) the dashed
    line separates the acute phase from the chronic phase; the total slope to
    :math:`T` years is :math:`(\\beta_{acute} k + \\beta_{chronic}(T - k)) / T`
    (Vonesh 2019 Stat Med, doi:10.1002/sim.8282).

    Parameters
    ----------
    trajectories : DataFrame
        ``models/trajectories.parquet``: ``model``, ``group``, ``years``, ``mean``,
        ``lower``, ``upper``.
    knot_years : float, optional
        Knot of the spline; marks the acute/chronic boundary when given.
    palette : mapping, optional
        ``{group: colour}``.

    Returns
    -------
    plotnine.ggplot
    """
    df = to_polars(trajectories, "trajectories")
    require_columns(df, ("group", "years", "mean"), "trajectories")
    if "model" not in df.columns:
        df = df.with_columns(model=pl.lit("slope model"))
    df = df.with_columns(pl.col("group").cast(pl.String).fill_null("no group")).sort(
        "model", "group", "years"
    )
    df = df.filter(pl.col("mean").is_not_null() & pl.col("mean").is_not_nan())
    colours = palette_for(df, palette)
    plot = ggplot(data=df.to_pandas(), mapping=aes("years", "mean", colour="group")) + base_theme()
    if {"lower", "upper"} <= set(df.columns):
        band = df.filter(
            pl.col("lower").is_not_null()
            & pl.col("upper").is_not_null()
            & pl.col("lower").is_not_nan()
            & pl.col("upper").is_not_nan()
        )
        if band.height:
            plot += geom_ribbon(
                data=band.to_pandas(),
                mapping=aes(ymin="lower", ymax="upper", fill="group"),
                alpha=0.22,
                colour="none",
            )
    plot += geom_line(size=1.1)
    caption = "Model-based mean eGFR with 95% confidence bands."
    if knot_years is not None and df.height:
        top = _label_height(df)
        plot += geom_vline(xintercept=knot_years, linetype="dashed", colour="#555555")
        plot += annotate("text", x=knot_years / 2, y=top, label="acute", size=8, va="bottom")
        right = as_float(df["years"].max(), "trajectories: last years")
        plot += annotate(
            "text", x=(knot_years + right) / 2, y=top, label="chronic", size=8, va="bottom"
        )
        caption += f" Dashed line: spline knot at {knot_years:g} years (acute | chronic phase)."
    if df["model"].n_unique() > 1:
        plot += facet_wrap("model")
    plot += scale_color_manual(values=colours, name="Group")
    plot += scale_fill_manual(values=colours, name="Group")
    plot += labs(
        x="Years from index",
        y=f"Fitted eGFR ({EGFR_UNIT_LABEL})",
        title="Fitted mean eGFR trajectories",
        caption=wrap(caption),
    )
    return plot
