"""Figures of a run: eGFR trajectories, slopes, survival, hazard ratios, KDIGO, attrition.

Every figure is a function that takes the run folder's tables (polars or pandas) and
returns a plotnine object, so it can be used on its own, restyled with ``+ theme(...)``
and saved anywhere. Each figure has a *data layer* function next to it that returns the
exact table the figure draws (``egfr_time_bins``, ``slope_distribution``,
``survival_steps``, ``forest_rows``, ``kdigo_grid_cells``, ``transition_cells``,
``attrition_boxes``); tests check those tables against the tables they summarise.

Conventions shared by all figures:

* colours come from the Okabe–Ito palette, which stays distinguishable under the common
  colour-vision deficiencies [1]_; a group keeps the same colour in every figure of a run
  (:func:`group_palette` assigns colours in sorted group order);
* axes carry units (mL/min/1.73 m², years);
* counts from 1 to the small-cell threshold (default 10) are printed as ``"<11"``, the
  same protection the tables apply (common practice in data-use agreements).

:func:`write_figures` draws every figure a run folder has data for, as PNG and SVG, into
``figures/``.

References
----------
.. [1] Okabe M, Ito K. Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people. J*Fly, 2002/2008.
   https://jfly.uni-koeln.de/color/
.. [2] KDIGO 2012 Clinical Practice Guideline for the Evaluation and Management of
   Chronic Kidney Disease. Kidney Int Suppl 2013;3:1-150. doi:10.1038/kisup.2012.73
.. [3] Schulz KF, Altman DG, Moher D. CONSORT 2010 statement. BMJ 2010;340:c332.
   doi:10.1136/bmj.c332
"""

from __future__ import annotations

import json
import logging
import math
import re
import textwrap
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any, Final

import matplotlib.pyplot as plt
import numpy as np
import polars as pl
from plotnine import (
    aes,
    annotate,
    arrow,
    coord_flip,
    element_blank,
    element_text,
    facet_wrap,
    geom_boxplot,
    geom_hline,
    geom_line,
    geom_point,
    geom_ribbon,
    geom_segment,
    geom_text,
    geom_tile,
    geom_violin,
    geom_vline,
    ggplot,
    labs,
    scale_color_identity,
    scale_color_manual,
    scale_fill_gradient,
    scale_fill_manual,
    scale_x_continuous,
    scale_x_discrete,
    scale_x_log10,
    scale_y_continuous,
    scale_y_discrete,
    theme,
    theme_bw,
    theme_void,
)
from scipy import stats

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES, RISK_GRID, RISK_LEVELS

logger = logging.getLogger(__name__)

# ---- shared conventions ---------------------------------------------------------------

OKABE_ITO: Final[dict[str, str]] = {
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
    "black": "#000000",
}
"""The eight Okabe–Ito colours [1]_."""

# Groups take the pair that differs most for every common colour-vision type first.
GROUP_COLOURS: Final = (
    OKABE_ITO["blue"],
    OKABE_ITO["vermillion"],
    OKABE_ITO["bluish_green"],
    OKABE_ITO["orange"],
    OKABE_ITO["reddish_purple"],
    OKABE_ITO["sky_blue"],
    OKABE_ITO["black"],
    OKABE_ITO["yellow"],
)

# the prognosis levels of kidneycohort.kdigo, spelt as identifiers
KDIGO_RISK_LEVELS: Final = tuple(level.replace(" ", "_") for level in RISK_LEVELS)
KDIGO_RISK_LABELS: Final[dict[str, str]] = {
    "low": "Low",
    "moderately_increased": "Moderately increased",
    "high": "High",
    "very_high": "Very high",
}
# Okabe–Ito colours ordered from green to vermillion, as the guideline's heat map is.
KDIGO_RISK_COLOURS: Final[dict[str, str]] = {
    "low": OKABE_ITO["bluish_green"],
    "moderately_increased": OKABE_ITO["yellow"],
    "high": OKABE_ITO["orange"],
    "very_high": OKABE_ITO["vermillion"],
}
G_RANGES: Final[dict[str, str]] = {
    "G1": "≥90",
    "G2": "60–89",
    "G3a": "45–59",
    "G3b": "30–44",
    "G4": "15–29",
    "G5": "<15",
}
A_RANGES: Final[dict[str, str]] = {"A1": "<30 mg/g", "A2": "30–300 mg/g", "A3": ">300 mg/g"}

# KDIGO 2012 prognosis of CKD by GFR and albuminuria category (kidneycohort.kdigo's
# RISK_GRID, column by column); used to colour cells that the run's grid leaves out.
KDIGO_RISK: Final[dict[tuple[str, str], str]] = {
    (g, a): RISK_GRID[(g, a)].replace(" ", "_") for a in A_CATEGORIES for g in G_CATEGORIES
}

EGFR_UNIT_LABEL: Final = "mL/min/1.73 m²"
SLOPE_UNIT_LABEL: Final = "mL/min/1.73 m²/year"
DEFAULT_SMALL_CELL_THRESHOLD: Final = 10
RAPID_DECLINE_PER_YEAR: Final = -5.0
"""A sustained fall of more than 5 mL/min/1.73 m² per year (KDIGO 2012, rapid progression)."""

ALL_PATIENTS: Final = "All patients"
_BASE_SIZE: Final = 10
_FIG_SIZE: Final = (7.5, 4.6)


def group_palette(groups: Iterable[Any]) -> dict[str, str]:
    """Map each group to an Okabe–Ito colour, in sorted group order.

    The same set of groups always gets the same colours, so a run's figures agree.
    More than eight groups reuse the colours in order.

    Parameters
    ----------
    groups : iterable
        Group labels (duplicates and nulls are ignored).

    Returns
    -------
    dict
        ``{group: "#RRGGBB"}``.
    """
    names = sorted({str(g) for g in groups if g is not None})
    return {g: GROUP_COLOURS[i % len(GROUP_COLOURS)] for i, g in enumerate(names)}


def small_cell_text(counts: pl.Expr, threshold: int = DEFAULT_SMALL_CELL_THRESHOLD) -> pl.Expr:
    """Expression printing counts, with 1..``threshold`` shown as ``"<threshold+1>"``.

    Zero stays ``"0"`` (an empty cell discloses nobody); nulls stay null.
    """
    # the count comes first so that the result keeps the count's column name
    return (
        pl.when(counts.is_null() | ~counts.is_between(1, threshold))
        .then(counts.cast(pl.Int64).cast(pl.String))
        .otherwise(pl.lit(f"<{threshold + 1}"))
    )


def _small(n: int, threshold: int) -> str:
    return f"<{threshold + 1}" if 1 <= n <= threshold else f"{n:,}"


def _theme() -> theme:
    return theme_bw(base_size=_BASE_SIZE) + theme(
        figure_size=_FIG_SIZE,
        legend_position="bottom",
        plot_title=element_text(size=_BASE_SIZE + 2, weight="bold"),
        plot_caption=element_text(size=_BASE_SIZE - 2, ha="left"),
        panel_grid_minor=element_blank(),
    )


def _check_threshold(threshold: int) -> int:
    if not isinstance(threshold, int | np.integer) or threshold < 0:
        raise InputDataError(
            f"small_cell_threshold: expected a non-negative integer, got {threshold!r}; "
            "use e.g. 10 to print counts 1..10 as '<11'"
        )
    return int(threshold)


def _pick(df: pl.DataFrame, column: str, value: str | None, name: str) -> pl.DataFrame:
    """Keep the rows of one ``column`` value; ``None`` is fine when there is one value."""
    if column not in df.columns:
        return df
    have = sorted(str(v) for v in df[column].drop_nulls().unique())
    if value is None:
        if len(have) > 1:
            raise InputDataError(
                f"{name}: column '{column}' holds {len(have)} values {have}; pass "
                f"{column}= one of them"
            )
        return df
    if value not in have:
        raise InputDataError(
            f"{name}: {column} '{value}' not found (have {have}){did_you_mean(value, have)}"
        )
    return df.filter(pl.col(column) == value)


def _with_groups(df: pl.DataFrame, groups: FrameLike | None, name: str) -> pl.DataFrame:
    """Attach a string ``group`` column from ``groups`` (patient_id, group) or the data."""
    if groups is not None:
        g = to_polars(groups, "groups")
        require_columns(g, ("patient_id", "group"), "groups")
        g = g.select(pl.col("patient_id").cast(pl.String), pl.col("group").cast(pl.String))
        if g["patient_id"].is_duplicated().any():
            raise InputDataError(
                "groups: patient_id must be unique (one group per patient); "
                f"got {int(g['patient_id'].is_duplicated().sum())} duplicated rows"
            )
        df = df.drop("group", strict=False).join(g, on="patient_id", how="left")
    elif "group" not in df.columns:
        df = df.with_columns(group=pl.lit(ALL_PATIENTS))
    missing = df["group"].null_count()
    if missing:
        logger.info("%s: %d rows without a group shown as 'no group'", name, missing)
    return df.with_columns(pl.col("group").cast(pl.String).fill_null("no group"))


def _palette_for(df: pl.DataFrame, palette: Mapping[str, str] | None) -> dict[str, str]:
    present = df["group"].unique().to_list() if "group" in df.columns else []
    base = dict(palette) if palette else {}
    extra = group_palette(g for g in present if g not in base)
    for g, colour in extra.items():
        base.setdefault(g, colour)
    return base


def _readable(code: str) -> str:
    """``egfr_decline_40pct`` -> ``eGFR decline 40pct`` (codes stay recognisable)."""
    return re.sub(r"\begfr\b", "eGFR", str(code).replace("_", " "), flags=re.IGNORECASE)


def _wrap(text: str, width: int = 110) -> str:
    return "\n".join(textwrap.wrap(text, width))


def _egfr_unit(df: pl.DataFrame) -> str:
    if "egfr_unit" in df.columns:
        units = df["egfr_unit"].drop_nulls().unique().to_list()
        if units == ["mL/min"]:
            return "mL/min"
    return EGFR_UNIT_LABEL


# ---- eGFR trajectories ------------------------------------------------------------------


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
        Not-computable eGFR values (null/NaN) are not summarised; their count is logged.

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
    df = _pick(df, "equation", equation, "egfr")
    df = _with_groups(df, groups, "egfr")
    usable = pl.col("egfr").is_not_null() & pl.col("egfr").is_not_nan()
    usable = usable & pl.col("years_from_index").is_not_null()
    n_unusable = df.height - df.filter(usable).height
    if n_unusable:
        logger.info("egfr: %d values not computable or undated, not summarised", n_unusable)
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
    threshold = _check_threshold(small_cell_threshold)
    df = _pick(to_polars(egfr, "egfr"), "equation", equation, "egfr")
    bins = egfr_time_bins(df, groups, bin_years=bin_years)
    df = _with_groups(df, groups, "egfr")
    colours = _palette_for(df, palette)
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
    plot = ggplot() + _theme()
    if lines.height:
        plot += geom_line(
            lines.to_pandas(),
            aes("years_from_index", "egfr", group="patient_id", colour="group"),
            alpha=0.18,
            size=0.4,
        )
    if ribbon.height:
        plot += geom_ribbon(
            ribbon.to_pandas(),
            aes("years", ymin="lower", ymax="upper", fill="group"),
            alpha=0.25,
        )
    if shown.height:
        frame = shown.to_pandas()
        plot += geom_line(frame, aes("years", "mean", colour="group"), size=1.1)
        plot += geom_point(frame, aes("years", "mean", colour="group"), size=1.6)
    if not (lines.height or shown.height):
        plot += annotate("text", x=0, y=0, label="No eGFR values to show")
    plot += scale_color_manual(values=colours, name="Group")
    plot += scale_fill_manual(values=colours, name="Group")
    plot += labs(
        x="Years from index",
        y=f"eGFR ({_egfr_unit(df)})",
        title="eGFR over time",
        caption=_wrap(caption),
    )
    return plot


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
    colours = _palette_for(df, palette)
    plot = ggplot(df.to_pandas(), aes("years", "mean", colour="group")) + _theme()
    if {"lower", "upper"} <= set(df.columns):
        band = df.filter(
            pl.col("lower").is_not_null()
            & pl.col("upper").is_not_null()
            & pl.col("lower").is_not_nan()
            & pl.col("upper").is_not_nan()
        )
        if band.height:
            plot += geom_ribbon(
                band.to_pandas(),
                aes(ymin="lower", ymax="upper", fill="group"),
                alpha=0.22,
                colour="none",
            )
    plot += geom_line(size=1.1)
    caption = "Model-based mean eGFR with 95% confidence bands."
    if knot_years is not None and df.height:
        top = float(df["upper"].max() if "upper" in df.columns else df["mean"].max())
        top = top if math.isfinite(top) else float(df["mean"].max())
        plot += geom_vline(xintercept=knot_years, linetype="dashed", colour="#555555")
        plot += annotate("text", x=knot_years / 2, y=top, label="acute", size=8, va="bottom")
        right = float(df["years"].max())
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
        caption=_wrap(caption),
    )
    return plot


# ---- per-patient slopes -----------------------------------------------------------------


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
    df = _pick(df, "equation", equation, "slopes")
    df = _with_groups(df, groups, "slopes")
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
    threshold = _check_threshold(small_cell_threshold)
    df = _pick(to_polars(slopes, "slopes"), "equation", equation, "slopes")
    summary = slope_distribution(df, groups, rapid_decline_threshold=rapid_decline_threshold)
    df = _with_groups(df, groups, "slopes")
    usable = pl.col("slope_per_year").is_not_null() & pl.col("slope_per_year").is_not_nan()
    if "eligible" in df.columns:
        usable = usable & pl.col("eligible").fill_null(False)
    values = df.filter(usable).select("group", "slope_per_year")
    colours = _palette_for(df, palette)
    axis_labels = {
        row["group"]: f"{row['group']}\n(n={_small(row['n'], threshold)})"
        for row in summary.select("group", "n").to_dicts()
    }
    order = sorted(axis_labels)
    plot = ggplot(values.to_pandas(), aes("group", "slope_per_year")) + _theme()
    # a violin needs a spread; a group of one patient gets its box (a line) only
    spread = (
        values.group_by("group")
        .agg(sd=pl.col("slope_per_year").std(), n=pl.len())
        .filter((pl.col("n") > 2) & (pl.col("sd") > 0))
    )
    violins = values.join(spread.select("group"), on="group", how="semi")
    if violins.height:
        plot += geom_violin(
            violins.to_pandas(), aes(fill="group"), alpha=0.35, colour="none", scale="width"
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


# ---- survival and cumulative incidence --------------------------------------------------

_MEASURE_LABEL: Final = {
    "survival": "Event-free probability (Kaplan–Meier)",
    "cumulative_incidence": "Cumulative incidence (Aalen–Johansen)",
}


def survival_steps(curves: FrameLike, *, endpoint: str | None = None) -> pl.DataFrame:
    """The step function of survival or cumulative-incidence curves, ready to draw.

    Each estimate holds from its time until the next one (right-continuous steps). A
    curve that does not start at time 0 gets a starting point at 0 with estimate 1
    (survival) or 0 (cumulative incidence) and a zero-width band.

    Parameters
    ----------
    curves : DataFrame
        ``models/survival_curves.parquet``: ``endpoint``, ``group``, ``years``,
        ``estimate``, ``lower``, ``upper``, ``measure``.
    endpoint : str, optional
        Needed when several endpoints are present.

    Returns
    -------
    polars.DataFrame
        ``group``, ``years``, ``estimate``, ``lower``, ``upper``, ``measure``, with two
        rows per jump (the level before and after it).
    """
    df = to_polars(curves, "survival_curves")
    require_columns(df, ("group", "years", "estimate"), "survival_curves")
    df = _pick(df, "endpoint", endpoint, "survival_curves")
    if "measure" not in df.columns:
        df = df.with_columns(measure=pl.lit("survival"))
    measures = df["measure"].drop_nulls().unique().to_list()
    if len(measures) > 1:
        raise InputDataError(
            f"survival_curves: one endpoint mixes measures {sorted(measures)}; "
            "write one measure per endpoint"
        )
    for c in ("lower", "upper"):
        if c not in df.columns:
            df = df.with_columns(pl.lit(None, dtype=pl.Float64).alias(c))
    df = df.select(
        pl.col("group").cast(pl.String).fill_null("no group"),
        pl.col("years").cast(pl.Float64),
        pl.col("estimate").cast(pl.Float64),
        pl.col("lower").cast(pl.Float64),
        pl.col("upper").cast(pl.Float64),
        pl.col("measure").cast(pl.String),
    ).sort("group", "years")
    start_value = 0.0 if measures == ["cumulative_incidence"] else 1.0
    starts = (
        df.group_by("group")
        .agg(first=pl.col("years").min(), measure=pl.col("measure").first())
        .filter(pl.col("first") > 0)
        .select(
            "group",
            years=pl.lit(0.0),
            estimate=pl.lit(start_value),
            lower=pl.lit(start_value),
            upper=pl.lit(start_value),
            measure="measure",
        )
    )
    df = pl.concat([starts, df]).sort("group", "years")
    before = (
        df.with_columns(
            pl.col("estimate", "lower", "upper").shift(1).over("group"),
            _order=pl.lit(0),
            _first=pl.col("years").rank("ordinal").over("group") == 1,
        )
        .filter(~pl.col("_first"))
        .drop("_first")
    )
    steps = pl.concat([before, df.with_columns(_order=pl.lit(1))])
    return steps.sort("group", "years", "_order").drop("_order")


def survival_figure(
    curves: FrameLike,
    at_risk: FrameLike | None = None,
    *,
    endpoint: str | None = None,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
    palette: Mapping[str, str] | None = None,
    title: str | None = None,
) -> ggplot:
    """Kaplan–Meier or cumulative-incidence curves per group, CI bands, numbers at risk.

    The number-at-risk table is drawn under the time axis in the same panel, so its
    columns line up with the time axis by construction; counts 1..threshold are shown
    as ``"<11"``.

    Parameters
    ----------
    curves : DataFrame
        ``models/survival_curves.parquet`` (see :func:`survival_steps`).
    at_risk : DataFrame, optional
        ``models/at_risk.parquet``: ``endpoint``, ``group``, ``years``, ``n_at_risk``.
    endpoint : str, optional
        Which endpoint; needed when several are present.
    small_cell_threshold : int
        Counts 1..threshold print as ``"<threshold+1>"``.
    palette : mapping, optional
        ``{group: colour}``.
    title : str, optional
        Figure title (default: the endpoint name).

    Returns
    -------
    plotnine.ggplot
    """
    threshold = _check_threshold(small_cell_threshold)
    steps = survival_steps(curves, endpoint=endpoint)
    measure = steps["measure"].drop_nulls().first() if steps.height else "survival"
    colours = _palette_for(steps, palette)
    if endpoint is None:
        raw = to_polars(curves, "survival_curves")
        endpoint = (
            str(raw["endpoint"].drop_nulls().first())
            if "endpoint" in raw.columns and raw.height
            else ""
        )
    plot = ggplot() + _theme()
    band = steps.filter(
        pl.col("lower").is_not_null()
        & pl.col("upper").is_not_null()
        & pl.col("lower").is_not_nan()
        & pl.col("upper").is_not_nan()
    )
    if band.height:
        plot += geom_ribbon(
            band.to_pandas(),
            aes("years", ymin="lower", ymax="upper", fill="group"),
            alpha=0.2,
        )
    line = steps.filter(pl.col("estimate").is_not_null() & pl.col("estimate").is_not_nan())
    if line.height:
        plot += geom_line(line.to_pandas(), aes("years", "estimate", colour="group"), size=0.9)
    breaks = [0.0, 0.25, 0.5, 0.75, 1.0]
    labels = [f"{b:.2f}" for b in breaks]
    y_low = -0.02
    if at_risk is not None:
        risk = to_polars(at_risk, "at_risk")
        require_columns(risk, ("group", "years", "n_at_risk"), "at_risk")
        if "endpoint" in risk.columns and endpoint:
            risk = risk.filter(pl.col("endpoint") == endpoint)
        risk = risk.with_columns(pl.col("group").cast(pl.String).fill_null("no group"))
        order = sorted(risk["group"].unique().to_list())
        if order:
            rows = {g: -0.14 - 0.085 * i for i, g in enumerate(order)}
            table = risk.with_columns(
                y=pl.col("group").replace_strict(rows, return_dtype=pl.Float64),
                label=small_cell_text(pl.col("n_at_risk"), threshold),
            )
            plot += geom_text(
                table.to_pandas(),
                aes("years", "y", label="label", colour="group"),
                size=7.5,
                show_legend=False,
            )
            plot += annotate(
                "text",
                x=float(table["years"].min()),
                y=-0.06,
                label="Number at risk",
                size=7.5,
                ha="left",
                fontweight="bold",
            )
            plot += geom_hline(yintercept=-0.035, colour="#BBBBBB", size=0.3)
            breaks = [rows[g] for g in order] + breaks
            labels = order + labels
            y_low = min(rows.values()) - 0.05
    # grid lines for the probability scale only, not through the at-risk rows
    plot += geom_hline(yintercept=[0.0, 0.25, 0.5, 0.75, 1.0], colour="#EBEBEB", size=0.4)
    plot += scale_y_continuous(breaks=breaks, labels=labels, limits=(y_low, 1.02))
    plot += theme(panel_grid_major_y=element_blank())
    present = sorted(steps["group"].unique().to_list())
    plot += scale_color_manual(values=colours, name="Group", limits=present, breaks=present)
    plot += scale_fill_manual(values=colours, name="Group", limits=present, breaks=present)
    plot += labs(
        x="Years from index",
        y=_MEASURE_LABEL.get(str(measure), str(measure)),
        title=title or (f"Time to {_readable(endpoint)}" if endpoint else "Time to event"),
        caption="Shaded bands: 95% confidence intervals.",
    )
    return plot


# ---- hazard ratios ----------------------------------------------------------------------


def _two_decimals(value: pl.Expr) -> pl.Expr:
    """A positive number printed with exactly two decimals (``0.4`` -> ``"0.40"``)."""
    hundredths = (value * 100).round(0).cast(pl.Int64)
    return pl.concat_str(
        (hundredths // 100).cast(pl.String),
        pl.lit("."),
        (hundredths % 100).cast(pl.String).str.zfill(2),
    )


def forest_rows(hazard_ratios: FrameLike) -> pl.DataFrame:
    """Rows of the forest plot: one per endpoint x term (x subgroup), with a printed label.

    Returns
    -------
    polars.DataFrame
        ``endpoint``, ``term``, ``subgroup`` (null when absent), ``hr``, ``hr_lower``,
        ``hr_upper``, ``p``, ``estimable`` (finite, positive limits), ``label``
        (``"endpoint · term: HR (lower–upper)"`` or ``"not estimable"``),
        ``row`` (1 = top).
    """
    df = to_polars(hazard_ratios, "hazard_ratios")
    require_columns(df, ("endpoint", "term", "hr", "hr_lower", "hr_upper"), "hazard_ratios")
    if "subgroup" not in df.columns:
        df = df.with_columns(subgroup=pl.lit(None, dtype=pl.String))
    if "p" not in df.columns:
        df = df.with_columns(p=pl.lit(None, dtype=pl.Float64))
    bad = df.filter((pl.col("hr") < 0) | (pl.col("hr_lower") < 0) | (pl.col("hr_upper") < 0)).height
    if bad:
        raise InputDataError(
            f"hazard_ratios: {bad} rows with a negative hazard ratio or limit; hazard ratios "
            "are positive (exp of a Cox coefficient)"
        )
    # a limit of 0 or infinity (no events in one group) cannot be drawn on a log axis
    estimable = (
        pl.col("hr").is_finite()
        & pl.col("hr_lower").is_finite()
        & pl.col("hr_upper").is_finite()
        & (pl.col("hr") > 0)
        & (pl.col("hr_lower") > 0)
    )
    name = pl.concat_str(
        pl.col("endpoint"),
        pl.lit(" · "),
        pl.col("term"),
        pl.when(pl.col("subgroup").is_not_null())
        .then(pl.lit(" [") + pl.col("subgroup").cast(pl.String) + pl.lit("]"))
        .otherwise(pl.lit("")),
    )
    ci = pl.concat_str(
        _two_decimals(pl.col("hr")),
        pl.lit(" ("),
        _two_decimals(pl.col("hr_lower")),
        pl.lit("–"),
        _two_decimals(pl.col("hr_upper")),
        pl.lit(")"),
    )
    return df.select(
        "endpoint",
        "term",
        pl.col("subgroup").cast(pl.String),
        pl.col("hr").cast(pl.Float64),
        pl.col("hr_lower").cast(pl.Float64),
        pl.col("hr_upper").cast(pl.Float64),
        pl.col("p").cast(pl.Float64),
        estimable=estimable.fill_null(False),
        label=pl.concat_str(
            name, pl.lit(":  "), pl.when(estimable).then(ci).otherwise(pl.lit("not estimable"))
        ),
        row=pl.int_range(1, pl.len() + 1),
    )


def forest_figure(hazard_ratios: FrameLike) -> ggplot:
    """Forest plot of hazard ratios with 95 % CIs across endpoints (and subgroups).

    The axis is logarithmic so that ratios and their reciprocals are equally far from 1.

    Parameters
    ----------
    hazard_ratios : DataFrame
        ``models/hazard_ratios.parquet``: ``endpoint``, ``term``, ``hr``, ``hr_lower``,
        ``hr_upper`` (``p``, ``ph_p``, ``subgroup`` optional).

    Returns
    -------
    plotnine.ggplot
    """
    rows = forest_rows(hazard_ratios)
    drawn = rows.filter(pl.col("estimable"))
    order = rows["label"].to_list()[::-1]
    plot = ggplot(drawn.to_pandas(), aes(y="label")) + _theme()
    plot += geom_vline(xintercept=1, linetype="dashed", colour="#555555")
    if drawn.height:
        plot += geom_segment(
            aes(x="hr_lower", xend="hr_upper", yend="label"), colour=OKABE_ITO["blue"], size=0.8
        )
        plot += geom_point(aes(x="hr"), colour=OKABE_ITO["blue"], shape="s", size=2.6)
    missing = rows.filter(~pl.col("estimable"))
    if missing.height:
        # placed on the line of no effect so the row keeps its place on the axis
        plot += geom_text(
            missing.with_columns(x=pl.lit(1.0), text=pl.lit("no estimate")).to_pandas(),
            aes(x="x", y="label", label="text"),
            size=8,
            colour="#555555",
        )
    plot += scale_y_discrete(limits=order)
    plot += scale_x_log10()
    plot += theme(figure_size=(_FIG_SIZE[0], max(2.2, 1.2 + 0.38 * max(rows.height, 1))))
    plot += labs(
        x="Hazard ratio (95% CI), log scale",
        y="",
        title="Hazard ratios by endpoint",
        caption="Ratios below 1: lower hazard in the group named by the term.",
    )
    return plot


# ---- KDIGO grid and transitions ---------------------------------------------------------


def kdigo_grid_cells(
    grid: FrameLike, *, small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD
) -> pl.DataFrame:
    """All 18 cells of the KDIGO G x A grid with counts, risk level and printed label.

    Cells missing from ``grid`` hold 0 patients and take the KDIGO 2012 risk level [2]_.

    Returns
    -------
    polars.DataFrame
        ``g_category``, ``a_category``, ``n``, ``risk``, ``label``.
    """
    threshold = _check_threshold(small_cell_threshold)
    df = to_polars(grid, "kdigo_grid")
    require_columns(df, ("g_category", "a_category", "n"), "kdigo_grid")
    for column, allowed in (("g_category", G_CATEGORIES), ("a_category", A_CATEGORIES)):
        unknown = sorted(set(df[column].drop_nulls().cast(pl.String).to_list()) - set(allowed))
        if unknown:
            raise InputDataError(
                f"kdigo_grid: column '{column}' has unknown value '{unknown[0]}' (expected "
                f"one of {list(allowed)}){did_you_mean(unknown[0], allowed)}"
            )
    if "risk" in df.columns:
        # kidneycohort.kdigo writes "moderately increased"; both spellings are accepted
        df = df.with_columns(pl.col("risk").cast(pl.String).str.replace_all(" ", "_"))
        unknown = sorted(set(df["risk"].drop_nulls().to_list()) - set(KDIGO_RISK_LEVELS))
        if unknown:
            raise InputDataError(
                f"kdigo_grid: column 'risk' has unknown value '{unknown[0]}' (expected one of "
                f"{list(KDIGO_RISK_LEVELS)}){did_you_mean(unknown[0], KDIGO_RISK_LEVELS)}"
            )
    full = pl.DataFrame(
        {
            "g_category": [g for g, _ in KDIGO_RISK],
            "a_category": [a for _, a in KDIGO_RISK],
            "guideline_risk": list(KDIGO_RISK.values()),
        }
    )
    counts = df.group_by("g_category", "a_category").agg(
        pl.col("n").sum().cast(pl.Int64),
        *([pl.col("risk").first()] if "risk" in df.columns else []),
    )
    out = full.join(counts, on=["g_category", "a_category"], how="left")
    if "risk" not in out.columns:
        out = out.with_columns(risk=pl.lit(None, dtype=pl.String))
    return out.select(
        "g_category",
        "a_category",
        n=pl.col("n").fill_null(0),
        risk=pl.col("risk").fill_null(pl.col("guideline_risk")),
        label=small_cell_text(pl.col("n").fill_null(0), threshold),
    )


def kdigo_grid_figure(
    grid: FrameLike, *, small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD
) -> ggplot:
    """Patients per KDIGO GFR x albuminuria category, coloured by the guideline risk level.

    Parameters
    ----------
    grid : DataFrame
        ``models/kdigo_grid.parquet``: ``g_category``, ``a_category``, ``n``, ``risk``.
    small_cell_threshold : int
        Counts 1..threshold print as ``"<threshold+1>"``.

    Returns
    -------
    plotnine.ggplot
    """
    cells = kdigo_grid_cells(grid, small_cell_threshold=small_cell_threshold)
    g_labels = [f"{g}  ({G_RANGES[g]})" for g in G_CATEGORIES]
    a_labels = [f"{a}\n{A_RANGES[a]}" for a in A_CATEGORIES]
    plot = (
        ggplot(cells.to_pandas(), aes("a_category", "g_category"))
        + _theme()
        + geom_tile(aes(fill="risk"), colour="white", size=1.5)
        + geom_text(aes(label="label"), size=11)
        + scale_fill_manual(
            values=KDIGO_RISK_COLOURS,
            limits=list(KDIGO_RISK_LEVELS),
            labels=[KDIGO_RISK_LABELS[r] for r in KDIGO_RISK_LEVELS],
            name="KDIGO risk",
        )
        + scale_x_discrete(limits=list(A_CATEGORIES), labels=a_labels)
        + scale_y_discrete(limits=list(G_CATEGORIES)[::-1], labels=g_labels[::-1])
        + theme(figure_size=(6.4, 5.0), panel_grid_major=element_blank())
        + labs(
            x="Albuminuria category (UACR)",
            y=f"GFR category ({EGFR_UNIT_LABEL})",
            title="Patients by KDIGO GFR and albuminuria category",
            caption="Colours: KDIGO 2012 prognosis of CKD (risk of adverse outcomes).",
        )
    )
    return plot


def _category_axis(category: pl.Expr) -> pl.Expr:
    return pl.when(category.str.starts_with("A")).then(pl.lit("A")).otherwise(pl.lit("G"))


def transition_cells(
    transition_counts: FrameLike, *, small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD
) -> pl.DataFrame:
    """The square from-category x to-category matrix of transition counts, per axis.

    The categories present on an axis (G or A, read from the category names) form the
    rows and columns; missing pairs are 0. Cells with 1..threshold transitions get a
    null ``fill`` so the colour does not disclose them either.

    Returns
    -------
    polars.DataFrame
        ``axis``, ``from_category``, ``to_category``, ``n``, ``fill``, ``label``,
        ``share_of_from`` (row percentage of the from-category).
    """
    threshold = _check_threshold(small_cell_threshold)
    df = to_polars(transition_counts, "transition_counts")
    require_columns(df, ("from_category", "to_category", "n"), "transition_counts")
    known = {*G_CATEGORIES, *A_CATEGORIES}
    for column in ("from_category", "to_category"):
        unknown = sorted(set(df[column].drop_nulls().cast(pl.String).to_list()) - known)
        if unknown:
            raise InputDataError(
                f"transition_counts: column '{column}' has unknown category '{unknown[0]}'"
                f"{did_you_mean(unknown[0], sorted(known))}; expected KDIGO G1..G5 or A1..A3"
            )
    df = df.with_columns(axis=_category_axis(pl.col("from_category")))
    levels = (
        pl.concat(
            [
                df.select("axis", category="from_category"),
                df.select("axis", category="to_category"),
            ]
        )
        .unique()
        .with_columns(order=pl.col("category").replace_strict(_CATEGORY_ORDER, default=99))
    )
    square = levels.join(levels, on="axis", suffix="_to").select(
        "axis", from_category="category", to_category="category_to"
    )
    counts = df.group_by("axis", "from_category", "to_category").agg(pl.col("n").sum())
    out = square.join(counts, on=["axis", "from_category", "to_category"], how="left").with_columns(
        n=pl.col("n").fill_null(0).cast(pl.Int64)
    )
    out = out.with_columns(
        share_of_from=pl.when(pl.col("n").sum().over("axis", "from_category") > 0).then(
            100.0 * pl.col("n") / pl.col("n").sum().over("axis", "from_category")
        ),
        fill=pl.when(pl.col("n").is_between(1, threshold))
        .then(None)
        .otherwise(pl.col("n").cast(pl.Float64)),
        label=small_cell_text(pl.col("n"), threshold),
    )
    return out.sort(
        "axis",
        pl.col("from_category").replace_strict(_CATEGORY_ORDER, default=99),
        pl.col("to_category").replace_strict(_CATEGORY_ORDER, default=99),
    )


_CATEGORY_ORDER: Final[dict[str, int]] = {
    c: i for i, c in enumerate((*G_CATEGORIES, *A_CATEGORIES))
}


def transition_heatmap_figure(
    transition_counts: FrameLike, *, small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD
) -> ggplot:
    """Heat map of KDIGO category transitions (from-category rows, to-category columns).

    A single-hue scale (white to Okabe–Ito blue) reads the same in greyscale and for
    colour-deficient readers; suppressed small cells are grey.

    Returns
    -------
    plotnine.ggplot
    """
    threshold = _check_threshold(small_cell_threshold)
    cells = transition_cells(transition_counts, small_cell_threshold=threshold)
    top = float(cells["fill"].max() or 0.0)
    cells = cells.with_columns(
        text_colour=pl.when(pl.col("fill").fill_null(0) > 0.6 * top)
        .then(pl.lit("white"))
        .otherwise(pl.lit("black"))
    )
    present = set(cells["from_category"].to_list())
    order = [c for c in (*G_CATEGORIES, *A_CATEGORIES) if c in present]
    plot = (
        ggplot(cells.to_pandas(), aes("to_category", "from_category"))
        + _theme()
        + geom_tile(aes(fill="fill"), colour="white", size=1)
        + geom_text(aes(label="label", colour="text_colour"), size=9)
        + scale_color_identity()
        + scale_fill_gradient(
            low="#F4F8FB", high=OKABE_ITO["blue"], na_value="#C8C8C8", name="Transitions"
        )
        + scale_x_discrete(limits=order)
        + scale_y_discrete(limits=order[::-1])
        + theme(panel_grid_major=element_blank(), figure_size=(6.4, 5.0))
        + labs(
            x="To category",
            y="From category",
            title="KDIGO category transitions",
            caption=f"Grey: 1 to {threshold} transitions (shown as <{threshold + 1}).",
        )
    )
    if cells["axis"].n_unique() > 1:
        plot += facet_wrap("axis", scales="free")
    return plot


# ---- attrition flow ---------------------------------------------------------------------


def attrition_boxes(
    accounting: Sequence[Mapping[str, Any]] | FrameLike,
    accounting_by_reason: Sequence[Mapping[str, Any]] | FrameLike | None = None,
    *,
    patients: Mapping[str, int] | None = None,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
) -> pl.DataFrame:
    """Boxes of the attrition flow diagram, from the manifest's row accounting.

    For every input table: rows read, then a side box of rows excluded by reason and
    rows merged as duplicates, then rows used, with

    .. math:: \\text{read} = \\text{used} + \\text{rejected} + \\text{merged}

    checked (the run folder's accounting rule). ``patients`` adds a row of patient
    counts (e.g. ``{"with lab results": 200, "with eGFR": 198, "analysed": 190}``), drawn
    in its given order.

    Returns
    -------
    polars.DataFrame
        ``table``, ``kind`` (read / excluded / used / patients), ``x``, ``y``, ``n``,
        ``text``.

    Raises
    ------
    InputDataError
        Accounting that does not add up, or reasons that do not sum to the rejected rows.
    """
    threshold = _check_threshold(small_cell_threshold)
    acc = _records(accounting, "accounting")
    require_columns(acc, ("table", "rows_read", "rows_used", "rows_rejected"), "accounting")
    if "rows_merged" not in acc.columns:
        acc = acc.with_columns(rows_merged=pl.lit(0))
    acc = acc.with_columns(
        pl.col("rows_read", "rows_used", "rows_rejected", "rows_merged").fill_null(0).cast(pl.Int64)
    )
    broken = acc.filter(
        pl.col("rows_read") != pl.col("rows_used") + pl.col("rows_rejected") + pl.col("rows_merged")
    )
    if broken.height:
        row = broken.row(0, named=True)
        raise InputDataError(
            f"accounting: table '{row['table']}' has rows_read={row['rows_read']} but "
            f"used+rejected+merged={row['rows_used'] + row['rows_rejected'] + row['rows_merged']}; "
            "the run folder's manifest is inconsistent"
        )
    reasons = _records(accounting_by_reason, "accounting_by_reason")
    if accounting_by_reason is not None and reasons.width:
        require_columns(reasons, ("table", "reason", "rows"), "accounting_by_reason")
    else:
        reasons = pl.DataFrame(schema={"table": pl.String, "reason": pl.String, "rows": pl.Int64})
    reasons = reasons.with_columns(pl.col("rows").cast(pl.Int64))
    check = acc.join(
        reasons.group_by("table").agg(listed=pl.col("rows").sum()), on="table", how="left"
    ).filter(pl.col("listed").is_not_null() & (pl.col("listed") != pl.col("rows_rejected")))
    if check.height:
        row = check.row(0, named=True)
        raise InputDataError(
            f"accounting_by_reason: table '{row['table']}' lists {row['listed']} rejected rows "
            f"by reason but accounting says rows_rejected={row['rows_rejected']}"
        )
    reason_lines = (
        reasons.sort("table", "rows", "reason", descending=[False, True, False])
        .with_columns(
            line=pl.concat_str(
                pl.lit("  "),
                pl.col("reason").str.replace_all("_", " "),
                pl.lit(": "),
                small_cell_text(pl.col("rows"), threshold),
            )
        )
        .group_by("table", maintain_order=True)
        .agg(lines=pl.col("line").str.join("\n"))
    )
    acc = (
        acc.with_row_index("x")
        .with_columns(x=pl.col("x").cast(pl.Float64) * _COLUMN_GAP)
        .join(reason_lines, on="table", how="left")
    )
    boxes: list[pl.DataFrame] = []
    fmt = lambda c: small_cell_text(pl.col(c), threshold)  # noqa: E731
    boxes.append(
        acc.select(
            "table",
            kind=pl.lit("read"),
            x=pl.col("x").cast(pl.Float64),
            y=pl.lit(3.0),
            n=pl.col("rows_read"),
            text=pl.concat_str(pl.col("table"), pl.lit(": rows read\n"), fmt("rows_read")),
        )
    )
    excluded_text = pl.concat_str(
        pl.lit("Rows excluded: "),
        fmt("rows_rejected"),
        pl.when(pl.col("lines").is_not_null())
        .then(pl.lit("\n") + pl.col("lines"))
        .otherwise(pl.lit("")),
        pl.lit("\nMerged as duplicates: "),
        fmt("rows_merged"),
    )
    boxes.append(
        acc.select(
            "table",
            kind=pl.lit("excluded"),
            x=pl.col("x") + _SIDE_OFFSET,
            y=pl.lit(2.0),
            n=pl.col("rows_rejected") + pl.col("rows_merged"),
            text=excluded_text,
        )
    )
    boxes.append(
        acc.select(
            "table",
            kind=pl.lit("used"),
            x=pl.col("x").cast(pl.Float64),
            y=pl.lit(1.0),
            n=pl.col("rows_used"),
            text=pl.concat_str(pl.col("table"), pl.lit(": rows used\n"), fmt("rows_used")),
        )
    )
    if patients:
        names = list(patients)
        span = max(acc.height - 1, 0) * _COLUMN_GAP + _SIDE_OFFSET
        xs = np.linspace(0.0, span, len(names)) if len(names) > 1 else np.array([span / 2])
        p = pl.DataFrame(
            {"step": names, "n": [int(patients[k]) for k in names], "x": xs.tolist()},
            schema={"step": pl.String, "n": pl.Int64, "x": pl.Float64},
        )
        boxes.append(
            p.select(
                table=pl.lit("patients"),
                kind=pl.lit("patients"),
                x="x",
                y=pl.lit(0.0),
                n="n",
                text=pl.concat_str(pl.lit("Patients "), pl.col("step"), pl.lit("\n"), fmt("n")),
            )
        )
    return pl.concat(boxes, how="vertical_relaxed")


_COLUMN_GAP: Final = 1.6  # x distance between the flows of two input tables
_SIDE_OFFSET: Final = 0.65  # x distance from a flow to its exclusion box
_INCH_PER_X: Final = 3.0  # drawing scale of the flow diagram
_INCH_PER_Y: Final = 1.15


def _records(data: Any, name: str) -> pl.DataFrame:
    if data is None:
        return pl.DataFrame()
    if isinstance(data, list | tuple):
        if not data:
            return pl.DataFrame()
        return pl.DataFrame([dict(r) for r in data], infer_schema_length=None)
    return to_polars(data, name)


def attrition_figure(
    accounting: Sequence[Mapping[str, Any]] | FrameLike,
    accounting_by_reason: Sequence[Mapping[str, Any]] | FrameLike | None = None,
    *,
    patients: Mapping[str, int] | None = None,
    small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD,
) -> ggplot:
    """Flow diagram of rows (and patients) in, excluded by reason, and analysed.

    Drawn in the manner of a CONSORT flow diagram [3]_ from the manifest's row
    accounting (see :func:`attrition_boxes`).

    Returns
    -------
    plotnine.ggplot
    """
    boxes = attrition_boxes(
        accounting,
        accounting_by_reason,
        patients=patients,
        small_cell_threshold=small_cell_threshold,
    )
    # Sizes in inches turned into data units at a fixed scale, so text fits its box
    # whatever the number of tables: about 0.068 in per character of 8-pt text.
    lines = pl.col("text").str.split("\n")
    chars = lines.list.eval(pl.element().str.len_chars()).list.max()
    boxes = boxes.with_columns(
        w=pl.max_horizontal(pl.lit(1.3), 0.068 * chars + 0.25) / _INCH_PER_X,
        h=(0.17 * lines.list.len() + 0.16) / _INCH_PER_Y,
    )
    ex = boxes.filter(pl.col("kind") == "excluded")
    main = (
        boxes.filter(pl.col("kind") == "read")
        .select("table", "x", y0=pl.col("y") - pl.col("h") / 2)
        .join(
            boxes.filter(pl.col("kind") == "used").select(
                "table", y1=pl.col("y") + pl.col("h") / 2
            ),
            on="table",
        )
    )
    side = ex.select("x", "y", "w").with_columns(
        x0=pl.col("x") - _SIDE_OFFSET, x1=pl.col("x") - pl.col("w") / 2
    )
    chain = (
        boxes.filter(pl.col("kind") == "patients")
        .sort("x")
        .select(
            x0=pl.col("x") + pl.col("w") / 2, x1=(pl.col("x") - pl.col("w") / 2).shift(-1), y="y"
        )
        .drop_nulls()
    )
    plot = ggplot() + theme_void(base_size=_BASE_SIZE)
    if chain.height:
        plot += geom_segment(
            chain.to_pandas(),
            aes(x="x0", xend="x1", y="y", yend="y"),
            arrow=arrow(length=0.08, type="closed"),
        )
    plot += geom_segment(
        main.to_pandas(),
        aes(x="x", xend="x", y="y0", yend="y1"),
        arrow=arrow(length=0.08, type="closed"),
    )
    plot += geom_segment(
        side.to_pandas(),
        aes(x="x0", xend="x1", y="y", yend="y"),
        arrow=arrow(length=0.08, type="closed"),
    )
    plot += geom_tile(
        boxes.to_pandas(),
        aes("x", "y", width="w", height="h", fill="kind"),
        colour="#333333",
        size=0.5,
    )
    plot += geom_text(
        boxes.filter(pl.col("kind") != "excluded").to_pandas(), aes("x", "y", label="text"), size=8
    )
    plot += geom_text(
        ex.with_columns(xl=pl.col("x") - pl.col("w") / 2 + 0.1 / _INCH_PER_X).to_pandas(),
        aes("xl", "y", label="text"),
        size=8,
        ha="left",
    )
    plot += scale_fill_manual(
        values={"read": "#FFFFFF", "used": "#E8F1F8", "excluded": "#FFF6E0", "patients": "#EAF6F1"},
        guide=None,
    )
    x_lo = float((boxes["x"] - boxes["w"] / 2).min()) - 0.05
    x_hi = float((boxes["x"] + boxes["w"] / 2).max()) + 0.05
    y_lo = float((boxes["y"] - boxes["h"] / 2).min()) - 0.05
    y_hi = float((boxes["y"] + boxes["h"] / 2).max()) + 0.05
    plot += scale_x_continuous(limits=(x_lo, x_hi), expand=(0, 0))
    plot += scale_y_continuous(limits=(y_lo, y_hi), expand=(0, 0))
    plot += theme(
        figure_size=((x_hi - x_lo) * _INCH_PER_X + 0.3, (y_hi - y_lo) * _INCH_PER_Y + 0.7),
        plot_title=element_text(size=_BASE_SIZE + 2, weight="bold", margin={"b": 6}),
        plot_margin=0.02,
    )
    plot += labs(title="Data flow: rows read, excluded and analysed")
    return plot


# ---- the run folder ---------------------------------------------------------------------

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


__all__ = [
    "FIGURE_TITLES",
    "GROUP_COLOURS",
    "KDIGO_RISK",
    "KDIGO_RISK_COLOURS",
    "OKABE_ITO",
    "attrition_boxes",
    "attrition_figure",
    "egfr_time_bins",
    "egfr_trajectory_figure",
    "forest_figure",
    "forest_rows",
    "group_palette",
    "kdigo_grid_cells",
    "kdigo_grid_figure",
    "model_trajectory_figure",
    "patient_flow",
    "patient_groups",
    "read_manifest",
    "slope_distribution",
    "slope_distribution_figure",
    "small_cell_text",
    "survival_figure",
    "survival_steps",
    "transition_cells",
    "transition_heatmap_figure",
    "write_figures",
]
