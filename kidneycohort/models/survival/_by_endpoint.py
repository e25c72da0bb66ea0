"""Survival analyses of every endpoint of a time-to-event table at once.

The endpoints table holds one row per patient per endpoint; a study reports curves and
hazard ratios for each endpoint, and hazard ratios within subgroups (the levels of a
patients column, e.g. sex or diabetes status) beside the overall one. These functions
run the single-endpoint models of this package over every evaluable endpoint and stack
their results into the layouts the run folder stores (``models/survival_curves``,
``models/at_risk``, ``models/hazard_ratios``).

An endpoint whose model cannot be estimated (no events, no convergence) is reported with
a :class:`~kidneycohort.errors.StatisticalWarning` and left out of the stacked table; it
never stops the others.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from typing import Any, TypeVar

import polars as pl

from kidneycohort._frames import FrameLike, conform, follows_input, to_polars
from kidneycohort._rules import resolve_rules
from kidneycohort.errors import ConfigError, ConvergenceError, StatisticalWarning, did_you_mean
from kidneycohort.models.survival._cox import CoxModel
from kidneycohort.models.survival._curves import CumulativeIncidence, KaplanMeier
from kidneycohort.models.survival._rule import SurvivalRule
from kidneycohort.schemas import AT_RISK, HAZARD_RATIOS, SURVIVAL_CURVES

__all__ = [
    "evaluable_rows",
    "hazard_ratio_table",
    "survival_curves_by_endpoint",
]

Fitted = TypeVar("Fitted")


def evaluable_rows(endpoints: FrameLike) -> pl.DataFrame:
    """The rows a survival model can use: those with an event indicator.

    Not-evaluable patients (null ``event``, with a reason code) are counted in the
    endpoint table but carry no follow-up time for an estimator.
    """
    return to_polars(endpoints, "endpoints").filter(pl.col("event").is_not_null())


def _cox_fit(
    rule: SurvivalRule, rows: pl.DataFrame, patients: pl.DataFrame, endpoint: str
) -> CoxModel:
    return CoxModel(rule, endpoint=endpoint).fit(rows, patients)


def _fit_each_endpoint(
    rows: pl.DataFrame, fit: Callable[[str], Fitted], what: str
) -> list[tuple[str, Fitted]]:
    """``fit(endpoint)`` for every endpoint of ``rows``; one that cannot be estimated warns."""
    out = []
    for name in sorted(rows["endpoint"].unique().to_list()):
        try:
            out.append((name, fit(name)))
        except ConvergenceError as exc:  # e.g. no events: reported, not fatal
            warnings.warn(
                f"{what} of endpoint '{name}' not estimated: {exc}",
                StatisticalWarning,
                stacklevel=3,
            )
    return out


@follows_input
def survival_curves_by_endpoint(
    endpoints: FrameLike,
    patients: FrameLike | None = None,
    *,
    competing: bool = False,
    rule: SurvivalRule | None = None,
    **options: Any,
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Curves and numbers at risk of every endpoint, by group.

    Parameters
    ----------
    endpoints
        The time-to-event table (:data:`~kidneycohort.schemas.ENDPOINTS`).
    patients
        The patients table, for the group column when ``endpoints`` lacks it.
    competing
        ``False``: Kaplan–Meier survival free of the endpoint (:class:`KaplanMeier`);
        ``True``: Aalen–Johansen cumulative incidence with death competing
        (:class:`CumulativeIncidence`).
    rule
        :class:`SurvivalRule`; keyword ``options`` override its fields.

    Returns
    -------
    tuple of polars.DataFrame
        Curves (:data:`~kidneycohort.schemas.SURVIVAL_CURVES`) and numbers at risk
        (:data:`~kidneycohort.schemas.AT_RISK`).
    """
    resolved = resolve_rules(SurvivalRule, rule, options, "survival_curves_by_endpoint")
    estimator = CumulativeIncidence if competing else KaplanMeier
    rows = evaluable_rows(endpoints)
    fits = _fit_each_endpoint(
        rows,
        lambda name: estimator(resolved, endpoint=name).fit(rows, patients),
        estimator.__name__,
    )
    curves = [f.curves_.select(pl.lit(n).alias("endpoint"), pl.all()) for n, f in fits]
    at_risk = [f.at_risk_.select(pl.lit(n).alias("endpoint"), pl.all()) for n, f in fits]
    return (
        pl.concat(curves) if curves else pl.DataFrame(schema=SURVIVAL_CURVES),
        pl.concat(at_risk) if at_risk else pl.DataFrame(schema=AT_RISK),
    )


def _hazard_rows(name: str, fit: CoxModel, subgroup: str | None) -> pl.DataFrame:
    """One endpoint's hazard ratios with the proportional-hazards p, in HAZARD_RATIOS."""
    ph = fit.ph_test_.select("term", pl.col("p").alias("ph_p"))
    return (
        fit.summary()
        .join(ph, on="term", how="left", maintain_order="left")
        .select(
            pl.lit(name).alias("endpoint"),
            "term",
            pl.lit(subgroup, dtype=pl.String).alias("subgroup"),
            "hr",
            "hr_lower",
            "hr_upper",
            "p",
            pl.when(pl.col("estimable")).then(pl.col("ph_p")).alias("ph_p"),
            "events",
            "reference_events",
            "estimable",
            "reason",
        )
    )


def _unfitted_rows(
    name: str, rows: pl.DataFrame, cohort: pl.DataFrame, rule: SurvivalRule, subgroup: str | None
) -> pl.DataFrame:
    """Group terms of an endpoint whose Cox model could not be fitted at all (no events,
    or no convergence), as not-estimable rows, so that they are reported, not left out."""
    column = rule.group_column
    if column is None or column not in cohort.columns:
        return pl.DataFrame(schema=HAZARD_RATIOS)
    events = (
        cohort.select("patient_id", pl.col(column).cast(pl.String).alias("_group"))
        .join(rows.filter(pl.col("endpoint") == name), on="patient_id", how="inner")
        .group_by("_group")
        .agg(pl.col("event").cast(pl.Int64).sum().alias("events"))
    )
    levels = sorted(events["_group"].drop_nulls().to_list())
    if len(levels) < 2:
        return pl.DataFrame(schema=HAZARD_RATIOS)
    reference = rule.reference_group if rule.reference_group in levels else levels[0]
    by_level = dict(events.iter_rows())
    none = by_level[reference] == 0 and all(n == 0 for n in by_level.values())
    return pl.DataFrame(
        {
            "endpoint": name,
            "term": [f"{column}={g}" for g in levels if g != reference],
            "subgroup": subgroup,
            "events": [by_level[g] for g in levels if g != reference],
            "reference_events": by_level[reference],
            "estimable": False,
            "reason": "no_events" if none else "did_not_converge",
        },
        schema_overrides={"subgroup": pl.String},
    ).pipe(conform, HAZARD_RATIOS)


def _fit_or_report(
    rows: pl.DataFrame, cohort: pl.DataFrame, rule: SurvivalRule, subgroup: str | None
) -> list[pl.DataFrame]:
    """Hazard-ratio rows of every endpoint of ``rows``: fitted, or reported not estimable."""
    parts = []
    for name in sorted(rows["endpoint"].unique().to_list()):
        try:
            fit = CoxModel(rule, endpoint=name).fit(rows, cohort)
        except ConvergenceError as exc:  # e.g. no events: reported, not fatal
            where = f" in subgroup {subgroup}" if subgroup else ""
            warnings.warn(
                f"Cox model of endpoint '{name}'{where} not estimated: {exc}",
                StatisticalWarning,
                stacklevel=3,
            )
            parts.append(_unfitted_rows(name, rows, cohort, rule, subgroup))
            continue
        parts.append(_hazard_rows(name, fit, subgroup))
    return parts


@follows_input
def hazard_ratio_table(
    endpoints: FrameLike,
    patients: FrameLike,
    *,
    rule: SurvivalRule | None = None,
    **options: Any,
) -> pl.DataFrame:
    """Cox hazard ratios of every endpoint, overall and within each subgroup level.

    For each endpoint the Cox model of :class:`CoxModel` (group, covariates, strata of
    the rule) is fitted on all patients; then, for every column of ``rule.subgroups``,
    once per level of that column on the patients of the level. Within a level the
    subgroup column is neither adjusted for nor stratified on (it is constant there).

    Parameters
    ----------
    endpoints
        The time-to-event table (:data:`~kidneycohort.schemas.ENDPOINTS`).
    patients
        The patients table: group, covariates, strata and subgroup columns.
    rule
        :class:`SurvivalRule`; keyword ``options`` override its fields.

    Returns
    -------
    polars.DataFrame
        :data:`~kidneycohort.schemas.HAZARD_RATIOS`: one row per endpoint, term and subgroup (``subgroup`` null
        for the whole cohort, ``"column=level"`` otherwise), with the
        proportional-hazards test p of the term (``ph_p``).

    Raises
    ------
    ConfigError
        A subgroup column that is not a patients column.
    """
    resolved = resolve_rules(SurvivalRule, rule, options, "hazard_ratio_table")
    if resolved.group_column is None and not resolved.covariates:
        warnings.warn(
            "hazard ratios not estimated: with no group column and no covariates there is "
            "nothing to compare (whole-cohort analysis)",
            StatisticalWarning,
            stacklevel=2,
        )
        return pl.DataFrame(schema=HAZARD_RATIOS)
    rows = evaluable_rows(endpoints)
    cohort = to_polars(patients, "patients")
    parts = _fit_or_report(rows, cohort, resolved, None)
    for column in resolved.subgroups:
        if column not in cohort.columns:
            raise ConfigError(
                f"survival.subgroups: '{column}' is not a patients column"
                f"{did_you_mean(column, cohort.columns)}"
            )
        within = resolved.model_copy(
            update={
                "covariates": [c for c in resolved.covariates if c != column],
                "strata": [c for c in resolved.strata if c != column],
            }
        )
        # one fit per level: a handful of levels, each a vectorised fit
        for level in sorted(cohort[column].drop_nulls().cast(pl.String).unique().to_list()):
            members = cohort.filter(pl.col(column).cast(pl.String) == level)
            level_rows = rows.join(members.select("patient_id"), on="patient_id", how="semi")
            parts.extend(_fit_or_report(level_rows, members, within, f"{column}={level}"))
    return (
        conform(pl.concat(parts, how="diagonal_relaxed"), HAZARD_RATIOS)
        if parts
        else pl.DataFrame(schema=HAZARD_RATIOS)
    )
