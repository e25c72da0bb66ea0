"""Per-patient OLS slopes against numpy.polyfit and statsmodels OLS."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from polars.testing import assert_frame_equal

from kidneycohort import schemas
from kidneycohort.errors import ConfigError
from kidneycohort.slopes import SlopeRule, egfr_slopes
from kidneycohort.value_filter import ValueFilterRule
from tests._fixtures import REPO_ROOT
from tests._fixtures.derivations import EQ, egfr_table, random_cohort, seeds


def test_slopes_equal_numpy_polyfit_and_statsmodels_ols():
    df = random_cohort(11, n_patients=80)
    ours = egfr_slopes(df, SlopeRule(min_values=2, min_span_years=0.0))
    checked = 0
    for pid in ours.filter(pl.col("n_values") >= 3)["patient_id"].to_list()[:40]:
        sub = df.filter(pl.col("patient_id") == pid)
        x = sub["years_from_index"].to_numpy()
        y = sub["egfr"].to_numpy()
        row = ours.filter(pl.col("patient_id") == pid).row(0, named=True)
        slope, intercept = np.polyfit(x, y, 1)
        fit = sm.OLS(y, sm.add_constant(x)).fit()
        log_slope = np.polyfit(x, np.log(y), 1)[0]
        assert row["slope_per_year"] == pytest.approx(slope, abs=1e-9, rel=1e-9)
        assert row["intercept"] == pytest.approx(intercept, abs=1e-9, rel=1e-9)
        assert row["slope_per_year"] == pytest.approx(fit.params[1], abs=1e-9, rel=1e-9)
        assert row["slope_se"] == pytest.approx(fit.bse[1], abs=1e-9, rel=1e-9)
        assert row["log_slope_pct_per_year"] == pytest.approx(
            100 * np.expm1(log_slope), abs=1e-9, rel=1e-9
        )
        assert row["n_values"] == len(x)
        assert row["span_years"] == pytest.approx(x.max() - x.min(), abs=1e-12)
        checked += 1
    assert checked >= 20


def test_exact_line_has_zero_standard_error():
    # eGFR 60 at index falling 4 per year, values at 0, 0.5, 1, 2 years
    rows = [("a", round(t * 365.25), 60 - 4 * round(t * 365.25) / 365.25) for t in (0, 0.5, 1, 2)]
    row = egfr_slopes(egfr_table(rows)).row(0, named=True)
    assert row["slope_per_year"] == pytest.approx(-4.0, abs=1e-9)
    assert row["intercept"] == pytest.approx(60.0, abs=1e-9)
    assert row["slope_se"] == pytest.approx(0.0, abs=1e-6)
    assert row["eligible"] is True
    assert row["rapid_decline"] is False


def test_eligibility_reasons_and_rapid_decline_threshold():
    rows = [
        ("one", 0, 50.0),
        ("two", 0, 50.0),
        ("two", 400, 45.0),
        ("short", 0, 50.0),
        ("short", 100, 49.0),
        ("short", 300, 48.0),
        # exactly -5 per year: KDIGO's rapid progression is a fall *greater than* 5
        ("at5", 0, 50.0),
        ("at5", 365, 50.0 - 5 * 365 / 365.25),
        ("at5", 730, 50.0 - 5 * 730 / 365.25),
        ("fast", 0, 50.0),
        ("fast", 365, 44.0),
        ("fast", 730, 38.0),
        ("empty", 0, None),
    ]
    out = egfr_slopes(egfr_table(rows)).sort("patient_id")
    got = dict(zip(out["patient_id"], out["ineligible_reason"], strict=True))
    assert got == {
        "at5": None,
        "empty": "no_values",
        "fast": None,
        "one": "fewer_than_min_values",
        "short": "span_below_min_years",
        "two": "fewer_than_min_values",
    }
    rapid = dict(zip(out["patient_id"], out["rapid_decline"], strict=True))
    assert rapid["at5"] is False
    assert rapid["fast"] is True
    assert rapid["two"] is None  # not eligible: no flag either way
    # ineligible patients still show their slope when two times exist
    assert out.filter(pl.col("patient_id") == "two")["slope_per_year"][0] == pytest.approx(
        -5 / (400 / 365.25)
    )
    assert out.filter(pl.col("patient_id") == "one")["slope_per_year"][0] is None
    assert out.schema == pl.Schema(schemas.SLOPES)
    lenient = egfr_slopes(egfr_table(rows), SlopeRule(rapid_decline_per_year=4.9))
    assert lenient.filter(pl.col("patient_id") == "at5")["rapid_decline"][0] is True


def test_time_window_and_value_filter():
    rows = [
        ("a", 0, 70.0),
        ("a", 30, 50.0, None, "inpatient"),  # excluded by the value filter
        ("a", 120, 60.0),
        ("a", 480, 58.0),
        ("a", 840, 56.0),
    ]
    df = egfr_table(rows)
    chronic = egfr_slopes(df, SlopeRule(from_years=0.25), ValueFilterRule(exclude_aki=False))
    x = np.array([120, 480, 840]) / 365.25
    assert chronic["slope_per_year"][0] == pytest.approx(
        np.polyfit(x, [60.0, 58.0, 56.0], 1)[0], abs=1e-9
    )
    assert chronic["n_values"][0] == 3
    everything = egfr_slopes(df)
    assert everything["n_values"][0] == 5
    with pytest.raises(ConfigError, match="from_years"):
        SlopeRule(from_years=2, to_years=1)


def test_nonpositive_value_gives_no_log_slope():
    rows = [("a", 0, 5.0), ("a", 200, 0.0), ("a", 400, 2.0)]
    row = egfr_slopes(egfr_table(rows)).row(0, named=True)
    assert row["log_slope_pct_per_year"] is None
    assert row["slope_per_year"] is not None


@settings(max_examples=15, deadline=None)
@given(seed=seeds)
def test_partition_and_row_order_invariance(seed):
    df = random_cohort(seed, n_patients=30, equations=(EQ, "other"))
    vf = ValueFilterRule()
    whole = egfr_slopes(df, value_filter=vf).sort("patient_id", "equation")
    part = df["patient_id"].unique().sort().sample(fraction=0.5, seed=seed).implode()
    split = pl.concat(
        [
            egfr_slopes(df.filter(pl.col("patient_id").is_in(part)), value_filter=vf),
            egfr_slopes(df.filter(~pl.col("patient_id").is_in(part)), value_filter=vf),
        ]
    ).sort("patient_id", "equation")
    assert_frame_equal(whole, split, abs_tol=1e-9)
    shuffled = egfr_slopes(df.sample(fraction=1.0, shuffle=True, seed=seed), value_filter=vf)
    assert_frame_equal(whole, shuffled.sort("patient_id", "equation"), abs_tol=1e-9)


def test_recovery_of_true_arm_slopes_on_the_synthetic_trial():
    """Noise-free synthetic two-arm trial: mean per-patient chronic slopes per arm.

    The generator's true GFR is b0 + b1 t + a t^2 - D after the acute dip (its package
    docstring). With no measurement noise, eGFR from the generated creatinine is the true
    GFR, so the OLS slope over a patient's sample times x is exactly
    b1 + a * sum((x - mean x) x^2) / sum((x - mean x)^2); averaged per arm this must
    match our slopes, and the arm difference must match the true slope difference.
    """
    yaml = pytest.importorskip("yaml")

    from kidneycohort.equations import evaluate
    from kidneycohort.synthetic import generate_cohort

    path = REPO_ROOT / "synthetic" / "trial_two_arm.yaml"
    scenario = yaml.safe_load(path.read_text())
    scenario["noise_off"] = True
    cohort = generate_cohort(scenario, patients=400, seed=7)
    truth = cohort.truth["patients"]
    samples = cohort.truth["samples"].filter(pl.col("analyte") == "creatinine")
    samples = samples.join(truth.select("patient_id", "sex"), on="patient_id")
    egfr = samples.select(
        "patient_id",
        pl.col("sample_date").cast(pl.Date),
        "years_from_index",
        pl.lit("ckd_epi_2021_cr").alias("equation"),
        pl.Series(
            "egfr",
            evaluate(
                "ckd_epi_2021_cr",
                creatinine_mg_dl=samples["measured_value"].to_numpy(),
                age=samples["age_at_sample"].to_numpy(),
                sex=samples["sex"].to_numpy(),
            ),
        ),
    )
    # noise off: the eGFR recomputed from creatinine is the true GFR
    assert np.allclose(egfr["egfr"].to_numpy(), samples["true_gfr"].to_numpy(), atol=1e-6)
    rule = SlopeRule(from_years=0.25, to_years=3.0)
    ours = egfr_slopes(egfr, rule).filter("eligible")
    used = egfr.filter(pl.col("years_from_index").is_between(0.25, 3.0))
    dx = pl.col("years_from_index") - pl.col("years_from_index").mean()
    k = used.group_by("patient_id").agg(
        k=(dx * pl.col("years_from_index") ** 2).sum() / (dx**2).sum()
    )
    table = (
        ours.join(truth, on="patient_id")
        .join(k, on="patient_id")
        .with_columns(
            expected=pl.col("true_chronic_slope") + pl.col("true_acceleration") * pl.col("k")
        )
    )
    # a patient whose true GFR met the floor or who left early is not on the quadratic
    above_floor = egfr.group_by("patient_id").agg(pl.col("egfr").min() > 4.5)
    table = table.join(above_floor.filter("egfr"), on="patient_id", how="semi")
    assert table.height > 300
    arms = table.group_by("group").agg(
        pl.col("slope_per_year").mean(),
        pl.col("expected").mean(),
        pl.col("true_chronic_slope").mean(),
    )
    arms = {r["group"]: r for r in arms.iter_rows(named=True)}
    for arm in ("placebo", "active"):
        assert arms[arm]["slope_per_year"] == pytest.approx(arms[arm]["expected"], abs=0.01)
    ours_diff = arms["active"]["slope_per_year"] - arms["placebo"]["slope_per_year"]
    true_diff = arms["active"]["true_chronic_slope"] - arms["placebo"]["true_chronic_slope"]
    assert ours_diff == pytest.approx(true_diff, abs=0.1)
    # and the scenario's stated effect (1.0 per year slower decline) within sampling error
    assert ours_diff == pytest.approx(1.0, abs=0.8)
