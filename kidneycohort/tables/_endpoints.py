"""The endpoint table: patients, events, person-years, rates and hazard ratios per endpoint
and group, with an overall row, small counts protected and non-estimable ratios marked."""

from __future__ import annotations

from collections.abc import Sequence

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, to_polars
from kidneycohort.disclosure import CountLedger, SharedDisclosure, protect_part
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.models._design import WHOLE_COHORT, with_group
from kidneycohort.models.rates import incidence_rates
from kidneycohort.models.survival import SurvivalRule, estimability_note, hazard_ratio_table
from kidneycohort.tables._format import (
    _DASH,
    OVERALL,
    TableRule,
    _format_fixed,
    _interval,
    _p_text,
)

__all__ = ["NOT_ESTIMABLE", "endpoint_table"]

_RATIO_COLUMNS = {
    "endpoint": pl.String,
    "group": pl.String,
    "hr": pl.Float64,
    "hr_lower": pl.Float64,
    "hr_upper": pl.Float64,
    "p": pl.Float64,
    "estimable": pl.Boolean,
    "reason": pl.String,
}

NOT_ESTIMABLE = "NE"
"""Text of a hazard ratio that is not estimable (the reason is in the row's ``note``)."""


def _group_hazard_ratios(
    hazard_ratios: FrameLike, group_column: str, endpoints: list[str]
) -> pl.DataFrame:
    """The whole-cohort group terms of a ``models/hazard_ratios`` table, by group."""
    ratios = to_polars(hazard_ratios, "hazard_ratios")
    prefix = f"{group_column}="
    if "subgroup" in ratios.columns:
        ratios = ratios.filter(pl.col("subgroup").is_null())
    ratios = ratios.filter(
        pl.col("term").str.starts_with(prefix) & pl.col("endpoint").is_in(endpoints)
    )
    if "estimable" not in ratios.columns:  # a table written before the estimability rule
        ratios = ratios.with_columns(
            (pl.col("hr").is_finite() & pl.col("hr_upper").is_finite()).alias("estimable"),
            pl.lit(None, dtype=pl.String).alias("reason"),
        )
    return ratios.select(
        "endpoint",
        pl.col("term").str.slice(len(prefix)).alias("group"),
        "hr",
        "hr_lower",
        "hr_upper",
        "p",
        "estimable",
        "reason",
    )


def _ledger(
    counts: pl.DataFrame, groups: list[str], sizes: dict[str, int], threshold: int
) -> CountLedger:
    """Patients and events per endpoint and group; groups add up to the overall row. A
    group's patients equal to its size in the patients table is the same count as the
    baseline table's N (key ``("N", "", group)``)."""
    ledger = CountLedger(threshold=threshold)
    for name, group, n, events in counts.select("endpoint", "group", "n_patients", "events").rows():
        same_as_n = sizes.get(group) == n
        ledger.add(_patients_key(name, group, same_as_n), n)
        ledger.add(("events", name, group), events)
    if len(groups) > 1:
        for name in counts["endpoint"].unique().to_list():
            rows = counts.filter(pl.col("endpoint") == name)
            by_group = dict(zip(rows["group"], rows["n_patients"], strict=True))
            members = [_patients_key(name, g, sizes.get(g) == by_group[g]) for g in groups]
            total = _patients_key(name, OVERALL, sizes.get(OVERALL) == by_group[OVERALL])
            ledger.relate(members, total)
            ledger.relate([("events", name, g) for g in groups], ("events", name, OVERALL))
    return ledger


def _patients_key(name: str, group: str, same_as_n: bool) -> tuple[str, str, str]:
    return ("N", "", group) if same_as_n else ("patients", name, group)


@follows_input
def endpoint_table(
    endpoints: FrameLike,
    patients: FrameLike | None = None,
    *,
    group_column: str | None = "group",
    reference_group: str | None = None,
    covariates: Sequence[str] = (),
    strata: Sequence[str] = (),
    endpoint: str | Sequence[str] | None = None,
    hazard_ratios: FrameLike | None = None,
    rule: TableRule | None = None,
    disclosure: SharedDisclosure | None = None,
) -> pl.DataFrame:
    r"""Endpoint table: per endpoint and group (and overall), N, events n (%),
    person-years, rate per 100 person-years (exact 95 % CI), hazard ratio (95 % CI), p.

    .. math::

        \%\ \text{events} = 100\, d / N, \qquad \text{rate} = 100\, d / PY

    Rates are those of :func:`kidneycohort.models.rates.incidence_rates`. Hazard ratios
    are the whole-cohort group terms of ``hazard_ratios`` (a ``models/hazard_ratios``
    table, :func:`kidneycohort.models.survival.hazard_ratio_table`); without it they are
    fitted here by that same function (group against ``reference_group``, adjusted for
    ``covariates``, stratified by ``strata``). A ratio that the estimability rule
    (:mod:`kidneycohort.models.survival._estimability`) rejects reads ``"NE"`` and its
    reason is in ``note``.

    Counts of people (patients, events) are protected by :mod:`kidneycohort.disclosure`:
    the groups add up to the overall row; a hidden event count also hides its percentage
    and rate (they would reveal it given N and the person-years); ``disclosure`` protects
    this table together with the other outputs of a run.

    Returns
    -------
    polars.DataFrame
        ``endpoint, group, n_patients, events, person_years, rate_per_100py,
        hazard_ratio, p, note`` as text.
    """
    rule = rule or TableRule()
    frame = with_group(endpoints, patients, group_column)
    rates = incidence_rates(frame, group_column="group", endpoint=endpoint)
    names = rates["endpoint"].unique().sort().to_list()
    frame = frame.filter(pl.col("endpoint").is_in(names))
    groups = sorted(rates["group"].unique().to_list())
    reference = reference_group if reference_group is not None else groups[0]
    if reference not in groups:
        raise InputDataError(
            f"reference_group: '{reference}' is not a value of '{group_column}' (values: "
            f"{groups}){did_you_mean(reference, groups)}"
        )
    if OVERALL in groups:
        raise InputDataError(f"groups: '{OVERALL}' is used as a group name; rename that group")
    counts = _counts_with_overall(frame, rates, groups)
    if hazard_ratios is None and group_column is not None:
        survival = SurvivalRule(
            group_column=group_column,
            reference_group=reference,
            covariates=list(covariates),
            strata=list(strata),
        )
        hazard_ratios = _fit_ratios(endpoints, patients, frame, survival, names)
    table = counts.join(
        _group_hazard_ratios(hazard_ratios, group_column, names)
        if hazard_ratios is not None and group_column is not None
        else pl.DataFrame(schema=_RATIO_COLUMNS),
        on=["endpoint", "group"],
        how="left",
    )
    sizes = _group_sizes(frame)
    display = protect_part(
        _ledger(counts, groups if len(groups) > 1 else [], sizes, rule.small_cell_threshold),
        disclosure,
        "endpoint_table",
    )
    patients_text = [
        display(_patients_key(e, g, sizes.get(g) == n))
        for e, g, n in table.select("endpoint", "group", "n_patients").rows()
    ]
    events_text = [display(("events", e, g)) for e, g in table.select("endpoint", "group").rows()]
    table = table.with_columns(
        pl.Series("_patients_text", patients_text, dtype=pl.String),
        pl.Series("_events_text", events_text, dtype=pl.String),
    )
    return _render(table, reference, rule)


def _fit_ratios(
    endpoints: FrameLike,
    patients: FrameLike | None,
    frame: pl.DataFrame,
    rule: SurvivalRule,
    names: list[str],
) -> pl.DataFrame | None:
    """Hazard ratios fitted here (one code path with the pipeline's), when none are given."""
    if frame["group"].n_unique() < 2:
        return None
    group_column = rule.group_column or "group"
    people = (
        to_polars(patients, "patients")
        if patients is not None
        else frame.select("patient_id", pl.col("group").alias(group_column)).unique("patient_id")
    )
    rows = to_polars(endpoints, "endpoints").filter(pl.col("endpoint").is_in(names))
    if patients is None:
        rows = rows.drop(group_column, strict=False)
    return hazard_ratio_table(rows, people, rule=rule)


def _group_sizes(frame: pl.DataFrame) -> dict[str, int]:
    """Patients per group over all endpoints (and overall): the cohort's group sizes."""
    people = frame.unique("patient_id")
    sizes = dict(people.group_by("group").agg(pl.len().cast(pl.Int64)).iter_rows())
    sizes[OVERALL] = people.height
    return sizes


def _counts_with_overall(
    frame: pl.DataFrame, rates: pl.DataFrame, groups: list[str]
) -> pl.DataFrame:
    counts = frame.group_by("endpoint", "group").agg(pl.len().cast(pl.Int64).alias("n_patients"))
    table = rates.join(counts, on=["endpoint", "group"], how="left").with_columns(
        pl.col("events").cast(pl.Int64)
    )
    if len(groups) > 1 and WHOLE_COHORT not in groups:
        overall = incidence_rates(
            frame.with_columns(pl.lit(OVERALL).alias("group")), group_column="group"
        ).join(
            frame.group_by("endpoint").agg(pl.len().cast(pl.Int64).alias("n_patients")),
            on="endpoint",
        )
        table = pl.concat(
            [table, overall.with_columns(pl.col("events").cast(pl.Int64))],
            how="diagonal_relaxed",
        )
    return table


def _render(table: pl.DataFrame, reference: str, rule: TableRule) -> pl.DataFrame:
    visible_events = pl.col("_events_text").str.contains(r"^\d+$")
    visible_patients = pl.col("_patients_text").str.contains(r"^\d+$")
    percent = _format_fixed(pl.col("events") / pl.col("n_patients") * 100, rule.decimals)
    is_reference = pl.col("group") == reference
    is_overall = pl.col("group") == OVERALL
    not_estimable = pl.col("estimable").is_not_null() & ~pl.col("estimable")
    notes = [estimability_note(r) for r in table["reason"].to_list()]
    order = pl.when(is_overall).then(2).when(is_reference).then(0).otherwise(1)
    return (
        table.with_columns(pl.Series("_note", notes, dtype=pl.String))
        .sort("endpoint", order, "group")
        .select(
            "endpoint",
            "group",
            pl.col("_patients_text").alias("n_patients"),
            pl.when(visible_events & visible_patients)
            .then(pl.concat_str([pl.col("_events_text"), pl.lit(" ("), percent, pl.lit("%)")]))
            .otherwise(pl.col("_events_text"))
            .alias("events"),
            _format_fixed(pl.col("person_years"), rule.decimals).alias("person_years"),
            pl.when(visible_events)
            .then(
                _interval(
                    pl.col("rate_per_100py"),
                    pl.col("lower"),
                    pl.col("upper"),
                    rule.estimate_decimals,
                )
            )
            .otherwise(pl.col("_events_text"))
            .alias("rate_per_100py"),
            pl.when(is_reference)
            .then(pl.lit("reference"))
            .when(is_overall | pl.col("estimable").is_null())
            .then(pl.lit(_DASH))
            .when(not_estimable)
            .then(pl.lit(NOT_ESTIMABLE))
            .otherwise(
                _interval(
                    pl.col("hr"), pl.col("hr_lower"), pl.col("hr_upper"), rule.estimate_decimals
                )
            )
            .alias("hazard_ratio"),
            pl.when(is_reference | is_overall | ~pl.col("estimable").fill_null(False))
            .then(pl.lit(""))
            .otherwise(_p_text(pl.col("p"), rule))
            .alias("p"),
            pl.when(is_reference | is_overall)
            .then(pl.lit(""))
            .otherwise(pl.col("_note"))
            .alias("note"),
        )
    )
