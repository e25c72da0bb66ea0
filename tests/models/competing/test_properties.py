"""Properties of the competing-risks estimators on simulated cohorts (hypothesis draws
the seeds and sizes): order invariance, incidence adding up, label invariance."""

from __future__ import annotations

import numpy as np
import polars as pl
from hypothesis import given, settings
from hypothesis import strategies as st

from kidneycohort.models.competing._analysis import CompetingRisks
from kidneycohort.models.competing._cause_specific import cause_specific_arrays
from kidneycohort.models.competing._fine_gray import fine_gray_arrays
from kidneycohort.models.competing._gray_test import aalen_johansen_by_group, gray_test
from tests._fixtures.competing import simulate_competing

cohorts = st.tuples(
    st.integers(60, 300),  # patients
    st.integers(0, 10_000),  # seed
    st.sampled_from([None, 1, 2]),  # rounding of years: ties or none
)


def _arrays(n: int, seed: int, decimals: int | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    endpoints, patients = simulate_competing(n, seed, decimals=decimals)
    cause = (endpoints["event"] + 2 * endpoints["competing"]).to_numpy()
    design = np.column_stack(
        [(patients["group"] == "treated").to_numpy(), patients["age"].to_numpy()]
    ).astype(float)
    return endpoints["years"].to_numpy(), cause, design


@settings(max_examples=25)
@given(cohorts)
def test_row_order_does_not_matter(cohort: tuple[int, int, int | None]) -> None:
    """Partition rule (DEVELOPERS.md): any row order gives the same estimates, standard
    errors and test statistic (to rounding)."""
    time, cause, design = _arrays(*cohort)
    order = np.random.default_rng(cohort[1] + 1).permutation(time.size)
    a = fine_gray_arrays(time, cause, design)
    b = fine_gray_arrays(time[order], cause[order], design[order])
    assert a.converged == b.converged
    np.testing.assert_allclose(a.beta, b.beta, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(a.se, b.se, rtol=1e-8)
    np.testing.assert_allclose(
        a.baseline_cumulative_hazard, b.baseline_cumulative_hazard, rtol=1e-8
    )
    group = design[:, 0]
    ga, gb = gray_test(time, cause, group), gray_test(time[order], cause[order], group[order])
    assert ga.statistic is not None and gb.statistic is not None
    assert abs(ga.statistic - gb.statistic) <= 1e-9 * max(1.0, ga.statistic)
    ca = cause_specific_arrays(time, cause, design, ties="efron")
    cb = cause_specific_arrays(time[order], cause[order], design[order], ties="efron")
    np.testing.assert_allclose(ca.beta, cb.beta, rtol=1e-8, atol=1e-10)


@settings(max_examples=15)
@given(cohorts)
def test_patient_order_in_both_tables_does_not_matter(cohort: tuple[int, int, int | None]) -> None:
    """Shuffling the endpoints and the patients tables independently changes nothing."""
    endpoints, patients = simulate_competing(cohort[0], cohort[1], decimals=cohort[2])
    a = CompetingRisks(covariates=["age", "female"]).fit(endpoints, patients)
    b = CompetingRisks(covariates=["age", "female"]).fit(
        endpoints.sample(fraction=1.0, shuffle=True, seed=1),
        patients.sample(fraction=1.0, shuffle=True, seed=2),
    )
    ta, tb = a.summary(), b.summary()
    assert ta["estimable"].to_list() == tb["estimable"].to_list()
    np.testing.assert_allclose(
        ta["log_hr"].to_numpy().astype(float), tb["log_hr"].to_numpy().astype(float), rtol=1e-8
    )
    assert (
        a.gray_test_["p"][0] == np.float64(b.gray_test_["p"][0])
        or abs(a.gray_test_["p"][0] - b.gray_test_["p"][0]) < 1e-9
    )


@settings(max_examples=25)
@given(cohorts)
def test_incidences_and_event_free_survival_add_to_one(cohort: tuple[int, int, int | None]) -> None:
    """Aalen–Johansen: F1(t) + F2(t) + S(t) = 1 with S the Kaplan–Meier estimate of
    being free of both events (Putter, Fiocco & Geskus, Stat Med 2007, section 3);
    each curve is non-decreasing and within [0, 1]."""
    time, cause, design = _arrays(*cohort)
    curves = aalen_johansen_by_group(time, cause, design[:, 0])
    total = curves["event_incidence"] + curves["competing_incidence"] + curves["event_free"]
    np.testing.assert_allclose(total.to_numpy(), 1.0, atol=1e-12)
    steps = curves.group_by("group").agg(
        pl.col("event_incidence").diff().min().alias("f1"),
        pl.col("competing_incidence").diff().min().alias("f2"),
    )
    assert (steps["f1"].fill_null(0) >= -1e-15).all() and (steps["f2"].fill_null(0) >= -1e-15).all()


@settings(max_examples=25)
@given(cohorts)
def test_gray_test_does_not_depend_on_group_labels(cohort: tuple[int, int, int | None]) -> None:
    """The K-sample statistic is the same whichever group is left out of the quadratic
    form (the scores of all K groups sum to zero; Gray 1988, section 2)."""
    time, cause, _ = _arrays(*cohort)
    rng = np.random.default_rng(cohort[1])
    group = rng.integers(0, 3, time.size)
    a = gray_test(time, cause, group)
    b = gray_test(time, cause, 2 - group)
    assert a.statistic is not None and b.statistic is not None
    assert abs(a.statistic - b.statistic) <= 1e-8 * max(1.0, a.statistic)


@settings(max_examples=25)
@given(cohorts)
def test_fine_gray_without_competing_events_equals_breslow_cox(
    cohort: tuple[int, int, int | None],
) -> None:
    """No competing events: the Fine–Gray partial likelihood is Cox's with Breslow ties
    (Fine & Gray 1999, section 2) — equal to 1e-8, ties or not."""
    time, cause, design = _arrays(*cohort)
    censored = np.where(cause == 2, 0, cause)
    fg = fine_gray_arrays(time, censored, design, tolerance=1e-12)
    cox = cause_specific_arrays(time, censored, design, ties="breslow", tolerance=1e-12)
    np.testing.assert_allclose(fg.beta, cox.beta, atol=1e-8)
    np.testing.assert_allclose(fg.se_model_based, cox.se, rtol=1e-8)
