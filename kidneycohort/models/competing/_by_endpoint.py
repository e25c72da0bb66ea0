"""Competing-risks analyses of every endpoint of a time-to-event table at once."""

from __future__ import annotations

import polars as pl

from kidneycohort._frames import FrameLike, follows_input, to_polars
from kidneycohort.models.competing._analysis import CompetingRisks
from kidneycohort.models.competing._data import CompetingRisksRule
from kidneycohort.models.survival import SurvivalRule, evaluable_rows
from kidneycohort.schemas import COMPETING_HAZARDS, COMPETING_TESTS

__all__ = ["COMPETING_HAZARDS", "COMPETING_TESTS", "competing_risks_tables"]


@follows_input
def competing_risks_tables(
    endpoints: FrameLike, patients: FrameLike, rule: SurvivalRule
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Fine–Gray and cause-specific Cox hazard ratios, and Gray's test, per endpoint.

    Every endpoint in ``rule.competing_risks.endpoints`` (default: every endpoint with a
    competing event, ``competing = 1``: death before it) is analysed by
    :class:`~kidneycohort.models.competing.CompetingRisks` with the study's group,
    reference group, covariates and confidence level. An endpoint without competing
    events is left out (a Cox model answers it); what cannot be estimated is a row with
    ``estimable = False`` and its reason.

    Returns
    -------
    (hazards, tests)
        :data:`COMPETING_HAZARDS` and :data:`COMPETING_TESTS`.
    """
    part = rule.competing_risks
    rows = evaluable_rows(endpoints)
    people = to_polars(patients, "patients")
    with_competing = (
        rows.filter(pl.col("competing").cast(pl.Int64) == 1)["endpoint"].unique().to_list()
    )
    chosen = sorted(with_competing) if part is None or part.endpoints is None else part.endpoints
    hazards, tests = [], []
    for name in chosen:
        analysis = CompetingRisks(
            CompetingRisksRule(
                event_of_interest=name,
                group_column=rule.group_column,
                reference_group=rule.reference_group,
                covariates=list(rule.covariates),
                confidence=rule.confidence,
                gray_test_rho=part.gray_test_rho if part is not None else 0.0,
            )
        ).fit(rows.filter(pl.col("endpoint") == name), people)
        hazards.append(analysis.summary().select(pl.lit(name).alias("endpoint"), pl.all()))
        tests.append(
            analysis.gray_test_.select(
                pl.lit(name).alias("endpoint"),
                pl.all(),
                pl.lit(analysis.methods_text()).alias("methods"),
            )
        )
    return (
        pl.concat(hazards, how="diagonal_relaxed").cast(pl.Schema(COMPETING_HAZARDS))
        if hazards
        else pl.DataFrame(schema=COMPETING_HAZARDS),
        pl.concat(tests, how="diagonal_relaxed")
        .select(list(COMPETING_TESTS))
        .cast(pl.Schema(COMPETING_TESTS))
        if tests
        else pl.DataFrame(schema=COMPETING_TESTS),
    )
