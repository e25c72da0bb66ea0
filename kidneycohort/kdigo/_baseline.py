"""KDIGO categories at baseline and the counts of the G x A prognosis grid."""

from __future__ import annotations

from typing import Final

import polars as pl
from pydantic import Field

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort._rules import RuleModel
from kidneycohort.baseline import BaselineRule
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kdigo._categories import (
    A_CATEGORIES,
    G_CATEGORIES,
    RISK_GRID,
    albuminuria_category_expr,
    gfr_category_expr,
    kdigo_risk_expr,
)
from kidneycohort.schemas import BASELINE_CATEGORIES

__all__ = [
    "BASELINE_CATEGORIES",
    "BASELINE_CATEGORY_REASONS",
    "KdigoGridRule",
    "baseline_categories",
    "kdigo_grid_counts",
]


class KdigoGridRule(RuleModel):
    """The KDIGO grid at baseline (config key ``kdigo_grid``).

    The G category comes from the baseline eGFR of the primary equation (the
    ``baseline`` rule); the A category from a baseline UACR chosen by ``uacr_baseline``
    (:func:`kidneycohort.baseline.uacr_baseline`).
    """

    uacr_baseline: BaselineRule = Field(
        default_factory=lambda: BaselineRule(method="mean_in_window", mean_type="geometric"),
        description="How the baseline UACR is chosen; default the geometric mean of the "
        "values in the year before index (UACR is right-skewed and varies day to day).",
    )


# ---- baseline categories (one row per patient) -------------------------------------------


BASELINE_CATEGORY_REASONS: Final[dict[str, str]] = {
    "no_baseline_row": "the patient has no row in that baseline table",
    "no_uacr_baseline": "no UACR baseline table was given",
    "not_classifiable": "the baseline value is negative or not a number",
}
"""Codes in ``g_reason`` / ``a_reason`` besides the baseline tables' own ``baseline_reason``."""


def _one_row_each(df: pl.DataFrame, what: str) -> pl.DataFrame:
    duplicated = df.filter(pl.col("patient_id").is_duplicated())
    if duplicated.height:
        raise InputDataError(
            f"{what}: patient '{duplicated['patient_id'][0]}' has more than one row; give one "
            "baseline row per patient (and equation)"
        )
    return df


@follows_input
def baseline_categories(
    baseline: FrameLike,
    uacr_baseline: FrameLike | None = None,
    *,
    equation: str | None = None,
) -> pl.DataFrame:
    """KDIGO G and A category at baseline, and the prognosis-grid risk, per patient.

    .. math::

        G = G(\\text{baseline eGFR}),\\quad A = A(\\text{baseline UACR, mg/g}),\\quad
        \\text{risk} = R(G, A)

    with :math:`G` and :math:`A` the KDIGO 2012 categories of :func:`gfr_category_expr`
    and :func:`albuminuria_category_expr` (Tables 5 and 6) and :math:`R` the prognosis
    grid of KDIGO 2012 Figure 2 (:data:`RISK_GRID`) [1]_. The baseline UACR is a mean
    in mg/g (:func:`kidneycohort.baseline.uacr_baseline`), so it is classified on the
    mg/g thresholds 30 and 300 whatever unit the results were reported in.

    Parameters
    ----------
    baseline : polars or pandas DataFrame
        :func:`kidneycohort.baseline.egfr_baseline` output (``schemas.BASELINE``): at least
        ``patient_id``, ``equation``, ``baseline_egfr``; ``baseline_reason`` is used
        when present.
    uacr_baseline : polars or pandas DataFrame, optional
        :func:`kidneycohort.baseline.uacr_baseline` output: ``patient_id``,
        ``baseline_uacr_mg_g`` (and ``baseline_reason``). Without it every A category is
        null with reason ``no_uacr_baseline``.
    equation : str, optional
        The equation whose baseline eGFR gives the G category; required when
        ``baseline`` holds more than one.

    Returns
    -------
    polars.DataFrame
        :data:`BASELINE_CATEGORIES`: one row per patient of either table (patients of
        ``baseline`` first, in its order). ``g_reason`` / ``a_reason`` say why a
        category is null: the baseline table's ``baseline_reason``, or a code of
        :data:`BASELINE_CATEGORY_REASONS`. ``risk`` is null unless both are known.

    Raises
    ------
    InputDataError
        A missing column, an unknown or ambiguous equation, or two rows of one patient.

    References
    ----------
    .. [1] KDIGO 2012 clinical practice guideline for the evaluation and management of
       chronic kidney disease. Kidney Int Suppl 2013;3:1-150.

    Examples
    --------
    >>> import polars as pl
    >>> base = pl.DataFrame({"patient_id": ["a", "b"], "equation": ["e", "e"],
    ...                      "baseline_egfr": [59.5, 90.0]})
    >>> uacr = pl.DataFrame({"patient_id": ["a"], "baseline_uacr_mg_g": [30.0]})
    >>> baseline_categories(base, uacr).select("g_category", "a_category", "risk").rows()
    [('G3a', 'A2', 'high'), ('G1', None, None)]
    """
    eg = to_polars(baseline, "baseline")
    require_columns(eg, ("patient_id", "equation", "baseline_egfr"), "baseline")
    eg = eg.with_columns(pl.col("patient_id").cast(pl.String), pl.col("equation").cast(pl.String))
    equations = sorted(eg["equation"].drop_nulls().unique().to_list())
    if equation is not None:
        if equation not in equations:
            raise InputDataError(
                f"baseline: equation '{equation}' is not in the table (equations: "
                f"{', '.join(equations) or 'none'}){did_you_mean(equation, equations)}"
            )
    elif len(equations) > 1:
        raise InputDataError(
            f"baseline: the table holds {len(equations)} equations ({', '.join(equations)}); "
            "pass equation=... to choose the one for the G category"
        )
    else:
        equation = equations[0] if equations else None
    eg = eg.filter(pl.col("equation") == equation) if equation is not None else eg.clear()
    reason = pl.col("baseline_reason").cast(pl.String) if "baseline_reason" in eg.columns else None
    eg = _one_row_each(
        eg.select(
            "patient_id",
            pl.col("baseline_egfr").cast(pl.Float64),
            (reason if reason is not None else pl.lit(None, dtype=pl.String)).alias("_g_reason"),
            _in_egfr=pl.lit(True),
        ),
        "baseline",
    )
    if uacr_baseline is not None:
        ua = to_polars(uacr_baseline, "uacr_baseline")
        require_columns(ua, ("patient_id", "baseline_uacr_mg_g"), "uacr_baseline")
        a_reason = (
            pl.col("baseline_reason").cast(pl.String)
            if "baseline_reason" in ua.columns
            else pl.lit(None, dtype=pl.String)
        )
        ua = _one_row_each(
            ua.select(
                pl.col("patient_id").cast(pl.String),
                pl.col("baseline_uacr_mg_g").cast(pl.Float64),
                a_reason.alias("_a_reason"),
                _in_uacr=pl.lit(True),
            ),
            "uacr_baseline",
        )
    else:
        ua = pl.DataFrame(
            schema={
                "patient_id": pl.String,
                "baseline_uacr_mg_g": pl.Float64,
                "_a_reason": pl.String,
                "_in_uacr": pl.Boolean,
            }
        )
    both = eg.join(ua, on="patient_id", how="full", coalesce=True, maintain_order="left_right")
    g = gfr_category_expr("baseline_egfr")
    a = albuminuria_category_expr("baseline_uacr_mg_g", "mg/g")
    no_uacr_table = "no_uacr_baseline" if uacr_baseline is None else "no_baseline_row"

    def why(value: str, present: str, own: str, missing_code: str) -> pl.Expr:
        return (
            pl.when(pl.col(present).is_null())
            .then(pl.lit(missing_code))
            .when(pl.col(value).is_null())
            .then(pl.col(own).fill_null(pl.lit("not_classifiable")))
            .otherwise(pl.lit("not_classifiable"))
        )

    out = both.with_columns(g_category=g, a_category=a).with_columns(
        g_reason=pl.when(pl.col("g_category").is_null()).then(
            why("baseline_egfr", "_in_egfr", "_g_reason", "no_baseline_row")
        ),
        a_reason=pl.when(pl.col("a_category").is_null()).then(
            why("baseline_uacr_mg_g", "_in_uacr", "_a_reason", no_uacr_table)
        ),
        equation=pl.lit(equation, dtype=pl.String),
        risk=kdigo_risk_expr("g_category", "a_category"),
    )
    return out.select(list(BASELINE_CATEGORIES)).cast(pl.Schema(BASELINE_CATEGORIES))


@follows_input
def kdigo_grid_counts(categories: FrameLike) -> pl.DataFrame:
    """Patients per KDIGO GFR x albuminuria cell, with the cell's prognosis level.

    Counts the patients of :func:`kidneycohort.kdigo.baseline_categories` that have both
    categories; the 18 cells of KDIGO 2012 Figure 2 are all present (zeros included).
    ``risk`` uses the figure's level names (``low``, ``moderately_increased``, ``high``,
    ``very_high``). Patients with a missing category are counted in the
    ``tables/kdigo_grid`` table (:func:`kidneycohort.tables.kdigo_grid_table`), not here.

    Returns
    -------
    polars.DataFrame
        ``g_category``, ``a_category``, ``n`` (Int64, unsuppressed), ``risk``.
    """
    df = to_polars(categories, "categories")
    require_columns(df, ("g_category", "a_category"), "categories")
    cells = pl.DataFrame(
        {
            "g_category": [g for g in G_CATEGORIES for _ in A_CATEGORIES],
            "a_category": [a for _ in G_CATEGORIES for a in A_CATEGORIES],
        }
    ).with_columns(
        risk=pl.concat_str("g_category", "a_category", separator="|")
        .replace_strict({f"{g}|{a}": r for (g, a), r in RISK_GRID.items()})
        .str.replace_all(" ", "_")
    )
    counts = (
        df.filter(pl.col("g_category").is_not_null() & pl.col("a_category").is_not_null())
        .group_by("g_category", "a_category")
        .agg(pl.len().cast(pl.Int64).alias("n"))
    )
    return cells.join(counts, on=["g_category", "a_category"], how="left").select(
        "g_category", "a_category", pl.col("n").fill_null(0), "risk"
    )
