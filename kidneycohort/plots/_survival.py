"""Survival and cumulative-incidence curves with numbers at risk, and the forest plot of
hazard ratios.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Final

import polars as pl
from plotnine import (
    aes,
    annotate,
    element_blank,
    geom_hline,
    geom_line,
    geom_point,
    geom_ribbon,
    geom_segment,
    geom_text,
    geom_vline,
    ggplot,
    labs,
    scale_color_manual,
    scale_fill_manual,
    scale_x_log10,
    scale_y_continuous,
    scale_y_discrete,
    theme,
)

from kidneycohort._frames import FrameLike, as_float, require_columns, to_polars
from kidneycohort.disclosure import DEFAULT_SMALL_CELL_THRESHOLD, small_cell_text
from kidneycohort.errors import InputDataError
from kidneycohort.labels import display_label
from kidneycohort.models.survival import NOT_ESTIMABLE_REASONS
from kidneycohort.plots._style import (
    FIG_SIZE,
    OKABE_ITO,
    base_theme,
    check_threshold,
    palette_for,
    pick,
)

__all__ = ["forest_figure", "forest_rows", "survival_figure", "survival_steps"]

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
    df = pick(df, "endpoint", endpoint, "survival_curves")
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
    threshold = check_threshold(small_cell_threshold)
    steps = survival_steps(curves, endpoint=endpoint)
    measure = steps["measure"].drop_nulls().first() if steps.height else "survival"
    colours = palette_for(steps, palette)
    if endpoint is None:
        raw = to_polars(curves, "survival_curves")
        endpoint = (
            str(raw["endpoint"].drop_nulls().first())
            if "endpoint" in raw.columns and raw.height
            else ""
        )
    plot = ggplot() + base_theme()
    band = steps.filter(
        pl.col("lower").is_not_null()
        & pl.col("upper").is_not_null()
        & pl.col("lower").is_not_nan()
        & pl.col("upper").is_not_nan()
    )
    if band.height:
        plot += geom_ribbon(
            data=band.to_pandas(),
            mapping=aes("years", ymin="lower", ymax="upper", fill="group"),
            alpha=0.2,
        )
    line = steps.filter(pl.col("estimate").is_not_null() & pl.col("estimate").is_not_nan())
    if line.height:
        plot += geom_line(
            data=line.to_pandas(), mapping=aes("years", "estimate", colour="group"), size=0.9
        )
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
                data=table.to_pandas(),
                mapping=aes("years", "y", label="label", colour="group"),
                size=7.5,
                show_legend=False,
            )
            plot += annotate(
                "text",
                x=as_float(table["years"].min(), "at_risk: first years"),
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
        title=title or (f"Time to {display_label(endpoint)}" if endpoint else "Time to event"),
        caption="Shaded bands: 95% confidence intervals.",
    )
    return plot


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
    # the models' estimability rule when the table carries it (models/hazard_ratios);
    # in any case a limit of 0 or infinity cannot be drawn on a log axis
    estimable = (
        pl.col("hr").is_finite()
        & pl.col("hr_lower").is_finite()
        & pl.col("hr_upper").is_finite()
        & (pl.col("hr") > 0)
        & (pl.col("hr_lower") > 0)
    )
    if "estimable" in df.columns:
        estimable = estimable & pl.col("estimable").fill_null(False)
    why = pl.lit("not estimable")
    if "reason" in df.columns:
        reason = pl.col("reason").cast(pl.String)
        why = (
            pl.when(reason.is_not_null())
            .then(
                pl.lit("not estimable (")
                + reason.replace_strict(NOT_ESTIMABLE_REASONS, default=reason)
                + pl.lit(")")
            )
            .otherwise(why)
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
        label=pl.concat_str(name, pl.lit(":  "), pl.when(estimable).then(ci).otherwise(why)),
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
    plot = ggplot(data=drawn.to_pandas(), mapping=aes(y="label")) + base_theme()
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
            data=missing.with_columns(x=pl.lit(1.0), text=pl.lit("no estimate")).to_pandas(),
            mapping=aes(x="x", y="label", label="text"),
            size=8,
            colour="#555555",
        )
    plot += scale_y_discrete(limits=order)
    plot += scale_x_log10()
    plot += theme(figure_size=(FIG_SIZE[0], max(2.2, 1.2 + 0.38 * max(rows.height, 1))))
    plot += labs(
        x="Hazard ratio (95% CI), log scale",
        y="",
        title="Hazard ratios by endpoint",
        caption="Ratios below 1: lower hazard in the group named by the term.",
    )
    return plot
