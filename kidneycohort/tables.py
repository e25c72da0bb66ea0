"""Trial and cohort tables: endpoints, slopes, baseline characteristics, KDIGO grids.

Every function returns a polars DataFrame ready to print: counts and statistics are
formatted as text, and small cells are protected. A count between 1 and the threshold
(``TableRule.small_cell_threshold``, default 10) is shown as ``"<11"``; a percentage,
rate or sum that would reveal such a count is suppressed with it; and where the other
cells of a category block would give a suppressed cell away by subtraction from the
total, the next smallest cell of the block is suppressed too (secondary suppression,
common practice under data-use agreements). :func:`suppression_footnote` words the
footnote; :func:`write_tables` writes CSV files and one XLSX workbook;
:func:`to_markdown` renders a table for the report.

Inputs of :func:`kdigo_count_grid` and :func:`baseline_characteristics` (argument
``categories``): one row per patient with ``patient_id``, ``g_category`` (``G1`` ...
``G5``, as :mod:`kidneycohort.kdigo` names them), ``a_category`` (``A1`` ... ``A3``),
optionally ``uacr_mg_g`` (baseline UACR in mg/g) and ``equation`` (then pass
``equation=`` when several are present). :func:`transition_matrix` reads the
``schemas.TRANSITIONS`` layout.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from pathlib import Path

import polars as pl
from pydantic import ConfigDict, Field

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort._rules import RuleModel
from kidneycohort.errors import ConvergenceError, InputDataError, did_you_mean
from kidneycohort.kdigo import A_CATEGORIES, G_CATEGORIES
from kidneycohort.models.mixed import SlopeModel
from kidneycohort.models.rates import _with_group, incidence_rates
from kidneycohort.models.survival import CoxModel

logger = logging.getLogger(__name__)

__all__ = [
    "TableRule",
    "baseline_characteristics",
    "endpoint_table",
    "kdigo_count_grid",
    "slope_table",
    "suppress_small_counts",
    "suppression_footnote",
    "suppression_label",
    "to_markdown",
    "transition_matrix",
    "write_tables",
]

_DASH = "–"
_MISSING_LEVEL = "missing"
_COMPLEMENTARY_LABEL = "*"  # hidden so that a suppressed cell cannot be recovered


class TableRule(RuleModel):
    """Options of the output tables (config key ``tables``)."""

    model_config = ConfigDict(frozen=False)

    small_cell_threshold: int = Field(
        10,
        ge=0,
        description="Counts from 1 to this value are shown as '<threshold+1>' (0 turns suppression off).",
    )
    decimals: int = Field(
        1, ge=0, le=6, description="Decimals of means, SDs, medians and percentages."
    )
    estimate_decimals: int = Field(
        2, ge=0, le=6, description="Decimals of rates, slopes and hazard ratios."
    )
    p_decimals: int = Field(
        3, ge=1, le=6, description="Decimals of p values (smaller shown as '<0.001')."
    )
    skew_threshold: float = Field(
        1.0,
        gt=0,
        description="Numeric covariates with |skewness| above this are summarised as median [IQR].",
    )


def suppression_label(spec: TableRule | None = None) -> str:
    """The text shown for a suppressed count, e.g. ``"<11"``."""
    spec = spec or TableRule()
    return f"<{spec.small_cell_threshold + 1}"


def suppression_footnote(spec: TableRule | None = None) -> str:
    """Footnote explaining small-cell suppression, for every aggregate table."""
    spec = spec or TableRule()
    if spec.small_cell_threshold == 0:
        return "No small-cell suppression applied."
    label = suppression_label(spec)
    return (
        f"Counts from 1 to {spec.small_cell_threshold} are shown as '{label}'; percentages and "
        "rates that would reveal them are suppressed, and where a suppressed count could be "
        "recovered from the other counts of its block or from the overall column, further "
        "counts are suppressed too (shown as '*')."
    )


# ---- formatting expressions ------------------------------------------------------------


def _is_small(count: pl.Expr, spec: TableRule) -> pl.Expr:
    return (count >= 1) & (count <= spec.small_cell_threshold)


def _count_text(count: pl.Expr, spec: TableRule, hide: pl.Expr | None = None) -> pl.Expr:
    hidden = _is_small(count, spec) if hide is None else hide
    return (
        pl.when(count.is_null())
        .then(pl.lit(_DASH))
        .when(hidden)
        .then(pl.lit(suppression_label(spec)))
        .otherwise(count.cast(pl.Int64).cast(pl.String))
    )


def _format_fixed(expr: pl.Expr, decimals: int) -> pl.Expr:
    scale = 10**decimals
    rounded = (expr * scale).round(0)
    sign = pl.when(rounded < 0).then(pl.lit("-")).otherwise(pl.lit(""))
    magnitude = rounded.abs().cast(pl.Int64)
    whole = (magnitude // scale).cast(pl.String)
    if decimals == 0:
        text = pl.concat_str([sign, whole])
    else:
        fraction = (magnitude % scale).cast(pl.String).str.zfill(decimals)
        text = pl.concat_str([sign, whole, pl.lit("."), fraction])
    return (
        pl.when(expr.is_null() | expr.is_nan())
        .then(pl.lit(_DASH))
        .when(expr.is_infinite())
        .then(pl.lit("inf"))
        .otherwise(text)
    )


def _p_text(expr: pl.Expr, spec: TableRule) -> pl.Expr:
    floor = 10.0 ** (-spec.p_decimals)
    return (
        pl.when(expr.is_null() | expr.is_nan())
        .then(pl.lit(_DASH))
        .when(expr < floor)
        .then(pl.lit(f"<{floor:.{spec.p_decimals}f}"))
        .otherwise(_format_fixed(expr, spec.p_decimals))
    )


def _interval(estimate: pl.Expr, lower: pl.Expr, upper: pl.Expr, decimals: int) -> pl.Expr:
    return pl.concat_str(
        [
            _format_fixed(estimate, decimals),
            pl.lit(" ("),
            _format_fixed(lower, decimals),
            pl.lit(" to "),
            _format_fixed(upper, decimals),
            pl.lit(")"),
        ]
    )


def suppress_small_counts(
    frame: FrameLike, count_columns: Sequence[str], *, spec: TableRule | None = None
) -> pl.DataFrame:
    """Return ``frame`` with each of ``count_columns`` as text, counts from 1 to the
    threshold replaced by the suppression label (``"<11"``)."""
    spec = spec or TableRule()
    table = to_polars(frame, "table")
    require_columns(table, count_columns, "table")
    return table.with_columns(_count_text(pl.col(c), spec).alias(c) for c in count_columns)


# ---- endpoint table --------------------------------------------------------------------


def endpoint_table(
    endpoints: FrameLike,
    patients: FrameLike | None = None,
    *,
    group_column: str = "group",
    reference_group: str | None = None,
    covariates: Sequence[str] = (),
    strata: Sequence[str] = (),
    endpoint: str | Sequence[str] | None = None,
    spec: TableRule | None = None,
) -> pl.DataFrame:
    r"""Endpoint table: per endpoint and group, N, events n (%), person-years, rate per
    100 person-years (exact 95 % CI), hazard ratio (95 % CI) and p.

    Rates are those of :func:`kidneycohort.models.rates.incidence_rates`; hazard ratios
    come from :class:`kidneycohort.models.survival.CoxModel` per endpoint (group against
    ``reference_group``, adjusted for ``covariates``, stratified by ``strata``). A hazard
    ratio that cannot be estimated (no events) is shown as '–' with the reason logged.

    .. math::

        \%\ \text{events} = 100\, d / N, \qquad \text{rate} = 100\, d / PY

    Returns
    -------
    polars.DataFrame
        ``endpoint, group, n_patients, events, person_years, rate_per_100py,
        hazard_ratio, p`` as text.
    """
    spec = spec or TableRule()
    frame = _with_group(endpoints, patients, group_column)
    rates = incidence_rates(frame, group_column="group", endpoint=endpoint)
    counts = frame.group_by("endpoint", "group").agg(pl.len().cast(pl.Int64).alias("n_patients"))
    table = rates.join(counts, on=["endpoint", "group"], how="left")
    groups = sorted(table["group"].unique().to_list())
    reference = reference_group if reference_group is not None else groups[0]
    if reference not in groups:
        raise InputDataError(
            f"reference_group: '{reference}' is not a value of '{group_column}' (values: "
            f"{groups}){did_you_mean(reference, groups)}"
        )
    hazard_rows = []
    if len(groups) > 1:
        for name in table["endpoint"].unique().sort().to_list():
            model = CoxModel(
                endpoint=name,
                group_column=group_column,
                reference_group=reference,
                covariates=covariates,
                strata=strata,
            )
            try:
                model.fit(frame, patients)
            except ConvergenceError as error:
                logger.warning("endpoint table: no hazard ratio for %s (%s)", name, error)
                continue
            summary = model.summary().filter(pl.col("term").str.starts_with(f"{group_column}="))
            hazard_rows.append(
                summary.select(
                    pl.lit(name).alias("endpoint"),
                    pl.col("term").str.slice(len(group_column) + 1).alias("group"),
                    "hr",
                    "hr_lower",
                    "hr_upper",
                    "p",
                )
            )
    hazards = (
        pl.concat(hazard_rows)
        if hazard_rows
        else pl.DataFrame(
            schema={
                "endpoint": pl.String,
                "group": pl.String,
                "hr": pl.Float64,
                "hr_lower": pl.Float64,
                "hr_upper": pl.Float64,
                "p": pl.Float64,
            }
        )
    )
    table = table.join(hazards, on=["endpoint", "group"], how="left")
    hide_events = _is_small(pl.col("events"), spec) | _is_small(pl.col("n_patients"), spec)
    percent = pl.col("events") / pl.col("n_patients") * 100
    return table.sort("endpoint", pl.col("group") != reference, "group").select(
        "endpoint",
        "group",
        _count_text(pl.col("n_patients"), spec).alias("n_patients"),
        pl.when(hide_events)
        .then(_count_text(pl.col("events"), spec, hide=hide_events & (pl.col("events") > 0)))
        .otherwise(
            pl.concat_str(
                [
                    _count_text(pl.col("events"), spec),
                    pl.lit(" ("),
                    _format_fixed(percent, spec.decimals),
                    pl.lit("%)"),
                ]
            )
        )
        .alias("events"),
        _format_fixed(pl.col("person_years"), spec.decimals).alias("person_years"),
        pl.when(hide_events & (pl.col("events") > 0))
        .then(pl.lit(suppression_label(spec)))
        .otherwise(
            _interval(
                pl.col("rate_per_100py"), pl.col("lower"), pl.col("upper"), spec.estimate_decimals
            )
        )
        .alias("rate_per_100py"),
        pl.when(pl.col("group") == reference)
        .then(pl.lit("reference"))
        .when(pl.col("hr").is_null())
        .then(pl.lit(_DASH))
        .otherwise(
            _interval(pl.col("hr"), pl.col("hr_lower"), pl.col("hr_upper"), spec.estimate_decimals)
        )
        .alias("hazard_ratio"),
        pl.when(pl.col("group") == reference)
        .then(pl.lit(""))
        .otherwise(_p_text(pl.col("p"), spec))
        .alias("p"),
    )


# ---- slope table -----------------------------------------------------------------------


def slope_table(model: SlopeModel, *, spec: TableRule | None = None) -> pl.DataFrame:
    """Slope table of a fitted :class:`~kidneycohort.models.mixed.SlopeModel`: per group
    and per difference, acute change, chronic and total slopes with SE, 95 % CI and p.

    Returns
    -------
    polars.DataFrame
        ``contrast, quantity, n_patients, estimate, se, ci_95, p`` as text; ``n_patients``
        is the group's size (both groups' for a difference), small counts suppressed.
    """
    spec = spec or TableRule()
    if not hasattr(model, "group_sizes_"):
        raise InputDataError(
            "slope_table: the model is not fitted; call .fit(egfr, patients) first"
        )
    sizes = dict(model.group_sizes_.select("group", "n_patients").rows())
    summary = model.summary()
    label = suppression_label(spec)

    def size_text(count: int) -> str:
        return label if 1 <= count <= spec.small_cell_threshold else str(count)

    size_by_contrast = {g: size_text(n) for g, n in sizes.items()}
    for group in model.groups_[1:]:
        size_by_contrast[f"{group} - {model.reference_group_}"] = (
            f"{size_text(sizes[group])} vs {size_text(sizes[model.reference_group_])}"
        )
    d = spec.estimate_decimals
    return summary.select(
        "contrast",
        "quantity",
        pl.col("contrast")
        .replace_strict(size_by_contrast, return_dtype=pl.String)
        .alias("n_patients"),
        _format_fixed(pl.col("estimate"), d).alias("estimate"),
        _format_fixed(pl.col("se"), d).alias("se"),
        pl.concat_str(
            [_format_fixed(pl.col("lower"), d), pl.lit(" to "), _format_fixed(pl.col("upper"), d)]
        ).alias("ci_95"),
        _p_text(pl.col("p"), spec).alias("p"),
    )


# ---- baseline characteristics ---------------------------------------------------------


def _age(people: pl.DataFrame) -> pl.Expr | None:
    if "age_at_index" in people.columns:
        return pl.col("age_at_index").cast(pl.Float64)
    if "birth_date" in people.columns and "index_date" in people.columns:
        return (
            pl.col("index_date").cast(pl.Date) - pl.col("birth_date").cast(pl.Date)
        ).dt.total_days() / 365.25
    return None


def baseline_characteristics(
    patients: FrameLike,
    baseline: FrameLike | None = None,
    categories: FrameLike | None = None,
    *,
    group_column: str = "group",
    covariates: Sequence[str] = (),
    equation: str | None = None,
    spec: TableRule | None = None,
) -> pl.DataFrame:
    r"""Baseline characteristics by group (and overall).

    Rows: N; age (mean (SD)); sex (n (%)); baseline eGFR of each equation in
    ``baseline`` (``schemas.BASELINE``; mean (SD)); UACR (median [IQR], from
    ``categories.uacr_mg_g``); KDIGO G and A categories (n (%), from ``categories``);
    and each of ``covariates``: text and booleans as n (%) per level, numbers as mean (SD)
    or, when :math:`|\text{skewness}|` exceeds ``spec.skew_threshold``, median [IQR].
    Missing values get a ``missing`` level (n (%)). Percentages are of the group's N.

    Returns
    -------
    polars.DataFrame
        ``characteristic, statistic, level``, one text column per group, and ``Overall``.
    """
    spec = spec or TableRule()
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
                if skew is not None and math.isfinite(skew) and abs(skew) > spec.skew_threshold
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
            _count_text(pl.col("_n"), spec).alias("text"),
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
        d = spec.decimals
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
                .when(_is_small(pl.col("_k"), spec))
                .then(pl.lit(f"n {suppression_label(spec)}"))
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
                    spec,
                    levels=["recorded", _MISSING_LEVEL],
                ).filter(pl.col("level") == _MISSING_LEVEL)
            )
            order += 1
    for characteristic, frame, levels in categorical:
        joined = with_overall.join(frame, on="patient_id", how="left").with_columns(
            pl.col("value").fill_null(_MISSING_LEVEL)
        )
        long_rows.append(_category_block(joined, sizes, characteristic, order, spec, levels=levels))
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
    spec: TableRule,
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
            _is_small(pl.col("_count"), spec)
            | (_is_small(pl.col("_n"), spec) & (pl.col("_count") > 0))
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
        pl.when(_is_small(pl.col("_count"), spec) & pl.col("_hidden"))
        .then(pl.lit(suppression_label(spec)))
        .when(pl.col("_hidden"))
        .then(pl.lit(_COMPLEMENTARY_LABEL))
        .otherwise(
            pl.concat_str(
                [
                    pl.col("_count").cast(pl.String),
                    pl.lit(" ("),
                    _format_fixed(percent, spec.decimals),
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


def _complementary(counts: pl.DataFrame) -> pl.DataFrame:
    """Add ``_hidden``: ``_primary`` cells plus, in a group's block with exactly one
    hidden cell (recoverable as N minus the others), its smallest other non-zero cell."""
    block = pl.col("_group")
    candidate = pl.when(~pl.col("_primary") & (pl.col("_count") > 0)).then(
        pl.col("_count") * 10_000 + pl.col("_level_order")
    )
    return (
        counts.with_columns(
            pl.col("_primary").sum().over(block).alias("_n_hidden"), candidate.alias("_candidate")
        )
        .with_columns(
            (
                pl.col("_primary")
                | (
                    (pl.col("_n_hidden") == 1)
                    & pl.col("_candidate").is_not_null()
                    & (pl.col("_candidate") == pl.col("_candidate").min().over(block))
                )
            ).alias("_hidden")
        )
        .drop("_n_hidden", "_candidate")
    )


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


# ---- KDIGO grid and transitions ------------------------------------------------------


def kdigo_count_grid(
    categories: FrameLike, *, equation: str | None = None, spec: TableRule | None = None
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
    spec = spec or TableRule()
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
        pl.when(_is_small(pl.col("n"), spec)).then(None).otherwise(pl.col("n")).alias("n"),
        _count_text(pl.col("n"), spec).alias("n_display"),
    )


def transition_matrix(
    transitions: FrameLike,
    *,
    axis: str = "G",
    equation: str | None = None,
    spec: TableRule | None = None,
) -> pl.DataFrame:
    """Counts of category transitions (``schemas.TRANSITIONS`` rows) on one axis.

    Returns
    -------
    polars.DataFrame
        ``from_category, to_category, n, n_patients, n_display``: every ordered pair of
        distinct categories of the axis (zeros included); ``n`` counts transitions,
        ``n_patients`` patients with at least one; both null where suppressed.
    """
    spec = spec or TableRule()
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
    hidden = _is_small(pl.col("n"), spec) | _is_small(pl.col("n_patients"), spec)
    return counted.select(
        "from_category",
        "to_category",
        pl.when(hidden).then(None).otherwise(pl.col("n")).alias("n"),
        pl.when(hidden).then(None).otherwise(pl.col("n_patients")).alias("n_patients"),
        _count_text(pl.col("n"), spec, hide=hidden).alias("n_display"),
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


# ---- output ----------------------------------------------------------------------------

_SHEET_FORBIDDEN = set("[]:*?/\\")


def write_tables(
    tables: Mapping[str, pl.DataFrame],
    folder: str | Path,
    *,
    notes: Mapping[str, Sequence[str]] | None = None,
    workbook_name: str = "tables.xlsx",
) -> dict[str, Path]:
    """Write each table as ``<name>.csv`` and all of them into one XLSX workbook with a
    sheet per table (polars ``write_excel``); notes (footnotes) go under each sheet's
    table and into ``<name>.notes.txt`` beside the CSV.

    Returns
    -------
    dict
        Table name (and ``"workbook"``) -> path written.
    """
    import xlsxwriter

    target = Path(folder)
    target.mkdir(parents=True, exist_ok=True)
    notes = notes or {}
    written: dict[str, Path] = {}
    for name in tables:
        if not name or len(name) > 31 or set(name) & _SHEET_FORBIDDEN:
            raise InputDataError(
                f"write_tables: table name {name!r} cannot name a sheet; use 1-31 characters "
                "without []:*?/\\"
            )
    for name in notes:
        if name not in tables:
            raise InputDataError(
                f"write_tables: notes for unknown table '{name}'{did_you_mean(name, tables)}"
            )
    workbook_path = target / workbook_name
    with xlsxwriter.Workbook(str(workbook_path)) as workbook:
        for name, table in tables.items():
            frame = to_polars(table, name)
            csv_path = target / f"{name}.csv"
            frame.write_csv(csv_path)
            written[name] = csv_path
            frame.write_excel(workbook=workbook, worksheet=name, autofit=True)
            lines = list(notes.get(name, ()))
            if lines:
                (target / f"{name}.notes.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
                sheet = workbook.get_worksheet_by_name(name)
                for offset, line in enumerate(lines):
                    sheet.write_string(frame.height + 2 + offset, 0, line)
    written["workbook"] = workbook_path
    logger.info("wrote %d tables to %s", len(tables), target)
    return written


def to_markdown(table: FrameLike, *, notes: Sequence[str] = (), float_decimals: int = 2) -> str:
    """Render a table as a Markdown pipe table (floats to ``float_decimals``), notes below."""
    frame = to_polars(table, "table")
    shown = frame.with_columns(
        _format_fixed(pl.col(c), float_decimals).alias(c)
        for c, t in frame.schema.items()
        if t.is_float()
    ).with_columns(
        pl.all().cast(pl.String).fill_null(_DASH).str.replace_all("|", r"\|", literal=True)
    )
    header = "| " + " | ".join(c.replace("|", r"\|") for c in shown.columns) + " |"
    rule = "| " + " | ".join("---" for _ in shown.columns) + " |"
    body_rows = shown.select(
        pl.concat_str([pl.lit("| "), pl.concat_str(pl.all(), separator=" | "), pl.lit(" |")]).alias(
            "line"
        )
    )["line"].to_list()
    lines = [header, rule, *body_rows]
    if notes:
        lines.append("")
        lines.extend(f"{note}" for note in notes)
    return "\n".join(lines) + "\n"


# ---- incidence-rate comparison table ---------------------------------------------------


def rate_comparison_table(
    endpoints: FrameLike,
    patients: FrameLike | None = None,
    *,
    group_column: str = "group",
    reference_group: str | None = None,
    confidence: float = 0.95,
    spec: TableRule | None = None,
) -> pl.DataFrame:
    r"""Incidence rates per 100 person-years with rate ratios and differences, for sharing.

    Per endpoint and group: events, person-years, rate (exact Poisson CI), and against
    ``reference_group`` the rate ratio (exact conditional CI) and the rate difference per
    100 person-years (Wald CI), from :func:`kidneycohort.models.rates.incidence_rates`,
    :func:`~kidneycohort.models.rates.rate_ratio` and
    :func:`~kidneycohort.models.rates.rate_difference`:

    .. math::

        \text{rate} = 100\,d/PY, \qquad RR = \frac{d_1/PY_1}{d_0/PY_0}, \qquad
        RD = 100\left(\frac{d_1}{PY_1} - \frac{d_0}{PY_0}\right)

    Small-cell protection: an event count from 1 to the threshold is shown as the
    suppression label, and so is every figure that would reveal it given the printed
    person-years — the group's rate, and the ratio and difference of any comparison
    that involves a suppressed count (in either group).

    Returns
    -------
    polars.DataFrame
        ``endpoint, group, events, person_years, rate_per_100py, rate_ratio,
        rate_difference_per_100py`` as text.
    """
    from kidneycohort.models.rates import incidence_rates, rate_difference, rate_ratio

    spec = spec or TableRule()
    rates = incidence_rates(endpoints, patients, group_column=group_column, confidence=confidence)
    groups = sorted(rates["group"].drop_nulls().unique().to_list())
    reference = reference_group if reference_group is not None else (groups[0] if groups else None)
    if reference is not None and reference not in groups:
        raise InputDataError(
            f"rate table: reference_group '{reference}' is not a group of '{group_column}'"
            f"{did_you_mean(reference, groups)}"
        )
    key = ["endpoint", "group"]
    table = rates
    if reference is not None and len(groups) > 1:
        ratio = rate_ratio(rates, reference_group=reference, confidence=confidence).select(
            *key,
            pl.col("rate_ratio"),
            pl.col("lower").alias("rr_lower"),
            pl.col("upper").alias("rr_upper"),
        )
        diff = rate_difference(rates, reference_group=reference, confidence=confidence).select(
            *key,
            pl.col("rate_difference_per_100py").alias("rd"),
            pl.col("lower").alias("rd_lower"),
            pl.col("upper").alias("rd_upper"),
        )
        table = table.join(ratio, on=key, how="left").join(diff, on=key, how="left")
    else:
        table = table.with_columns(
            pl.lit(None, dtype=pl.Float64).alias(c)
            for c in ("rate_ratio", "rr_lower", "rr_upper", "rd", "rd_lower", "rd_upper")
        )
    small = _is_small(pl.col("events"), spec)
    reference_small = (
        (small & (pl.col("group") == reference)).any().over("endpoint")
        if reference is not None
        else pl.lit(False)
    )
    label = pl.lit(suppression_label(spec))
    d = spec.estimate_decimals
    is_reference = pl.col("group") == reference
    comparison_hidden = small | reference_small
    return table.sort(key).select(
        "endpoint",
        "group",
        _count_text(pl.col("events"), spec).alias("events"),
        _format_fixed(pl.col("person_years"), spec.decimals).alias("person_years"),
        pl.when(small)
        .then(label)
        .otherwise(_interval(pl.col("rate_per_100py"), pl.col("lower"), pl.col("upper"), d))
        .alias("rate_per_100py"),
        pl.when(is_reference)
        .then(pl.lit("reference"))
        .when(comparison_hidden)
        .then(label)
        .when(pl.col("rate_ratio").is_null() | pl.col("rate_ratio").is_nan())
        .then(pl.lit(_DASH))
        .otherwise(_interval(pl.col("rate_ratio"), pl.col("rr_lower"), pl.col("rr_upper"), d))
        .alias("rate_ratio"),
        pl.when(is_reference)
        .then(pl.lit("reference"))
        .when(comparison_hidden)
        .then(label)
        .when(pl.col("rd").is_null() | pl.col("rd").is_nan())
        .then(pl.lit(_DASH))
        .otherwise(_interval(pl.col("rd"), pl.col("rd_lower"), pl.col("rd_upper"), d))
        .alias("rate_difference_per_100py"),
    )
