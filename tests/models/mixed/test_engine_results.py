"""The engine's analytic gradient, Henderson's equations, contrasts, trajectories,
tables and likelihood-ratio tests, each against a direct computation."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from scipy import linalg, stats

from kidneycohort.errors import InputDataError
from kidneycohort.models.mixed._blocks import patient_blocks_from_frame
from kidneycohort.models.mixed._engine import fit_patient_mixed_model
from kidneycohort.models.mixed._objective import ProfiledDeviance
from kidneycohort.models.mixed._result import likelihood_ratio_test
from tests._fixtures.mixed_engine import DESIGNS, design_data, design_matrix, simulate_values

ONE_SLOPE = DESIGNS["one_slope"]


@pytest.fixture(scope="module")
def small() -> pl.DataFrame:
    return simulate_values(14, 5, min_values=1, max_values=6, residual_sd=(2.0, 4.0))


def _dense_profiled(frame: pl.DataFrame, deviance: ProfiledDeviance, x: np.ndarray) -> float:
    """The profiled deviance of _mixed_objective written with the dense n x n H (Bates
    et al. 2015, eqs. 34 and 41, doi:10.18637/jss.v067.i01), for finite differences."""
    y = frame["egfr"].to_numpy()
    fixed = design_matrix(frame, ONE_SLOPE.fixed)
    random = design_matrix(frame, ONE_SLOPE.random)
    factor = deviance.factor(x)
    ratio = dict(zip(deviance.groups, np.exp(2 * deviance.log_ratios(x)), strict=True))
    rho = np.array([ratio.get(a, 1.0) for a in frame["arm"].to_list()])
    same = frame["patient_id"].to_numpy()[:, None] == frame["patient_id"].to_numpy()[None, :]
    h = np.where(same, random @ factor @ factor.T @ random.T, 0.0) + np.diag(rho)
    h_inv = np.linalg.inv(h)
    precision = fixed.T @ h_inv @ fixed
    beta = np.linalg.solve(precision, fixed.T @ h_inv @ y)
    rss = (y - fixed @ beta) @ h_inv @ (y - fixed @ beta)
    dof = deviance.dof
    value = np.linalg.slogdet(h)[1] + dof * (1 + np.log(2 * np.pi * rss / dof))
    return float(value + (np.linalg.slogdet(precision)[1] if deviance.reml else 0.0))


@pytest.mark.parametrize("covariance", ["unstructured", "diagonal"])
@pytest.mark.parametrize("reml", [True, False])
@pytest.mark.parametrize("by_group", [False, True])
def test_analytic_gradient_matches_dense_differences(
    small: pl.DataFrame, covariance: str, reml: bool, by_group: bool
) -> None:
    """Common practice: the analytic gradient (Lambda entries and log residual ratios)
    against central differences (step 1e-6) of the dense profiled deviance, at a point
    away from the optimum; the values themselves agree to 1e-9."""
    blocks = patient_blocks_from_frame(
        small,
        response="egfr",
        fixed=ONE_SLOPE.fixed,
        random=ONE_SLOPE.random,
        residual_group="arm",
    )
    deviance = ProfiledDeviance(
        blocks, covariance=covariance, reml=reml, residual_by_group=by_group
    )
    x = (
        np.random.default_rng(3).normal(0.0, 0.4, deviance.n_parameters)
        + np.r_[[1.0] * deviance.n_theta, [0.0] * (deviance.n_parameters - deviance.n_theta)]
    )
    evaluation = deviance(x)
    assert evaluation.value == pytest.approx(_dense_profiled(small, deviance, x), rel=1e-9)
    differences = np.empty_like(x)
    for k in range(x.size):
        step = np.zeros_like(x)
        step[k] = 1e-6
        differences[k] = (
            _dense_profiled(small, deviance, x + step) - _dense_profiled(small, deviance, x - step)
        ) / 2e-6
    np.testing.assert_allclose(evaluation.gradient, differences, rtol=1e-6, atol=1e-6)


@pytest.fixture(scope="module")
def one_slope_fit():
    frame = design_data("one_slope")
    fit = fit_patient_mixed_model(
        frame, response="egfr", fixed=ONE_SLOPE.fixed, random=ONE_SLOPE.random
    )
    return frame, fit


def test_blups_and_patient_estimates_solve_hendersons_equations(one_slope_fit) -> None:
    """Henderson 1975 (doi:10.2307/2529430): with R = sigma^2 I and G at the estimates,
    the mixed-model equations [[X'X, X'Z], [Z'X, Z'Z + sigma^2 G^-1]] [beta; b] =
    [X'y; Z'y] give the same beta and BLUPs, and sigma^2 times the inverse coefficient
    matrix is the prediction-error covariance of (beta, b - b_true): the SE of a
    patient's c'beta + r'b_i is sqrt(w' C^-1 w) sigma for w = (c, r in that patient's
    block)."""
    frame, fit = one_slope_fit
    ids = fit.random_effects["patient_id"].to_list()
    x = design_matrix(frame, ONE_SLOPE.fixed)
    z_rows = design_matrix(frame, ONE_SLOPE.random)
    position = {pid: k for k, pid in enumerate(ids)}
    which = np.array([position[p] for p in frame["patient_id"].to_list()])
    q = z_rows.shape[1]
    z = np.zeros((frame.height, q * len(ids)))
    for a in range(q):
        z[np.arange(frame.height), which * q + a] = z_rows[:, a]
    sigma2 = fit.residual_variance
    penalty = linalg.block_diag(*[sigma2 * np.linalg.inv(fit.random_covariance)] * len(ids))
    coefficients = np.block([[x.T @ x, x.T @ z], [z.T @ x, z.T @ z + penalty]])
    y = frame["egfr"].to_numpy()
    solution = np.linalg.solve(coefficients, np.r_[x.T @ y, z.T @ y])
    p = x.shape[1]
    np.testing.assert_allclose(fit.fixed_effects, solution[:p], rtol=1e-8)
    blups = fit.random_effects.select(list(fit.random_names)).to_numpy().ravel()
    np.testing.assert_allclose(blups, solution[p:], rtol=1e-7, atol=1e-9)
    inverse = sigma2 * np.linalg.inv(coefficients)
    np.testing.assert_allclose(fit.fixed_covariance, inverse[:p, :p], rtol=1e-7)
    # each patient's slope in its own arm: t (+ act_t for active patients) plus b_slope
    active = frame.group_by("patient_id").agg(pl.col("act").first()).sort("patient_id")
    weights = np.zeros((len(ids), p))
    weights[:, 1] = 1.0
    weights[:, 3] = active["act"].to_numpy()
    slopes = fit.patient_contrast(weights, {"t": 1.0})
    w = np.zeros((len(ids), p + q * len(ids)))
    w[:, :p] = weights
    w[np.arange(len(ids)), p + np.arange(len(ids)) * q + 1] = 1.0
    np.testing.assert_allclose(slopes["estimate"], w @ solution, rtol=1e-8)
    np.testing.assert_allclose(
        slopes["se"], np.sqrt(np.einsum("ij,jk,ik->i", w, inverse, w)), rtol=1e-7
    )
    assert slopes["patient_id"].to_list() == ids


def test_contrasts_and_trajectories_are_wald_linear_functions(one_slope_fit) -> None:
    """Common practice: c'beta with SE sqrt(c'Vc), limits estimate -/+ z_(1-a/2) SE and
    two-sided normal p; a trajectory is the contrast of its design rows."""
    _, fit = one_slope_fit
    difference = fit.contrast({"act_t": 1.0}, names=["slope difference"], confidence=0.9)
    se = np.sqrt(fit.fixed_covariance[3, 3])
    z = stats.norm.ppf(0.95)
    row = difference.row(0, named=True)
    assert row["contrast"] == "slope difference"
    assert row["estimate"] == pytest.approx(fit.fixed_effects[3], rel=1e-12)
    assert row["se"] == pytest.approx(se, rel=1e-12)
    assert (row["lower"], row["upper"]) == pytest.approx(
        (fit.fixed_effects[3] - z * se, fit.fixed_effects[3] + z * se), rel=1e-12
    )
    assert row["p"] == pytest.approx(2 * stats.norm.sf(abs(fit.fixed_effects[3]) / se), rel=1e-9)
    times = np.array([0.0, 1.0, 2.5])

    def active(t: np.ndarray) -> np.ndarray:
        return np.column_stack([np.ones_like(t), t, np.ones_like(t), t])

    def placebo(t: np.ndarray) -> np.ndarray:
        return np.column_stack([np.ones_like(t), t, np.zeros_like(t), np.zeros_like(t)])

    paths = fit.mean_trajectory(times, {"active": active, "placebo": placebo})
    assert paths.columns == ["label", "time", "estimate", "se", "lower", "upper", "p"]
    assert paths["label"].to_list() == ["active"] * 3 + ["placebo"] * 3
    expected = fit.contrast(np.vstack([active(times), placebo(times)]))
    np.testing.assert_allclose(paths["estimate"], expected["estimate"], rtol=1e-12)
    np.testing.assert_allclose(paths["se"], expected["se"], rtol=1e-12)
    with pytest.raises(InputDataError, match="contrast: 'slope' is not a fixed effect"):
        fit.contrast({"slope": 1.0})
    with pytest.raises(InputDataError, match="design for 'mean' gave shape"):
        fit.mean_trajectory(times, lambda t: np.ones((t.size, 2)))


def test_tables_and_description(one_slope_fit) -> None:
    """lme4's as.data.frame(VarCorr()) layout: variances, then covariances with their
    correlation, then the residual; SD = sqrt(variance)."""
    _, fit = one_slope_fit
    table = fit.variance_components_table()
    assert table.select("level", "term", "other_term").rows() == [
        ("patient", "intercept", None),
        ("patient", "t", None),
        ("patient", "intercept", "t"),
        ("residual", "all", None),
    ]
    variance, sd = table["variance"].to_numpy(), table["sd_or_correlation"].to_numpy()
    np.testing.assert_allclose(sd[[0, 1, 3]], np.sqrt(variance[[0, 1, 3]]))
    assert sd[2] == pytest.approx(variance[2] / (sd[0] * sd[1]))
    fixed = fit.fixed_effects_table()
    assert fixed.columns == ["term", "estimate", "se", "lower", "upper", "p"]
    assert fixed["term"].to_list() == list(ONE_SLOPE.fixed)
    text = fit.describe()
    assert "REML" in text and "unstructured random effects (intercept, t)" in text
    assert f"{fit.n_patients} patients" in text and "converged in" in text
    assert fit.aic == pytest.approx(-2 * fit.log_likelihood + 2 * 8)  # 4 fixed, 3 G, sigma^2
    assert fit.bic == pytest.approx(-2 * fit.log_likelihood + 8 * np.log(fit.n_observations))


def test_likelihood_ratio_test_refuses_fits_it_cannot_compare(one_slope_fit) -> None:
    """REML likelihoods differ by log|X'V^-1X|, so only ML fits with different fixed
    effects are comparable (Bates et al. 2015, section 5.2.4)."""
    frame, reml = one_slope_fit
    ml = fit_patient_mixed_model(
        frame, response="egfr", fixed=ONE_SLOPE.fixed, random=ONE_SLOPE.random, method="ml"
    )
    fewer_fixed_reml = fit_patient_mixed_model(
        frame, response="egfr", fixed=["intercept", "t"], random=ONE_SLOPE.random
    )
    fewer_fixed_ml = fit_patient_mixed_model(
        frame, response="egfr", fixed=["intercept", "t"], random=ONE_SLOPE.random, method="ml"
    )
    other_rows = fit_patient_mixed_model(
        frame.head(400),
        response="egfr",
        fixed=["intercept", "t"],
        random=ONE_SLOPE.random,
        method="ml",
    )
    with pytest.raises(InputDataError, match="one fit is reml, the other ml"):
        likelihood_ratio_test(fewer_fixed_reml, ml)
    with pytest.raises(InputDataError, match="REML fits with different fixed effects"):
        likelihood_ratio_test(fewer_fixed_reml, reml)
    with pytest.raises(InputDataError, match="fits are to different data"):
        likelihood_ratio_test(other_rows, ml)
    with pytest.raises(InputDataError, match="not more than the smaller's"):
        likelihood_ratio_test(ml, fewer_fixed_ml)
    test = likelihood_ratio_test(fewer_fixed_ml, ml)
    assert test.df == 2
    assert test.statistic == pytest.approx(2 * (ml.log_likelihood - fewer_fixed_ml.log_likelihood))
    assert test.p_value == pytest.approx(stats.chi2.sf(test.statistic, 2))
