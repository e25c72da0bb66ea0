"""Survival and cumulative-incidence curves with numbers at risk, and the forest plot of
hazard ratios.
"""

from __future__ import annotations

import textwrap
from collections.abc import Mapping, Sequence
from typing import Final

import polars as pl
from plotnine import (
    aes,
    annotate,
    element_blank,
    element_text,
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
from kidneycohort.plots._survival_panel import (
    SurvivalScale,
    display_scale,
    probability_axis,
    term_text,
)

__all__ = ["forest_figure", "forest_rows", "survival_figure", "survival_steps"]


MAX_CENSOR_MARKS: Final = 150
"""More distinct censoring times than this in a group make a solid bar: not drawn."""


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
    censored: FrameLike | None = None,
    hazard_ratio_text: Sequence[str] = (),
    scale: SurvivalScale = "as_estimated",
    subtitle: str | None = None,
) -> ggplot:
    """Kaplan–Meier or cumulative-incidence curves per group, CI bands, censoring marks,
    the hazard ratio in the panel, and numbers at risk.

    The probability axis spans the data (a round number below the lowest band to 1 for
    falling curves, 0 to a round number above the highest band for rising ones; the
    caption says where it starts). The number-at-risk table is drawn under the time axis
    in the same panel, so its columns line up with the time axis by construction; counts
    1..threshold are shown as ``"<11"``.

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
    censored : DataFrame, optional
        Censoring times (``group``, ``years``; e.g. from
        :func:`~kidneycohort.plots._survival_panel.censor_marks`), drawn as ticks on the
        curves.
    hazard_ratio_text : sequence of str
        Lines printed in the panel's empty corner (e.g. ``HR active vs placebo 0.75 (95%
        CI 0.46–1.22)``).
    scale : {"as_estimated", "event_free", "cumulative"}
        Draw the curves as estimated, as event-free probability, or as cumulative
        probability of the event (1 - estimate where the estimate is the other one).
    subtitle : str, optional
        E.g. the eGFR equation the endpoint was derived with.

    Returns
    -------
    plotnine.ggplot
    """
    threshold = check_threshold(small_cell_threshold)
    steps, y_label, falling = _displayed_steps(curves, endpoint, scale)
    colours = palette_for(steps, palette)
    if endpoint is None:
        raw = to_polars(curves, "survival_curves")
        endpoint = (
            str(raw["endpoint"].drop_nulls().first())
            if "endpoint" in raw.columns and raw.height
            else ""
        )
    finite = [
        v
        for c in ("estimate", "lower", "upper")
        for v in steps[c].drop_nulls().drop_nans().to_list()
    ]
    lo, hi, breaks = probability_axis(
        min(finite, default=0.0), max(finite, default=1.0), falling=falling
    )
    span = hi - lo
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
    marks = _censor_points(line, censored)
    crowded = marks.height > 0 and (
        as_float(marks.group_by("group").len()["len"].max(), "censoring marks") > MAX_CENSOR_MARKS
    )
    if crowded:
        marks = marks.clear()
    if marks.height:
        plot += geom_point(
            data=marks.to_pandas(),
            mapping=aes("years", "estimate", colour="group"),
            shape="|",
            size=2.6,
            show_legend=False,
        )
    decimals = 2 if all(abs(b * 100 - round(b * 100)) < 1e-9 for b in breaks) else 3
    labels = [f"{b:.{decimals}f}" for b in breaks]
    y_low = lo - 0.02 * span
    x_max = as_float(steps["years"].max(), "survival: last time") if steps.height else 1.0
    if hazard_ratio_text:
        plot += annotate(
            "text",
            x=0.02 * x_max,
            y=lo + 0.06 * span if falling else hi - 0.06 * span,
            label="\n".join(line for text in hazard_ratio_text for line in textwrap.wrap(text, 70)),
            size=8,
            ha="left",
            va="bottom" if falling else "top",
        )
    if at_risk is not None:
        plot, rows = _at_risk_rows(plot, at_risk, endpoint, (lo, span, x_max), threshold)
        if rows:
            breaks = list(rows.values()) + breaks
            labels = list(rows) + labels
            y_low = min(rows.values()) - 0.05 * span
    # grid lines for the probability scale only, not through the at-risk rows
    plot += geom_hline(yintercept=[b for b in breaks if b >= lo], colour="#EBEBEB", size=0.4)
    plot += scale_y_continuous(breaks=breaks, labels=labels, limits=(y_low, hi + 0.02 * span))
    plot += theme(panel_grid_major_y=element_blank())
    present = sorted(steps["group"].unique().to_list())
    plot += scale_color_manual(values=colours, name="Group", limits=present, breaks=present)
    plot += scale_fill_manual(values=colours, name="Group", limits=present, breaks=present)
    caption = "Shaded bands: 95% confidence intervals."
    if marks.height:
        caption += " Ticks: censored follow-up."
    elif crowded:
        caption += f" Censoring ticks not drawn (over {MAX_CENSOR_MARKS} times in a group)."
    if falling and lo > 0:
        caption += f" The probability axis starts at {lo:.{decimals}f}."
    plot += labs(
        x="Years from index",
        y=y_label,
        title=title or (f"Time to {display_label(endpoint)}" if endpoint else "Time to event"),
        subtitle=subtitle,
        caption=caption,
    )
    return plot


def _at_risk_rows(
    plot: ggplot,
    at_risk: FrameLike,
    endpoint: str,
    axis: tuple[float, float, float],
    threshold: int,
) -> tuple[ggplot, dict[str, float]]:
    """The number-at-risk table under the axis (``axis``: the probability axis' start and
    span, the last time of the curves): the layers, and each group's row height. Times
    past the end of the curves are left out (columns of zeros would stretch the axis)."""
    lo, span, x_max = axis
    risk = to_polars(at_risk, "at_risk")
    require_columns(risk, ("group", "years", "n_at_risk"), "at_risk")
    risk = risk.filter(pl.col("years").cast(pl.Float64) <= x_max + 1e-9)
    if "endpoint" in risk.columns and endpoint:
        risk = risk.filter(pl.col("endpoint") == endpoint)
    risk = risk.with_columns(pl.col("group").cast(pl.String).fill_null("no group"))
    order = sorted(risk["group"].unique().to_list())
    if not order:
        return plot, {}
    rows = {g: lo - span * (0.14 + 0.085 * i) for i, g in enumerate(order)}
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
        y=lo - 0.06 * span,
        label="Number at risk",
        size=7.5,
        ha="left",
        fontweight="bold",
    )
    plot += geom_hline(yintercept=lo - 0.035 * span, colour="#BBBBBB", size=0.3)
    return plot, rows


def _displayed_steps(
    curves: FrameLike, endpoint: str | None, scale: SurvivalScale
) -> tuple[pl.DataFrame, str, bool]:
    """The steps as drawn (flipped when the scale asks), the y label, and whether the
    curves fall (event-free) or rise (cumulative)."""
    steps = survival_steps(curves, endpoint=endpoint)
    measure = str(steps["measure"].drop_nulls().first()) if steps.height else "survival"
    flip, y_label = display_scale(measure, scale)
    if flip:
        steps = steps.with_columns(
            estimate=1.0 - pl.col("estimate"),
            lower=1.0 - pl.col("upper"),
            upper=1.0 - pl.col("lower"),
        )
    return steps, y_label, (measure == "cumulative_incidence") == flip


def _censor_points(line: pl.DataFrame, censored: FrameLike | None) -> pl.DataFrame:
    """Censoring times placed on their group's curve (the estimate in force then)."""
    empty = pl.DataFrame(schema={"group": pl.String, "years": pl.Float64, "estimate": pl.Float64})
    if censored is None or not line.height:
        return empty
    marks = to_polars(censored, "censored")
    require_columns(marks, ("group", "years"), "censored")
    curve = (
        line.select("group", "years", "estimate")
        .unique(["group", "years"], keep="last", maintain_order=True)
        .sort("years")
    )
    return (
        marks.select(pl.col("group").cast(pl.String), pl.col("years").cast(pl.Float64))
        .drop_nulls()
        .unique()
        .sort("years")
        .join_asof(curve, on="years", by="group", strategy="backward", check_sortedness=False)
        .drop_nulls("estimate")
        .sort("group", "years")
    )


def _two_decimals(value: pl.Expr) -> pl.Expr:
    """A positive number printed with exactly two decimals (``0.4`` -> ``"0.40"``)."""
    hundredths = (value * 100).round(0).cast(pl.Int64)
    return pl.concat_str(
        (hundredths // 100).cast(pl.String),
        pl.lit("."),
        (hundredths % 100).cast(pl.String).str.zfill(2),
    )


def forest_rows(
    hazard_ratios: FrameLike,
    *,
    labels: Mapping[str, str] | None = None,
    reference_group: str | None = None,
) -> pl.DataFrame:
    """Rows of the forest plot: one per endpoint x term (x subgroup), with a printed label.

    Endpoints and groups print as their display labels (``labels``, see
    :func:`kidneycohort.labels.label_map`); a group term ``group=active`` reads
    ``active vs <reference_group>`` when the reference group is given.

    Returns
    -------
    polars.DataFrame
        ``endpoint``, ``term``, ``endpoint_label`` and ``comparison`` (as a reader
        says them), ``subgroup`` (null when absent), ``hr``, ``hr_lower``,
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
    endpoints = {str(e): display_label(str(e), labels) for e in df["endpoint"].unique()}
    terms = {str(t): term_text(str(t), labels, reference_group) for t in df["term"].unique()}
    name = pl.concat_str(
        pl.col("endpoint").cast(pl.String).replace_strict(endpoints, default=pl.col("endpoint")),
        pl.lit(" · "),
        pl.col("term").cast(pl.String).replace_strict(terms, default=pl.col("term")),
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
        endpoint_label=pl.col("endpoint")
        .cast(pl.String)
        .replace_strict(endpoints, default=pl.col("endpoint")),
        comparison=pl.col("term").cast(pl.String).replace_strict(terms, default=pl.col("term")),
        subgroup=pl.col("subgroup").cast(pl.String),
        hr=pl.col("hr").cast(pl.Float64),
        hr_lower=pl.col("hr_lower").cast(pl.Float64),
        hr_upper=pl.col("hr_upper").cast(pl.Float64),
        p=pl.col("p").cast(pl.Float64),
        estimable=estimable.fill_null(False),
        label=pl.concat_str(name, pl.lit(":  "), pl.when(estimable).then(ci).otherwise(why)),
        row=pl.int_range(1, pl.len() + 1),
    )


def forest_figure(
    hazard_ratios: FrameLike,
    *,
    labels: Mapping[str, str] | None = None,
    reference_group: str | None = None,
    title: str = "Hazard ratios by endpoint",
    subtitle: str | None = None,
) -> ggplot:
    """Forest plot of hazard ratios with 95 % CIs across endpoints (and subgroups).

    The axis is logarithmic so that ratios and their reciprocals are equally far from 1.

    Parameters
    ----------
    hazard_ratios : DataFrame
        ``models/hazard_ratios.parquet``: ``endpoint``, ``term``, ``hr``, ``hr_lower``,
        ``hr_upper`` (``p``, ``ph_p``, ``subgroup`` optional).
    labels, reference_group
        Display labels and the reference group (:func:`forest_rows`).
    title, subtitle
        Figure title; subtitle (e.g. the eGFR equation of the endpoints).

    Returns
    -------
    plotnine.ggplot
    """
    rows = forest_rows(hazard_ratios, labels=labels, reference_group=reference_group)
    terms = rows["term"].unique().to_list()
    one_term = len(terms) == 1
    rows = rows.with_columns(
        label=pl.Series(_axis_labels(rows, labels, reference_group, with_term=not one_term))
    )
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
    lines = max((label.count("\n") + 1 for label in order), default=1)
    plot += scale_y_discrete(limits=order)
    plot += scale_x_log10()
    plot += theme(
        figure_size=(FIG_SIZE[0], max(2.4, 1.5 + (0.16 * lines + 0.12) * max(rows.height, 1))),
        plot_title_position="plot",
        axis_text_y=element_text(ha="right", ma="right", linespacing=1.1),
    )
    comparison = f", {term_text(str(terms[0]), labels, reference_group)}" if one_term else ""
    plot += labs(
        x=f"Hazard ratio{comparison} (95% CI), log scale",
        y="",
        title=title,
        subtitle=subtitle,
        caption="Ratios below 1: lower hazard in the first group named than in the second."
        if reference_group
        else "Ratios below 1: lower hazard in the group named by the term.",
    )
    return plot


def _axis_labels(
    rows: pl.DataFrame,
    labels: Mapping[str, str] | None,
    reference_group: str | None,
    *,
    with_term: bool,
) -> list[str]:
    """Row labels of the forest plot: the endpoint (wrapped), the comparison when the
    plot has several, the subgroup, and the estimate with its interval on the last line."""
    out = []
    for row in rows.iter_rows(named=True):
        name = display_label(str(row["endpoint"]), labels)
        if with_term:
            name += " · " + term_text(str(row["term"]), labels, reference_group)
        if row["subgroup"] is not None:
            name += f" [{row['subgroup']}]"
        value = str(row["label"]).rsplit(":  ", 1)[-1]
        out.append("\n".join([*textwrap.wrap(name, 44), *textwrap.wrap(value, 44)]))
    return out
