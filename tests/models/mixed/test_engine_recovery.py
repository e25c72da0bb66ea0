"""The mixed-model engine recovers the synthetic two-arm trial's treatment effects.

Data run through the library's own stages (generator -> harmonise -> CKD-EPI 2021
creatinine eGFR), then the two-slope model is fitted by the engine directly: cell
means per arm for the intercept, acute slope (0 to the knot) and chronic slope, random
intercept, acute and chronic slopes per patient (unstructured), REML. The knot sits at
the end of the active arm's dip (28 days), where the linear spline matches the true
mean path (see the Notes of ``SlopeModel``).

Truth, recomputed from the generator's documented path
g_i(t) = b0_i + b1_i t + a_i t^2 - D_i min(t / r_i, 1) (``truth["patients"]``):
the active - placebo difference of arm means of the chronic secant
(g_i(T) - g_i(k)) / (T - k), T = 3 years, and of the acute change g_i(k) - g_i(0).
"""

from __future__ import annotations

import warnings

import numpy as np
import polars as pl
import pytest
from scipy import stats

from kidneycohort.egfr import compute_egfr
from kidneycohort.errors import StatisticalWarning
from kidneycohort.harmonize import harmonize_tables
from kidneycohort.models.mixed._engine import fit_patient_mixed_model
from kidneycohort.schemas import DAYS_PER_YEAR
from kidneycohort.synthetic import generate_cohort, load_scenario
from tests._fixtures import REPO_ROOT

SCENARIO = REPO_ROOT / "synthetic" / "trial_two_arm.yaml"
HORIZON = 3.0
FIXED = ["p_intercept", "p_acute", "p_chronic", "a_intercept", "a_acute", "a_chronic"]


def _true_path(t: float) -> pl.Expr:
    ramp = pl.min_horizontal(pl.lit(t) / (pl.col("dip_days") / DAYS_PER_YEAR), pl.lit(1.0))
    return (
        pl.col("true_intercept")
        + pl.col("true_chronic_slope") * t
        + pl.col("true_acceleration") * t**2
        - pl.col("true_acute_dip") * ramp
    )


def _truth(patients: pl.DataFrame, knot: float) -> dict[str, float]:
    means = patients.group_by("group").agg(
        ((_true_path(HORIZON) - _true_path(knot)) / (HORIZON - knot)).mean().alias("chronic"),
        (_true_path(knot) - _true_path(0.0)).mean().alias("acute"),
    )
    by_arm = {row["group"]: row for row in means.iter_rows(named=True)}
    return {q: by_arm["active"][q] - by_arm["placebo"][q] for q in ("chronic", "acute")}


def _rows(seed: int, knot: float) -> tuple[pl.DataFrame, dict[str, float]]:
    scenario = load_scenario(SCENARIO)
    cohort = generate_cohort(scenario, patients=300, seed=seed)
    harmonised = harmonize_tables(cohort.labs, cohort.patients, cohort.events)
    egfr = compute_egfr(harmonised.labs, harmonised.patients, ["ckd_epi_2021_cr"])
    active = pl.col("group") == "active"
    t1 = pl.min_horizontal("years_from_index", pl.lit(knot))
    t2 = (pl.col("years_from_index") - knot).clip(lower_bound=0.0)
    rows = (
        egfr.filter(pl.col("years_from_index") >= 0)
        .join(harmonised.patients.select("patient_id", "group"), on="patient_id")
        .select(
            "patient_id",
            "egfr",
            t1=t1,
            t2=t2,
            p_intercept=(~active).cast(pl.Float64),
            p_acute=pl.when(active).then(0.0).otherwise(t1),
            p_chronic=pl.when(active).then(0.0).otherwise(t2),
            a_intercept=active.cast(pl.Float64),
            a_acute=pl.when(active).then(t1).otherwise(0.0),
            a_chronic=pl.when(active).then(t2).otherwise(0.0),
        )
    )
    return rows, _truth(cohort.truth["patients"], knot)


@pytest.mark.slow
def test_treatment_difference_in_chronic_slope_is_covered_across_seeds() -> None:
    """20 seeds x 300 patients. The 95 % CI of the active - placebo chronic slope
    difference covers the truth of its cohort in at least 16 of 20 runs (with true 95 %
    coverage, fewer than 16 has binomial probability 0.0026, scipy.stats.binom); so does
    the acute change. The mean estimate over seeds is within 3 standard errors of the
    mean truth, and every fit converges without a fallback. Some seeds give a singular
    3 x 3 random-effects covariance (the acute slope varies little beyond the dip); that
    is reported with a boundary warning, which is recorded here and counted."""
    assert stats.binom.cdf(15, 20, 0.95) == pytest.approx(0.0026, abs=0.0001)
    knot = 28 / DAYS_PER_YEAR
    covered = {"chronic": 0, "acute": 0}
    errors = []
    boundary = 0
    for seed in range(1, 21):
        rows, truth = _rows(seed, knot)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", StatisticalWarning)
            fit = fit_patient_mixed_model(
                rows, response="egfr", fixed=FIXED, random=["intercept", "t1", "t2"]
            )
        assert all("at the boundary" in str(w.message) for w in caught), caught
        boundary += bool(caught)
        assert fit.convergence.converged and fit.structure == "unstructured", fit.attempts
        contrasts = fit.contrast({"a_chronic": 1.0, "p_chronic": -1.0}, names=["chronic"]).vstack(
            fit.contrast({"a_acute": knot, "p_acute": -knot}, names=["acute"])
        )
        for row in contrasts.iter_rows(named=True):
            covered[row["contrast"]] += int(row["lower"] <= truth[row["contrast"]] <= row["upper"])
        chronic = contrasts.row(0, named=True)
        errors.append((chronic["estimate"] - truth["chronic"], chronic["se"]))
    assert min(covered.values()) >= 16, (covered, boundary)
    error, se = np.array(errors).T
    assert abs(error.mean()) <= 3 * np.sqrt(np.mean(se**2) / len(se)), errors
