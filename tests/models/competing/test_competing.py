"""Fine–Gray, Gray's test and cause-specific Cox against published methods, hand counts,
lifelines and recorded R (cmprsk, survival) output."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl
import pytest
from lifelines import CoxPHFitter
from scipy import optimize

from kidneycohort.models.competing._analysis import CompetingRisks
from kidneycohort.models.competing._cause_specific import CauseSpecificCox, cause_specific_arrays
from kidneycohort.models.competing._fine_gray import (
    FineGray,
    censoring_survival,
    fine_gray_arrays,
    survival_before,
)
from kidneycohort.models.competing._gray_test import aalen_johansen_by_group, gray_test
from tests._fixtures.competing import (
    SMALL_AGE,
    SMALL_CAUSE,
    SMALL_TREATED,
    SMALL_YEARS,
    geskus_expanded,
    simulate_competing,
    small_cohort,
)

TIGHT = 1e-12


def _small_arrays() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    design = np.column_stack([SMALL_TREATED, SMALL_AGE]).astype(float)
    return np.array(SMALL_YEARS), np.array(SMALL_CAUSE), design


def _simulated_arrays(
    n: int, seed: int, **kwargs: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    endpoints, patients = simulate_competing(n, seed, **kwargs)
    cause = (endpoints["event"] + 2 * endpoints["competing"]).to_numpy()
    design = np.column_stack(
        [(patients["group"] == "treated").to_numpy(), patients["age"].to_numpy()]
    ).astype(float)
    return endpoints["years"].to_numpy(), cause, design


# ---- hand example ------------------------------------------------------------------------

HAND_TIME = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
HAND_CAUSE = np.array([1, 2, 0, 1, 1, 0])
HAND_X = np.array([[1.0], [0.0], [1.0], [0.0], [1.0], [0.0]])


def test_censoring_weights_by_hand() -> None:
    """Fine & Gray (1999, section 2.2) weights w_j(t) = G(t-)/G(T_j-), G the
    Kaplan–Meier of censoring. Censorings at 3 (4 followed: C, D, E, F) and 6 (1
    followed): G(3) = 3/4, G(6) = 0. Just before the failure times 1, 4, 5 and the
    competing event at 2: G = 1, 3/4, 3/4 and 1, so patient B (competing at 2) stays
    in the risk sets at 4 and 5 with weight 3/4 (hand count)."""
    times, survival = censoring_survival(HAND_TIME, HAND_CAUSE == 0)
    np.testing.assert_allclose(survival[np.isin(times, [3.0, 6.0])], [0.75, 0.0])
    before = survival_before(times, survival, np.array([1.0, 2.0, 4.0, 5.0]))
    np.testing.assert_allclose(before, [1.0, 1.0, 0.75, 0.75])


def _hand_log_likelihood(beta: float) -> float:
    """Written out from the risk sets of the hand example (Fine & Gray 1999, eq. 2):
    u = 1: all six at risk, three with x = 1; u = 4: D, E, F plus B weighted 3/4;
    u = 5: E, F plus B weighted 3/4. Failures: A (x = 1), D (x = 0), E (x = 1)."""
    e = np.exp(beta)
    return float(
        2.0 * beta - np.log(3.0 * e + 3.0) - np.log(e + 2.0 + 0.75) - np.log(e + 1.0 + 0.75)
    )


def test_fine_gray_hand_example() -> None:
    """The fit maximises the hand-written weighted partial likelihood: the maximiser
    found by scipy's bounded scalar search on it agrees, and so does the log-likelihood
    at 0 (-log 6 - log 15/4 - log 11/4) (hand count; Fine & Gray 1999)."""
    fit = fine_gray_arrays(HAND_TIME, HAND_CAUSE, HAND_X, tolerance=TIGHT)
    found = optimize.minimize_scalar(
        lambda b: -_hand_log_likelihood(b),
        bounds=(-10, 10),
        method="bounded",
        options={"xatol": 1e-12},
    )
    assert fit.beta[0] == pytest.approx(found.x, abs=1e-6)
    assert fit.log_likelihood == pytest.approx(_hand_log_likelihood(fit.beta[0]), abs=1e-12)
    assert fit.log_likelihood_null == pytest.approx(
        -np.log(6.0) - np.log(15 / 4) - np.log(11 / 4), abs=1e-12
    )
    endpoints = pl.DataFrame(
        {
            "patient_id": list("ABCDEF"),
            "endpoint": "kidney_failure",
            "years": HAND_TIME,
            "event": (HAND_CAUSE == 1).astype(np.int8),
            "competing": (HAND_CAUSE == 2).astype(np.int8),
            "group": np.where(HAND_X[:, 0] == 1, "b", "a"),
        }
    )
    row = FineGray().fit(endpoints).summary().row(0, named=True)
    assert row["term"] == "group=b"
    assert row["log_hr"] == pytest.approx(fit.beta[0], abs=1e-9)


# ---- expanded data set (Geskus 2011) ------------------------------------------------------


def test_fine_gray_equals_weighted_cox_on_expanded_data() -> None:
    """Geskus RB, Biometrics 2011;67:39-49 (doi:10.1111/j.1541-0420.2010.01420.x),
    section 3: the Fine–Gray estimate is the weighted Cox estimate on the expanded
    counting-process data. Computed with lifelines' CoxPHFitter (weights_col, entry_col);
    continuous times, so its Efron ties equal Breslow. Coefficients to 1e-6.

    lifelines' robust standard errors are not compared: its score residuals ignore
    entry times (lifelines 0.30, ``_compute_score_within_strata``). R's coxph with
    cluster(id) on these rows gives the robust variance that treats the weights as known,
    our ``se_fixed_weights`` (checked in test_competing_risks_r.py)."""
    time, cause, design = _simulated_arrays(180, seed=11)
    ours = fine_gray_arrays(time, cause, design, tolerance=TIGHT)
    rows = geskus_expanded(time, cause, design)
    fitter = CoxPHFitter()
    fitter.fit(
        rows.drop(columns=["id"]),
        duration_col="stop",
        event_col="event",
        entry_col="start",
        weights_col="weight",
        robust=True,  # non-integer weights: lifelines asks for the robust variance
        fit_options={"precision": 1e-12},
    )
    np.testing.assert_allclose(fitter.params_.to_numpy(), ours.beta, atol=1e-6)


def test_fine_gray_without_competing_events_is_cox() -> None:
    """With no competing event every weight is 1 and the risk sets are Cox's (Fine &
    Gray 1999, section 2): coefficients equal lifelines' CoxPHFitter to 1e-8 (continuous
    times, Efron = Breslow); the Fine–Gray sandwich becomes the Lin–Wei robust variance
    (lifelines robust=True) and the naive variance the inverse information."""
    time, cause, design = _simulated_arrays(300, seed=5, competing_rate=1e-12)
    assert not np.any(cause == 2)
    ours = fine_gray_arrays(time, cause, design, tolerance=TIGHT)
    frame = pd.DataFrame({"a": design[:, 0], "b": design[:, 1], "T": time, "E": cause})
    plain = CoxPHFitter().fit(frame, "T", "E", fit_options={"precision": 1e-14})
    robust = CoxPHFitter().fit(frame, "T", "E", robust=True, fit_options={"precision": 1e-14})
    np.testing.assert_allclose(ours.beta, plain.params_.to_numpy(), atol=1e-8)
    np.testing.assert_allclose(ours.se, robust.standard_errors_.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(ours.se_model_based, plain.standard_errors_.to_numpy(), rtol=1e-6)


# ---- recorded R output on the literal cohort ----------------------------------------------
# Produced with R 4 / cmprsk 2.2-11 / survival on SMALL_* (tests/_competing_fixtures.py):
#   d <- data.frame(t = SMALL_YEARS, cause = SMALL_CAUSE, treated = SMALL_TREATED, age = SMALL_AGE)
#   f <- crr(d$t, d$cause, cbind(d$treated, d$age), gtol = 1e-12, maxiter = 100)
#   f$coef; sqrt(diag(f$var)); sqrt(diag(f$invinf))
#   predict(f, cov1 = rbind(c(0, 60), c(1, 60)))
#   cuminc(d$t, d$cause, d$treated)$Tests; timepoints(cuminc(...), c(0.5, 1.5, 2.5, 3.5))$est
#   coxph(Surv(t, cause == k) ~ treated + age, data = d, ties = "efron" / "breslow")

CRR_COEF = [0.709704574362242990, -0.000216653162191482]
CRR_SE = [0.4612690406983411, 0.0262399729377286]
CRR_NAIVE_SE = [0.5071038417802505, 0.0247166550264272]
CRR_PREDICT_TIMES = [0.25, 0.75, 1.25, 1.75, 2.25, 2.75]
CRR_PREDICT_CONTROL_60 = [
    0.0341467367303401, 0.1659156804069167, 0.1882078767170009,
    0.2371592205637829, 0.2981117418550671, 0.3335206552349489,
]  # fmt: skip
CRR_PREDICT_TREATED_60 = [
    0.0682090684805527, 0.3085049459726342, 0.3455657984371383,
    0.4233102704379152, 0.5131414825223625, 0.5617826717681278,
]  # fmt: skip
CUMINC_TEST = {1: (2.43027639923653, 0.119011912266333), 2: (1.63632714543661, 0.200830144150278)}
CUMINC_EST = {  # group 0 = control, 1 = treated; times 0.5, 1.5, 2.5, 3.5
    (0, 1): [0.0434782608695652, 0.263586956521739, 0.320754076086956, 0.320754076086956],
    (1, 1): [0.0588235294117647, 0.294117647058824, 0.567226890756303, 0.672268907563025],
    (0, 2): [0.0, 0.228260869565217, 0.279076086956522, 0.429139775815217],
    (1, 2): [0.1176470588235294, 0.117647058823529, 0.117647058823529, 0.117647058823529],
}
COXPH = {  # (cause, ties): (coef, se)
    (1, "efron"): ([0.77406125467569986, 0.00515758324722421], [0.5052772360996716, 0.0254847909255668]),
    (1, "breslow"): ([0.72873609602224820, 0.00348988413656026], [0.5064957254321329, 0.0247592469583214]),
    (2, "efron"): ([-0.82318570178413975, 0.00696926120613499], [0.7952567045711301, 0.0335885562695467]),
    (2, "breslow"): ([-0.78725202017145979, 0.00397344318956311], [0.795522331235167, 0.033317092292119]),
}  # fmt: skip


def test_fine_gray_matches_recorded_crr() -> None:
    """cmprsk crr (R; recorded above), with ties of every kind: coefficients, robust
    (Fine–Gray) and naive standard errors, and predict.crr's cumulative incidence."""
    time, cause, design = _small_arrays()
    fit = fine_gray_arrays(time, cause, design, tolerance=TIGHT)
    np.testing.assert_allclose(fit.beta, CRR_COEF, rtol=1e-7, atol=1e-10)
    np.testing.assert_allclose(fit.se, CRR_SE, rtol=1e-8)
    np.testing.assert_allclose(fit.se_model_based, CRR_NAIVE_SE, rtol=1e-8)
    np.testing.assert_allclose(fit.failure_times, CRR_PREDICT_TIMES)
    np.testing.assert_allclose(
        fit.cumulative_incidence(np.array([0.0, 60.0])), CRR_PREDICT_CONTROL_60, rtol=1e-8
    )
    np.testing.assert_allclose(
        fit.cumulative_incidence(np.array([1.0, 60.0])), CRR_PREDICT_TREATED_60, rtol=1e-8
    )


def test_gray_test_and_incidence_match_recorded_cuminc() -> None:
    """cmprsk cuminc (R; recorded above): Gray's test statistic and p for each cause,
    and the Aalen–Johansen incidence at 0.5, 1.5, 2.5, 3.5 years per group and cause."""
    time, cause, design = _small_arrays()
    group = design[:, 0].astype(int)
    for k, (statistic, p) in CUMINC_TEST.items():
        recoded = np.where(cause == k, 1, np.where(cause == 0, 0, 2))
        result = gray_test(time, recoded, group)
        assert result.statistic == pytest.approx(statistic, rel=1e-10)
        assert result.p == pytest.approx(p, rel=1e-9)
        assert result.df == 1
    curves = aalen_johansen_by_group(time, cause, group).sort("years")
    grid = pl.DataFrame({"years": [0.5, 1.5, 2.5, 3.5]})
    for (g, k), expected in CUMINC_EST.items():
        column = "event_incidence" if k == 1 else "competing_incidence"
        found = grid.join_asof(curves.filter(pl.col("group") == str(g)), on="years")
        np.testing.assert_allclose(found[column].to_numpy(), expected, atol=1e-12)


@pytest.mark.parametrize(("cause", "ties"), list(COXPH))
def test_cause_specific_matches_recorded_coxph(cause: int, ties: str) -> None:
    """R survival coxph of each cause with the other censored (recorded above),
    Efron and Breslow ties."""
    time, codes, design = _small_arrays()
    fit = cause_specific_arrays(time, codes, design, of_cause=cause, ties=ties, tolerance=TIGHT)  # type: ignore[arg-type]
    coef, se = COXPH[(cause, ties)]
    np.testing.assert_allclose(fit.beta, coef, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(fit.se, se, rtol=1e-7)


def test_cause_specific_matches_lifelines_with_ties() -> None:
    """lifelines CoxPHFitter (Efron ties) of kidney failure with death censored, on
    data rounded to 0.1 years so that many failure times are tied; to 1e-6."""
    endpoints, patients = simulate_competing(400, seed=3, decimals=1)
    model = CauseSpecificCox(covariates=["age", "female"]).fit(endpoints, patients)
    ours = model.summary().filter(pl.col("cause") == "kidney_failure")
    frame = pd.DataFrame(
        {
            "treated": (patients["group"] == "treated").cast(pl.Float64).to_numpy(),
            "age": patients["age"].to_numpy(),
            "female": patients["female"].cast(pl.Float64).to_numpy(),
            "T": endpoints["years"].to_numpy(),
            "E": endpoints["event"].to_numpy(),
        }
    )
    fitter = CoxPHFitter().fit(frame, "T", "E", fit_options={"precision": 1e-12})
    np.testing.assert_allclose(ours["log_hr"].to_numpy(), fitter.params_.to_numpy(), atol=1e-6)
    np.testing.assert_allclose(ours["se"].to_numpy(), fitter.standard_errors_.to_numpy(), rtol=1e-6)


def test_combined_analysis_on_the_literal_cohort() -> None:
    """The combined analysis reports the recorded crr and coxph numbers side by side
    (cmprsk crr / survival coxph, recorded above) and Gray's test of cuminc."""
    endpoints, patients = small_cohort()
    analysis = CompetingRisks(covariates=["age"]).fit(endpoints, patients)
    wide = analysis.side_by_side().filter(pl.col("term") == "group=treated").row(0, named=True)
    assert np.log(wide["subdistribution_hr"]) == pytest.approx(CRR_COEF[0], rel=1e-7)
    assert np.log(wide["cause_specific_hr"]) == pytest.approx(COXPH[(1, "efron")][0][0], rel=1e-7)
    z = 1.959963984540054  # normal 97.5 % point (common practice)
    assert wide["subdistribution_hr_upper"] == pytest.approx(
        np.exp(CRR_COEF[0] + z * CRR_SE[0]), rel=1e-7
    )
    test = analysis.gray_test_.row(0, named=True)
    assert test["test_statistic"] == pytest.approx(CUMINC_TEST[1][0], rel=1e-10)
    assert analysis.summary()["estimable"].all()
    assert "Fine–Gray" in analysis.methods_text()
    assert "Cause-specific" in analysis.methods_text()
