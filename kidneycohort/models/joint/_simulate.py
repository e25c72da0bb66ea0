r"""A simulator of the shared-random-effects joint model with known parameters.

eGFR follows :math:`y_{ij} = \beta_{0g} + b_{0i} + (\beta_{1g} + b_{1i})\,t_{ij} +
\varepsilon_{ij}` at planned visits; dropout (kidney failure or death) has hazard
:math:`h_0 \exp\{\gamma_g + \alpha\, m_i(t)\}` with :math:`m_i(t)` the current true
eGFR (or the random slope :math:`b_{1i}`). Dropout times are drawn by inverting the
cumulative hazard on a fine time grid (vectorised over patients); values planned after
dropout are not observed, and follow-up ends administratively after the last visit.
Used by the tests (recovery of known parameters) and the benchmark; all data invented.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import polars as pl

__all__ = ["JointCohortTruth", "simulate_joint_cohort"]


@dataclass(frozen=True)
class JointCohortTruth:
    """True parameters of :func:`simulate_joint_cohort` (defaults: a two-arm trial)."""

    intercepts: Mapping[str, float] = field(
        default_factory=lambda: {"placebo": 45.0, "active": 45.0}
    )
    slopes: Mapping[str, float] = field(default_factory=lambda: {"placebo": -3.0, "active": -2.0})
    intercept_sd: float = 10.0
    slope_sd: float = 1.5
    correlation: float = 0.2
    residual_sd: float = 4.0
    association: float = -0.08
    association_type: str = "current_value"
    hazard_at_45: float = 0.08
    log_hazard_ratio: Mapping[str, float] = field(default_factory=lambda: {"active": 0.0})
    knot_years: float | None = None
    acute_slopes: Mapping[str, float] = field(
        default_factory=lambda: {"placebo": 0.0, "active": -4.0}
    )
    acute_sd: float = 6.0

    @property
    def slope_difference(self) -> float:
        """True active - placebo slope difference (first non-first key minus first)."""
        names = list(self.slopes)
        return float(self.slopes[names[1]] - self.slopes[names[0]])


def _first_passage(
    grid: np.ndarray, hazard: np.ndarray, target: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Times where the cumulative hazard (trapezoid on ``grid``) reaches ``target``
    (linear interpolation), and whether it does before the end of the grid."""
    n_patients = hazard.shape[0]
    steps = np.diff(grid)
    cumulative = np.concatenate(
        [np.zeros((n_patients, 1)), np.cumsum((hazard[:, 1:] + hazard[:, :-1]) / 2 * steps, 1)],
        axis=1,
    )
    reached = cumulative >= target[:, None]
    event = reached[:, -1]
    index = np.where(event, reached.argmax(axis=1), grid.size - 1)
    low = np.maximum(index - 1, 0)
    rows = np.arange(n_patients)
    span = cumulative[rows, index] - cumulative[rows, low]
    fraction = np.where(span > 0, (target - cumulative[rows, low]) / np.where(span > 0, span, 1), 1)
    years = np.where(event, grid[low] + fraction * (grid[index] - grid[low]), grid[-1])
    return years, event


def simulate_joint_cohort(
    n_patients: int,
    *,
    values_per_patient: int = 8,
    visit_step_years: float = 0.5,
    visit_years: np.ndarray | None = None,
    truth: JointCohortTruth | None = None,
    seed: int = 0,
) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    """Invented ``(egfr, patients, endpoints)`` tables in the project's layouts.

    Visits are at ``0, step, 2 step, ...`` (``values_per_patient`` of them) unless
    ``visit_years`` lists them; with ``truth.knot_years`` the true trajectory has an
    acute slope (random, SD ``acute_sd``, independent of the rest) up to the knot."""
    truth = truth or JointCohortTruth()
    rng = np.random.default_rng(seed)
    groups = list(truth.slopes)
    code = rng.integers(0, len(groups), n_patients)
    intercept = np.array([truth.intercepts[g] for g in groups])[code]
    slope = np.array([truth.slopes[g] for g in groups])[code]
    log_hr = np.array([truth.log_hazard_ratio.get(g, 0.0) for g in groups])[code]
    cov = truth.correlation * truth.intercept_sd * truth.slope_sd
    g_matrix = np.array([[truth.intercept_sd**2, cov], [cov, truth.slope_sd**2]])
    effects = rng.standard_normal((n_patients, 2)) @ np.linalg.cholesky(g_matrix).T
    theta0, theta1 = intercept + effects[:, 0], slope + effects[:, 1]
    visits = (
        np.arange(values_per_patient) * visit_step_years
        if visit_years is None
        else np.asarray(visit_years, dtype=float)
    )
    end = float(visits[-1]) + (visit_step_years if visit_years is None else 0.5)
    knot = truth.knot_years
    acute = np.zeros(n_patients)
    if knot is not None:
        acute = np.array([truth.acute_slopes[g] for g in groups])[code]
        acute = acute + truth.acute_sd * rng.standard_normal(n_patients)

    def trajectory(t: np.ndarray) -> np.ndarray:
        if knot is None:
            return theta0[:, None] + theta1[:, None] * t[None, :]
        return (
            theta0[:, None]
            + acute[:, None] * np.minimum(t, knot)[None, :]
            + theta1[:, None] * np.maximum(t - knot, 0.0)[None, :]
        )

    grid = np.linspace(0.0, end, 801)
    if truth.association_type == "current_value":
        link = trajectory(grid)
        reference = 45.0
    else:
        link = np.broadcast_to(effects[:, 1:2], (n_patients, grid.size))
        reference = 0.0
    base = np.log(truth.hazard_at_45) - truth.association * reference
    hazard = np.exp(base + log_hr[:, None] + truth.association * link)
    years, event = _first_passage(grid, hazard, rng.exponential(size=n_patients))
    years = np.maximum(years, 1e-3)
    seen = visits[None, :] <= years[:, None]
    true_value = trajectory(visits)
    observed = true_value + truth.residual_sd * rng.standard_normal(true_value.shape)
    ids = np.char.add("P", np.char.zfill(np.arange(n_patients).astype(str), 6))
    patient_index, visit_index = np.nonzero(seen)
    egfr = pl.DataFrame(
        {
            "patient_id": ids[patient_index],
            "equation": "ckd_epi_2021",
            "years_from_index": visits[visit_index],
            "egfr": observed[patient_index, visit_index],
        }
    )
    patients = pl.DataFrame({"patient_id": ids, "group": np.array(groups)[code]})
    failure = event & (rng.random(n_patients) < 0.6)
    death = event & ~failure
    endpoints = pl.concat(
        [
            pl.DataFrame(
                {
                    "patient_id": ids,
                    "endpoint": name,
                    "years": years,
                    "event": flag.astype(np.int8),
                    "competing": other.astype(np.int8),
                }
            )
            for name, flag, other in (
                ("kidney_failure", failure, death),
                ("death", death, np.zeros(n_patients, dtype=bool)),
            )
        ]
    )
    return egfr, patients, endpoints
