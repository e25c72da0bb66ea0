"""The baseline characteristics table (Table 1) by group."""

from __future__ import annotations

import math
from collections.abc import Sequence

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.ages import age_at_index_expr, has_age
from kidneycohort.disclosure import HIDDEN, CountLedger, SharedDisclosure, protect_part
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES
from kidneycohort.tables._format import (
    _DASH,
    _MISSING_LEVEL,
    OVERALL,
    TableRule,
    _format_fixed,
    _is_small,
    suppression_label,
)
from kidneycohort.tables._kdigo import A_MARGIN, G_MARGIN, _one_row_per_patient

__all__ = ["baseline_characteristics_table"]

Characteristic = tuple[str, pl.DataFrame, str]
"""(name, frame of ``patient_id, value``, kind): kind ``mean``/``median`` for numbers."""
Category = tuple[str, pl.DataFrame, Sequence[str] | None]
"""(name, frame of ``patient_id, value``, known levels in order or None)."""


def _values(people: pl.DataFrame, expr: pl.Expr, dtype: type[pl.DataType]) -> pl.DataFrame:
    return people.select(pl.col("patient_id").cast(pl.String), expr.cast(dtype).alias("value"))


def _patient_rows(people: pl.DataFrame) -> tuple[list[Characteristic], list[Category]]:
    """Age (from the dates when known, else ``age_at_index``) and sex."""
    numeric: list[Characteristic] = []
    categorical: list[Category] = []
    if has_age(people.columns):
        age = age_at_index_expr(people.columns)
        numeric.append(("Age, years", _values(people, age, pl.Float64), "mean"))
    if "sex" in people.columns:
        categorical.append(("Sex", _values(people, pl.col("sex"), pl.String), None))
    return numeric, categorical


def _baseline_rows(baseline: FrameLike) -> list[Characteristic]:
    values = to_polars(baseline, "baseline")
    require_columns(values, ("patient_id", "equation", "baseline_egfr"), "baseline")
    out: list[Characteristic] = []
    for name in sorted(values["equation"].drop_nulls().unique().to_list()):
        part = values.filter(pl.col("equation") == name)
        out.append(
            (
                f"Baseline eGFR ({name}), mL/min/1.73 m²",
                _values(part, pl.col("baseline_egfr"), pl.Float64),
                "mean",
            )
        )
    return out


def _kdigo_rows(
    categories: FrameLike, equation: str | None
) -> tuple[list[Characteristic], list[Category]]:
    kdigo = _one_row_per_patient(to_polars(categories, "categories"), equation)
    numeric: list[Characteristic] = []
    categorical: list[Category] = []
    if "uacr_mg_g" in kdigo.columns:
        numeric.append(("UACR, mg/g", _values(kdigo, pl.col("uacr_mg_g"), pl.Float64), "median"))
    for column, name, levels in (
        ("g_category", G_MARGIN, G_CATEGORIES),
        ("a_category", A_MARGIN, A_CATEGORIES),
    ):
        if column in kdigo.columns:
            categorical.append((name, _values(kdigo, pl.col(column), pl.String), levels))
    return numeric, categorical


def _covariate_rows(
    people: pl.DataFrame, covariates: Sequence[str], rule: TableRule
) -> tuple[list[Characteristic], list[Category]]:
    """Numbers as mean (SD), or median [IQR] when skewed; text and booleans as levels."""
    numeric: list[Characteristic] = []
    categorical: list[Category] = []
    for name in covariates:
        if name not in people.columns:
            raise InputDataError(
                f"patients: covariate '{name}' is not a column{did_you_mean(name, people.columns)}"
            )
        column = people[name]
        if not column.dtype.is_numeric():
            categorical.append((name, _values(people, pl.col(name), pl.String), None))
            continue
        values = column.cast(pl.Float64).drop_nulls()
        skew = values.skew() if values.len() > 2 else 0.0
        skewed = skew is not None and math.isfinite(skew) and abs(skew) > rule.skew_threshold
        numeric.append(
            (name, _values(people, pl.col(name), pl.Float64), "median" if skewed else "mean")
        )
    return numeric, categorical


def _checked_patients(patients: FrameLike, group_column: str | None) -> pl.DataFrame:
    people = to_polars(patients, "patients")
    require_columns(people, ("patient_id",), "patients")
    if group_column is None:
        return people
    require_columns(people, (group_column,), "patients")
    if people["patient_id"].is_duplicated().any():
        raise InputDataError("patients: patient_id values must be unique (one row per patient)")
    if people[group_column].null_count():
        raise InputDataError(
            f"patients: {people[group_column].null_count()} patients have no '{group_column}'; "
            "fill the group or leave those patients out before tabulating"
        )
    return people


def _summary_text(kind: str, decimals: int) -> tuple[pl.Expr, str]:
    """The formatted statistic of a number and its label."""

    def fixed(name: str) -> pl.Expr:
        return _format_fixed(pl.col(name), decimals)

    if kind == "mean":
        return pl.concat_str([fixed("_mean"), pl.lit(" ("), fixed("_sd"), pl.lit(")")]), (
            "mean (SD)"
        )
    text = pl.concat_str(
        [fixed("_median"), pl.lit(" ["), fixed("_q1"), pl.lit(", "), fixed("_q3"), pl.lit("]")]
    )
    return text, "median [IQR]"


def _numeric_rows(
    with_overall: pl.DataFrame,
    sizes: pl.DataFrame,
    item: Characteristic,
    order: int,
    rule: TableRule,
) -> list[pl.DataFrame]:
    """The statistic row of a number, and its missing-values row when any is missing."""
    characteristic, frame, kind = item
    joined = with_overall.join(frame, on="patient_id", how="left")
    value = pl.col("value")
    stats_frame = joined.group_by("_group").agg(
        value.drop_nans().count().alias("_k"),
        value.mean().alias("_mean"),
        value.std().alias("_sd"),
        value.median().alias("_median"),
        value.quantile(0.25, interpolation="linear").alias("_q1"),
        value.quantile(0.75, interpolation="linear").alias("_q3"),
        (value.is_null() | value.is_nan()).sum().alias("_missing"),
    )
    text, statistic = _summary_text(kind, rule.decimals)
    rows = [
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
    ]
    if stats_frame["_missing"].sum() > 0:
        missing = joined.with_columns(
            pl.when(value.is_null() | value.is_nan())
            .then(pl.lit(_MISSING_LEVEL))
            .otherwise(pl.lit("recorded"))
            .alias("value")
        )
        block = _category_counts(
            missing, sizes, characteristic, order + 1, levels=["recorded", _MISSING_LEVEL]
        )
        rows.append(
            block.filter(pl.col("level") == _MISSING_LEVEL).with_columns(_kind=pl.lit("missing"))
        )
    return rows


def _widen(long_rows: list[pl.DataFrame], columns: list[str]) -> pl.DataFrame:
    long = pl.concat(long_rows, how="diagonal_relaxed")
    if "_level_order" not in long.columns:  # no categorical characteristic at all
        long = long.with_columns(pl.lit(0).alias("_level_order"))
    long = long.with_columns(pl.col("_level_order").fill_null(0))
    wide = long.pivot(
        on="_group",
        index=["_order", "_level_order", "characteristic", "statistic", "level"],
        values="text",
    )
    wide = wide.sort("_order", "_level_order").drop("_order", "_level_order")
    for column in columns:
        if column not in wide.columns:
            wide = wide.with_columns(pl.lit(_DASH).alias(column))
    return wide.select("characteristic", "statistic", "level", *columns).with_columns(
        pl.col(columns).fill_null(_DASH)
    )


@follows_input
def baseline_characteristics_table(
    patients: FrameLike,
    baseline: FrameLike | None = None,
    categories: FrameLike | None = None,
    *,
    group_column: str | None = "group",
    covariates: Sequence[str] = (),
    equation: str | None = None,
    rule: TableRule | None = None,
    disclosure: SharedDisclosure | None = None,
) -> pl.DataFrame:
    r"""Baseline characteristics by group (and overall; only overall without a group column).

    Rows: N; age at index (mean (SD); from the birth and index dates where known, else
    ``age_at_index``); sex (n (%)); baseline eGFR of each equation in ``baseline``
    (``schemas.BASELINE``; mean (SD)); UACR (median [IQR], from
    ``categories.uacr_mg_g``); KDIGO G and A categories (n (%), from ``categories``);
    and each of ``covariates``: text and booleans as n (%) per level, numbers as mean (SD)
    or, when :math:`|\text{skewness}|` exceeds ``rule.skew_threshold``, median [IQR].
    Missing values get a ``missing`` level (n (%)). Percentages are of the group's N.

    Counts of people are protected by :mod:`kidneycohort.disclosure` (threshold
    ``rule.small_cell_threshold``); pass ``disclosure`` to protect this table together
    with others shown beside it.

    Returns
    -------
    polars.DataFrame
        ``characteristic, statistic, level``, one text column per group, and ``Overall``.
    """
    rule = rule or TableRule()
    people = _checked_patients(patients, group_column)
    numeric, categorical = _patient_rows(people)
    if baseline is not None:
        numeric += _baseline_rows(baseline)
    if categories is not None:
        more_numeric, more_categorical = _kdigo_rows(categories, equation)
        numeric += more_numeric
        categorical += more_categorical
    more_numeric, more_categorical = _covariate_rows(people, covariates, rule)
    numeric += more_numeric
    categorical += more_categorical

    overall = OVERALL
    if group_column is None:
        with_overall = _values(people, pl.lit(overall), pl.String).rename({"value": "_group"})
        groups: list[str] = []
    else:
        base = _values(people, pl.col(group_column), pl.String).rename({"value": "_group"})
        groups = sorted(base["_group"].unique().to_list())
        if overall in groups:
            raise InputDataError(
                f"patients: '{overall}' is used as a group name; rename that group"
            )
        with_overall = pl.concat([base, base.with_columns(pl.lit(overall).alias("_group"))])
    sizes = with_overall.group_by("_group").agg(pl.len().cast(pl.Int64).alias("_n"))
    long_rows = [
        sizes.select(
            pl.lit("N").alias("characteristic"),
            pl.lit("n").alias("statistic"),
            pl.lit("").alias("level"),
            "_group",
            pl.col("_n").alias("_count"),
            "_n",
            pl.lit(0).alias("_order"),
            pl.lit(0).alias("_level_order"),
            pl.lit("n").alias("_kind"),
        )
    ]
    order = 1
    for item in numeric:
        long_rows += _numeric_rows(with_overall, sizes, item, order, rule)
        order += 2
    for characteristic, frame, levels in categorical:
        joined = with_overall.join(frame, on="patient_id", how="left").with_columns(
            pl.col("value").fill_null(_MISSING_LEVEL)
        )
        block = _category_counts(joined, sizes, characteristic, order, levels=levels)
        long_rows.append(block.with_columns(_kind=pl.lit("category")))
        order += 1
    counts = pl.concat([r for r in long_rows if "_kind" in r.columns], how="diagonal_relaxed")
    texts = [r for r in long_rows if "_kind" not in r.columns]
    return _widen([*texts, _protected_text(counts, groups, rule, disclosure)], [*groups, overall])


def _category_counts(
    joined: pl.DataFrame,
    sizes: pl.DataFrame,
    characteristic: str,
    order: int,
    *,
    levels: Sequence[str] | None,
) -> pl.DataFrame:
    """Patients per level and group (every level x group, zeros included), with N."""
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
    return counts.select(
        pl.lit(characteristic).alias("characteristic"),
        pl.lit("n (%)").alias("statistic"),
        pl.col("value").alias("level"),
        "_group",
        "_count",
        "_n",
        pl.lit(order).alias("_order"),
        "_level_order",
    )


def _ledger(counts: pl.DataFrame, groups: list[str], threshold: int) -> CountLedger:
    """Every printed count of people and how a reader can add them up: the levels of a
    characteristic add up to N in each column, the groups to the Overall column."""
    ledger = CountLedger(threshold=threshold)
    for row in counts.iter_rows(named=True):
        ledger.add((row["characteristic"], row["level"], row["_group"]), row["_count"])
    if groups:
        for (characteristic, level), _ in counts.group_by(
            "characteristic", "level", maintain_order=True
        ):
            members = [(characteristic, level, g) for g in groups]
            ledger.relate(members, (characteristic, level, OVERALL))
    categories = counts.filter(pl.col("_kind") == "category")
    for (characteristic, group), block in categories.group_by(
        "characteristic", "_group", maintain_order=True
    ):
        members = [(characteristic, level, group) for level in block["level"]]
        ledger.relate(members, ("N", "", group))
    return ledger


def _protected_text(
    counts: pl.DataFrame,
    groups: list[str],
    rule: TableRule,
    disclosure: SharedDisclosure | None = None,
) -> pl.DataFrame:
    """The count cells as printed: ``n`` or ``n (%)``, small counts and the counts that
    would reveal them hidden (:mod:`kidneycohort.disclosure`)."""
    display = protect_part(
        _ledger(counts, groups, rule.small_cell_threshold), disclosure, "baseline"
    )
    shown = [
        display(key)
        for key in zip(counts["characteristic"], counts["level"], counts["_group"], strict=True)
    ]
    visible = ~pl.col("_text").is_in([suppression_label(rule), HIDDEN])
    # a percentage of a hidden N would give the N away (count / share)
    n_shown = {g: display(("N", "", g)).isdigit() for g in counts["_group"].unique().to_list()}
    n_visible = pl.col("_group").replace_strict(n_shown, return_dtype=pl.Boolean)
    percent = _format_fixed(pl.col("_count") / pl.col("_n") * 100, rule.decimals)
    text = (
        pl.when(visible & n_visible & (pl.col("_kind") != "n"))
        .then(pl.concat_str([pl.col("_text"), pl.lit(" ("), percent, pl.lit("%)")]))
        .otherwise(pl.col("_text"))
    )
    return counts.with_columns(_text=pl.Series(shown, dtype=pl.String)).select(
        "characteristic",
        "statistic",
        "level",
        "_group",
        text.alias("text"),
        "_order",
        "_level_order",
    )
