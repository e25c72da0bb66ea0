"""KDIGO tables: the G x A grid of patients at baseline and the G (or A) transition matrix."""

from __future__ import annotations

from collections.abc import Sequence

import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES
from kidneycohort.tables._format import _MISSING_LEVEL, TableRule, _count_text, _is_small

__all__ = ["_one_row_per_patient", "kdigo_grid_table", "transition_table"]


def _one_row_per_patient(categories: pl.DataFrame, equation: str | None) -> pl.DataFrame:
    require_columns(categories, ("patient_id",), "categories")
    if "equation" in categories.columns:
        equations = sorted(categories["equation"].drop_nulls().unique().to_list())
        if equation is not None:
            if equation not in equations:
                raise InputDataError(
                    f"categories: equation '{equation}' is not in the table (equations: {equations})"
                    f"{did_you_mean(equation, equations)}"
                )
            categories = categories.filter(pl.col("equation") == equation)
        elif len(equations) > 1:
            raise InputDataError(
                f"categories: the table holds {len(equations)} equations {equations}; pass equation=..."
            )
    categories = categories.with_columns(pl.col("patient_id").cast(pl.String))
    duplicated = categories.filter(pl.col("patient_id").is_duplicated())
    if duplicated.height:
        raise InputDataError(
            f"categories: patient '{duplicated['patient_id'][0]}' has more than one row; give one "
            "row per patient (and equation)"
        )
    return categories


def kdigo_grid_table(
    categories: FrameLike, *, equation: str | None = None, rule: TableRule | None = None
) -> pl.DataFrame:
    """Number of patients in each KDIGO GFR x albuminuria cell (KDIGO 2012 / 2024 grid).

    ``categories`` holds one row per patient with ``g_category`` and ``a_category``; a
    missing category is counted under ``missing`` rather than left out.

    Returns
    -------
    polars.DataFrame
        ``g_category, a_category, n, n_display``: every G1-G5 x A1-A3 cell (zeros
        included) plus any ``missing`` cells; ``n`` is null where suppressed and
        ``n_display`` is the text to show (``"<11"``).
    """
    rule = rule or TableRule()
    kdigo = _one_row_per_patient(to_polars(categories, "categories"), equation)
    require_columns(kdigo, ("g_category", "a_category"), "categories")
    _check_levels(kdigo, "g_category", G_CATEGORIES)
    _check_levels(kdigo, "a_category", A_CATEGORIES)
    kdigo = kdigo.with_columns(
        pl.col("g_category", "a_category").cast(pl.String).fill_null(_MISSING_LEVEL)
    )
    g_levels = list(G_CATEGORIES) + (
        [_MISSING_LEVEL] if (kdigo["g_category"] == _MISSING_LEVEL).any() else []
    )
    a_levels = list(A_CATEGORIES) + (
        [_MISSING_LEVEL] if (kdigo["a_category"] == _MISSING_LEVEL).any() else []
    )
    grid = pl.DataFrame({"g_category": g_levels}).join(
        pl.DataFrame({"a_category": a_levels}), how="cross"
    )
    counted = grid.join(
        kdigo.group_by("g_category", "a_category").agg(pl.len().cast(pl.Int64).alias("n")),
        on=["g_category", "a_category"],
        how="left",
    ).with_columns(pl.col("n").fill_null(0))
    return counted.select(
        "g_category",
        "a_category",
        pl.when(_is_small(pl.col("n"), rule)).then(None).otherwise(pl.col("n")).alias("n"),
        _count_text(pl.col("n"), rule).alias("n_display"),
    )


def transition_table(
    transitions: FrameLike,
    *,
    axis: str = "G",
    equation: str | None = None,
    rule: TableRule | None = None,
) -> pl.DataFrame:
    """Counts of category transitions (``schemas.TRANSITIONS`` rows) on one axis.

    Returns
    -------
    polars.DataFrame
        ``from_category, to_category, n, n_patients, n_display``: every ordered pair of
        distinct categories of the axis (zeros included); ``n`` counts transitions,
        ``n_patients`` patients with at least one; both null where suppressed.
    """
    rule = rule or TableRule()
    table = to_polars(transitions, "transitions")
    require_columns(table, ("patient_id", "axis", "from_category", "to_category"), "transitions")
    if axis not in ("G", "A"):
        raise InputDataError(f"axis: expected 'G' or 'A', got {axis!r}")
    table = table.filter(pl.col("axis") == axis)
    if "equation" in table.columns:
        equations = sorted(table["equation"].drop_nulls().unique().to_list())
        if equation is not None:
            table = table.filter(pl.col("equation") == equation)
        elif len(equations) > 1:
            raise InputDataError(
                f"transitions: the table holds equations {equations}; pass equation=..."
            )
    levels = G_CATEGORIES if axis == "G" else A_CATEGORIES
    for column in ("from_category", "to_category"):
        _check_levels(table, column, levels, name="transitions")
    grid = (
        pl.DataFrame({"from_category": list(levels)})
        .join(pl.DataFrame({"to_category": list(levels)}), how="cross")
        .filter(pl.col("from_category") != pl.col("to_category"))
    )
    counted = grid.join(
        table.group_by("from_category", "to_category").agg(
            pl.len().cast(pl.Int64).alias("n"),
            pl.col("patient_id").n_unique().cast(pl.Int64).alias("n_patients"),
        ),
        on=["from_category", "to_category"],
        how="left",
    ).with_columns(pl.col("n", "n_patients").fill_null(0))
    hidden = _is_small(pl.col("n"), rule) | _is_small(pl.col("n_patients"), rule)
    return counted.select(
        "from_category",
        "to_category",
        pl.when(hidden).then(None).otherwise(pl.col("n")).alias("n"),
        pl.when(hidden).then(None).otherwise(pl.col("n_patients")).alias("n_patients"),
        _count_text(pl.col("n"), rule, hide=hidden).alias("n_display"),
    )


def _check_levels(
    table: pl.DataFrame, column: str, levels: Sequence[str], name: str = "categories"
) -> None:
    present = table[column].drop_nulls().cast(pl.String).unique().to_list()
    for value in present:
        if value not in levels:
            raise InputDataError(
                f"{name}: column '{column}' has value '{value}'; expected one of {list(levels)}"
                f"{did_you_mean(value, levels)}"
            )
