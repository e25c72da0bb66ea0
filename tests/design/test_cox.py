"""The design's per-trial Cox fit equals the study's CoxModel on the same trial."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from kidneycohort.design._cox import treatment_hazard
from kidneycohort.models.survival import CoxModel


def _trial(seed: int, n: int, ties: bool) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    treated = rng.uniform(size=n) < 0.5
    hazard = np.where(treated, 0.6, 1.0)
    event_time = rng.exponential(1 / hazard)
    censor = rng.uniform(0.5, 3.0, size=n)
    years = np.minimum(event_time, censor)
    if ties:  # visit-based times: many ties, as confirmed declines have
        years = np.ceil(years * 4) / 4
    return pl.DataFrame(
        {
            "patient_id": [f"p{i}" for i in range(n)],
            "endpoint": "e",
            "years": years,
            "event": (event_time <= censor).astype(np.int8),
            "group": np.where(treated, "treatment", "control"),
        }
    )


@pytest.mark.parametrize(("seed", "ties"), [(1, False), (2, True), (3, True)])
def test_estimate_and_se_equal_the_study_cox_model(seed: int, ties: bool) -> None:
    rows = _trial(seed, 300, ties)
    fit = treatment_hazard(
        rows["years"].to_numpy(),
        rows["event"].to_numpy(),
        (rows["group"] == "treatment").to_numpy(),
    )
    # reference: the study's CoxModel (lifelines' Newton steps, Efron ties)
    model = CoxModel(endpoint="e", reference_group="control").fit(
        rows.drop("group"), rows.select("patient_id", "group")
    )
    row = model.summary().row(0, named=True)
    assert fit.reason is None
    # lifelines stops its Newton steps at a step norm of about 1e-7; ours goes further
    assert fit.log_hr == pytest.approx(row["log_hr"], abs=1e-6)
    assert fit.se == pytest.approx(row["se"], rel=1e-5)
    assert fit.p == pytest.approx(row["p"], rel=1e-4, abs=1e-9)
    assert fit.events_treatment == row["events"]
    assert fit.events_control == row["reference_events"]


def test_a_group_without_events_is_not_estimable_with_the_study_reason() -> None:
    years = np.array([1.0, 2.0, 3.0, 1.5, 2.5, 0.5])
    event = np.array([1, 1, 0, 0, 0, 0])
    treated = np.array([False, False, False, True, True, True])
    fit = treatment_hazard(years, event, treated)
    assert fit.reason == "too_few_events_in_group"
    assert np.isnan(fit.log_hr) and np.isnan(fit.p)
    none = treatment_hazard(years, np.zeros(6), treated)
    assert none.reason == "no_events"
