"""Tables of model results: events and hazard ratios per endpoint, incidence-rate comparisons,
and the slope-model contrasts.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence

import polars as pl

from kidneycohort._frames import FrameLike
from kidneycohort.errors import ConvergenceError, InputDataError, did_you_mean
from kidneycohort.models._design import with_group
from kidneycohort.models.mixed import SlopeModel
from kidneycohort.models.rates import incidence_rates
from kidneycohort.models.survival import CoxModel
from kidneycohort.tables._format import (
    _DASH,
    TableRule,
    _count_text,
    _format_fixed,
    _interval,
    _is_small,
    _p_text,
    suppression_label,
)

__all__ = ["endpoint_table", "rate_comparison_table", "slope_table"]

logger = logging.getLogger(__name__)


def endpoint_table(
    endpoints: FrameLike,
    patients: FrameLike | None = None,
    *,
    group_column: str = "group",
    reference_group: str | None = None,
    covariates: Sequence[str] = (),
    strata: Sequence[str] = (),
    endpoint: str | Sequence[str] | None = None,
    rule: TableRule | None = None,
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
    rule = rule or TableRule()
    frame = with_group(endpoints, patients, group_column)
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
    hide_events = _is_small(pl.col("events"), rule) | _is_small(pl.col("n_patients"), rule)
    percent = pl.col("events") / pl.col("n_patients") * 100
    return table.sort("endpoint", pl.col("group") != reference, "group").select(
        "endpoint",
        "group",
        _count_text(pl.col("n_patients"), rule).alias("n_patients"),
        pl.when(hide_events)
        .then(_count_text(pl.col("events"), rule, hide=hide_events & (pl.col("events") > 0)))
        .otherwise(
            pl.concat_str(
                [
                    _count_text(pl.col("events"), rule),
                    pl.lit(" ("),
                    _format_fixed(percent, rule.decimals),
                    pl.lit("%)"),
                ]
            )
        )
        .alias("events"),
        _format_fixed(pl.col("person_years"), rule.decimals).alias("person_years"),
        pl.when(hide_events & (pl.col("events") > 0))
        .then(pl.lit(suppression_label(rule)))
        .otherwise(
            _interval(
                pl.col("rate_per_100py"), pl.col("lower"), pl.col("upper"), rule.estimate_decimals
            )
        )
        .alias("rate_per_100py"),
        pl.when(pl.col("group") == reference)
        .then(pl.lit("reference"))
        .when(pl.col("hr").is_null())
        .then(pl.lit(_DASH))
        .otherwise(
            _interval(pl.col("hr"), pl.col("hr_lower"), pl.col("hr_upper"), rule.estimate_decimals)
        )
        .alias("hazard_ratio"),
        pl.when(pl.col("group") == reference)
        .then(pl.lit(""))
        .otherwise(_p_text(pl.col("p"), rule))
        .alias("p"),
    )


def slope_table(model: SlopeModel, *, rule: TableRule | None = None) -> pl.DataFrame:
    """Slope table of a fitted :class:`~kidneycohort.models.mixed.SlopeModel`: per group
    and per difference, acute change, chronic and total slopes with SE, 95 % CI and p.

    Returns
    -------
    polars.DataFrame
        ``contrast, quantity, n_patients, estimate, se, ci_95, p`` as text; ``n_patients``
        is the group's size (both groups' for a difference), small counts suppressed.
    """
    rule = rule or TableRule()
    if not hasattr(model, "group_sizes_"):
        raise InputDataError(
            "slope_table: the model is not fitted; call .fit(egfr, patients) first"
        )
    sizes = dict(model.group_sizes_.select("group", "n_patients").rows())
    summary = model.summary()
    label = suppression_label(rule)

    def size_text(count: int) -> str:
        return label if 1 <= count <= rule.small_cell_threshold else str(count)

    size_by_contrast = {g: size_text(n) for g, n in sizes.items()}
    for group in model.groups_[1:]:
        size_by_contrast[f"{group} - {model.reference_group_}"] = (
            f"{size_text(sizes[group])} vs {size_text(sizes[model.reference_group_])}"
        )
    d = rule.estimate_decimals
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
        _p_text(pl.col("p"), rule).alias("p"),
    )


def rate_comparison_table(
    endpoints: FrameLike,
    patients: FrameLike | None = None,
    *,
    group_column: str = "group",
    reference_group: str | None = None,
    confidence: float = 0.95,
    rule: TableRule | None = None,
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

    rule = rule or TableRule()
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
    small = _is_small(pl.col("events"), rule)
    reference_small = (
        (small & (pl.col("group") == reference)).any().over("endpoint")
        if reference is not None
        else pl.lit(False)
    )
    label = pl.lit(suppression_label(rule))
    d = rule.estimate_decimals
    is_reference = pl.col("group") == reference
    comparison_hidden = small | reference_small
    return table.sort(key).select(
        "endpoint",
        "group",
        _count_text(pl.col("events"), rule).alias("events"),
        _format_fixed(pl.col("person_years"), rule.decimals).alias("person_years"),
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
