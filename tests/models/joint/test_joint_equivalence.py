"""With the association fixed at zero the joint likelihood factorises into the mixed
model and the survival model, so the joint fit must reproduce each fitted alone (common
practice: Rizopoulos 2012, section 4.1 — the joint model nests the separate ones)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl
import pytest
import statsmodels.api as sm
from lifelines import WeibullAFTFitter
from statsmodels.regression.mixed_linear_model import MixedLM

from kidneycohort.models.joint import JointCohortTruth, JointSlopeModel, simulate_joint_cohort


@pytest.fixture(scope="module")
def cohort() -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    return simulate_joint_cohort(300, seed=11)


@pytest.fixture(scope="module")
def knot_cohort() -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    truth = JointCohortTruth(knot_years=0.5)
    visits = np.array([0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0])
    return simulate_joint_cohort(300, truth=truth, visit_years=visits, seed=12)


def _statsmodels_ml(model: JointSlopeModel):
    data = model.data_
    code = data.group_code[data.row_patient]
    z = data.row_design
    x = np.hstack([(code == g)[:, None] * z for g in range(len(data.groups))])
    fit = MixedLM(data.row_response, x, groups=data.row_patient, exog_re=z).fit(
        reml=False, method=["lbfgs"], gtol=1e-10
    )
    return fit


def _parameter(model: JointSlopeModel, name: str) -> float:
    table = model.parameters_
    return float(table.filter(pl.col("parameter") == name)["estimate"][0])


@pytest.mark.parametrize("knot", [None, 0.5])
def test_zero_association_reproduces_statsmodels_mixedlm(cohort, knot_cohort, knot) -> None:
    # reference: statsmodels MixedLM by maximum likelihood on the same values, and the
    # Poisson GLM of the piecewise-exponential dropout model (independent of the joint code)
    egfr, patients, endpoints = cohort if knot is None else knot_cohort
    model = JointSlopeModel(knot, reference_group="placebo", fixed_association=0.0).fit(
        egfr, patients, endpoints
    )
    assert model.diagnostics_["converged"]
    reference = _statsmodels_ml(model)
    lay, x = model.layout_, model.optimum_.x
    np.testing.assert_allclose(x[lay.beta], reference.fe_params, rtol=0, atol=2e-3)
    factor = lay.factor(x)
    np.testing.assert_allclose(factor @ factor.T, reference.cov_re, rtol=2e-3, atol=2e-3)
    assert np.exp(2 * x[lay.log_sigma]) == pytest.approx(reference.scale, rel=1e-4)
    glm, constant = _poisson_glm(model)
    # the joint log-likelihood is the mixed one plus the survival one
    assert model.optimum_.loglik == pytest.approx(reference.llf + glm.llf - constant, abs=1e-4)
    assert model.mixed_.loglik == pytest.approx(reference.llf, abs=1e-4)
    # the "mixed" rows (exact engine, ML) and the joint rows agree at association 0
    table = model.summary()
    joint = table.filter(pl.col("model") == "joint", pl.col("quantity") != "log_hazard_ratio")
    mixed = table.filter(pl.col("model") == "mixed")
    np.testing.assert_allclose(joint["estimate"], mixed["estimate"], atol=2e-4)
    np.testing.assert_allclose(joint["se"], mixed["se"], rtol=0.02)


def _split_follow_up(model: JointSlopeModel) -> pd.DataFrame:
    data, cuts = model.data_, model.cuts_
    edges = np.concatenate([[0.0], cuts, [np.inf]])
    start = np.minimum(edges[:-1][None, :], data.time[:, None])
    end = np.minimum(edges[1:][None, :], data.time[:, None])
    exposure = end - start
    piece = np.searchsorted(edges, data.time, side="left") - 1
    events = (np.arange(cuts.size + 1)[None, :] == piece[:, None]) * data.event[:, None]
    keep = exposure > 0
    rows = np.nonzero(keep)
    return pd.DataFrame(
        {
            "events": events[keep],
            "exposure": exposure[keep],
            "piece": rows[1],
            "active": (data.group_code[rows[0]] == 1).astype(float),
        }
    )


def _poisson_glm(model: JointSlopeModel):
    """The piecewise-exponential model as a Poisson GLM on split follow-up, and the
    constant sum(d log exposure) that separates its log-likelihood from the survival one."""
    split = _split_follow_up(model)
    design = pd.get_dummies(split["piece"], prefix="piece", dtype=float)
    design["active"] = split["active"]
    glm = sm.GLM(
        split["events"], design, family=sm.families.Poisson(), offset=np.log(split["exposure"])
    ).fit(tol=1e-12)
    return glm, float((split["events"] * np.log(split["exposure"])).sum())


def test_zero_association_reproduces_poisson_glm_on_split_follow_up(cohort) -> None:
    # reference: the piecewise-exponential model is a Poisson GLM on follow-up split at
    # the cut points with log exposure as offset (Holford 1980; common practice)
    egfr, patients, endpoints = cohort
    model = JointSlopeModel(reference_group="placebo", fixed_association=0.0).fit(
        egfr, patients, endpoints
    )
    glm, constant = _poisson_glm(model)
    lay, x = model.layout_, model.optimum_.x
    np.testing.assert_allclose(x[lay.hazard], glm.params.iloc[:-1], atol=1e-5)
    assert x[lay.gamma][0] == pytest.approx(glm.params["active"], abs=1e-5)
    se = model.parameters_["se"].to_numpy()
    np.testing.assert_allclose(se[lay.hazard], glm.bse.iloc[:-1], rtol=1e-3)
    survival = model.optimum_.loglik - model.mixed_.loglik
    assert survival == pytest.approx(glm.llf - constant, abs=1e-4)


def test_zero_association_reproduces_lifelines_weibull(cohort) -> None:
    # reference: lifelines WeibullAFTFitter; its H(t) = (t / exp(b0 + b1 x))^rho, so our
    # log scale is -rho b0 and our log hazard ratio is -rho b1
    egfr, patients, endpoints = cohort
    model = JointSlopeModel(
        reference_group="placebo", baseline_hazard="weibull", fixed_association=0.0
    ).fit(egfr, patients, endpoints)
    data = model.data_
    frame = pd.DataFrame(
        {"T": data.time, "E": data.event, "active": (data.group_code == 1).astype(float)}
    )
    aft = WeibullAFTFitter().fit(frame, "T", "E")
    rho = float(np.exp(aft.params_[("rho_", "Intercept")]))
    b0 = float(aft.params_[("lambda_", "Intercept")])
    b1 = float(aft.params_[("lambda_", "active")])
    lay, x = model.layout_, model.optimum_.x
    assert np.exp(x[lay.hazard][1]) == pytest.approx(rho, rel=1e-4)
    assert x[lay.hazard][0] == pytest.approx(-rho * b0, abs=1e-3)
    assert x[lay.gamma][0] == pytest.approx(-rho * b1, abs=1e-3)
    survival = model.optimum_.loglik - model.mixed_.loglik
    assert survival == pytest.approx(aft.log_likelihood_, abs=1e-4)


def test_free_association_is_estimated_and_improves_the_likelihood(cohort) -> None:
    # from memory: nested models, the larger one cannot fit worse
    egfr, patients, endpoints = cohort
    free = JointSlopeModel(reference_group="placebo").fit(egfr, patients, endpoints)
    fixed = JointSlopeModel(reference_group="placebo", fixed_association=0.0).fit(
        egfr, patients, endpoints
    )
    assert free.optimum_.loglik >= fixed.optimum_.loglik - 1e-6
    association = free.summary().filter(pl.col("quantity") == "association")
    truth = JointCohortTruth().association
    assert association["lower"][0] < truth < association["upper"][0]


def test_separate_mixed_model_reaches_the_statsmodels_optimum_from_a_boundary_start() -> None:
    # reference: statsmodels MixedLM (ML). On this cohort the exact engine's ML fit, used
    # only as the starting value, stops at a singular random-effects covariance; the
    # floored start lets the mixed fit reach statsmodels' optimum.
    truth = JointCohortTruth(hazard_at_45=0.02)
    visits = np.array([0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0])
    egfr, patients, endpoints = simulate_joint_cohort(
        1250, truth=truth, visit_years=visits, seed=1250
    )
    model = JointSlopeModel(reference_group="placebo").fit(egfr, patients, endpoints)
    reference = _statsmodels_ml(model)
    assert model.mixed_.loglik == pytest.approx(reference.llf, abs=1e-4)
    lay = model.layout_
    np.testing.assert_allclose(model.mixed_.x[lay.beta], reference.fe_params, atol=2e-3)
