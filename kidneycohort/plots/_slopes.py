"""The distribution of per-patient eGFR slopes: summary, binned density and figure."""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
import polars as pl
from plotnine import (
    aes,
    annotate,
    coord_flip,
    geom_hline,
    geom_polygon,
    geom_rect,
    geom_segment,
    ggplot,
    labs,
    scale_color_manual,
    scale_fill_manual,
    scale_x_continuous,
)

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.disclosure import DEFAULT_SMALL_CELL_THRESHOLD, small_count_text
from kidneycohort.plots._style import (
    RAPID_DECLINE_PER_YEAR,
    SLOPE_UNIT_LABEL,
    base_theme,
    check_threshold,
    palette_for,
    pick,
    with_groups,
    wrap,
)

__all__ = ["DENSITY_BINS", "slope_density", "slope_distribution", "slope_distribution_figure"]


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


# The slope violins are a kernel density of the binned slopes: one pass over the
# patients counts them into DENSITY_BINS equal bins over each group's range, and a
# Gaussian kernel (Silverman's rule-of-thumb bandwidth, R's bw.nrd0, the default of
# ggplot2's and plotnine's violins) smooths the counts. The cost past the one pass does
# not grow with patients; the shape differs from the exact density by at most the bin
# width (range / 512) (Wand MP, Jones MC. Kernel Smoothing. Chapman & Hall 1995, 5.3).
DENSITY_BINS = 512
# Half the width of the widest violin, in group-axis units.
_VIOLIN_HALF_WIDTH = 0.45
_BOX_HALF_WIDTH = 0.11
# Kernel truncated at this many bandwidths.
_KERNEL_SDS = 4.0


def _usable_slopes(
    slopes: FrameLike, groups: FrameLike | None, equation: str | None
) -> pl.DataFrame:
    df = pick(to_polars(slopes, "slopes"), "equation", equation, "slopes")
    df = with_groups(df, groups, "slopes")
    usable = pl.col("slope_per_year").is_not_null() & pl.col("slope_per_year").is_not_nan()
    if "eligible" in df.columns:
        usable = usable & pl.col("eligible").fill_null(False)
    return df.filter(usable).select("group", "slope_per_year")


def _slope_box(values: pl.DataFrame) -> pl.DataFrame:
    """Per group: quartiles (linear interpolation), Tukey whiskers, spread and range."""
    v = pl.col("slope_per_year")
    box = values.group_by("group").agg(
        n=pl.len(),
        q1=v.quantile(0.25, interpolation="linear"),
        median=v.median(),
        q3=v.quantile(0.75, interpolation="linear"),
        sd=v.std(),
        low=v.min(),
        high=v.max(),
    )
    fence = values.join(box, on="group").with_columns(
        _iqr=pl.col("q3") - pl.col("q1"),
    )
    whiskers = fence.group_by("group").agg(
        whisker_low=v.filter(v >= pl.col("q1") - 1.5 * pl.col("_iqr")).min(),
        whisker_high=v.filter(v <= pl.col("q3") + 1.5 * pl.col("_iqr")).max(),
    )
    return box.join(whiskers, on="group").sort("group")


@follows_input
def slope_density(
    slopes: FrameLike,
    groups: FrameLike | None = None,
    *,
    equation: str | None = None,
    bins: int = DENSITY_BINS,
) -> pl.DataFrame:
    r"""The violins of the slope figure: a binned Gaussian kernel density per group.

    Slopes (eligible, finite) are counted into ``bins`` equal bins over each group's
    range, and the counts are smoothed with a Gaussian kernel of bandwidth
    :math:`0.9 \min(s, \mathrm{IQR}/1.34)\, n^{-1/5}` (Silverman's rule, R's
    ``bw.nrd0``). A group with fewer than 3 slopes or no spread has no violin.

    Returns
    -------
    polars.DataFrame (pandas when given pandas)
        ``group``, ``slope_per_year`` (bin centre), ``density`` (integrates to 1 over
        the group's range, up to the kernel mass beyond it), ``width`` (density over
        the group's largest density).
    """
    values = _usable_slopes(slopes, groups, equation)
    box = _slope_box(values).filter((pl.col("n") > 2) & (pl.col("sd") > 0))
    empty = pl.DataFrame(
        schema={
            "group": pl.String,
            "slope_per_year": pl.Float64,
            "density": pl.Float64,
            "width": pl.Float64,
        }
    )
    if box.height == 0:
        return empty
    counts = (
        values.join(box.select("group", "low", "high"), on="group")
        .with_columns(
            _bin=(
                (pl.col("slope_per_year") - pl.col("low")) / (pl.col("high") - pl.col("low")) * bins
            )
            .floor()
            .clip(0, bins - 1)
            .cast(pl.Int64)
        )
        .group_by("group", "_bin")
        .agg(count=pl.len())
    )
    parts = []
    for row in box.iter_rows(named=True):  # one row per group, not per patient
        step = (row["high"] - row["low"]) / bins
        spread = min(row["sd"], (row["q3"] - row["q1"]) / 1.34) or row["sd"]
        bandwidth = 0.9 * spread * row["n"] ** -0.2
        grid = np.zeros(bins)
        mine = counts.filter(pl.col("group") == row["group"])
        grid[mine["_bin"].to_numpy()] = mine["count"].to_numpy()
        sigma = bandwidth / step
        reach = min(math.ceil(_KERNEL_SDS * sigma), 2 * bins)
        offsets = np.arange(-reach, reach + 1)
        kernel = np.exp(-0.5 * (offsets / sigma) ** 2)
        kernel /= kernel.sum()
        smooth = np.convolve(grid, kernel)[reach : reach + bins]
        density = smooth / (row["n"] * step)
        parts.append(
            pl.DataFrame(
                {
                    "group": [row["group"]] * bins,
                    "slope_per_year": row["low"] + step * (np.arange(bins) + 0.5),
                    "density": density,
                    "width": density / density.max(),
                }
            )
        )
    return pl.concat(parts) if parts else empty


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

    Violin (the binned kernel density of :func:`slope_density`) with a box of median,
    quartiles and Tukey whiskers (1.5 IQR) per group; individual values are not drawn.
    The dashed line marks ``rapid_decline_threshold``. Group labels carry the number of
    patients (small-cell protected). Everything drawn is a per-group summary computed
    in one pass over the patients.

    Returns
    -------
    plotnine.ggplot
    """
    threshold = check_threshold(small_cell_threshold)
    df = pick(to_polars(slopes, "slopes"), "equation", equation, "slopes")
    summary = slope_distribution(df, groups, rapid_decline_threshold=rapid_decline_threshold)
    df = with_groups(df, groups, "slopes")
    colours = palette_for(df, palette)
    axis_labels = {
        row["group"]: f"{row['group']}\n(n={small_count_text(row['n'], threshold)})"
        for row in summary.select("group", "n").to_dicts()
    }
    order = sorted(axis_labels)
    position = {g: float(i + 1) for i, g in enumerate(order)}
    box = _slope_box(_usable_slopes(df, None, None)).with_columns(
        x=pl.col("group").replace_strict(position, return_dtype=pl.Float64)
    )
    violins = slope_density(df, None).with_columns(
        x=pl.col("group").replace_strict(position, default=0.0, return_dtype=pl.Float64)
    )
    plot = ggplot() + base_theme()
    if violins.height:
        outline = pl.concat(
            [
                violins.with_columns(px=pl.col("x") + _VIOLIN_HALF_WIDTH * pl.col("width")),
                violins.reverse().with_columns(
                    px=pl.col("x") - _VIOLIN_HALF_WIDTH * pl.col("width")
                ),
            ]
        ).select("group", "px", "slope_per_year")
        plot += geom_polygon(
            data=outline.to_pandas(),
            mapping=aes("px", "slope_per_year", fill="group", group="group"),
            alpha=0.35,
            colour="none",
        )
    if box.height:
        frame = box.with_columns(
            x0=pl.col("x") - _BOX_HALF_WIDTH, x1=pl.col("x") + _BOX_HALF_WIDTH
        ).to_pandas()
        plot += geom_segment(
            data=frame,
            mapping=aes(x="x", xend="x", y="whisker_low", yend="whisker_high", colour="group"),
        )
        plot += geom_rect(
            data=frame,
            mapping=aes(xmin="x0", xmax="x1", ymin="q1", ymax="q3", colour="group"),
            fill="white",
        )
        plot += geom_segment(
            data=frame,
            mapping=aes(x="x0", xend="x1", y="median", yend="median", colour="group"),
            size=0.9,
        )
    else:
        plot += annotate("text", x=1, y=0, label="No eligible slopes")
    plot += geom_hline(yintercept=rapid_decline_threshold, linetype="dashed", colour="#333333")
    plot += geom_hline(yintercept=0, colour="#999999", size=0.3)
    plot += scale_x_continuous(
        breaks=[position[g] for g in order],
        labels=[axis_labels[g] for g in order],
        limits=(0.4, len(order) + 0.6) if order else None,
    )
    plot += scale_color_manual(values=colours, guide=None)
    plot += scale_fill_manual(values=colours, guide=None)
    plot += coord_flip()
    plot += labs(
        x="",
        y=f"eGFR slope ({SLOPE_UNIT_LABEL})",
        title="Per-patient eGFR slopes",
        caption=wrap(
            f"Dashed line: rapid decline (slope below {rapid_decline_threshold:g} "
            f"{SLOPE_UNIT_LABEL}). Boxes: median and quartiles, whiskers to the furthest "
            f"slope within 1.5 IQR; shapes: Gaussian kernel density of all slopes of the "
            f"group binned into {DENSITY_BINS} bins (Silverman bandwidth)."
        ),
    )
    return plot
