"""Synthetic generator: the drawn cohort matches the scenario's stated model.

Sampling tolerances are about 3.5 standard errors, so that a correct generator fails
less than once in a few thousand runs while a wrong parameter fails at once.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest
import yaml

from kidneycohort import equations
from kidneycohort.synthetic import generate_cohort, load_scenario
from kidneycohort.synthetic.trajectories import Trajectories, first_crossing, gfr_at
from tests._fixtures import REPO_ROOT

SCENARIOS = REPO_ROOT / "synthetic"
TRIAL = SCENARIOS / "trial_two_arm.yaml"
EHR = SCENARIOS / "ehr_cohort.yaml"
Z = 3.5


def _scenario_dict(path: Path) -> dict:
    return yaml.safe_load(path.read_text(encoding="utf-8"))


def _path(truth: pl.DataFrame, t: np.ndarray, floor: float) -> np.ndarray:
    """True GFR written out from the model formula (independently of the module)."""
    b0 = truth["true_intercept"].to_numpy()[:, None]
    b1 = truth["true_chronic_slope"].to_numpy()[:, None]
    a = truth["true_acceleration"].to_numpy()[:, None]
    d = truth["true_acute_dip"].to_numpy()[:, None]
    r = truth["dip_days"].to_numpy()[:, None] / 365.25
    tp = np.maximum(t, 0.0)
    return np.maximum(b0 + b1 * t + a * tp**2 - d * np.minimum(tp / r, 1.0), floor)


# ---- the trajectory formula -----------------------------------------------------------


def test_gfr_path_by_hand() -> None:
    one = np.ones(1)
    # 50 - 2*1 - 0.1*1 - 3 = 44.9 once the 28-day dip is complete
    assert gfr_at(50 * one, -2 * one, -0.1 * one, 3 * one, 28 / 365.25 * one, 4.0, one)[
        0
    ] == pytest.approx(44.9, abs=1e-12)
    # half-way through the ramp (day 14): 50 - 2*t - 0.1*t^2 - 1.5
    t = 14 / 365.25
    expected = 50 - 2 * t - 0.1 * t**2 - 1.5
    got = gfr_at(50 * one, -2 * one, -0.1 * one, 3 * one, 28 / 365.25 * one, 4.0, t * one)
    assert got[0] == pytest.approx(expected, abs=1e-12)
    # before index (screening) the path is the straight line, no dip, no acceleration
    got = gfr_at(50 * one, -2 * one, -0.1 * one, 3 * one, 28 / 365.25 * one, 4.0, -0.5 * one)
    assert got[0] == pytest.approx(51.0, abs=1e-12)
    # the physiological floor
    assert gfr_at(10 * one, -5 * one, 0 * one, 0 * one, one, 4.0, 3 * one)[0] == 4.0


def test_first_crossing_matches_numpy_roots() -> None:
    rng = np.random.default_rng(0)
    n = 300
    traj = Trajectories(
        intercept=rng.uniform(20, 90, n),
        chronic_slope=rng.normal(-3, 3, n),
        # a third without acceleration exercises the linear branch
        acceleration=np.where(
            rng.uniform(size=n) < 1 / 3, 0.0, np.minimum(rng.normal(-0.3, 0.3, n), 0.0)
        ),
        acute_dip=np.maximum(rng.normal(3, 2, n), 0.0),
        dip_years=np.full(n, 28 / 365.25),
        floor=4.0,
    )
    level = traj.intercept * rng.uniform(0.3, 0.9, n)
    got = first_crossing(traj, level)
    # reference: numpy.roots on each quadratic piece, smallest real root in the piece
    expected = np.full(n, np.inf)
    for i in range(n):  # a loop in the test only, to build the reference
        r = traj.dip_years[i]
        pieces = [
            (
                [
                    traj.acceleration[i],
                    traj.chronic_slope[i] - traj.acute_dip[i] / r,
                    traj.intercept[i] - level[i],
                ],
                0.0,
                r,
            ),
            (
                [
                    traj.acceleration[i],
                    traj.chronic_slope[i],
                    traj.intercept[i] - traj.acute_dip[i] - level[i],
                ],
                r,
                np.inf,
            ),
        ]
        for coef, lo, hi in pieces:
            roots = np.roots(np.trim_zeros(np.array(coef), "f"))
            real = roots[np.isreal(roots)].real
            real = real[(real >= lo) & (real <= hi)]
            if real.size:
                expected[i] = real.min()
                break
    finite = np.isfinite(expected)
    assert finite.sum() > 100 and (~finite).sum() > 10
    np.testing.assert_array_equal(np.isfinite(got), finite)
    np.testing.assert_allclose(got[finite], expected[finite], rtol=1e-9, atol=1e-12)
    # and the path is at the level there (where the level is above the floor)
    at = finite & (level > 4.0)
    value = traj.gfr(np.flatnonzero(at), got[at])
    np.testing.assert_allclose(value, level[at], rtol=1e-9)


# ---- the trial scenario ---------------------------------------------------------------


@pytest.fixture(scope="module")
def trial():
    return generate_cohort(TRIAL)


def test_arms_dip_and_slopes_match_the_scenario(trial) -> None:
    s = load_scenario(TRIAL)
    t = trial.truth["patients"]
    placebo, active = t.filter(group="placebo"), t.filter(group="active")
    assert placebo.height == active.height == 1000
    assert (placebo["true_acute_dip"] == 0).all()
    # active dip ~ N(3.0, 1.0) truncated at 0 (P < 0.2 %): mean 3.0, SE 1/sqrt(1000)
    arm = s.groups.arms[1]
    assert abs(active["true_acute_dip"].mean() - arm.acute_dip) < Z * arm.acute_dip_sd / np.sqrt(
        1000
    )
    # slope = mean + covariate effects + shift + rho*sd*z0 + sd*sqrt(1-rho^2)*e: the
    # conditional normal of a bivariate normal given the intercept residual z0
    tr = s.trajectory
    fx = tr.slope_effects
    linear = (
        tr.slope_mean
        + fx.age_per_10_years * (t["age_at_index"] - 60) / 10
        + fx.female * (t["sex"] == "female").cast(pl.Float64)
        + fx.diabetes * t["diabetes"].cast(pl.Float64)
        + fx.log2_uacr * (t["baseline_uacr_mg_g"] / 30).log(2)
    )
    ix = tr.intercept_effects
    mean0 = (
        tr.intercept_mean
        + ix.age_per_10_years * (t["age_at_index"] - 60) / 10
        + ix.female * (t["sex"] == "female").cast(pl.Float64)
        + ix.diabetes * t["diabetes"].cast(pl.Float64)
        + ix.log2_uacr * (t["baseline_uacr_mg_g"] / 30).log(2)
    )
    z0 = (t["true_intercept"] - mean0) / tr.intercept_sd
    rho = tr.intercept_slope_correlation
    shift = (t["group"] == "active").cast(pl.Float64) * arm.slope_difference
    e = (t["true_chronic_slope"] - linear - shift - rho * tr.slope_sd * z0).to_numpy()
    sd_e = tr.slope_sd * np.sqrt(1 - rho**2)
    assert abs(e.mean()) < Z * sd_e / np.sqrt(e.size)
    assert abs(e.std() / sd_e - 1) < 0.06  # SE of an SD ~ 1/sqrt(2n) = 1.6 %
    assert abs(np.corrcoef(e, z0.to_numpy())[0, 1]) < Z / np.sqrt(e.size)
    diff = active["true_chronic_slope"].mean() - placebo["true_chronic_slope"].mean()
    se = np.sqrt(
        placebo["true_chronic_slope"].var() / 1000 + active["true_chronic_slope"].var() / 1000
    )
    assert abs(diff - arm.slope_difference) < Z * se


def test_total_slope_formula(trial) -> None:
    t = trial.truth["patients"]
    horizon = 3.0
    g = _path(t, np.array([[0.0, horizon]]), 4.0)
    np.testing.assert_allclose(t["true_total_slope"], (g[:, 1] - g[:, 0]) / horizon, rtol=1e-12)
    # above the floor: total = chronic + acceleration*T - dip/T (DOMAIN: total vs chronic)
    above = g[:, 1] > 4.0
    closed = (
        t["true_chronic_slope"] + t["true_acceleration"] * horizon - t["true_acute_dip"] / horizon
    )
    np.testing.assert_allclose(
        t["true_total_slope"].to_numpy()[above], closed.to_numpy()[above], rtol=1e-9
    )


def _egfr_at_visit(cohort, visit: str) -> pl.DataFrame:
    rows = (
        cohort.truth["samples"]
        .filter(analyte="creatinine", visit=visit)
        .join(cohort.labs.select("sample_id", "value"), on="sample_id")
        .join(cohort.patients.select("patient_id", "sex", "group"), on="patient_id")
    )
    egfr = equations.evaluate(
        "ckd_epi_2021_cr",
        creatinine_mg_dl=rows["value"].cast(pl.Float64).to_numpy(),
        age=rows["age_at_sample"].to_numpy(),
        sex=rows["sex"].to_numpy(),
    )
    return rows.select("patient_id", "group").with_columns(egfr=pl.Series(egfr))


def test_measured_acute_dip_seen_in_egfr(trial) -> None:
    # Mean eGFR change randomisation -> week 4, active minus placebo: the dip (3.0)
    # plus 28 days of the 1.0/yr slope difference, measured through CKD-EPI 2021 on
    # rounded, noisy creatinine (Inker 2021 NEJM).
    base = _egfr_at_visit(trial, "randomisation")
    week4 = _egfr_at_visit(trial, "week_4")
    change = week4.join(base, on=["patient_id", "group"], suffix="_0").with_columns(
        change=pl.col("egfr") - pl.col("egfr_0")
    )
    by_arm = (
        change.group_by("group")
        .agg(pl.col("change").mean().alias("m"), pl.col("change").var().alias("v"), pl.len())
        .sort("group")
    )
    active, placebo = by_arm.row(0, named=True), by_arm.row(1, named=True)
    diff = active["m"] - placebo["m"]
    se = np.sqrt(active["v"] / active["len"] + placebo["v"] / placebo["len"])
    expected = -3.0 + 1.0 * 28 / 365.25
    assert abs(diff - expected) < Z * se
    assert se < 0.4  # the check has power to see a dip of 3


def test_death_and_loss_to_followup_rates(trial) -> None:
    # Martingale check: observed events = sum of each patient's cumulative hazard up to
    # their exit (Andersen et al., Statistical Models Based on Counting Processes, 1993).
    s = load_scenario(TRIAL)
    d = s.events.death
    t = trial.truth["patients"]
    ev = trial.truth["events"]
    exit_years = ev["end_of_followup_years"].to_numpy()
    grid = np.linspace(0.0, 1.0, 801)[None, :] * exit_years[:, None]
    gfr = _path(t, grid, s.trajectory.gfr_floor)
    age = t["age_at_index"].to_numpy()[:, None] + grid
    kf = ev["kfrt_years"].fill_null(np.inf).to_numpy()[:, None]
    hazard = (
        d.rate_per_year_at_60
        * d.hazard_ratio_per_10_years ** ((age - 60) / 10)
        * d.hazard_ratio_per_10_below_60 ** (np.maximum(60 - gfr, 0) / 10)
        * np.where(grid >= kf, d.hazard_ratio_after_kidney_failure, 1.0)
    )
    expected_deaths = np.trapezoid(hazard, grid, axis=1).sum()
    observed_deaths = (ev["end_reason"] == "death").sum()
    assert expected_deaths > 100
    assert abs(observed_deaths - expected_deaths) < Z * np.sqrt(expected_deaths)
    expected_lost = s.events.loss_to_followup_per_year * exit_years.sum()
    observed_lost = (ev["end_reason"] == "loss_to_followup").sum()
    assert abs(observed_lost - expected_lost) < Z * np.sqrt(expected_lost)


def test_kidney_failure_follows_the_threshold_with_lag() -> None:
    data = _scenario_dict(TRIAL)
    data.update(patients=3000, seed=8)
    data["trajectory"].update(intercept_mean=30, intercept_min=16, intercept_max=40, slope_mean=-6)
    data["events"]["death"]["rate_per_year_at_60"] = 0.0
    data["events"]["loss_to_followup_per_year"] = 0.0
    kf = data["events"]["kidney_failure"]
    kf.update(probability=0.7, lag_years_mean=0.25)
    cohort = generate_cohort(data)
    ev = cohort.truth["events"]
    reached = ev["threshold_reached_years"].fill_null(np.inf).to_numpy()
    end = ev["end_of_followup_years"].to_numpy()
    # GFR at the crossing equals the patient's threshold
    t = cohort.truth["patients"]
    hit = reached < end
    g = _path(t.filter(pl.Series(hit)), reached[hit][:, None], 4.0)[:, 0]
    np.testing.assert_allclose(g, ev["kfrt_threshold_gfr"].to_numpy()[hit], rtol=1e-9)
    # P(kidney failure observed) = p * (1 - exp(-(end - reached) / lag)) for exponential lag
    expected = (0.7 * (1 - np.exp(-(end[hit] - reached[hit]) / 0.25))).sum()
    observed = ev["kfrt_date"].is_not_null().sum()
    assert expected > 200
    assert abs(observed - expected) < Z * np.sqrt(expected)
    kfrt = ev["kfrt_years"].to_numpy()
    got = np.isfinite(kfrt) & ~np.isnan(kfrt)
    assert (kfrt[got] >= reached[got]).all()


# ---- the EHR scenario -----------------------------------------------------------------


@pytest.fixture(scope="module")
def ehr():
    return generate_cohort(EHR, patients=4000, seed=21)


def test_ehr_subsets_and_aki(ehr) -> None:
    s = load_scenario(EHR)
    samples = ehr.truth["samples"]
    n = ehr.patients.height
    for analyte, fraction in (("cystatin_c", 0.1), ("uacr", 0.35)):
        share = samples.filter(analyte=analyte)["patient_id"].n_unique() / n
        assert abs(share - fraction) < Z * np.sqrt(fraction * (1 - fraction) / n)
    admissions = (
        samples.filter(pl.col("admission").is_not_null())
        .group_by("admission")
        .agg(pl.col("aki_creatinine_multiplier").max().alias("peak"))
    )
    p = s.schedule.inpatient.aki_probability
    share_aki = (admissions["peak"] > 1).mean()
    assert admissions.height > 300
    assert abs(share_aki - p) < Z * np.sqrt(p * (1 - p) / admissions.height)
    # a spike never exceeds the stated peak ratio
    assert admissions["peak"].max() <= s.schedule.inpatient.aki_peak_creatinine_ratio_max


def test_ehr_testing_rises_as_gfr_falls(ehr) -> None:
    # Outpatient tests (index test excluded) against the model's expected count: the
    # integral of base * ratio^((60 - GFR)/10)_+ over each patient's testing window.
    s = load_scenario(EHR)
    sched = s.schedule
    t = ehr.truth["patients"]
    ev = ehr.truth["events"]
    stop = np.minimum(
        ev["end_of_followup_years"].to_numpy(), ev["kfrt_years"].fill_null(np.inf).to_numpy()
    )
    start = -s.calendar.lookback_years
    grid = start + np.linspace(0.0, 1.0, 401)[None, :] * (stop[:, None] - start)
    gfr = _path(t, grid, s.trajectory.gfr_floor)
    rate = sched.outpatient_tests_per_year * sched.rate_ratio_per_10_below_60 ** (
        np.maximum(60 - gfr, 0) / 10
    )
    expected = np.trapezoid(rate, grid, axis=1)
    outpatient = ehr.truth["samples"].filter(
        pl.col("visit").is_null(), analyte="creatinine", setting="outpatient"
    )
    counts = (
        t.select("patient_id")
        .join(outpatient.group_by("patient_id").len(), on="patient_id", how="left")
        .fill_null(0)["len"]
        .to_numpy()
    )
    # a few outpatient tests fall on an admission or index day and are not kept
    assert 0.93 * expected.sum() < counts.sum() < expected.sum() + Z * np.sqrt(expected.sum())
    low = t["true_intercept"].to_numpy() < 50
    per_year = counts / (stop - start)
    assert per_year[low].mean() > 1.3 * per_year[~low].mean()


def test_uacr_tracks_the_slope(ehr) -> None:
    t = ehr.truth["patients"]
    # baseline albuminuria lowers the slope (slope_effects.log2_uacr = -0.3)
    r = np.corrcoef(np.log(t["baseline_uacr_mg_g"].to_numpy()), t["true_chronic_slope"].to_numpy())[
        0, 1
    ]
    assert r < -3 / np.sqrt(t.height)
