"""Competing-risks input layouts, options and bad input: statements instead of numbers,
one-line errors only where the input is unusable."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from kidneycohort.errors import ConfigError, InputDataError
from kidneycohort.models.competing._analysis import CURVE_COLUMNS, CompetingRisks
from kidneycohort.models.competing._cause_specific import CauseSpecificCox, cause_specific_arrays
from kidneycohort.models.competing._data import CompetingRisksRule
from kidneycohort.models.competing._fine_gray import FineGray, fine_gray_arrays
from kidneycohort.models.competing._results import HAZARD_COLUMNS
from tests._fixtures.competing import simulate_competing, small_cohort


def _estimates(table: pl.DataFrame) -> np.ndarray:
    return table.select("log_hr", "se").to_numpy()


def test_event_type_layout_gives_the_same_fit() -> None:
    """The documented event-type layout (patient_id, years, event_type) is read as the
    endpoints layout with the same events (common practice: one coding, two layouts)."""
    endpoints, patients = simulate_competing(300, seed=8)
    typed = endpoints.select(
        "patient_id",
        "years",
        pl.when(pl.col("event") == 1)
        .then(pl.lit("kidney_failure"))
        .when(pl.col("competing") == 1)
        .then(pl.lit("death"))
        .otherwise(pl.lit("censored"))
        .alias("event_type"),
    )
    a = FineGray(covariates=["age"]).fit(endpoints, patients).summary()
    b = FineGray(event_of_interest="kidney_failure", covariates=["age"]).fit(typed, patients)
    np.testing.assert_allclose(_estimates(b.summary()), _estimates(a), rtol=1e-12)
    assert b.summary()["cause"][0] == "kidney_failure"


def test_event_type_layout_refuses_unlisted_labels() -> None:
    """A label that is neither the event nor listed as competing is refused rather
    than silently censored (common practice: no silent recoding)."""
    typed = pl.DataFrame(
        {
            "patient_id": ["a", "b", "c"],
            "years": [1.0, 2.0, 3.0],
            "event_type": ["kidney_failure", "death", "transplant"],
            "group": ["x", "y", "x"],
        }
    )
    with pytest.raises(InputDataError, match="event_type 'transplant' is neither"):
        FineGray(event_of_interest="kidney_failure", competing_events=["death"]).fit(typed)
    with pytest.raises(InputDataError, match="event_of_interest: needed"):
        FineGray().fit(typed)


def test_censoring_reasons_can_compete() -> None:
    """A lab endpoint censored at kidney failure (reason 'kidney_failure') treats it as
    competing when listed in competing_events; death (competing = 1) always competes."""
    endpoints, patients = simulate_competing(200, seed=4)
    # recode part of the censored rows as censored at kidney failure onset
    recoded = endpoints.with_columns(
        pl.when((pl.col("event") == 0) & (pl.col("competing") == 0) & (pl.col("years") < 1.0))
        .then(pl.lit("kidney_failure"))
        .otherwise(pl.col("reason"))
        .alias("reason")
    )
    plain = FineGray().fit(recoded, patients)
    listed = FineGray(competing_events=["kidney_failure"]).fit(recoded, patients)
    moved = recoded.filter(pl.col("reason") == "kidney_failure").height
    assert moved > 0
    assert listed.n_competing_ == plain.n_competing_ + moved
    assert listed.rows_.competing_label == "death+kidney_failure"
    cause = (
        recoded["event"].to_numpy()
        + 2 * ((recoded["competing"] == 1) | (recoded["reason"] == "kidney_failure")).to_numpy()
    )
    design = (patients["group"] == "treated").cast(pl.Float64).to_numpy()[:, None]
    direct = fine_gray_arrays(recoded["years"].to_numpy(), cause, design)
    assert listed.summary()["log_hr"][0] == pytest.approx(direct.beta[0], rel=1e-10)


def test_not_evaluable_and_incomplete_rows_are_listed() -> None:
    """No silent drops (DEVELOPERS.md): a null event keeps its reason, a missing
    covariate gets missing_<column>."""
    endpoints, patients = small_cohort()
    endpoints = endpoints.with_columns(
        pl.when(pl.col("patient_id") == "S00").then(None).otherwise(pl.col("event")).alias("event"),
        pl.when(pl.col("patient_id") == "S00")
        .then(pl.lit("no_baseline"))
        .otherwise(pl.col("reason"))
        .alias("reason"),
    )
    patients = patients.with_columns(
        pl.when(pl.col("patient_id") == "S01").then(None).otherwise(pl.col("age")).alias("age")
    )
    model = CompetingRisks(covariates=["age"]).fit(endpoints, patients)
    assert model.excluded_.sort("patient_id").rows() == [
        ("S00", "no_baseline"),
        ("S01", "missing_age"),
    ]
    assert model.rows_.n_patients == 38


def test_no_competing_events_is_stated_not_duplicated() -> None:
    """With no competing event the subdistribution hazard is the cause-specific hazard
    (Fine & Gray 1999, section 2): the table says so instead of repeating the numbers;
    the fit itself equals the Breslow Cox fit to 1e-8."""
    endpoints, patients = simulate_competing(250, seed=9)
    censored = endpoints.with_columns(pl.lit(0, dtype=pl.Int8).alias("competing"))
    analysis = CompetingRisks(covariates=["age"]).fit(censored, patients)
    table = analysis.summary()
    sub = table.filter(pl.col("model") == "subdistribution")
    assert not sub["estimable"].any() and sub["hr"].is_null().all()
    assert sub["reason"][0].startswith("no competing events (death): the subdistribution hazard")
    competing = table.filter((pl.col("model") == "cause_specific") & (pl.col("cause") == "death"))
    assert competing["reason"][0] == "no death events among 250 patients; no hazard ratio"
    event = table.filter((pl.col("model") == "cause_specific") & (pl.col("cause") != "death"))
    assert event["estimable"].all()
    fine_gray = analysis.fine_gray_
    assert fine_gray is not None and fine_gray.fit_ is not None
    cause = censored["event"].to_numpy()
    design = np.column_stack(
        [(patients["group"] == "treated").to_numpy(), patients["age"].to_numpy()]
    ).astype(float)
    cox = cause_specific_arrays(
        censored["years"].to_numpy(), cause, design, ties="breslow", tolerance=1e-12
    )
    np.testing.assert_allclose(fine_gray.fit_.beta, cox.beta, atol=1e-8)
    assert any("no competing events" in s for s in analysis.statements_)


def test_all_censored_gives_statements_only() -> None:
    """No events at all: every hazard-ratio row and Gray's test carry a one-line reason
    and no number (common practice: never a number that looks real)."""
    endpoints, patients = simulate_competing(100, seed=2)
    none = endpoints.with_columns(pl.lit(0, dtype=pl.Int8).alias(c) for c in ("event", "competing"))
    analysis = CompetingRisks().fit(none, patients)
    table = analysis.summary()
    assert table.height == 3 and not table["estimable"].any()
    assert table["hr"].is_null().all() and table["p"].is_null().all()
    assert table["reason"][0] == "no kidney_failure events among 100 patients; no hazard ratio"
    test = analysis.gray_test_.row(0, named=True)
    assert test["test_statistic"] is None and test["estimable"] is False
    assert "no events of interest" in test["reason"]
    curves = analysis.cumulative_incidence_
    assert curves.schema == pl.Schema(CURVE_COLUMNS)
    assert (curves["estimate"] == 0.0).all()


def test_group_without_events_is_left_out_with_a_reason() -> None:
    """A group with no events has no finite hazard ratio: its row says so and the
    other groups are estimated without its patients (checked against that direct fit)."""
    endpoints, patients = simulate_competing(300, seed=12)
    third = patients.with_row_index().with_columns(
        pl.when(pl.col("index") % 5 == 0)
        .then(pl.lit("untreated_pilot"))
        .otherwise(pl.col("group"))
        .alias("group")
    )
    pilot = third.filter(pl.col("group") == "untreated_pilot")["patient_id"]
    cleared = endpoints.with_columns(
        pl.when(pl.col("patient_id").is_in(pilot.implode()))
        .then(0)
        .otherwise(pl.col("event"))
        .cast(pl.Int8)
        .alias("event")
    )
    table = FineGray().fit(cleared, third).summary()
    pilot_row = table.filter(pl.col("term") == "group=untreated_pilot").row(0, named=True)
    assert pilot_row["estimable"] is False and pilot_row["hr"] is None
    assert pilot_row["reason"].startswith(f"no kidney_failure events among the {pilot.len()}")
    kept = cleared.filter(~pl.col("patient_id").is_in(pilot.implode()))
    direct = FineGray().fit(kept, third).summary()
    treated = table.filter(pl.col("term") == "group=treated")
    assert treated["log_hr"][0] == pytest.approx(direct["log_hr"][0], rel=1e-12)


def test_reference_group_without_events_voids_the_model() -> None:
    """Hazard ratios against a reference level without events cannot be estimated."""
    endpoints, patients = simulate_competing(200, seed=13)
    control = patients.filter(pl.col("group") == "control")["patient_id"].implode()
    cleared = endpoints.with_columns(
        pl.when(pl.col("patient_id").is_in(control))
        .then(0)
        .otherwise(pl.col("event"))
        .cast(pl.Int8)
        .alias("event")
    )
    table = FineGray(covariates=["age"]).fit(cleared, patients).summary()
    assert not table["estimable"].any()
    assert table["reason"][0].startswith(
        "no kidney_failure events in the reference level group=control"
    )


def test_monotone_likelihood_is_reported_as_not_converged() -> None:
    """A covariate that is largest for whoever fails at every failure time drives its
    estimate to infinity (monotone likelihood; common practice): a reason, no number."""
    years = np.arange(1.0, 21.0)
    cause = np.r_[np.ones(10), np.full(5, 2), np.zeros(5)].astype(np.int8)
    endpoints = pl.DataFrame(
        {
            "patient_id": [f"M{i}" for i in range(20)],
            "endpoint": "kidney_failure",
            "years": years,
            "event": (cause == 1).astype(np.int8),
            "competing": (cause == 2).astype(np.int8),
            "marker": -years,
        }
    )
    model = FineGray(group_column=None, covariates=["marker"]).fit(endpoints)
    row = model.summary().row(0, named=True)
    assert row["estimable"] is False and row["hr"] is None
    assert row["reason"].startswith("the Fine–Gray fit did not converge (")


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (lambda f: f.drop("competing"), "missing column 'competing'"),
        (
            lambda f: f.with_columns(pl.lit(1, dtype=pl.Int8).alias("competing")),
            "event = 1 and competing = 1",
        ),
        (lambda f: f.with_columns(pl.lit(-1.0).alias("years")), "follow-up must be a non-negative"),
        (lambda f: pl.concat([f, f.head(1)]), "more than one row"),
        (lambda f: f.with_columns(pl.lit(3).alias("event")), "expected 1 \\(event\\), 0"),
    ],
)
def test_unusable_input_raises_one_line(change: object, message: str) -> None:
    """Unusable tables raise InputDataError with one line naming the problem (DEVELOPERS.md)."""
    endpoints, patients = small_cohort()
    with pytest.raises(InputDataError, match=message) as caught:
        FineGray().fit(change(endpoints), patients)  # type: ignore[operator]
    assert "\n" not in str(caught.value)


def test_unknown_endpoint_reference_and_nothing_to_model() -> None:
    endpoints, patients = small_cohort()
    with pytest.raises(InputDataError, match="did you mean 'kidney_failure'"):
        FineGray(event_of_interest="kidney_failur").fit(endpoints, patients)
    with pytest.raises(InputDataError, match="reference_group: 'placebo' is not a value"):
        FineGray(reference_group="placebo").fit(endpoints, patients)
    with pytest.raises(InputDataError, match="nothing to model"):
        CauseSpecificCox(group_column=None).fit(endpoints, patients)
    only = CompetingRisks(group_column=None).fit(endpoints, patients)
    assert only.summary().height == 0
    assert only.statements_[0].startswith("one group and no covariates")
    assert only.gray_test_["reason"][0].startswith("one group only")


def test_options_are_validated_with_one_line() -> None:
    """Options derive from RuleModel: frozen, unknown keys refused with a suggestion."""
    with pytest.raises(ConfigError, match="did you mean 'covariates'"):
        CompetingRisksRule(covariate=["age"])  # type: ignore[call-arg]
    with pytest.raises(ConfigError, match="an event cannot compete with itself"):
        CompetingRisksRule(event_of_interest="death", competing_events=["death"])
    with pytest.raises(ConfigError, match="unknown rule 'ties'"):
        FineGray(ties="efron")
    with pytest.raises(ConfigError, match="confidence"):
        CompetingRisks(confidence=1.5)


def test_summary_layout_and_reference_group() -> None:
    """The summary has the documented columns; reference_group flips the contrast."""
    endpoints, patients = small_cohort()
    table = CompetingRisks(covariates=["age"]).fit(endpoints, patients).summary()
    assert table.schema == pl.Schema(HAZARD_COLUMNS)
    assert table["model"].to_list() == ["subdistribution"] * 2 + ["cause_specific"] * 4
    assert table["cause"].to_list()[2:] == ["kidney_failure"] * 2 + ["death"] * 2
    flipped = FineGray(reference_group="treated").fit(endpoints, patients).summary()
    base = FineGray().fit(endpoints, patients).summary()
    assert flipped["term"][0] == "group=control"
    assert flipped["log_hr"][0] == pytest.approx(-base["log_hr"][0], rel=1e-10)


def test_predicted_incidence_horizons() -> None:
    """Predicted incidence per group at the horizons, null beyond a group's follow-up
    (common practice: no extrapolation)."""
    endpoints, patients = small_cohort()
    model = FineGray(horizons_years=[1.0, 3.0, 10.0]).fit(endpoints, patients)
    found = model.horizon_estimates_
    assert found.height == 6
    assert found.filter(pl.col("years") == 10.0)["estimate"].is_null().all()
    early = found.filter(pl.col("years") == 1.0).sort("group")["estimate"].to_list()
    assert early[0] < early[1]  # treated has the higher subdistribution hazard here


def test_stratified_gray_test_through_the_analysis() -> None:
    """gray_test_strata reads patients columns; the statistic is the stratified one
    (cmprsk cuminc(strata = ...) convention: scores and variances summed over strata)."""
    from kidneycohort.models.competing._gray_test import gray_test

    endpoints, patients = simulate_competing(300, seed=17)
    analysis = CompetingRisks(gray_test_strata=["female"]).fit(endpoints, patients)
    joined = endpoints.join(patients, on="patient_id")
    direct = gray_test(
        joined["years"].to_numpy(),
        (joined["event"] + 2 * joined["competing"]).to_numpy(),
        joined["group"].to_numpy(),
        strata=joined["female"].to_numpy(),
    )
    assert analysis.gray_test_["test_statistic"][0] == pytest.approx(direct.statistic, rel=1e-12)
    assert "stratified by female" in analysis.methods_text()


def test_only_compared_group_without_events_is_a_statement_not_a_crash() -> None:
    """Two groups, no covariates, and the one compared group has no events: every term
    is left out, so there is nothing to fit; each model says why (found on an invented
    50-patient cohort with a single event)."""
    endpoints, patients = simulate_competing(200, seed=14)
    treated = patients.filter(pl.col("group") == "treated")["patient_id"].implode()
    cleared = endpoints.with_columns(
        pl.when(pl.col("patient_id").is_in(treated))
        .then(0)
        .otherwise(pl.col("event"))
        .cast(pl.Int8)
        .alias("event")
    )
    for model in (FineGray(), CauseSpecificCox()):
        table = model.fit(cleared, patients).summary()
        table = table.filter(pl.col("cause") == "kidney_failure")
        assert table.height == 1 and not table["estimable"].any()
        assert table["hr"].to_list() == [None]
        assert table["reason"][0].startswith("no kidney_failure events among the")
