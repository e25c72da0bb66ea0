"""Competing-risks analyses of every endpoint at once, and their side-by-side table."""

from __future__ import annotations

import numpy as np
import polars as pl

from kidneycohort.models.competing import CompetingRisks, competing_risks_tables
from kidneycohort.models.survival import CompetingRisksPart, SurvivalRule
from kidneycohort.tables import competing_risks_table


def _endpoints(seed: int = 4) -> tuple[pl.DataFrame, pl.DataFrame]:
    rng = np.random.default_rng(seed)
    n = 200
    ids = [f"C{i:03d}" for i in range(n)]
    group = np.where(np.arange(n) < n // 2, "treated", "control")
    years = rng.exponential(4.0, n)
    kind = rng.choice([0, 1, 2], n, p=[0.5, 0.3, 0.2])  # censored / event / death
    rows = []
    for name, competing_allowed in (("kidney_failure", True), ("egfr_decline_40", False)):
        rows.append(
            pl.DataFrame(
                {
                    "patient_id": ids,
                    "endpoint": name,
                    "years": years,
                    "event": (kind == 1).astype(np.int8),
                    "competing": ((kind == 2) & competing_allowed).astype(np.int8),
                }
            )
        )
    patients = pl.DataFrame({"patient_id": ids, "group": group})
    return pl.concat(rows), patients


def test_every_endpoint_death_competes_with_and_no_other() -> None:
    endpoints, patients = _endpoints()
    rule = SurvivalRule(reference_group="control", competing_risks=CompetingRisksPart())
    hazards, tests = competing_risks_tables(endpoints, patients, rule)
    # egfr_decline_40 has no competing event here: a Cox model answers it
    assert set(hazards["endpoint"].unique()) == {"kidney_failure"}
    assert tests.height == 1 and "Fine–Gray" in tests["methods"][0]
    # the same numbers as one CompetingRisks analysis of that endpoint
    direct = CompetingRisks(
        event_of_interest="kidney_failure", group_column="group", reference_group="control"
    ).fit(endpoints.filter(pl.col("endpoint") == "kidney_failure"), patients)
    np.testing.assert_allclose(
        hazards.drop("endpoint")["hr"].to_numpy(), direct.summary()["hr"].to_numpy(), rtol=1e-12
    )
    table = competing_risks_table(hazards, tests)
    row = table.row(0, named=True)
    assert row["term"] == "group=treated"
    sub = direct.summary().filter(
        (pl.col("model") == "subdistribution") & (pl.col("cause") == "kidney_failure")
    )
    assert row["subdistribution_hr"].startswith(f"{sub['hr'][0]:.2f} (")


def test_an_endpoint_without_events_reads_ne_not_a_number() -> None:
    endpoints, patients = _endpoints()
    endpoints = endpoints.with_columns(pl.lit(0, dtype=pl.Int8).alias("event"))
    rule = SurvivalRule(reference_group="control", competing_risks=CompetingRisksPart())
    hazards, tests = competing_risks_tables(endpoints, patients, rule)
    own = hazards.filter(pl.col("cause") == pl.col("endpoint"))
    assert own.height and not own["estimable"].any() and own["hr"].is_null().all()
    table = competing_risks_table(hazards, tests)
    assert set(table["subdistribution_hr"]) == {"NE"}
    assert table["note"][0].startswith("NE (Fine–Gray)")
