"""Simulated power and type I error against closed forms, within Monte Carlo error.

The fast tier uses few trials (wide but honest tolerances of three Monte Carlo SEs);
the ``slow`` tier (``pytest -m slow``) repeats the checks with 1,000 trials.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from kidneycohort.design import simulate_power
from tests.design.conftest import QUARTERLY_DAYS, cox_design, slope_design

ALPHA = 0.05
Z = stats.norm.ppf(1 - ALPHA / 2)
CKD_EPI_2021_EXPONENT = 1.200  # creatinine above kappa (Inker 2021 NEJM; from memory)


def _two_sample_power(difference: float, variance: float, n_each: float) -> float:
    """Power of a two-sided two-sample z test of means with known variance (normal
    approximation; common practice, e.g. Chow, Shao & Wang, Sample Size Calculations in
    Clinical Research, 2nd ed. 2008, ch. 3 - from memory)."""
    se = math.sqrt(variance * 2 / n_each)
    return float(stats.norm.cdf(difference / se - Z) + stats.norm.cdf(-difference / se - Z))


def _schoenfeld_power(events: float, log_hr: float, share: float = 0.5) -> float:
    """Power of the Cox / log-rank test with ``events`` events: Schoenfeld D. Sample-size
    formula for the proportional-hazards regression model. Biometrics 1983;39:499-503,
    D = (z_{1-a/2} + z_{1-b})^2 / (p (1-p) log(HR)^2), solved for the power."""
    return float(stats.norm.cdf(math.sqrt(events * share * (1 - share)) * abs(log_hr) - Z))


def _slope_variance(slope_sd: float, cv: float, mean_gfr_squared: float) -> float:
    """Variance of one patient's least-squares slope: between-patient slope variance
    plus measurement variance over the spread of visit times (sum of squares Sxx).
    eGFR varies with creatinine^-1.2, so its CV is 1.2 x the creatinine CV (delta
    method); 2-decimal creatinine reporting adds a negligible ~0.2 % relative error."""
    years = np.array(QUARTERLY_DAYS) / 365.25
    sxx = float(((years - years.mean()) ** 2).sum())
    noise = mean_gfr_squared * (CKD_EPI_2021_EXPONENT * cv) ** 2
    return slope_sd**2 + noise / sxx


@pytest.mark.parametrize(
    ("trials", "null_trials"),
    [(100, 0), pytest.param(1000, 1000, marks=pytest.mark.slow)],
    ids=["fast", "slow"],
)
def test_slope_power_matches_the_two_sample_closed_form(
    plain_base: str, tmp_path: Path, trials: int, null_trials: int
) -> None:
    # a mixed-model fit costs ~0.1 s whatever the trial size: the fast tier runs 100
    # trials under the effect only (type I error is checked on Cox below and here slow)
    n, effect = 80, 1.7
    design = slope_design(
        plain_base, sizes=[n], trials=trials, effect=effect, null_trials=null_trials
    )
    result = simulate_power(design, out=tmp_path / "d")
    # true GFR over follow-up: intercept ~ 50 (SD 8, truncated 35-65), slope ~ -1.15 on
    # average over both arms, visit times uniform over 0-3 years
    mean_gfr = 50 - 1.15 * 1.5
    variance = _slope_variance(3.0, 0.01, mean_gfr**2 + 8.0**2)
    expected = _two_sample_power(effect, variance, n / 2)
    row = result.power.row(0, named=True)
    assert row["endpoint"] == "slope" and row["estimable_trials"] == trials
    mc_se = math.sqrt(expected * (1 - expected) / trials)
    assert abs(row["rejection_rate"] - expected) < 3 * mc_se, (row["rejection_rate"], expected)
    # the estimate is unbiased for the chronic effect, its CI covers at about 95 %
    assert abs(row["bias"]) < 3 * row["bias_mc_se"]
    assert abs(row["coverage"] - 0.95) < 3 * math.sqrt(0.95 * 0.05 / trials) + 0.01
    if null_trials:
        null = result.type_one_error.row(0, named=True)
        tolerance = 3 * math.sqrt(ALPHA * (1 - ALPHA) / null_trials)
        assert abs(null["rejection_rate"] - ALPHA) < tolerance


@pytest.mark.parametrize(
    "trials", [120, pytest.param(1000, marks=pytest.mark.slow)], ids=["fast", "slow"]
)
def test_cox_power_matches_schoenfeld_and_type_one_error_is_nominal(
    tmp_path: Path, trials: int
) -> None:
    # a chronic effect only (no acute effect), hazard ratio about 0.7, about 130 events per
    # trial: Schoenfeld's variance 4/D (taken under the null) is close to the Wald
    # variance 1/D_control + 1/D_treatment here; it is optimistic far from HR = 1
    design = cox_design(sizes=[500], trials=trials, reference=20_000)
    result = simulate_power(design, out=tmp_path / "d")
    for endpoint in ("egfr_decline_40", "decline_40_or_kidney_failure"):
        row = result.power.filter(result.power["endpoint"] == endpoint).row(0, named=True)
        # the effect size is the trials' mean log hazard ratio (the hazards are not
        # proportional, so there is no closed-form one); Schoenfeld's formula then gives
        # the power from it and the mean number of events
        log_hr, log_hr_mc_se = row["mean_estimate"], row["bias_mc_se"]
        expected = _schoenfeld_power(row["mean_events"], log_hr)
        slope = stats.norm.pdf(stats.norm.ppf(expected)) * math.sqrt(row["mean_events"] / 4)
        tolerance = 3 * math.sqrt(expected * (1 - expected) / trials + (slope * log_hr_mc_se) ** 2)
        assert abs(row["rejection_rate"] - expected) < tolerance, (endpoint, row, expected)
        # the large reference trial estimates the same log hazard ratio (within its SE)
        reference_se = 2 / math.sqrt(20_000 / 500 * row["mean_events"])
        assert abs(row["true_value"] - log_hr) < 3 * math.hypot(reference_se, log_hr_mc_se)
        null = result.type_one_error.filter(result.type_one_error["endpoint"] == endpoint)
        rate = null["rejection_rate"][0]
        assert abs(rate - ALPHA) < 3 * math.sqrt(ALPHA * (1 - ALPHA) / trials), (endpoint, rate)
