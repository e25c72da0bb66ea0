"""Tables of model results: events and hazard ratios per endpoint, incidence-rate comparisons,
and the slope-model contrasts.
"""

from __future__ import annotations

import logging

import polars as pl

from kidneycohort._frames import FrameLike, follows_input
from kidneycohort.disclosure import CountLedger, SharedDisclosure, protect_part
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.models.mixed import SlopeModel
from kidneycohort.models.rates import incidence_rates
from kidneycohort.tables._format import (
    _DASH,
    TableRule,
    _format_fixed,
    _interval,
    _p_text,
    suppression_label,
)

__all__ = ["rate_comparison_table", "slope_table"]

logger = logging.getLogger(__name__)


@follows_input
def slope_table(
    model: SlopeModel,
    *,
    rule: TableRule | None = None,
    disclosure: SharedDisclosure | None = None,
) -> pl.DataFrame:
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
    # a group's patients in the model: the baseline table's N when it is the same count
    # (a different count is kept apart by the shared protection)
    ledger = CountLedger(threshold=rule.small_cell_threshold)
    for group, count in sizes.items():
        ledger.add(("N", "", group), int(count))
    display = protect_part(ledger, disclosure, "slope_table")

    def size_text(group: str) -> str:
        return display(("N", "", group))

    size_by_contrast = {g: size_text(g) for g in sizes}
    for group in model.groups_[1:]:
        size_by_contrast[f"{group} - {model.reference_group_}"] = (
            f"{size_text(group)} vs {size_text(model.reference_group_)}"
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


@follows_input
def rate_comparison_table(
    endpoints: FrameLike,
    patients: FrameLike | None = None,
    *,
    group_column: str = "group",
    reference_group: str | None = None,
    confidence: float = 0.95,
    rule: TableRule | None = None,
    disclosure: SharedDisclosure | None = None,
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

    Small-cell protection (:mod:`kidneycohort.disclosure`; ``disclosure`` to protect the
    table together with the endpoint table, whose event counts are the same): an event
    count from 1 to the threshold is shown as the suppression label, a count hidden to
    protect another as ``"*"``, and so is every figure that would reveal it given the
    printed person-years — the group's rate, and the ratio and difference of any comparison
    that involves a suppressed count (in either group).

    Returns
    -------
    polars.DataFrame
        ``endpoint, group, events, person_years, rate_per_100py, rate_ratio,
        rate_difference_per_100py`` as text.
    """
    from kidneycohort.models.rates import rate_difference, rate_ratio

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
    # events are the same counts as the endpoint table's (key ("events", endpoint, group))
    ledger = CountLedger(threshold=rule.small_cell_threshold)
    keys = [("events", e, g) for e, g in table.select("endpoint", "group").rows()]
    for name, n in zip(keys, table["events"].to_list(), strict=True):
        ledger.add(name, int(n))
    display = protect_part(ledger, disclosure, "rate_comparison_table")
    texts = [display(name) for name in keys]
    table = table.with_columns(pl.Series("_events_text", texts, dtype=pl.String))
    small = ~pl.col("_events_text").str.contains(r"^\d+$")
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
        pl.col("_events_text").alias("events"),
        _format_fixed(pl.col("person_years"), rule.decimals).alias("person_years"),
        pl.when(small)
        .then(pl.col("_events_text"))
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
        .when(
            pl.col("rd").is_null()
            | pl.col("rd").is_nan()
            | pl.col("rd_lower").is_null()
            | pl.col("rd_upper").is_null()
        )
        .then(pl.lit(_DASH))
        .otherwise(_interval(pl.col("rd"), pl.col("rd_lower"), pl.col("rd_upper"), d))
        .alias("rate_difference_per_100py"),
    )
