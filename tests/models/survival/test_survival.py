"""Kaplan–Meier, Aalen–Johansen and Cox models against published results and hand counts."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from lifelines import CoxPHFitter, KaplanMeierFitter
from lifelines.datasets import load_rossi

from kidneycohort.errors import ConfigError, ConvergenceError, InputDataError
from kidneycohort.models.survival import (
    CoxModel,
    CumulativeIncidence,
    KaplanMeier,
    SurvivalRule,
    numbers_at_risk,
)

ROSSI_TERMS = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]


@pytest.fixture(scope="module")
def rossi() -> tuple[pl.DataFrame, pl.DataFrame]:
    """Rossi et al. recidivism data (432 released prisoners, weeks to re-arrest) as
    shipped by lifelines, in the endpoints / patients layouts ("years" holds weeks)."""
    data = load_rossi()
    ids = [f"R{i:03d}" for i in range(len(data))]
    endpoints = pl.DataFrame(
        {
            "patient_id": ids,
            "endpoint": "arrest",
            "years": data["week"].astype(float).to_numpy(),
            "event": data["arrest"].to_numpy(),
            "competing": 0,
        }
    )
    patients = pl.from_pandas(data.drop(columns=["week", "arrest"])).with_columns(
        pl.Series("patient_id", ids),
        pl.when(pl.col("fin") == 1).then(pl.lit("aid")).otherwise(pl.lit("no_aid")).alias("group"),
    )
    return endpoints, patients


def test_cox_matches_published_rossi_coefficients(rossi: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    """Fox J. Cox proportional-hazards regression for survival data. Appendix to An R
    and S-PLUS Companion to Applied Regression, 2002, p. 6 (coxph, Efron ties):
    coef (se) fin -0.379 (0.191), age -0.0574 (0.0220), race 0.314 (0.308),
    wexp -0.150 (0.212), mar -0.434 (0.382), paro -0.0849 (0.196), prio 0.0915 (0.0286).
    fin, age and prio as quoted in the lifelines documentation; the others from memory."""
    endpoints, patients = rossi
    model = CoxModel(group_column=None, covariates=ROSSI_TERMS).fit(endpoints, patients)
    table = model.summary()
    published = {
        "fin": (-0.379, 0.191),
        "age": (-0.0574, 0.0220),
        "race": (0.314, 0.308),
        "wexp": (-0.150, 0.212),
        "mar": (-0.434, 0.382),
        "paro": (-0.0849, 0.196),
        "prio": (0.0915, 0.0286),
    }
    for term, (coefficient, se) in published.items():
        row = table.filter(pl.col("term") == term)
        assert row["log_hr"][0] == pytest.approx(coefficient, abs=6e-4)
        assert row["se"][0] == pytest.approx(se, abs=6e-4)
        assert row["hr"][0] == pytest.approx(np.exp(coefficient), rel=2e-3)
        assert row["hr_lower"][0] < row["hr"][0] < row["hr_upper"][0]
    # Fox (2002): fin is "marginally significant" (p = 0.047); age p = 0.0090; prio p = 0.0014
    assert table.filter(pl.col("term") == "fin")["p"][0] == pytest.approx(0.047, abs=1e-3)
    assert table.filter(pl.col("term") == "prio")["p"][0] == pytest.approx(0.0014, abs=2e-4)
    assert model.n_events_ == 114 and model.n_patients_ == 432


def test_ph_test_flags_age_and_work_experience(rossi: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    """Fox (2002, section 4) and the lifelines proportional-hazards tutorial find the
    scaled Schoenfeld test rejecting proportionality for age and wexp, not for fin
    (from memory; tolerant thresholds)."""
    endpoints, patients = rossi
    model = CoxModel(group_column=None, covariates=ROSSI_TERMS).fit(endpoints, patients)
    ph = {row[0]: row[2] for row in model.ph_test_.rows()}
    assert set(ph) == set(ROSSI_TERMS)
    assert ph["age"] < 0.05
    assert ph["wexp"] < 0.05
    assert ph["fin"] > 0.5
    assert model.ph_test_.columns == ["term", "test_statistic", "p"]


def test_cox_group_term_and_strata_match_lifelines(
    rossi: tuple[pl.DataFrame, pl.DataFrame],
) -> None:
    endpoints, patients = rossi
    model = CoxModel(reference_group="no_aid", covariates=["age", "prio"], strata=["wexp"]).fit(
        endpoints, patients
    )
    # the same fit done directly in lifelines (reference library)
    data = load_rossi()
    direct = CoxPHFitter().fit(
        data[["week", "arrest", "fin", "age", "prio", "wexp"]], "week", "arrest", strata=["wexp"]
    )
    row = model.summary().filter(pl.col("term") == "group=aid")
    assert row["log_hr"][0] == pytest.approx(direct.params_["fin"], rel=1e-6)
    assert row["p"][0] == pytest.approx(direct.summary.loc["fin", "p"], rel=1e-6)
    assert model.summary().columns[:5] == ["term", "hr", "hr_lower", "hr_upper", "p"]


def test_kaplan_meier_without_early_censoring_is_one_minus_proportion_arrested(
    rossi: tuple[pl.DataFrame, pl.DataFrame],
) -> None:
    """Every Rossi subject not re-arrested is censored at week 52 (Rossi data
    documentation), so S(t) = 1 - (arrests by week t) / N for t < 52 exactly."""
    endpoints, patients = rossi
    km = KaplanMeier(horizons_years=[10, 26, 51], at_risk_years=[0, 26, 52]).fit(
        endpoints, patients
    )
    joined = endpoints.join(patients.select("patient_id", "group"), on="patient_id")
    for group in ("aid", "no_aid"):
        part = joined.filter(pl.col("group") == group)
        for week in (10, 26, 51):
            expected = (
                1
                - part.filter((pl.col("event") == 1) & (pl.col("years") <= week)).height
                / part.height
            )
            got = km.horizon_estimates_.filter(
                (pl.col("group") == group) & (pl.col("years") == week)
            )
            assert got["estimate"][0] == pytest.approx(expected, abs=1e-12)
            assert got["lower"][0] < got["estimate"][0] < got["upper"][0]
    # 48 of 216 with aid and 66 of 216 without were re-arrested (114 in all; Fox 2002)
    summary = km.summary()
    assert summary.filter(pl.col("group") == "aid")["events"][0] == 48
    assert summary.filter(pl.col("group") == "no_aid")["events"][0] == 66
    assert summary["median_years"].null_count() == 2  # median not reached
    assert km.curves_.columns == ["group", "years", "estimate", "lower", "upper", "measure"]
    assert set(km.curves_["measure"].to_list()) == {"survival"}


def _six_mp() -> pl.DataFrame:
    """Freireich et al., Blood 1963: weeks in remission, 6-MP vs placebo (21 each);
    '+' times censored. Reproduced in Kleinbaum & Klein, Survival Analysis (ch. 2)."""
    six_mp = [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35]
    six_mp_event = [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0]
    placebo = [1, 1, 2, 2, 3, 4, 4, 5, 5, 8, 8, 8, 8, 11, 11, 12, 12, 15, 17, 22, 23]
    return pl.DataFrame(
        {
            "patient_id": [f"L{i:02d}" for i in range(42)],
            "endpoint": "relapse",
            "years": [float(t) for t in six_mp + placebo],
            "event": six_mp_event + [1] * 21,
            "competing": 0,
            "group": ["6-MP"] * 21 + ["placebo"] * 21,
        }
    )


def test_kaplan_meier_and_logrank_match_textbook_leukaemia_example() -> None:
    """Kleinbaum & Klein, Survival Analysis: A Self-Learning Text, ch. 2 (from memory):
    6-MP group S(6)=0.857, S(7)=0.807, S(10)=0.753, S(13)=0.690, S(16)=0.627,
    S(22)=0.538, S(23)=0.448; median 23 weeks; placebo median 8 weeks; log-rank
    chi-square 16.79 on 1 df."""
    km = KaplanMeier(horizons_years=[6, 7, 10, 13, 16, 22, 23]).fit(_six_mp())
    six = km.horizon_estimates_.filter(pl.col("group") == "6-MP")["estimate"].to_list()
    assert six == pytest.approx([0.857, 0.807, 0.753, 0.690, 0.627, 0.538, 0.448], abs=6e-4)
    medians = dict(km.medians_.select("group", "median_years").rows())
    assert medians == {"6-MP": 23.0, "placebo": 8.0}
    assert km.logrank_ is not None
    assert km.logrank_["test_statistic"] == pytest.approx(16.79, abs=0.01)
    assert km.logrank_["df"] == 1


def test_numbers_at_risk_by_hand() -> None:
    rows = pl.DataFrame({"group": ["a", "a", "a", "b"], "years": [0.5, 1.0, 2.5, 3.0]})
    result = numbers_at_risk(rows, [0.0, 1.0, 2.0, 3.5], groups=["a", "b"])
    assert result["n_at_risk"].to_list() == [3, 2, 1, 0, 1, 1, 1, 0]
    assert result.columns == ["group", "years", "n_at_risk"]


def _competing_example() -> pl.DataFrame:
    # 8 patients; tied endpoint and competing events at years 1 and 2
    return pl.DataFrame(
        {
            "patient_id": list("abcdefgh"),
            "endpoint": "kidney_failure",
            "years": [1.0, 1.0, 1.0, 2.0, 2.0, 3.0, 3.0, 4.0],
            "event": [1, 0, 0, 1, 0, 0, 1, 0],
            "competing": [0, 1, 0, 0, 1, 0, 0, 0],
            "group": "all",
        }
    )


def test_aalen_johansen_by_hand_with_tied_competing_events() -> None:
    """Aalen–Johansen by hand (Putter et al. 2007): F(t) = sum S(t-) d1/n.
    t=1: n=8, F=1/8; S=6/8. t=2: n=5, F += 6/8 * 1/5; S = 6/8 * 3/5.
    t=3: n=3, F += 0.45 * 1/3."""
    model = CumulativeIncidence(horizons_years=[0.5, 1, 2, 3, 4]).fit(_competing_example())
    expected = [0.0, 0.125, 0.125 + 0.75 / 5, 0.125 + 0.15 + 0.45 / 3, 0.425]
    assert model.horizon_estimates_["estimate"].to_list() == pytest.approx(expected, abs=1e-12)
    curve = model.curves_
    assert curve["years"].to_list() == [0.0, 1.0, 2.0, 3.0, 4.0]
    inner = curve.filter(pl.col("years") > 0)
    assert (inner["lower"] <= inner["estimate"]).all() and (
        inner["estimate"] <= inner["upper"]
    ).all()
    assert set(curve["measure"].to_list()) == {"cumulative_incidence"}
    assert model.summary()["competing_events"][0] == 2


def test_aalen_johansen_without_competing_events_is_one_minus_kaplan_meier() -> None:
    rng = np.random.default_rng(3)
    years = rng.exponential(2.0, 60).round(2)
    event = rng.integers(0, 2, 60)
    frame = pl.DataFrame(
        {
            "patient_id": [str(i) for i in range(60)],
            "endpoint": "x",
            "years": years,
            "event": event,
            "competing": 0,
            "group": "g",
        }
    )
    model = CumulativeIncidence(horizons_years=[0.5, 1.0, 2.0]).fit(frame)
    reference = KaplanMeierFitter().fit(years, event)  # lifelines as the reference
    expected = 1 - reference.survival_function_at_times([0.5, 1.0, 2.0]).to_numpy()
    assert model.horizon_estimates_["estimate"].to_numpy() == pytest.approx(expected, abs=1e-9)


def test_models_take_their_rule_and_validate_at_once() -> None:
    rule = SurvivalRule(horizons_years=[1, 2], at_risk_years=[0, 1], covariates=["age"])
    assert KaplanMeier(rule).rule.horizons_years == [1.0, 2.0]
    assert CoxModel(rule, endpoint="x").rule.covariates == ["age"]
    assert CoxModel(rule, covariates=["prio"]).rule.covariates == ["prio"]
    with pytest.raises(ConfigError, match="confidence"):
        KaplanMeier(confidence=2)


def test_several_endpoints_need_a_choice(rossi: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    endpoints, patients = rossi
    both = pl.concat([endpoints, endpoints.with_columns(pl.lit("other").alias("endpoint"))])
    with pytest.raises(InputDataError, match="pass endpoint="):
        KaplanMeier().fit(both, patients)
    with pytest.raises(InputDataError, match="did you mean 'arrest'"):
        KaplanMeier(endpoint="arest").fit(both, patients)


def test_cox_without_events_raises_with_advice(rossi: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    endpoints, patients = rossi
    with pytest.raises(ConvergenceError, match="no events"):
        CoxModel().fit(endpoints.with_columns(pl.lit(0).alias("event")), patients)


def test_missing_covariate_rows_are_reported(rossi: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    endpoints, patients = rossi
    holes = patients.with_columns(
        pl.when(pl.col("patient_id") == "R000").then(None).otherwise(pl.col("age")).alias("age")
    )
    model = CoxModel(covariates=["age"]).fit(endpoints, holes)
    assert model.excluded_.rows() == [("R000", "missing_age")]
    assert model.n_patients_ == 431


def test_unknown_covariate_suggests(rossi: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    endpoints, patients = rossi
    with pytest.raises(InputDataError, match="did you mean 'prio'"):
        CoxModel(covariates=["prior"]).fit(endpoints, patients)


def test_event_and_competing_together_is_refused() -> None:
    bad = _competing_example().with_columns(pl.lit(1).alias("competing"))
    with pytest.raises(InputDataError, match="event = 1 and competing = 1"):
        CumulativeIncidence().fit(bad)


def test_whole_cohort_without_a_group_column(rossi: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    # an overall analysis is possible wherever a group is optional; the curve equals
    # lifelines' Kaplan-Meier of all 432 patients (reference library)
    endpoints, patients = rossi
    model = KaplanMeier(group_column=None, horizons_years=[20, 40]).fit(endpoints, patients)
    assert set(model.curves_["group"]) == {"all"}
    reference = KaplanMeierFitter().fit(
        endpoints["years"].to_numpy(), endpoints["event"].to_numpy()
    )
    expected = reference.survival_function_at_times([20.0, 40.0]).to_numpy()
    assert model.horizon_estimates_["estimate"].to_numpy() == pytest.approx(expected, abs=1e-9)
    cox = CoxModel(group_column=None, covariates=["age"]).fit(endpoints, patients)
    assert cox.summary()["term"].to_list() == ["age"]


def _direct_aalen_johansen_variance(years: np.ndarray, state: np.ndarray) -> list[float]:
    """The Greenwood-type variance of the cumulative incidence written out term by term
    (Collett D. Modelling Survival Data in Medical Research, 3rd ed., 2015, §12.2; the
    formula lifelines documents for AalenJohansenFitter._bounds), as a double sum."""
    times = sorted(set(years.tolist()))
    n = [float((years >= t).sum()) for t in times]
    d = [float(((years == t) & (state != 0)).sum()) for t in times]
    d1 = [float(((years == t) & (state == 1)).sum()) for t in times]
    surv, lagged, incidence = 1.0, [], []
    total = 0.0
    for j in range(len(times)):
        lagged.append(surv)
        total += surv * d1[j] / n[j]
        incidence.append(total)
        surv *= 1 - d[j] / n[j]
    out = []
    for k in range(len(times)):
        var = 0.0
        for j in range(k + 1):
            gap = incidence[k] - incidence[j]
            if n[j] > d[j]:
                var += gap**2 * d[j] / (n[j] * (n[j] - d[j]))
            var += lagged[j] ** 2 * d1[j] * (n[j] - d1[j]) / n[j] ** 3
            var -= 2 * gap * lagged[j] * d1[j] / n[j] ** 2
        out.append(var)
    return out


def test_aalen_johansen_band_against_direct_variance() -> None:
    """Delta-method band of the Aalen–Johansen estimate on the hand example: the variance
    equals the term-by-term double sum; at t=1 (n=8, d=2, d1=1, S(0)=1) it is
    1 * 1 * 7 / 8**3 = 7/512 by hand; the limits are exp(-exp(log(-log F) +- z se)) with
    se = sqrt(var) / (F |log F|) (log(-log) scale, Collett 2015)."""
    from kidneycohort.models.survival._curves import aalen_johansen

    frame = _competing_example()
    years = frame["years"].to_numpy()
    state = np.where(frame["event"] == 1, 1, np.where(frame["competing"] == 1, 2, 0))
    result = aalen_johansen(years, state)
    direct = _direct_aalen_johansen_variance(years, state)
    assert result["years"].to_list() == [0.0, 1.0, 2.0, 3.0, 4.0]
    assert result["variance"].to_list()[1:] == pytest.approx(direct, rel=1e-12, abs=1e-15)
    assert result["variance"][1] == pytest.approx(7 / 512, rel=1e-12)
    f, var = result["estimate"][2], result["variance"][2]
    se = np.sqrt(var) / (f * abs(np.log(f)))
    z = 1.959963984540054  # standard normal 97.5th percentile
    assert result["lower"][2] == pytest.approx(np.exp(-np.exp(np.log(-np.log(f)) + z * se)))
    assert result["upper"][2] == pytest.approx(np.exp(-np.exp(np.log(-np.log(f)) - z * se)))


def test_cumulative_incidence_band_is_zero_before_the_first_event_and_set_at_deaths() -> None:
    """Before the first endpoint event the incidence is 0 with no uncertainty, even when
    deaths come first; at a death time the band is defined (Aalen–Johansen: a competing
    event changes S, not F, so the band at a death equals the band just before it)."""
    frame = pl.DataFrame(
        {
            "patient_id": [str(i) for i in range(10)],
            "endpoint": "kidney_failure",
            "years": [0.5, 0.8, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 5.0],
            "event": [0, 0, 1, 0, 1, 0, 0, 1, 0, 0],
            "competing": [1, 0, 0, 1, 0, 1, 0, 0, 1, 0],
            "group": "all",
        }
    )
    curve = CumulativeIncidence().fit(frame).curves_
    assert curve.select(pl.col("lower", "upper").null_count()).row(0) == (0, 0)
    early = curve.filter(pl.col("years") < 1.0)
    assert early["lower"].to_list() == early["upper"].to_list() == [0.0] * early.height
    at_death = curve.filter(pl.col("years").is_in([1.5, 2.5]))
    before = curve.filter(pl.col("years").is_in([1.0, 2.0]))
    assert at_death["lower"].to_list() == pytest.approx(before["lower"].to_list())
    assert at_death["upper"].to_list() == pytest.approx(before["upper"].to_list())
    inner = curve.filter(pl.col("estimate") > 0)
    assert ((inner["lower"] < inner["estimate"]) & (inner["estimate"] < inner["upper"])).all()


def test_aalen_johansen_variance_matches_lifelines_without_ties() -> None:
    """Without tied times lifelines' AalenJohansenFitter applies the same documented
    variance; the two agree (lifelines as the reference implementation)."""
    from lifelines import AalenJohansenFitter

    from kidneycohort.models.survival._curves import aalen_johansen

    rng = np.random.default_rng(11)
    years = rng.permutation(np.arange(1, 41) / 10.0)
    state = rng.choice([0, 1, 2], size=40, p=[0.4, 0.35, 0.25])
    state[0] = 1
    ours = aalen_johansen(years, state).filter(pl.col("years") > 0)
    reference = AalenJohansenFitter(calculate_variance=True).fit(years, state, event_of_interest=1)
    ref_var = reference.variance_.to_numpy()[1:]  # lifelines' first row is time 0
    ref_f = reference.cumulative_density_.iloc[1:, 0].to_numpy()
    assert ours["estimate"].to_numpy() == pytest.approx(ref_f, abs=1e-12)
    # lifelines' first row is forced to F = 0; its variance there is not comparable
    assert ours["variance"].to_numpy()[1:] == pytest.approx(ref_var[1:], rel=1e-9, abs=1e-15)
