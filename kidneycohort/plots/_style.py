"""Conventions shared by every figure: the Okabe–Ito palette and group colours, KDIGO risk
colours, unit labels, small-cell text and the base theme.
"""

from __future__ import annotations

import logging
import textwrap
from collections.abc import Iterable, Mapping
from typing import Any, Final

import numpy as np
import polars as pl
from plotnine import (
    element_blank,
    element_text,
    theme,
    theme_bw,
)

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES, RISK_GRID, RISK_LEVELS

__all__ = [
    "ALL_PATIENTS",
    "A_RANGES",
    "BASE_SIZE",
    "EGFR_UNIT_LABEL",
    "FIG_SIZE",
    "GROUP_COLOURS",
    "G_RANGES",
    "KDIGO_RISK",
    "KDIGO_RISK_COLOURS",
    "KDIGO_RISK_LABELS",
    "KDIGO_RISK_LEVELS",
    "OKABE_ITO",
    "RAPID_DECLINE_PER_YEAR",
    "SLOPE_UNIT_LABEL",
    "base_theme",
    "check_threshold",
    "egfr_unit",
    "group_palette",
    "palette_for",
    "pick",
    "with_groups",
    "wrap",
]

logger = logging.getLogger(__name__)


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


# Okabe–Ito colours from green to red, as the guideline's heat map runs; the highest
# level is a darkened vermillion so that it differs from orange in lightness as well as
# hue (orange and vermillion alone are hard to tell apart, on paper and under
# colour-vision deficiencies), and takes white text.
KDIGO_RISK_COLOURS: Final[dict[str, str]] = {
    "low": OKABE_ITO["bluish_green"],
    "moderately_increased": OKABE_ITO["yellow"],
    "high": OKABE_ITO["orange"],
    "very_high": "#8F2D00",
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


RAPID_DECLINE_PER_YEAR: Final = -5.0
"""A sustained fall of more than 5 mL/min/1.73 m² per year (KDIGO 2012, rapid progression)."""


ALL_PATIENTS: Final = "All patients"


BASE_SIZE: Final = 10


FIG_SIZE: Final = (7.5, 4.6)


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


def base_theme() -> theme:
    return theme_bw(base_size=BASE_SIZE) + theme(
        figure_size=FIG_SIZE,
        legend_position="bottom",
        plot_title=element_text(size=BASE_SIZE + 2, weight="bold"),
        plot_caption=element_text(size=BASE_SIZE - 2, ha="left"),
        panel_grid_minor=element_blank(),
    )


def check_threshold(threshold: int) -> int:
    if not isinstance(threshold, int | np.integer) or threshold < 0:
        raise InputDataError(
            f"small_cell_threshold: expected a non-negative integer, got {threshold!r}; "
            "use e.g. 10 to print counts 1..10 as '<11'"
        )
    return int(threshold)


def pick(df: pl.DataFrame, column: str, value: str | None, name: str) -> pl.DataFrame:
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


def with_groups(df: pl.DataFrame, groups: FrameLike | None, name: str) -> pl.DataFrame:
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


def palette_for(df: pl.DataFrame, palette: Mapping[str, str] | None) -> dict[str, str]:
    present = df["group"].unique().to_list() if "group" in df.columns else []
    base = dict(palette) if palette else {}
    extra = group_palette(g for g in present if g not in base)
    for g, colour in extra.items():
        base.setdefault(g, colour)
    return base


def wrap(text: str, width: int = 110) -> str:
    return "\n".join(textwrap.wrap(text, width))


def egfr_unit(df: pl.DataFrame) -> str:
    if "egfr_unit" in df.columns:
        units = df["egfr_unit"].drop_nulls().unique().to_list()
        if units == ["mL/min"]:
            return "mL/min"
    return EGFR_UNIT_LABEL
