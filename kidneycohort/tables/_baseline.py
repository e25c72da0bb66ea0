"""The baseline characteristics table (Table 1) by group."""

from __future__ import annotations

import math
from collections.abc import Sequence

import polars as pl

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES
from kidneycohort.tables._format import (
    _COMPLEMENTARY_LABEL,
    _DASH,
    _MISSING_LEVEL,
    TableRule,
    _complementary,
    _count_text,
    _format_fixed,
    _is_small,
    suppression_label,
)
from kidneycohort.tables._kdigo import _one_row_per_patient


def _age(people: pl.DataFrame) -> pl.Expr | None:
    if "age_at_index" in people.columns:
        return pl.col("age_at_index").cast(pl.Float64)
    if "birth_date" in people.columns and "index_date" in people.columns:
        return (
            pl.col("index_date").cast(pl.Date) - pl.col("birth_date").cast(pl.Date)
        ).dt.total_days() / 365.25
    return None


def baseline_characteristics_table(
    patients: FrameLike,
    baseline: FrameLike | None = None,
    categories: FrameLike | None = None,
    *,
    group_column: str = "group",
    covariates: Sequence[str] = (),
    equation: str | None = None,
    rule: TableRule | None = None,
) -> pl.DataFrame:
    r"""Baseline characteristics by group (and overall).

    Rows: N; age (mean (SD)); sex (n (%)); baseline eGFR of each equation in
    ``baseline`` (``schemas.BASELINE``; mean (SD)); UACR (median [IQR], from
    ``categories.uacr_mg_g``); KDIGO G and A categories (n (%), from ``categories``);
    and each of ``covariates``: text and booleans as n (%) per level, numbers as mean (SD)
    or, when :math:`|\text{skewness}|` exceeds ``rule.skew_threshold``, median [IQR].
    Missing values get a ``missing`` level (n (%)). Percentages are of the group's N.

    Returns
    -------
    polars.DataFrame
        ``characteristic, statistic, level``, one text column per group, and ``Overall``.
    """
    rule = rule or TableRule()
    people = to_polars(patients, "patients")
    require_columns(people, ("patient_id", group_column), "patients")
    if people["patient_id"].is_duplicated().any():
        raise InputDataError("patients: patient_id values must be unique (one row per patient)")
    if people[group_column].null_count():
        raise InputDataError(
            f"patients: {people[group_column].null_count()} patients have no '{group_column}'; "
            "fill the group or leave those patients out before tabulating"
        )
    base = people.select(
        pl.col("patient_id").cast(pl.String), pl.col(group_column).cast(pl.String).alias("_group")
    )
    numeric: list[
        tuple[str, pl.DataFrame, str]
    ] = []  # (characteristic, frame(patient_id, value), kind)
    categorical: list[tuple[str, pl.DataFrame, Sequence[str] | None]] = []
    age = _age(people)
    if age is not None:
        numeric.append(
            (
                "Age, years",
                people.select(pl.col("patient_id").cast(pl.String), age.alias("value")),
                "mean",
            )
        )
    if "sex" in people.columns:
        categorical.append(
            (
                "Sex",
                people.select(
                    pl.col("patient_id").cast(pl.String),
                    pl.col("sex").cast(pl.String).alias("value"),
                ),
                None,
            )
        )
    if baseline is not None:
        values = to_polars(baseline, "baseline")
        require_columns(values, ("patient_id", "equation", "baseline_egfr"), "baseline")
        for name in sorted(values["equation"].drop_nulls().unique().to_list()):
            part = values.filter(pl.col("equation") == name).select(
                pl.col("patient_id").cast(pl.String),
                pl.col("baseline_egfr").cast(pl.Float64).alias("value"),
            )
            numeric.append((f"Baseline eGFR ({name}), mL/min/1.73 m²", part, "mean"))
    if categories is not None:
        kdigo = _one_row_per_patient(to_polars(categories, "categories"), equation)
        if "uacr_mg_g" in kdigo.columns:
            numeric.append(
                (
                    "UACR, mg/g",
                    kdigo.select("patient_id", pl.col("uacr_mg_g").cast(pl.Float64).alias("value")),
                    "median",
                )
            )
        if "g_category" in kdigo.columns:
            categorical.append(
                (
                    "KDIGO GFR category",
                    kdigo.select("patient_id", pl.col("g_category").alias("value")),
                    G_CATEGORIES,
                )
            )
        if "a_category" in kdigo.columns:
            categorical.append(
                (
                    "KDIGO albuminuria category",
                    kdigo.select("patient_id", pl.col("a_category").alias("value")),
                    A_CATEGORIES,
                )
            )
    for name in covariates:
        if name not in people.columns:
            raise InputDataError(
                f"patients: covariate '{name}' is not a column{did_you_mean(name, people.columns)}"
            )
        column = people[name]
        if column.dtype.is_numeric():
            values = column.cast(pl.Float64).drop_nulls()
            skew = values.skew() if values.len() > 2 else 0.0
            kind = (
                "median"
                if skew is not None and math.isfinite(skew) and abs(skew) > rule.skew_threshold
                else "mean"
            )
            numeric.append(
                (
                    name,
                    people.select(
                        pl.col("patient_id").cast(pl.String),
                        pl.col(name).cast(pl.Float64).alias("value"),
                    ),
                    kind,
                )
            )
        else:
            categorical.append(
                (
                    name,
                    people.select(
                        pl.col("patient_id").cast(pl.String),
                        pl.col(name).cast(pl.String).alias("value"),
                    ),
                    None,
                )
            )

    overall = "Overall"
    groups = sorted(base["_group"].unique().to_list())
    if overall in groups:
        raise InputDataError(f"patients: '{overall}' is used as a group name; rename that group")
    with_overall = pl.concat([base, base.with_columns(pl.lit(overall).alias("_group"))])
    sizes = with_overall.group_by("_group").agg(pl.len().cast(pl.Int64).alias("_n"))
    long_rows = [
        sizes.select(
            pl.lit("N").alias("characteristic"),
            pl.lit("n").alias("statistic"),
            pl.lit("").alias("level"),
            "_group",
            _count_text(pl.col("_n"), rule).alias("text"),
            pl.lit(0).alias("_order"),
        )
    ]
    order = 1
    for characteristic, frame, kind in numeric:
        joined = with_overall.join(frame, on="patient_id", how="left")
        stats_frame = joined.group_by("_group").agg(
            pl.col("value").drop_nans().count().alias("_k"),
            pl.col("value").mean().alias("_mean"),
            pl.col("value").std().alias("_sd"),
            pl.col("value").median().alias("_median"),
            pl.col("value").quantile(0.25, interpolation="linear").alias("_q1"),
            pl.col("value").quantile(0.75, interpolation="linear").alias("_q3"),
            (pl.col("value").is_null() | pl.col("value").is_nan()).sum().alias("_missing"),
        )
        d = rule.decimals
        if kind == "mean":
            text = pl.concat_str(
                [
                    _format_fixed(pl.col("_mean"), d),
                    pl.lit(" ("),
                    _format_fixed(pl.col("_sd"), d),
                    pl.lit(")"),
                ]
            )
            statistic = "mean (SD)"
        else:
            text = pl.concat_str(
                [
                    _format_fixed(pl.col("_median"), d),
                    pl.lit(" ["),
                    _format_fixed(pl.col("_q1"), d),
                    pl.lit(", "),
                    _format_fixed(pl.col("_q3"), d),
                    pl.lit("]"),
                ]
            )
            statistic = "median [IQR]"
        long_rows.append(
            stats_frame.select(
                pl.lit(characteristic).alias("characteristic"),
                pl.lit(statistic).alias("statistic"),
                pl.lit("").alias("level"),
                "_group",
                pl.when(pl.col("_k") == 0)
                .then(pl.lit(_DASH))
                .when(_is_small(pl.col("_k"), rule))
                .then(pl.lit(f"n {suppression_label(rule)}"))
                .otherwise(text)
                .alias("text"),
                pl.lit(order).alias("_order"),
            )
        )
        order += 1
        if stats_frame["_missing"].sum() > 0:
            categorical_missing = joined.with_columns(
                pl.when(pl.col("value").is_null() | pl.col("value").is_nan())
                .then(pl.lit(_MISSING_LEVEL))
                .otherwise(pl.lit("recorded"))
                .alias("value")
            )
            long_rows.append(
                _category_block(
                    categorical_missing,
                    sizes,
                    characteristic,
                    order,
                    rule,
                    levels=["recorded", _MISSING_LEVEL],
                ).filter(pl.col("level") == _MISSING_LEVEL)
            )
            order += 1
    for characteristic, frame, levels in categorical:
        joined = with_overall.join(frame, on="patient_id", how="left").with_columns(
            pl.col("value").fill_null(_MISSING_LEVEL)
        )
        long_rows.append(_category_block(joined, sizes, characteristic, order, rule, levels=levels))
        order += 1

    long = pl.concat(long_rows, how="diagonal_relaxed").with_columns(
        pl.col("_level_order").fill_null(0)
    )
    wide = long.pivot(
        on="_group",
        index=["_order", "_level_order", "characteristic", "statistic", "level"],
        values="text",
    )
    wide = wide.sort("_order", "_level_order").drop("_order", "_level_order")
    for column in [*groups, overall]:
        if column not in wide.columns:
            wide = wide.with_columns(pl.lit(_DASH).alias(column))
    return wide.select("characteristic", "statistic", "level", *groups, overall).with_columns(
        pl.col([*groups, overall]).fill_null(_DASH)
    )


def _category_block(
    joined: pl.DataFrame,
    sizes: pl.DataFrame,
    characteristic: str,
    order: int,
    rule: TableRule,
    *,
    levels: Sequence[str] | None,
) -> pl.DataFrame:
    """n (%) per level and group with primary and secondary small-cell suppression."""
    present = joined["value"].unique().to_list()
    known = [
        v
        for v in (levels if levels is not None else sorted(present))
        if v != _MISSING_LEVEL  # the missing level always goes last, once
    ]
    unexpected = sorted(v for v in present if v not in known and v != _MISSING_LEVEL)
    ordered = [*known, *unexpected] + ([_MISSING_LEVEL] if _MISSING_LEVEL in present else [])
    grid = sizes.select("_group").join(
        pl.DataFrame({"value": ordered, "_level_order": list(range(len(ordered)))}), how="cross"
    )
    counts = (
        grid.join(
            joined.group_by("_group", "value").agg(pl.len().cast(pl.Int64).alias("_count")),
            on=["_group", "value"],
            how="left",
        )
        .with_columns(pl.col("_count").fill_null(0))
        .join(sizes, on="_group")
    )
    counts = counts.with_columns(
        (
            _is_small(pl.col("_count"), rule)
            | (_is_small(pl.col("_n"), rule) & (pl.col("_count") > 0))
        ).alias("_primary")
    )
    counts = _complementary(counts)
    # the Overall column is the sum of the groups: hide it where a group cell is hidden
    hidden_in_groups = (
        counts.filter(pl.col("_group") != "Overall")
        .group_by("value")
        .agg(pl.col("_hidden").any().alias("_group_hidden"))
    )
    counts = counts.join(hidden_in_groups, on="value", how="left").with_columns(
        pl.when(pl.col("_group") == "Overall")
        .then(
            pl.col("_hidden") | (pl.col("_group_hidden").fill_null(False) & (pl.col("_count") > 0))
        )
        .otherwise(pl.col("_hidden"))
        .alias("_primary")
    )
    counts = _complementary(counts.drop("_hidden", "_group_hidden"))
    percent = pl.col("_count") / pl.col("_n") * 100
    text = (
        pl.when(_is_small(pl.col("_count"), rule) & pl.col("_hidden"))
        .then(pl.lit(suppression_label(rule)))
        .when(pl.col("_hidden"))
        .then(pl.lit(_COMPLEMENTARY_LABEL))
        .otherwise(
            pl.concat_str(
                [
                    pl.col("_count").cast(pl.String),
                    pl.lit(" ("),
                    _format_fixed(percent, rule.decimals),
                    pl.lit("%)"),
                ]
            )
        )
    )
    return counts.select(
        pl.lit(characteristic).alias("characteristic"),
        pl.lit("n (%)").alias("statistic"),
        pl.col("value").alias("level"),
        "_group",
        text.alias("text"),
        pl.lit(order).alias("_order"),
        "_level_order",
    )
