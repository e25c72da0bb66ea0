"""Run-level summaries the pipeline writes beside the stage outputs.

* :func:`kfre_at_baseline` -- the Kidney Failure Risk Equation at cohort entry, one row
  per patient, applicability stated (wraps :func:`kidneycohort.kfre.kfre_inputs` and
  :func:`kidneycohort.kfre.add_kfre_risk`).
* :func:`kfre_summary` -- that risk's distribution by group, small cells protected.
* :func:`kdigo_grid_counts` -- patients per KDIGO G x A cell with the prognosis level,
  the layout the KDIGO heat-map figure reads.

All are plain table functions (polars in, polars out), usable without the runner.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Final

import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import ConfigError, InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES, RISK_GRID
from kidneycohort.kfre import KFRE_REASONS, Region, add_kfre_risk, kfre_inputs
from kidneycohort.tables import TableRule, suppression_label
from kidneycohort.value_filter import ValueFilterRule

logger = logging.getLogger(__name__)

ON_KFRT: Final = "on_kfrt_at_baseline"
"""Extra ``kfre_reason``: kidney replacement therapy began on or before the assessment."""

KFRE_SUMMARY_REASONS: Final[dict[str, str]] = {
    **KFRE_REASONS,
    ON_KFRT: "kidney replacement therapy already started: the equation does not apply",
}

_DASH: Final = "–"
_OVERALL: Final = "Overall"


# ---- KFRE at baseline ---------------------------------------------------------------------
def kfre_at_baseline(
    egfr: FrameLike,
    labs: FrameLike,
    cohort: FrameLike,
    *,
    equation: str,
    region: Region = "north_american",
    lookback_days: float = 365.0,
    value_filter: ValueFilterRule | None = None,
    group_column: str | None = "group",
) -> pl.DataFrame:
    """Two- and five-year KFRE risk of each patient at the index date.

    The inputs are the latest usable eGFR of ``equation`` and the latest UACR within
    ``lookback_days`` before (or on) the index date, and the age at index
    (:func:`kidneycohort.kfre.kfre_inputs`); the risk is the 4-variable KFRE
    (:func:`kidneycohort.kfre.add_kfre_risk`, Tangri 2011 with the 2016 regional baseline
    survivals):

    .. math:: \\text{risk}(t) = 1 - S_0(t)^{\\exp(\\eta)}

    Applicability is stated per patient: ``kfre_applicable`` is true when a risk was
    computed, and ``kfre_reason`` names why not (:data:`KFRE_SUMMARY_REASONS`). Besides
    the checks of :func:`~kidneycohort.kfre.kfre`, a patient whose ``kfrt_date`` is on
    or before the index date is already on kidney replacement therapy and gets
    ``on_kfrt_at_baseline`` (the equation predicts the start of it).

    Parameters
    ----------
    egfr, labs, cohort : polars or pandas DataFrame
        ``egfr.parquet`` rows, harmonised labs (UACR in mg/g) and harmonised patients.
    equation : str
        The eGFR equation (the study's primary one).
    region, lookback_days, value_filter
        Passed to the KFRE functions.
    group_column : str or None
        A ``cohort`` column copied to the output (the grouping of :func:`kfre_summary`).

    Returns
    -------
    polars.DataFrame
        One row per patient of ``cohort``: ``patient_id``, the group column, ``equation``,
        the inputs (``at_years``, ``age_years``, ``sex``, ``egfr``, ``egfr_years``,
        ``uacr_mg_g``, ``uacr_years``), ``kfre_2y``, ``kfre_5y``, ``kfre_region``,
        ``kfre_applicable``, ``kfre_reason``.
    """
    pts = to_polars(cohort, "cohort")
    require_columns(pts, ("patient_id",), "cohort")
    inputs = kfre_inputs(
        egfr,
        labs,
        pts,
        equation,
        at_years=0.0,
        lookback_days=lookback_days,
        value_filter=value_filter,
    )
    risk = add_kfre_risk(inputs, region=region)
    pts = pts.with_columns(pl.col("patient_id").cast(pl.String))
    extra = [pl.col("patient_id")]
    if group_column is not None and group_column in pts.columns:
        extra.append(pl.col(group_column).cast(pl.String))
    on_kfrt = pl.lit(False)
    if "kfrt_date" in pts.columns and "index_date" in pts.columns:
        on_kfrt = (
            pl.col("kfrt_date").cast(pl.Date) <= pl.col("index_date").cast(pl.Date)
        ).fill_null(False)
    extra.append(on_kfrt.alias("_on_kfrt"))
    out = risk.join(
        pts.select(extra).unique("patient_id", keep="first", maintain_order=True),
        on="patient_id",
        how="left",
        maintain_order="left",
    )
    reason = pl.when(pl.col("_on_kfrt")).then(pl.lit(ON_KFRT)).otherwise(pl.col("kfre_reason"))
    out = out.with_columns(
        kfre_reason=reason,
        kfre_2y=pl.when(pl.col("_on_kfrt")).then(None).otherwise(pl.col("kfre_2y")),
        kfre_5y=pl.when(pl.col("_on_kfrt")).then(None).otherwise(pl.col("kfre_5y")),
        equation=pl.lit(equation, dtype=pl.String),
    ).with_columns(kfre_applicable=pl.col("kfre_reason").is_null())
    group = [group_column] if group_column is not None and group_column in out.columns else []
    return out.select(
        "patient_id",
        *group,
        "equation",
        "at_years",
        "age_years",
        "sex",
        "egfr",
        "egfr_years",
        "uacr_mg_g",
        "uacr_years",
        "kfre_2y",
        "kfre_5y",
        "kfre_region",
        "kfre_applicable",
        "kfre_reason",
    )


# ---- KFRE summary table ------------------------------------------------------------------
def _percent(value: float) -> str:
    text = f"{value * 100:g}"
    return f"{text} %"


def _protect(counts: pl.DataFrame, spec: TableRule) -> pl.DataFrame:
    """Mark ``_hidden`` cells: small counts, plus complementary cells.

    A block (``_block``: counts of one column that add up to its N) or a row (one count
    across the group columns, which add up to the overall column) holding exactly one
    hidden cell would let a reader recover it by subtraction; its smallest other
    non-zero cell is hidden too. Repeated until nothing changes (common practice in
    statistical disclosure control).
    """
    thr = spec.small_cell_threshold
    out = counts.with_columns(
        _hidden=(pl.col("_count") >= 1) & (pl.col("_count") <= thr),
        _rank=pl.col("_count") * 1_000_000 + pl.int_range(pl.len()),
    )
    if thr == 0:
        return out.drop("_rank")
    for _ in range(10):
        before = int(out["_hidden"].sum())
        for scope in (["_column", "_block"], ["_row", "_is_group"]):
            candidate = pl.when(~pl.col("_hidden") & (pl.col("_count") > 0)).then(pl.col("_rank"))
            scoped = out.with_columns(
                _n=pl.col("_hidden").sum().over(scope),
                _c=candidate,
            )
            scoped = scoped.with_columns(_cmin=pl.col("_c").min().over(scope))
            applies = (
                pl.col("_block").is_not_null() if scope[1] == "_block" else pl.col("_is_group")
            )
            out = scoped.with_columns(
                _hidden=pl.col("_hidden")
                | (
                    applies
                    & (pl.col("_n") == 1)
                    & (pl.col("_c") == pl.col("_cmin")).fill_null(False)
                )
            ).drop("_n", "_c", "_cmin")
        if int(out["_hidden"].sum()) == before:
            break
    return out.drop("_rank")


def kfre_summary(
    kfre_rows: FrameLike,
    *,
    group_column: str | None = "group",
    thresholds_2y: Sequence[float] = (0.10, 0.40),
    thresholds_5y: Sequence[float] = (0.03, 0.05),
    spec: TableRule | None = None,
) -> pl.DataFrame:
    """KFRE risk at baseline by group: applicability, median [IQR] risk, risk above thresholds.

    Rows (layout of the baseline characteristics table: ``characteristic, statistic,
    level``, one column per group, then ``Overall``):

    * ``N``; ``KFRE applicable`` (n, % of N) and one row per reason it is not;
    * 2- and 5-year risk in %, median [Q1, Q3] of the applicable patients (quartiles by
      linear interpolation, ``numpy.percentile``'s default);
    * patients at or above each threshold (n, % of the applicable).

    The default thresholds are decision points named by KDIGO 2024 (from memory: 5-year
    risk 3-5 % for referral to kidney care, 2-year risk above 10 % for multidisciplinary
    care and above 40 % for planning kidney replacement therapy); they are parameters.

    Small cells: counts from 1 to ``spec.small_cell_threshold`` print as ``"<11"`` with
    no percentage, a median or quartiles of so few patients print as the same label,
    and complementary cells that would reveal a hidden one are hidden too (``"*"``).

    Parameters
    ----------
    kfre_rows : polars or pandas DataFrame
        :func:`kfre_at_baseline` output (``kfre_2y``, ``kfre_5y``, ``kfre_reason``).
    group_column : str or None
        Column to split by; None (or absent) gives the overall column only.
    thresholds_2y, thresholds_5y : sequence of float
        Risk thresholds as fractions in (0, 1).
    spec : TableRule, optional
        Suppression threshold and decimals.

    Returns
    -------
    polars.DataFrame
        All columns text.

    Raises
    ------
    InputDataError
        A missing column. :class:`ConfigError` for a threshold outside (0, 1).
    """
    spec = spec or TableRule()
    df = to_polars(kfre_rows, "kfre")
    require_columns(df, ("patient_id", "kfre_2y", "kfre_5y", "kfre_reason"), "kfre")
    for name, values in (("thresholds_2y", thresholds_2y), ("thresholds_5y", thresholds_5y)):
        bad = [v for v in values if not 0 < float(v) < 1]
        if bad:
            raise ConfigError(
                f"kfre.{name}: {bad[0]!r} is not a risk fraction in (0, 1); write 10 % as 0.1"
            )
    unknown = sorted(set(df["kfre_reason"].drop_nulls().to_list()) - set(KFRE_SUMMARY_REASONS))
    if unknown:
        raise InputDataError(
            f"kfre: column 'kfre_reason' has unknown code '{unknown[0]}'"
            f"{did_you_mean(unknown[0], KFRE_SUMMARY_REASONS)}"
        )
    if group_column is not None and group_column in df.columns:
        df = df.with_columns(_group=pl.col(group_column).cast(pl.String).fill_null("missing"))
        groups = sorted(df["_group"].unique().to_list())
    else:
        df = df.with_columns(_group=pl.lit(_OVERALL))
        groups = []
    columns = [*groups, _OVERALL]
    both = pl.concat([df, df.with_columns(_group=pl.lit(_OVERALL))]) if groups else df
    ok = pl.col("kfre_reason").is_null()
    reasons = [r for r in KFRE_SUMMARY_REASONS if (df["kfre_reason"] == r).any()]

    # counts: (row id, label parts, block, numerator, denominator kind)
    count_rows: list[tuple[str, str, str, str, pl.Expr, str | None, str]] = [
        ("n", "N", "n", "", pl.len(), None, ""),
        ("applicable", "KFRE applicable", "n (%)", "yes", ok.sum(), "n", "of_n"),
    ]
    for reason in reasons:
        count_rows.append(
            (
                f"reason_{reason}",
                "KFRE not applicable",
                "n (%)",
                reason,
                (pl.col("kfre_reason") == reason).sum(),
                "n",
                "of_n",
            )
        )
    for horizon, column, thresholds in (
        (2, "kfre_2y", thresholds_2y),
        (5, "kfre_5y", thresholds_5y),
    ):
        for t in thresholds:
            count_rows.append(
                (
                    f"over_{horizon}_{t}",
                    f"{horizon}-year kidney failure risk >= {_percent(float(t))}",
                    "n (% of applicable)",
                    "",
                    (ok & (pl.col(column) >= float(t))).sum(),
                    None,
                    "of_applicable",
                )
            )
    aggs = [expr.cast(pl.Int64).alias(row) for row, *_rest, expr, _b, _d in count_rows]
    stats = both.group_by("_group").agg(
        *aggs,
        *[
            pl.col(c).filter(ok).quantile(q, interpolation="linear").alias(f"{c}_{name}")
            for c in ("kfre_2y", "kfre_5y")
            for q, name in ((0.25, "q1"), (0.5, "median"), (0.75, "q3"))
        ],
    )
    stats = pl.DataFrame({"_group": columns}).join(stats, on="_group", how="left")

    long = stats.unpivot(
        index="_group",
        on=[r[0] for r in count_rows],
        variable_name="_row",
        value_name="_count",
    ).rename({"_group": "_column"})
    blocks = {r[0]: r[5] for r in count_rows}
    long = long.with_columns(
        _count=pl.col("_count").fill_null(0),
        _block=pl.col("_row").replace_strict(blocks, default=None, return_dtype=pl.String),
        _is_group=pl.col("_column") != _OVERALL,
    )
    hidden = _protect(long.filter(pl.col("_row") != "n"), spec)
    long = long.join(
        hidden.select("_column", "_row", "_hidden"), on=["_column", "_row"], how="left"
    ).with_columns(pl.col("_hidden").fill_null(False))
    thr = spec.small_cell_threshold
    small = suppression_label(spec)
    denominators = stats.select(
        pl.col("_group").alias("_column"),
        pl.col("n").alias("_of_n"),
        pl.col("applicable").alias("_of_applicable"),
    )
    kinds = {r[0]: r[6] for r in count_rows}
    long = long.join(denominators, on="_column", how="left").with_columns(
        _kind=pl.col("_row").replace_strict(kinds, return_dtype=pl.String)
    )
    denominator = (
        pl.when(pl.col("_kind") == "of_n")
        .then(pl.col("_of_n"))
        .when(pl.col("_kind") == "of_applicable")
        .then(pl.col("_of_applicable"))
    )
    pct = (100.0 * pl.col("_count") / denominator).round(spec.decimals)
    pct_text = pl.format(" ({}%)", pct.cast(pl.String))
    small_n = (pl.col("_count") >= 1) & (pl.col("_count") <= thr)
    text = (
        pl.when(pl.col("_hidden") & small_n)
        .then(pl.lit(small))
        .when(pl.col("_hidden"))
        .then(pl.lit("*"))
        .when(pl.col("_kind") == "")
        .then(pl.col("_count").cast(pl.String))
        .when(denominator.is_null() | (denominator == 0))
        .then(pl.col("_count").cast(pl.String))
        .otherwise(pl.concat_str([pl.col("_count").cast(pl.String), pct_text]))
    )
    counts_text = long.with_columns(_text=text).pivot(
        on="_column", index="_row", values="_text", aggregate_function="first"
    )
    labels = pl.DataFrame(
        {
            "_row": [r[0] for r in count_rows],
            "characteristic": [r[1] for r in count_rows],
            "statistic": [r[2] for r in count_rows],
            "level": [r[3] for r in count_rows],
            "_order": list(range(len(count_rows))),
        }
    )
    count_table = labels.join(counts_text, on="_row", how="left")

    # median [Q1, Q3] in %, hidden when computed on 1..threshold patients
    few = (pl.col("applicable") >= 1) & (pl.col("applicable") <= thr)
    risk_parts = []
    for i, (horizon, c) in enumerate(((2, "kfre_2y"), (5, "kfre_5y"))):
        d = spec.decimals

        def fmt(expr: pl.Expr, d: int = d) -> pl.Expr:
            return (expr * 100).round(d).cast(pl.String)

        value = (
            pl.when(few)
            .then(pl.lit(small))
            .when(pl.col(f"{c}_median").is_null())
            .then(pl.lit(_DASH))
            .otherwise(
                pl.format(
                    "{} [{}, {}]",
                    fmt(pl.col(f"{c}_median")),
                    fmt(pl.col(f"{c}_q1")),
                    fmt(pl.col(f"{c}_q3")),
                )
            )
        )
        row = stats.select(pl.col("_group"), value.alias("_text")).transpose(column_names="_group")
        risk_parts.append(
            row.select(
                pl.lit(f"{horizon}-year kidney failure risk, %").alias("characteristic"),
                pl.lit("median [Q1, Q3]").alias("statistic"),
                pl.lit("").alias("level"),
                pl.lit(len(reasons) + 1.5 + i * 0.1).alias("_order"),
                *[pl.col(c2) for c2 in columns],
            )
        )
    table = pl.concat(
        [
            count_table.drop("_row").with_columns(pl.col("_order").cast(pl.Float64)),
            *[p.with_columns(pl.col("_order").cast(pl.Float64)) for p in risk_parts],
        ],
        how="diagonal_relaxed",
    )
    return table.sort("_order", maintain_order=True).select(
        "characteristic", "statistic", "level", *columns
    )


# ---- KDIGO grid counts -------------------------------------------------------------------
def kdigo_grid_counts(categories: FrameLike) -> pl.DataFrame:
    """Patients per KDIGO GFR x albuminuria cell, with the cell's prognosis level.

    Counts the patients of :func:`kidneycohort.kdigo.baseline_categories` that have both
    categories; the 18 cells of KDIGO 2012 Figure 2 are all present (zeros included).
    ``risk`` uses the figure's level names (``low``, ``moderately_increased``, ``high``,
    ``very_high``). Patients with a missing category are counted in the
    ``tables/kdigo_grid`` table (:func:`kidneycohort.tables.kdigo_count_grid`), not here.

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
