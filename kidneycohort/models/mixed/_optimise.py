"""Minimising the profiled deviance: L-BFGS-B with the analytic gradient, then Newton steps.

L-BFGS-B (scipy) respects lme4's bounds (diagonal of the relative covariance factor
non-negative) and gets close cheaply. A few Newton steps with a Hessian from central
differences of the analytic gradient then finish the job, and the Newton decrement
:math:`g^\\top H^{-1} g` (in deviance units, so independent of how the parameters are
scaled) says honestly how far the result is from the optimum. Coordinates held at a
bound with the gradient pushing outwards are left out of the Newton step and reported.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from kidneycohort.models.mixed._objective import Evaluation, ProfiledDeviance

logger = logging.getLogger(__name__)

__all__ = ["FitConvergence", "OptimisationFailed", "minimise_deviance"]

# Relative covariance factor diagonal below which a random effect counts as at the
# boundary; lme4's isSingular() uses the same tolerance on theta (1e-4).
BOUNDARY = 1e-4
_NEWTON_STEPS = 12
_EIGEN_FLOOR = 1e-10
# relative size of rounding in a deviance summed over many patients
_ROUNDING = 1e-12


class OptimisationFailed(RuntimeError):
    """The deviance could not be evaluated or minimised; the caller may fall back."""


@dataclass(frozen=True)
class FitConvergence:
    """How the optimisation ended.

    Attributes
    ----------
    converged : bool
        The Newton decrement per value is below the tolerance.
    iterations : int
        L-BFGS-B iterations plus Newton steps.
    evaluations : int
        Deviance-and-gradient evaluations, including those of the Hessian.
    gradient_norm : float
        Largest absolute projected gradient of the deviance at the result.
    newton_decrement : float
        :math:`g^\\top H^{-1} g` over the free parameters: the predicted remaining
        decrease of the deviance (twice the log-likelihood gap).
    boundary : tuple of str
        What is at the boundary of the parameter space (a variance at zero, or a
        singular random-effects covariance), empty otherwise.
    message : str
        The optimiser's own message.
    """

    converged: bool
    iterations: int
    evaluations: int
    gradient_norm: float
    newton_decrement: float
    boundary: tuple[str, ...]
    message: str


class _Counter:
    """The deviance with a count of evaluations, failures turned into one exception."""

    def __init__(self, deviance: ProfiledDeviance) -> None:
        self.deviance = deviance
        self.count = 0

    def __call__(self, x: np.ndarray) -> Evaluation:
        self.count += 1
        try:
            with np.errstate(over="raise", invalid="raise", divide="raise"):
                evaluation = self.deviance(x)
        except (np.linalg.LinAlgError, FloatingPointError) as error:
            raise OptimisationFailed(f"deviance not computable ({error})") from None
        if not np.isfinite(evaluation.value) or not np.all(np.isfinite(_gradient(evaluation))):
            raise OptimisationFailed("deviance or gradient not finite")
        return evaluation


def _gradient(evaluation: Evaluation) -> np.ndarray:
    """The gradient of an evaluation; the optimiser asks for it at every evaluation."""
    if evaluation.gradient is None:
        raise OptimisationFailed("deviance evaluated without its gradient")
    return evaluation.gradient


def _held_at_bound(x: np.ndarray, gradient: np.ndarray, lower: np.ndarray) -> np.ndarray:
    return (x <= lower + 1e-12) & (gradient > 0.0)


def _hessian(counter: _Counter, x: np.ndarray) -> np.ndarray:
    """Central differences of the analytic gradient, symmetrised."""
    size = x.size
    hessian = np.empty((size, size))
    for k in range(size):
        step = 1e-5 * max(1.0, abs(x[k]))
        up, down = x.copy(), x.copy()
        up[k] += step
        down[k] -= step
        hessian[:, k] = (_gradient(counter(up)) - _gradient(counter(down))) / (2.0 * step)
    return (hessian + hessian.T) / 2.0


def _newton_direction(
    hessian: np.ndarray, gradient: np.ndarray, free: np.ndarray
) -> tuple[np.ndarray, float]:
    """Newton step over the free coordinates and its decrement; directions of
    (numerically) zero or negative curvature are left out of the step."""
    step = np.zeros_like(gradient)
    if not free.any():
        return step, 0.0
    values, vectors = np.linalg.eigh(hessian[np.ix_(free, free)])
    keep = values > _EIGEN_FLOOR * max(1.0, float(np.abs(values).max()))
    projected = vectors.T @ gradient[free]
    step[free] = -vectors[:, keep] @ (projected[keep] / values[keep])
    decrement = float(projected[keep] ** 2 @ (1.0 / values[keep]))
    # curvature-free directions with a real slope keep the fit from counting as converged
    decrement += float(np.sum(projected[~keep] ** 2))
    return step, decrement


def _projected_norm(evaluation: Evaluation, x: np.ndarray, lower: np.ndarray) -> float:
    gradient = _gradient(evaluation)
    free = ~_held_at_bound(x, gradient, lower)
    return float(np.abs(gradient[free]).max()) if free.any() else 0.0


def _better(
    candidate: Evaluation, trial: np.ndarray, current: Evaluation, x: np.ndarray, lower: np.ndarray
) -> bool:
    """A lower deviance; or, next to the optimum where deviance changes are lost in
    rounding (sums over all patients), a change within rounding and a smaller gradient."""
    if candidate.value < current.value:
        return True
    rounding = _ROUNDING * max(1.0, abs(current.value))
    return candidate.value - current.value <= rounding and _projected_norm(
        candidate, trial, lower
    ) < _projected_norm(current, x, lower)


def _newton_polish(
    counter: _Counter, x: np.ndarray, lower: np.ndarray, upper: np.ndarray, tolerance: float
) -> tuple[np.ndarray, Evaluation, float, int]:
    current = counter(x)
    decrement = np.inf
    steps = 0
    while steps < _NEWTON_STEPS:
        steps += 1
        gradient = _gradient(current)
        free = ~_held_at_bound(x, gradient, lower)
        direction, decrement = _newton_direction(_hessian(counter, x), gradient, free)
        improved = False
        for length in (1.0, 0.5, 0.25, 0.125, 1 / 16, 1 / 64):
            trial = np.clip(x + length * direction, lower, upper)
            candidate = counter(trial)
            if _better(candidate, trial, current, x, lower):
                x, current, improved = trial, candidate, True
                break
        if decrement <= tolerance or not improved:
            break
    return x, current, decrement, steps


def _boundary(deviance: ProfiledDeviance, x: np.ndarray) -> tuple[str, ...]:
    factor = deviance.factor(x)
    relative_variance = np.diag(factor @ factor.T)
    notes = []
    for k, name in enumerate(deviance.blocks.random_names):
        if abs(factor[k, k]) > BOUNDARY:
            continue
        if np.sqrt(relative_variance[k]) <= BOUNDARY:
            notes.append(f"variance of '{name}' at zero")
        else:
            notes.append(
                f"random-effects covariance singular at '{name}' (it is a linear combination "
                "of the effects before it: a correlation of +/-1 for two effects)"
            )
    return tuple(notes)


def _escape_starts(
    deviance: ProfiledDeviance, x: np.ndarray, lower: np.ndarray
) -> list[np.ndarray]:
    """Restarts for a search that stopped with a diagonal entry of Lambda at zero.

    The deviance depends on a diagonal entry only through its square, so its gradient
    there is exactly zero: a search that reaches the bound cannot leave it even when the
    optimum lies inside (a stationary point, not a minimum). Two restarts away from the
    bound: the same factor with each zero diagonal entry set to the length of its row,
    and lme4's default start (Lambda = identity). The best of all searches is kept.
    """
    diagonal = np.isfinite(lower) & (lower == 0.0)
    stuck = diagonal & (x <= BOUNDARY)
    if not stuck.any():
        return []
    factor = deviance.factor(x)
    row_length = np.sqrt(np.sum(factor**2, axis=1))
    moved = x.copy()
    positions = np.flatnonzero(stuck)
    # the k-th diagonal parameter belongs to Lambda's row of the k-th diagonal entry
    diagonal_rows = {p: r for r, p in enumerate(np.flatnonzero(diagonal))}
    for position in positions:
        moved[position] = max(row_length[diagonal_rows[position]], 0.1)
    identity = np.zeros_like(x)
    identity[diagonal] = 1.0
    return [moved, identity]


def minimise_deviance(
    deviance: ProfiledDeviance, *, tolerance: float, max_iterations: int
) -> tuple[np.ndarray, Evaluation, FitConvergence]:
    """Minimise ``deviance`` from lme4's start; returns the parameters, the evaluation
    there and the convergence report.

    Raises
    ------
    OptimisationFailed
        When the deviance cannot be evaluated along the way.
    """
    counter = _Counter(deviance)
    bounds = deviance.bounds()
    lower = np.array([-np.inf if b[0] is None else b[0] for b in bounds])
    upper = np.array([np.inf if b[1] is None else b[1] for b in bounds])
    scale = 1.0 / deviance.n  # per-value deviance keeps the gradient O(1) at any size

    def value_and_gradient(x: np.ndarray) -> tuple[float, np.ndarray]:
        evaluation = counter(x)
        return evaluation.value * scale, _gradient(evaluation) * scale

    def search_from(start: np.ndarray) -> optimize.OptimizeResult:
        return optimize.minimize(
            value_and_gradient,
            start,
            jac=True,
            method="L-BFGS-B",
            bounds=bounds,
            options={"maxiter": max_iterations, "ftol": 1e-13, "gtol": 1e-9, "maxcor": 20},
        )

    search = search_from(deviance.start())
    for start in _escape_starts(deviance, search.x, lower):
        try:
            other = search_from(start)
        except OptimisationFailed:
            continue
        if other.fun < search.fun - _ROUNDING * max(1.0, abs(search.fun)):
            logger.debug("boundary escape: deviance %.6g -> %.6g", search.fun, other.fun)
            search = other
    logger.debug("L-BFGS-B: %d iterations, %d evaluations", search.nit, counter.count)
    x, evaluation, decrement, steps = _newton_polish(
        counter, search.x, lower, upper, tolerance * deviance.n
    )
    gradient_norm = _projected_norm(evaluation, x, lower)
    report = FitConvergence(
        converged=bool(decrement <= tolerance * deviance.n),
        iterations=int(search.nit) + steps,
        evaluations=counter.count,
        gradient_norm=gradient_norm,
        newton_decrement=float(decrement),
        boundary=_boundary(deviance, x),
        message=str(search.message),
    )
    logger.debug("mixed model optimisation: %s", report)
    return x, evaluation, report
