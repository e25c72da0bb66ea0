r"""Maximising the joint likelihood: staged adaptive quadrature, L-BFGS-B on whitened
parameters, Newton steps, and a numerical Hessian for the standard errors.

Each stage centres the quadrature nodes (:meth:`JointLikelihood.grid`) at the current
parameters and maximises the fixed-grid log-likelihood with L-BFGS-B in whitened
coordinates :math:`x = x_0 + V\Lambda^{-1/2} z`, where :math:`V\Lambda V^\top` is the
(eigenvalue-floored) observed information at the start, so all coordinates have
curvature near 1 and one tolerance fits all. Stages repeat until re-centring changes
the log-likelihood by less than the tolerance. Newton steps with the Hessian from
central differences of the analytic gradient then finish; the Newton decrement
:math:`g^\top H^{-1} g` says how far the result is from the optimum, and the inverse
of that Hessian is the covariance of the estimates (observed information).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from kidneycohort.models.joint._likelihood import Grid, JointLikelihood

__all__ = ["JointOptimum", "maximise", "numerical_hessian"]

_MAX_STAGES = 6
_NEWTON_STEPS = 6


@dataclass(frozen=True)
class JointOptimum:
    """The result of :func:`maximise`."""

    x: np.ndarray
    loglik: float
    covariance: np.ndarray | None
    converged: bool
    message: str
    iterations: int
    newton_decrement: float
    seconds: float
    grid: Grid


def _value_and_gradient(
    likelihood: JointLikelihood, x: np.ndarray, grid: Grid
) -> tuple[float, np.ndarray]:
    """The log-likelihood and its gradient at ``x`` on a fixed grid."""
    out = likelihood(x, grid)
    if not isinstance(out, tuple) or out[1] is None:
        raise TypeError("the joint likelihood returned no gradient")
    return out[0], out[1]


def numerical_hessian(
    likelihood: JointLikelihood, x: np.ndarray, grid: Grid, free: np.ndarray
) -> np.ndarray:
    """Central differences of the analytic gradient over the free coordinates, symmetrised."""
    index = np.flatnonzero(free)
    hessian = np.empty((index.size, index.size))
    for column, k in enumerate(index):
        step = 1e-5 * max(1.0, abs(x[k]))
        up, down = x.copy(), x.copy()
        up[k] += step
        down[k] -= step
        grad_up = _value_and_gradient(likelihood, up, grid)[1]
        grad_down = _value_and_gradient(likelihood, down, grid)[1]
        hessian[:, column] = (grad_up[index] - grad_down[index]) / (2.0 * step)
    return (hessian + hessian.T) / 2.0


def _whitening(hessian: np.ndarray) -> np.ndarray:
    """:math:`V\\Lambda^{-1/2}` of the negative Hessian, eigenvalues floored."""
    values, vectors = np.linalg.eigh(-hessian)
    values = np.abs(values)
    values = np.maximum(values, 1e-8 * max(float(values.max()), 1e-12))
    return vectors / np.sqrt(values)


def _stage(
    likelihood: JointLikelihood,
    x0: np.ndarray,
    grid: Grid,
    free: np.ndarray,
    transform: np.ndarray,
    max_iterations: int,
) -> tuple[np.ndarray, int]:
    index = np.flatnonzero(free)

    def objective(z: np.ndarray) -> tuple[float, np.ndarray]:
        x = x0.copy()
        x[index] += transform @ z
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            value, grad = _value_and_gradient(likelihood, x, grid)
        if not np.isfinite(value) or not np.all(np.isfinite(grad)):
            return 1e300, np.zeros_like(z)
        return -value, -(transform.T @ grad[index])

    result = optimize.minimize(
        objective,
        np.zeros(index.size),
        jac=True,
        method="L-BFGS-B",
        options={"maxiter": max_iterations, "ftol": 1e-13, "gtol": 1e-7},
    )
    x = x0.copy()
    x[index] += transform @ result.x
    return x, int(result.nit)


def _newton(
    likelihood: JointLikelihood, x: np.ndarray, grid: Grid, free: np.ndarray, tolerance: float
) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Newton steps with step halving; returns x, Hessian, decrement, steps taken."""
    index = np.flatnonzero(free)
    value, grad = _value_and_gradient(likelihood, x, grid)
    hessian = numerical_hessian(likelihood, x, grid, free)
    decrement = np.inf
    for step_count in range(1, _NEWTON_STEPS + 1):
        try:
            direction = np.linalg.solve(-hessian, grad[index])
        except np.linalg.LinAlgError:
            return x, hessian, np.inf, step_count
        decrement = float(grad[index] @ direction)
        if decrement < 0:  # not a maximum direction: the Hessian is not negative definite
            return x, hessian, np.inf, step_count
        if decrement < tolerance:
            return x, hessian, decrement, step_count
        scale = 1.0
        while scale > 1e-4:
            trial = x.copy()
            trial[index] += scale * direction
            trial_value, trial_grad = _value_and_gradient(likelihood, trial, grid)
            if np.isfinite(trial_value) and trial_value >= value - 1e-10:
                break
            scale /= 2.0
        else:
            return x, hessian, decrement, step_count
        x, value, grad = trial, trial_value, trial_grad
        hessian = numerical_hessian(likelihood, x, grid, free)
    direction = np.linalg.lstsq(-hessian, grad[index], rcond=None)[0]
    return x, hessian, float(grad[index] @ direction), _NEWTON_STEPS


def maximise(
    likelihood: JointLikelihood,
    start: np.ndarray,
    free: np.ndarray,
    *,
    tolerance: float,
    max_iterations: int,
) -> JointOptimum:
    """Maximise the joint log-likelihood from ``start`` over the ``free`` coordinates."""
    began = time.perf_counter()
    x = start.copy()
    grid = likelihood.grid(x)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        hessian = numerical_hessian(likelihood, x, grid, free)
    if not np.all(np.isfinite(hessian)):
        return _failed(x, grid, began, "the log-likelihood is not finite at the start")
    transform = _whitening(hessian)
    iterations, previous = 0, -np.inf
    for _ in range(_MAX_STAGES):
        x, used = _stage(likelihood, x, grid, free, transform, max_iterations)
        iterations += used
        grid = likelihood.grid(x)
        value = likelihood(x, grid, gradient=False)[0]
        if abs(value - previous) < tolerance:
            break
        previous = value
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        x, hessian, decrement, steps = _newton(likelihood, x, grid, free, tolerance)
        grid = likelihood.grid(x)
        value = likelihood(x, grid, gradient=False)[0]
    iterations += steps
    if not np.isfinite(value):
        return _failed(x, grid, began, "the log-likelihood is not finite at the result")
    covariance = None
    message = "converged"
    try:
        information = -hessian
        np.linalg.cholesky(information)
        inverse = np.linalg.inv(information)
        covariance = np.zeros((x.size, x.size))
        index = np.flatnonzero(free)
        covariance[np.ix_(index, index)] = (inverse + inverse.T) / 2.0
    except np.linalg.LinAlgError:
        message = "information matrix not positive definite"
    converged = bool(decrement < tolerance) and covariance is not None
    if covariance is not None and not converged:
        message = f"Newton decrement {decrement:.3g} above tolerance {tolerance:g}"
    return JointOptimum(
        x,
        float(value),
        covariance,
        converged,
        message,
        iterations,
        decrement,
        time.perf_counter() - began,
        grid,
    )


def _failed(x: np.ndarray, grid: Grid, began: float, message: str) -> JointOptimum:
    return JointOptimum(
        x, float("nan"), None, False, message, 0, float("inf"), time.perf_counter() - began, grid
    )
