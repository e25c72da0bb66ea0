"""eGFR over time: binned means with a faint sample of patients, model-based mean
trajectories, and the distribution of per-patient slopes.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping

import numpy as np
import polars as pl
from plotnine import (
    aes,
    annotate,
    coord_flip,
    facet_wrap,
    geom_boxplot,
    geom_hline,
    geom_line,
    geom_point,
    geom_ribbon,
    geom_violin,
    geom_vline,
    ggplot,
    labs,
    scale_color_manual,
    scale_fill_manual,
    scale_x_discrete,
)
from scipy import stats

from kidneycohort._frames import FrameLike, as_float, require_columns, to_polars
from kidneycohort.disclosure import DEFAULT_SMALL_CELL_THRESHOLD, small_count_text
from kidneycohort.errors import InputDataError
from kidneycohort.plots._style import (
    EGFR_UNIT_LABEL,
    RAPID_DECLINE_PER_YEAR,
    SLOPE_UNIT_LABEL,
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
    "slope_distribution",
    "slope_distribution_figure",
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
        f"faint lines: up to {sample_patients} randomly chosen patients per group. "
        f"Bins with fewer than {threshold + 1} patients are not shown."
    )
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


def slope_distribution(
    slopes: FrameLike,
    groups: FrameLike | None = None,
    *,
    equation: str | None = None,
    rapid_decline_threshold: float = RAPID_DECLINE_PER_YEAR,
) -> pl.DataFrame:
    """Summary of per-patient eGFR slopes by group (the slope figure's numbers).

    Only slopes flagged ``eligible`` (when the column exists) with a finite value are
    summarised; the others are counted in ``n_not_eligible``. Rapid decline is a slope
    below ``rapid_decline_threshold``:

    .. math:: \\text{rapid} \\iff b_i < -5\\ \\text{mL/min/1.73 m}^2/\\text{year}

    (KDIGO 2012 [2]_, sustained decline of more than 5 per year).

    Returns
    -------
    polars.DataFrame
        ``group``, ``n``, ``n_not_eligible``, ``mean``, ``median``, ``q1``, ``q3``,
        ``n_rapid``, ``pct_rapid``.
    """
    df = to_polars(slopes, "slopes")
    require_columns(df, ("patient_id", "slope_per_year"), "slopes")
    df = pick(df, "equation", equation, "slopes")
    df = with_groups(df, groups, "slopes")
    usable = pl.col("slope_per_year").is_not_null() & pl.col("slope_per_year").is_not_nan()
    if "eligible" in df.columns:
        usable = usable & pl.col("eligible").fill_null(False)
    value = pl.col("slope_per_year").filter(usable)
    return (
        df.group_by("group")
        .agg(
            n=usable.sum().cast(pl.Int64),
            n_not_eligible=(~usable).sum().cast(pl.Int64),
            mean=value.mean(),
            median=value.median(),
            q1=value.quantile(0.25, interpolation="linear"),
            q3=value.quantile(0.75, interpolation="linear"),
            n_rapid=(usable & (pl.col("slope_per_year") < rapid_decline_threshold))
            .sum()
            .cast(pl.Int64),
        )
        .with_columns(
            pct_rapid=pl.when(pl.col("n") > 0).then(100.0 * pl.col("n_rapid") / pl.col("n"))
        )
        .sort("group")
    )


def slope_distribution_figure(
    slopes: FrameLike,
    groups: FrameLike | None = None,
    *,
    equation: str | None = None,
    rapid_decline_threshold: float = RAPID_DECLINE_PER_YEAR,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
    palette: Mapping[str, str] | None = None,
) -> ggplot:
    """Distribution of per-patient eGFR slopes by group, with the rapid-decline threshold.

    Violin (density) with a box of median and quartiles per group; individual values are
    not drawn. The dashed line marks ``rapid_decline_threshold``. Group labels carry the
    number of patients (small-cell protected).

    Returns
    -------
    plotnine.ggplot
    """
    threshold = check_threshold(small_cell_threshold)
    df = pick(to_polars(slopes, "slopes"), "equation", equation, "slopes")
    summary = slope_distribution(df, groups, rapid_decline_threshold=rapid_decline_threshold)
    df = with_groups(df, groups, "slopes")
    usable = pl.col("slope_per_year").is_not_null() & pl.col("slope_per_year").is_not_nan()
    if "eligible" in df.columns:
        usable = usable & pl.col("eligible").fill_null(False)
    values = df.filter(usable).select("group", "slope_per_year")
    colours = palette_for(df, palette)
    axis_labels = {
        row["group"]: f"{row['group']}\n(n={small_count_text(row['n'], threshold)})"
        for row in summary.select("group", "n").to_dicts()
    }
    order = sorted(axis_labels)
    plot = ggplot(data=values.to_pandas(), mapping=aes("group", "slope_per_year")) + base_theme()
    # a violin needs a spread; a group of one patient gets its box (a line) only
    spread = (
        values.group_by("group")
        .agg(sd=pl.col("slope_per_year").std(), n=pl.len())
        .filter((pl.col("n") > 2) & (pl.col("sd") > 0))
    )
    violins = values.join(spread.select("group"), on="group", how="semi")
    if violins.height:
        plot += geom_violin(
            data=violins.to_pandas(),
            mapping=aes(fill="group"),
            alpha=0.35,
            colour="none",
            scale="width",
        )
    if values.height:
        plot += geom_boxplot(aes(colour="group"), width=0.22, outlier_shape="", fill="white")
    else:
        plot += annotate("text", x=1, y=0, label="No eligible slopes")
    plot += geom_hline(yintercept=rapid_decline_threshold, linetype="dashed", colour="#333333")
    plot += geom_hline(yintercept=0, colour="#999999", size=0.3)
    plot += scale_x_discrete(limits=order, labels=[axis_labels[g] for g in order])
    plot += scale_color_manual(values=colours, guide=None)
    plot += scale_fill_manual(values=colours, guide=None)
    plot += coord_flip()
    plot += labs(
        x="",
        y=f"eGFR slope ({SLOPE_UNIT_LABEL})",
        title="Per-patient eGFR slopes",
        caption=(
            f"Dashed line: rapid decline (slope below {rapid_decline_threshold:g} "
            f"{SLOPE_UNIT_LABEL}). Boxes: median and quartiles; shapes: density."
        ),
    )
    return plot
