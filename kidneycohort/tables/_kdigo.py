"""KDIGO tables: the G x A grid of patients at baseline and the G (or A) transition matrix."""

from __future__ import annotations

from collections.abc import Sequence

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.disclosure import CountLedger, SharedDisclosure, protect_part
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES
from kidneycohort.tables._format import (
    _MISSING_LEVEL,
    OVERALL,
    TableRule,
    _count_text,
)

__all__ = ["A_MARGIN", "G_MARGIN", "_one_row_per_patient", "kdigo_grid_table", "transition_table"]


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


GRID = "KDIGO GFR × albuminuria"
G_MARGIN = "KDIGO GFR category"
A_MARGIN = "KDIGO albuminuria category"
ALL = "all"


@follows_input
def kdigo_grid_table(
    categories: FrameLike,
    *,
    equation: str | None = None,
    rule: TableRule | None = None,
    disclosure: SharedDisclosure | None = None,
) -> pl.DataFrame:
    """Number of patients in each KDIGO GFR x albuminuria cell (KDIGO 2012 / 2024 grid),
    with the margins.

    ``categories`` holds one row per patient with ``g_category`` and ``a_category``; a
    missing category is counted under ``missing`` rather than left out. Counts of people
    are protected by :mod:`kidneycohort.disclosure` over the cells and margins together
    (``disclosure``: together with the other outputs of a run, e.g. the baseline table,
    whose G and A rows are the same counts as these margins).

    Returns
    -------
    polars.DataFrame
        ``g_category, a_category, n, n_display``: every G1-G5 x A1-A3 cell (zeros
        included), any ``missing`` cells, then the margins (``a_category == "all"`` for a
        G row's total, ``g_category == "all"`` for an A column's, both for all patients);
        ``n`` is null where hidden and ``n_display`` is the text to show (``"<11"``, or
        ``"*"`` for a count hidden so that a small one cannot be recovered).
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
    with_margins = pl.concat(
        [
            counted,
            counted.group_by("g_category", maintain_order=True).agg(
                pl.lit(ALL).alias("a_category"), pl.col("n").sum()
            ),
            counted.group_by("a_category", maintain_order=True).agg(
                pl.lit(ALL).alias("g_category"), pl.col("n").sum()
            ),
            pl.DataFrame({"g_category": [ALL], "a_category": [ALL], "n": [counted["n"].sum()]}),
        ],
        how="diagonal_relaxed",
    ).with_columns(pl.col("n").cast(pl.Int64))
    display = protect_part(
        _grid_ledger(with_margins, g_levels, a_levels, rule), disclosure, "kdigo_grid"
    )
    keys = [_grid_key(g, a) for g, a in with_margins.select("g_category", "a_category").rows()]
    texts = pl.Series("n_display", [display(key) for key in keys], dtype=pl.String)
    shown = texts.str.contains(r"^\d+$")
    return with_margins.select(
        "g_category",
        "a_category",
        pl.when(shown).then(pl.col("n")).otherwise(None).alias("n"),
    ).with_columns(texts)


def _grid_key(g: str, a: str) -> tuple[str, str, str]:
    """What a grid count is: a cell, or a margin that is the same count as the baseline
    table's G or A row (missing levels excepted: there they also count patients with no
    category row at all)."""
    if a == ALL and g not in (ALL, _MISSING_LEVEL):
        return (G_MARGIN, g, OVERALL)
    if g == ALL and a not in (ALL, _MISSING_LEVEL):
        return (A_MARGIN, a, OVERALL)
    return (GRID, f"{g} × {a}", OVERALL)


def _grid_ledger(
    counts: pl.DataFrame, g_levels: Sequence[str], a_levels: Sequence[str], rule: TableRule
) -> CountLedger:
    ledger = CountLedger(threshold=rule.small_cell_threshold)
    for g, a, n in counts.select("g_category", "a_category", "n").rows():
        ledger.add(_grid_key(g, a), n)
    for g in [*g_levels, ALL]:
        ledger.relate([_grid_key(g, a) for a in a_levels], _grid_key(g, ALL))
    for a in a_levels:
        ledger.relate([_grid_key(g, a) for g in g_levels], _grid_key(ALL, a))
    return ledger


@follows_input
def transition_table(
    transitions: FrameLike,
    *,
    axis: str = "G",
    equation: str | None = None,
    rule: TableRule | None = None,
    disclosure: SharedDisclosure | None = None,
) -> pl.DataFrame:
    """Counts of category transitions (``schemas.TRANSITIONS`` rows) on one axis.

    Returns
    -------
    polars.DataFrame
        ``from_category, to_category, n, n_patients, n_display``: every ordered pair of
        distinct categories of the axis (zeros included); ``n`` counts transitions,
        ``n_patients`` patients with at least one; both null where the patients are
        a small count (:mod:`kidneycohort.disclosure`; ``disclosure`` to protect the
        table together with other outputs).
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
    # patients with a transition are counted; the number of transitions goes with them
    ledger = CountLedger(threshold=rule.small_cell_threshold)
    pairs = counted.select("from_category", "to_category", "n_patients").rows()
    for source, target, n in pairs:
        ledger.add(("transition", axis, f"{source} -> {target}"), n)
    display = protect_part(ledger, disclosure, f"transition_table_{axis}")
    shown = [
        display(("transition", axis, f"{source} -> {target}")).isdigit()
        for source, target, _ in pairs
    ]
    hidden = pl.lit(~pl.Series(shown, dtype=pl.Boolean))
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
