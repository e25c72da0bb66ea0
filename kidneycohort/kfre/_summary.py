"""The distribution of KFRE risk at baseline by group, as a table for sharing."""

from __future__ import annotations

from typing import Final

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.disclosure import CountLedger, SharedDisclosure, protect_part
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kfre._inputs import KFRE_SUMMARY_REASONS
from kidneycohort.kfre._rule import KfreRule
from kidneycohort.tables import TableRule, suppression_label

__all__ = ["kfre_summary_table"]

_DASH: Final = "–"


_OVERALL: Final = "Overall"


# ---- KFRE summary table ------------------------------------------------------------------
def _percent(value: float) -> str:
    text = f"{value * 100:g}"
    return f"{text} %"


def _protect(
    counts: pl.DataFrame, spec: TableRule, disclosure: SharedDisclosure | None
) -> pl.DataFrame:
    """Mark ``_hidden`` cells with the one disclosure control of
    :mod:`kidneycohort.disclosure`: the applicable patients and the not-applicable reasons
    add up to N in each column, the groups add up to the overall column; small counts and
    the counts that would reveal them are hidden. N is the baseline table's N (same key)."""
    ledger = CountLedger(threshold=spec.small_cell_threshold)

    def key(row: str, column: str) -> tuple[str, str, str]:
        return ("N", "", column) if row == "n" else ("kfre summary", row, column)

    cells = counts.select("_row", "_column", "_count", "_block").rows()
    for row, column, n, _ in cells:
        ledger.add(key(row, column), n)
    columns = counts["_column"].unique(maintain_order=True).to_list()
    groups = [c for c in columns if c != _OVERALL]
    for column in columns:
        block = [key(row, column) for row, c, _, b in cells if c == column and b == "n"]
        if block:
            ledger.relate(block, key("n", column))
    if groups:
        for row in counts["_row"].unique(maintain_order=True).to_list():
            ledger.relate([key(row, g) for g in groups], key(row, _OVERALL))
    display = protect_part(ledger, disclosure, "kfre_summary")
    hidden = [not display(key(row, column)).isdigit() for row, column, _, _ in cells]
    return counts.with_columns(pl.Series("_hidden", hidden, dtype=pl.Boolean))


def _denominator_hidden(long: pl.DataFrame) -> pl.Expr:
    """Whether a row's percentage is of a hidden denominator (it would give it away:
    count / share)."""
    hidden_of = long.filter(pl.col("_hidden")).select("_column", "_row")
    return (
        pl.when(pl.col("_kind") == "of_n")
        .then(pl.col("_column").is_in(hidden_of.filter(pl.col("_row") == "n")["_column"].implode()))
        .when(pl.col("_kind") == "of_applicable")
        .then(
            pl.col("_column").is_in(
                hidden_of.filter(pl.col("_row") == "applicable")["_column"].implode()
            )
        )
        .otherwise(pl.lit(False))
    )


CountRow = tuple[str, str, str, str, pl.Expr, str | None, str]
"""(row id, characteristic, statistic, level, count expression, block, denominator)."""


def _count_rows(
    reasons: list[str], thresholds_2y: list[float], thresholds_5y: list[float], ok: pl.Expr
) -> list[CountRow]:
    rows: list[CountRow] = [
        ("n", "N", "n", "", pl.len(), None, ""),
        ("applicable", "KFRE applicable", "n (%)", "yes", ok.sum(), "n", "of_n"),
    ]
    for reason in reasons:
        rows.append(
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
            rows.append(
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
    return rows


@follows_input
def kfre_summary_table(
    kfre_rows: FrameLike,
    *,
    group_column: str | None = "group",
    rule: KfreRule | None = None,
    table_rule: TableRule | None = None,
    disclosure: SharedDisclosure | None = None,
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

    Small cells: counts from 1 to ``table_rule.small_cell_threshold`` print as ``"<11"`` with
    no percentage, a median or quartiles of so few patients print as the same label,
    and complementary cells that would reveal a hidden one are hidden too (``"*"``).

    Parameters
    ----------
    kfre_rows : polars or pandas DataFrame
        :func:`kfre_at_baseline` output (``kfre_2y``, ``kfre_5y``, ``kfre_reason``).
    group_column : str or None
        Column to split by; None (or absent) gives the overall column only.
    rule : KfreRule, optional
        Its ``thresholds_2y`` and ``thresholds_5y`` (fractions) are counted.
    table_rule : TableRule, optional
        Suppression threshold and decimals.

    Returns
    -------
    polars.DataFrame
        All columns text.

    Raises
    ------
    InputDataError
        A missing column.
    """
    spec = table_rule or TableRule()
    rule = rule or KfreRule()
    thresholds_2y, thresholds_5y = rule.thresholds_2y, rule.thresholds_5y
    df = to_polars(kfre_rows, "kfre")
    require_columns(df, ("patient_id", "kfre_2y", "kfre_5y", "kfre_reason"), "kfre")
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

    count_rows = _count_rows(reasons, thresholds_2y, thresholds_5y, ok)
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
    hidden = _protect(long, spec, disclosure)
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
    denominator_hidden = _denominator_hidden(long)
    text = (
        pl.when(pl.col("_hidden") & small_n)
        .then(pl.lit(small))
        .when(pl.col("_hidden"))
        .then(pl.lit("*"))
        .when(pl.col("_kind") == "")
        .then(pl.col("_count").cast(pl.String))
        .when(denominator.is_null() | (denominator == 0) | denominator_hidden)
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
