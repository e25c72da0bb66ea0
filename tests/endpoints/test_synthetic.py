"""Truth recovery: endpoints derived from a noise-free synthetic trial match its truth.

With noise off, measured creatinine is the published CKD-EPI 2021 equation inverted at
the true GFR, so eGFR equals the true GFR. The true GFR path falls steadily, so a 40 %
decline (and 57 %, and eGFR < 15) must be detected at the first scheduled sample on or
after the true crossing date - never earlier, and never later than the next sample:
that is the schedule's resolution. Kidney failure must be dated exactly.
"""

from __future__ import annotations

import polars as pl
import pytest

from kidneycohort import equations
from kidneycohort.endpoints import (
    EgfrBelow,
    EgfrDecline,
    EndpointRule,
    KidneyFailure,
    derive_endpoints,
)
from kidneycohort.synthetic import generate_cohort
from kidneycohort.synthetic.scenario import load_scenario
from tests._fixtures import REPO_ROOT

SCENARIO = REPO_ROOT / "synthetic" / "trial_two_arm.yaml"
EQUATION = "ckd_epi_2021_cr"
DEFS = [EgfrDecline(percent=40), EgfrDecline(percent=57), EgfrBelow(threshold=15), KidneyFailure()]
TRUTH_COLUMN = {
    "egfr_decline_40": "true_decline_40_date",
    "egfr_decline_57": "true_decline_57_date",
    "egfr_below_15": "true_gfr_below_15_date",
}


@pytest.fixture(scope="module")
def derived() -> dict[str, pl.DataFrame]:
    scenario = load_scenario(SCENARIO).model_copy(update={"noise_off": True})
    cohort = generate_cohort(scenario, patients=800)
    samples = (
        cohort.truth["samples"]
        .filter(pl.col("analyte") == "creatinine")
        .join(cohort.patients.select("patient_id", "sex"), on="patient_id")
    )
    egfr = samples.select(
        "patient_id",
        pl.col("sample_date").dt.date(),
        pl.lit(EQUATION).alias("equation"),
        pl.Series(
            "egfr",
            equations.evaluate(
                EQUATION,
                creatinine_mg_dl=samples["measured_value"].to_numpy(),
                age=samples["age_at_sample"].to_numpy(),
                sex=samples["sex"].to_numpy(),
            ),
        ),
    )
    # The truth's declines are relative to the true GFR at index (before any acute dip).
    baseline = cohort.truth["patients"].select(
        "patient_id",
        pl.lit(EQUATION).alias("equation"),
        pl.col("true_intercept").alias("baseline_egfr"),
    )
    truth = cohort.truth["events"]
    out = derive_endpoints(
        egfr,
        baseline,
        cohort.patients,
        cohort.events,
        DEFS,
        equation=EQUATION,
        data_cut=truth["end_of_followup"].max(),
        # noise-free values need no confirmation against noise; count a last-visit value too
        rule=EndpointRule(unconfirmed_last_value="event"),
    )
    return {"endpoints": out, "truth": truth, "egfr": egfr}


@pytest.mark.parametrize("endpoint", list(TRUTH_COLUMN))
def test_lab_endpoints_found_at_the_first_sample_after_the_true_crossing(
    derived: dict[str, pl.DataFrame], endpoint: str
) -> None:
    egfr, truth = derived["egfr"], derived["truth"]
    out = derived["endpoints"].filter(pl.col("endpoint") == endpoint)
    # Values on or after the kidney-failure date are not native kidney function (our
    # documented rule works on dates: a value on the day of dialysis start or transplant
    # is set aside).
    last_sample = (
        egfr.join(truth.select("patient_id", "kfrt_date"), on="patient_id")
        .filter(pl.col("kfrt_date").is_null() | (pl.col("sample_date") < pl.col("kfrt_date")))
        .group_by("patient_id")
        .agg(pl.col("sample_date").max().alias("last_sample"))
    )
    table = (
        out.join(
            truth.select("patient_id", pl.col(TRUTH_COLUMN[endpoint]).alias("truth")),
            on="patient_id",
        )
        .join(last_sample, on="patient_id", how="left")
        # A crossing after the last sample (before death or study end) cannot be seen; one
        # on the day of the last sample may fall after that sample's time of day (truth
        # dates are whole days), so that day is left out of the comparison.
        .with_columns(
            seen=pl.col("truth").is_not_null() & (pl.col("truth") < pl.col("last_sample"))
        )
        .filter(pl.col("truth").is_null() | (pl.col("truth") != pl.col("last_sample")))
    )
    assert table.filter("seen").height >= 30, "scenario gives too few true crossings to test"
    assert table.filter(pl.col("seen") != (pl.col("event") == 1)).height == 0
    events = table.filter("seen")
    assert (events["end_date"] >= events["truth"]).all()
    # the sample just before the detected one must not come after the true crossing day
    previous = (
        egfr.join(events.select("patient_id", "end_date"), on="patient_id")
        .filter(pl.col("sample_date") < pl.col("end_date"))
        .group_by("patient_id")
        .agg(pl.col("sample_date").max().alias("previous"))
    )
    checked = events.join(previous, on="patient_id", how="left")
    assert checked.filter(pl.col("previous") > pl.col("truth")).height == 0
    # and the lag is within one scheduled interval (3 months +/- a 7-day window)
    assert (checked["end_date"] - checked["truth"]).dt.total_days().max() <= 3 * 31 + 14


def test_kidney_failure_dated_exactly(derived: dict[str, pl.DataFrame]) -> None:
    out = derived["endpoints"].filter(pl.col("endpoint") == "kidney_failure")
    truth = derived["truth"].filter(pl.col("kfrt_date") <= pl.col("end_of_followup"))
    table = out.join(truth.select("patient_id", "kfrt_date"), on="patient_id", how="left")
    assert truth.height >= 3
    assert table.filter(pl.col("kfrt_date").is_not_null() != (pl.col("event") == 1)).height == 0
    events = table.filter(pl.col("event") == 1)
    assert (events["end_date"] == events["kfrt_date"]).all()
