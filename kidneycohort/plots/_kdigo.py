"""KDIGO figures: the G x A prognosis grid and the transition heat maps."""

from __future__ import annotations

from typing import Final

import pandas as pd
import polars as pl
from plotnine import (
    aes,
    element_blank,
    facet_wrap,
    geom_text,
    geom_tile,
    ggplot,
    labs,
    scale_color_identity,
    scale_fill_gradient,
    scale_fill_manual,
    scale_x_discrete,
    scale_y_discrete,
    theme,
)

from kidneycohort._frames import FrameLike, as_float, require_columns, to_polars
from kidneycohort.disclosure import (
    DEFAULT_SMALL_CELL_THRESHOLD,
    small_cell_text,
    small_count_text,
)
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES
from kidneycohort.plots._style import (
    A_RANGES,
    EGFR_UNIT_LABEL,
    G_RANGES,
    KDIGO_RISK,
    KDIGO_RISK_COLOURS,
    KDIGO_RISK_LABELS,
    KDIGO_RISK_LEVELS,
    OKABE_ITO,
    base_theme,
    check_threshold,
    wrap,
)

__all__ = [
    "kdigo_grid_cells",
    "kdigo_grid_figure",
    "missing_category_note",
    "transition_cells",
    "transition_heatmap_figure",
]


def kdigo_grid_cells(
    grid: FrameLike, *, small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD
) -> pl.DataFrame:
    """All 18 cells of the KDIGO G x A grid with counts, risk level and printed label.

    Cells missing from ``grid`` hold 0 patients and take the KDIGO 2012 risk level [2]_.
    A protected table (:func:`kidneycohort.tables.kdigo_grid_table`, with ``n_display``)
    is printed as it stands, so the figure hides exactly what the table hides; raw counts
    get primary suppression only.

    Returns
    -------
    polars.DataFrame
        ``g_category``, ``a_category``, ``n``, ``risk``, ``label``.
    """
    threshold = check_threshold(small_cell_threshold)
    df = to_polars(grid, "kdigo_grid")
    require_columns(df, ("g_category", "a_category", "n"), "kdigo_grid")
    printed = "n_display" in df.columns  # a protected table: print its texts as they are
    df = df.with_columns(pl.col("n").cast(pl.Int64, strict=False)).filter(
        pl.col("g_category").is_in(G_CATEGORIES) & pl.col("a_category").is_in(A_CATEGORIES)
        | ~pl.lit(printed)
    )
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
        *([pl.col("n_display").first()] if printed else []),
    )
    out = full.join(counts, on=["g_category", "a_category"], how="left")
    if "risk" not in out.columns:
        out = out.with_columns(risk=pl.lit(None, dtype=pl.String))
    return out.select(
        "g_category",
        "a_category",
        n=pl.col("n").fill_null(0),
        risk=pl.col("risk").fill_null(pl.col("guideline_risk")),
        label=pl.col("n_display").fill_null("0")
        if printed
        else small_cell_text(pl.col("n").fill_null(0), threshold),
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
    caption = "Colours: KDIGO 2012 prognosis of CKD (risk of adverse outcomes)."
    missing = missing_category_note(grid, small_cell_threshold=small_cell_threshold)
    if missing:
        caption += " " + missing
    cells = cells.with_columns(
        text_colour=pl.when(pl.col("risk") == "very_high")
        .then(pl.lit("white"))
        .otherwise(pl.lit("black"))
    )
    g_labels = [f"{g}  ({G_RANGES[g]})" for g in G_CATEGORIES]
    a_labels = [f"{a}\n{A_RANGES[a]}" for a in A_CATEGORIES]
    plot = (
        ggplot(data=cells.to_pandas(), mapping=aes("a_category", "g_category"))
        + base_theme()
        + geom_tile(aes(fill="risk"), colour="white", size=1.5)
        + geom_text(aes(label="label", colour="text_colour"), size=11)
        + scale_color_identity()
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
            caption=wrap(caption, 82),
        )
    )
    return plot


def missing_category_note(
    grid: FrameLike, *, small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD
) -> str:
    """The sentence under the grid about patients it cannot place: without a GFR or an
    albuminuria category at baseline (the grid's ``missing`` row and column), counted
    as the table prints them; empty when there are none."""
    threshold = check_threshold(small_cell_threshold)
    df = to_polars(grid, "kdigo_grid")
    if not {"g_category", "a_category", "n"} <= set(df.columns):
        return ""
    g, a = pl.col("g_category").cast(pl.String), pl.col("a_category").cast(pl.String)
    parts = []
    for what, this, other in (("GFR", g, a), ("albuminuria", a, g)):
        rows = df.filter(this == _MISSING)
        margin = rows.filter(other == "all")
        if margin.height and "n_display" in df.columns:
            text = str(margin["n_display"][0])
        else:
            cells = rows.filter(other != "all")
            total = int(cells["n"].cast(pl.Int64, strict=False).fill_null(0).sum())
            text = small_count_text(total, threshold) if cells.height else "0"
        if text not in ("0", ""):
            parts.append(
                f"{text} patients without a{'n' if what[0] in 'aeiou' else ''} {what} category"
            )
    if not parts:
        return ""
    return (
        "Not in the grid: "
        + " and ".join(parts)
        + " at baseline (the 'missing' row or column of tables/kdigo_grid)."
    )


_MISSING: Final = "missing"


def _category_axis(category: pl.Expr) -> pl.Expr:
    return pl.when(category.str.starts_with("A")).then(pl.lit("A")).otherwise(pl.lit("G"))


def transition_cells(
    transition_counts: FrameLike, *, small_cell_threshold: int = DEFAULT_SMALL_CELL_THRESHOLD
) -> pl.DataFrame:
    """The square from-category x to-category matrix of transition counts, per axis.

    The categories present on an axis (G or A, read from the category names) form the
    rows and columns; missing pairs are 0. Cells with 1..threshold transitions get a
    null ``fill`` so the colour does not disclose them either. A protected table
    (:func:`kidneycohort.tables.transition_table`, with ``n_display``) is printed as it
    stands, so the figure hides exactly what the table hides.

    Returns
    -------
    polars.DataFrame
        ``axis``, ``from_category``, ``to_category``, ``n``, ``fill``, ``label``,
        ``share_of_from`` (row percentage of the from-category).
    """
    threshold = check_threshold(small_cell_threshold)
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
    printed = "n_display" in df.columns  # a protected table: print its texts as they are
    df = df.with_columns(pl.col("n").cast(pl.Int64, strict=False))
    counts = df.group_by("axis", "from_category", "to_category").agg(
        pl.col("n").sum(), *([pl.col("n_display").first()] if printed else [])
    )
    out = square.join(counts, on=["axis", "from_category", "to_category"], how="left").with_columns(
        n=pl.col("n").fill_null(0).cast(pl.Int64)
    )
    hidden = (
        ~pl.col("n_display").fill_null("0").str.contains(r"^\d+$")
        if printed
        else pl.col("n").is_between(1, threshold)
    )
    out = out.with_columns(
        share_of_from=pl.when(pl.col("n").sum().over("axis", "from_category") > 0).then(
            100.0 * pl.col("n") / pl.col("n").sum().over("axis", "from_category")
        ),
        fill=pl.when(hidden).then(None).otherwise(pl.col("n").cast(pl.Float64)),
        label=pl.col("n_display").fill_null("0")
        if printed
        else small_cell_text(pl.col("n"), threshold),
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
    threshold = check_threshold(small_cell_threshold)
    cells = transition_cells(transition_counts, small_cell_threshold=threshold)
    top = as_float(cells["fill"].max() or 0.0, "transitions: largest fill")
    cells = cells.with_columns(
        text_colour=pl.when(pl.col("fill").fill_null(0) > 0.6 * top)
        .then(pl.lit("white"))
        .otherwise(pl.lit("black"))
    )
    present = set(cells["from_category"].to_list())
    order = [c for c in (*G_CATEGORIES, *A_CATEGORIES) if c in present]
    frame = cells.to_pandas()
    # ordered categories: each panel's axes hold its own categories only (free scales)
    frame["to_category"] = pd.Categorical(frame["to_category"], categories=order)
    frame["from_category"] = pd.Categorical(frame["from_category"], categories=order[::-1])
    frame["axis"] = pd.Categorical(
        frame["axis"].map(_AXIS_TITLES), categories=list(_AXIS_TITLES.values())
    )
    panels = cells["axis"].n_unique()
    plot = (
        ggplot(data=frame, mapping=aes("to_category", "from_category"))
        + base_theme()
        + geom_tile(aes(fill="fill"), colour="white", size=1)
        + geom_text(aes(label="label", colour="text_colour"), size=9)
        + scale_color_identity()
        + scale_fill_gradient(
            low="#F4F8FB", high=OKABE_ITO["blue"], na_value="#C8C8C8", name="Transitions"
        )
        + scale_x_discrete(drop=True)
        + scale_y_discrete(drop=True)
        + theme(
            panel_grid_major=element_blank(),
            figure_size=(7.5, 4.4) if panels > 1 else (6.4, 5.0),
            panel_spacing=0.08,
        )
        + labs(
            x="To category",
            y="From category",
            title="KDIGO category transitions",
            caption=f"Grey: 1 to {threshold} transitions (shown as <{threshold + 1}).",
        )
    )
    if panels > 1:
        plot += facet_wrap("axis", scales="free")
    return plot


_AXIS_TITLES: Final = {"G": "GFR categories", "A": "Albuminuria categories"}
