"""Numerical checks of the joint likelihood: analytic gradient against central
differences, and the adaptive quadrature error shrinking with the number of nodes."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from kidneycohort.models.joint import JointCohortTruth, JointSlopeModel, simulate_joint_cohort


@pytest.fixture(scope="module")
def cohort() -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    truth = JointCohortTruth(knot_years=0.5, association=-0.1)
    visits = np.array([0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0])
    return simulate_joint_cohort(120, truth=truth, visit_years=visits, seed=5)


def _central_differences(likelihood, x, grid, step=1e-6):
    out = np.empty_like(x)
    for k in range(x.size):
        up, down = x.copy(), x.copy()
        up[k] += step
        down[k] -= step
        out[k] = (
            likelihood(up, grid, gradient=False)[0] - likelihood(down, grid, gradient=False)[0]
        ) / (2 * step)
    return out


@pytest.mark.parametrize(
    ("knot", "association", "baseline"),
    [
        (None, "current_value", "piecewise"),
        (0.5, "current_value", "piecewise"),
        (0.5, "slope", "piecewise"),
        (None, "current_value", "weibull"),
        (0.5, "slope", "weibull"),
    ],
)
def test_analytic_gradient_matches_central_differences(cohort, knot, association, baseline):
    # common practice: check an analytic gradient against central differences at a point
    # away from the optimum (every parameter moved), on the fixed quadrature grid
    egfr, patients, endpoints = cohort
    model = JointSlopeModel(
        knot, association=association, baseline_hazard=baseline, reference_group="placebo"
    ).fit(egfr, patients, endpoints)
    likelihood = model.likelihood(5)
    rng = np.random.default_rng(0)
    x = model.optimum_.x + rng.normal(0, 0.05, model.optimum_.x.size)
    x[model.layout_.alpha] = -0.05 if association == "current_value" else -0.3
    grid = likelihood.grid(model.optimum_.x)
    analytic = likelihood(x, grid)[1]
    numeric = _central_differences(likelihood, x, grid)
    np.testing.assert_allclose(analytic, numeric, rtol=1e-5, atol=1e-4 * np.abs(numeric).max())


@pytest.mark.parametrize("knot", [None, 0.5])
def test_quadrature_error_shrinks_with_nodes(cohort, knot):
    # Rizopoulos 2012, section 4.3.1: adaptive Gauss-Hermite converges quickly in the
    # number of nodes; compared against a 21-node rule at the same parameters
    egfr, patients, endpoints = cohort
    model = JointSlopeModel(knot, reference_group="placebo").fit(egfr, patients, endpoints)
    table = model.quadrature_error(nodes=(3, 5, 7, 9), reference=21)
    errors = table["abs_error"].to_numpy()
    assert np.all(np.diff(errors) < 0) or errors[-1] < 1e-8
    assert errors[-1] < errors[0] / 10
    assert errors[-1] < 1e-3
