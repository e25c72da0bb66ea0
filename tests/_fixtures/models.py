"""Simulated trial data for the model tests (invented: made-up study, made-up arms)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

VISIT_YEARS = (0.0, 0.0833, 0.25, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0)


@dataclass(frozen=True)
class TwoSlopeTruth:
    """True values of the simulated two-slope trial (eGFR in mL/min/1.73 m²)."""

    knot_years: float = 0.25
    intercept: float = 48.0
    acute_change: dict[str, float] | None = None
    chronic_slope: dict[str, float] | None = None
    sd_intercept: float = 10.0
    sd_acute_slope: float = 8.0
    sd_chronic_slope: float = 1.5
    sd_residual: float = 3.0

    def acute(self, arm: str) -> float:
        return (self.acute_change or {"placebo": 0.0, "active": -3.0})[arm]

    def chronic(self, arm: str) -> float:
        return (self.chronic_slope or {"placebo": -3.0, "active": -2.0})[arm]


def simulate_two_slope_trial(
    n_per_arm: int, seed: int, truth: TwoSlopeTruth | None = None
) -> tuple[pl.DataFrame, pl.DataFrame, TwoSlopeTruth]:
    """eGFR rows (``schemas.EGFR`` columns used by the model) and patients for a
    two-arm trial following the linear-spline model of the slope module."""
    truth = truth or TwoSlopeTruth()
    rng = np.random.default_rng(seed)
    arms = np.repeat(["placebo", "active"], n_per_arm)
    n = arms.size
    ids = np.array([f"P{seed:03d}-{i:05d}" for i in range(n)])
    acute_mean = np.array([truth.acute(a) for a in arms]) / truth.knot_years
    chronic_mean = np.array([truth.chronic(a) for a in arms])
    b0 = truth.intercept + rng.normal(0, truth.sd_intercept, n)
    b1 = acute_mean + rng.normal(0, truth.sd_acute_slope, n)
    b2 = chronic_mean + rng.normal(0, truth.sd_chronic_slope, n)
    times = np.array(VISIT_YEARS)
    jitter = rng.uniform(-0.02, 0.02, (n, times.size))
    jitter[:, 0] = 0.0
    t = np.clip(times[None, :] + jitter, 0.0, None)
    t1 = np.minimum(t, truth.knot_years)
    t2 = np.maximum(t - truth.knot_years, 0.0)
    egfr = (
        b0[:, None]
        + b1[:, None] * t1
        + b2[:, None] * t2
        + rng.normal(0, truth.sd_residual, t.shape)
    )
    values = pl.DataFrame(
        {
            "patient_id": np.repeat(ids, times.size),
            "years_from_index": t.ravel(),
            "equation": "ckd_epi_2021_cr",
            "egfr": egfr.ravel(),
        }
    )
    patients = pl.DataFrame(
        {
            "patient_id": ids,
            "group": arms,
            "age_at_index": rng.normal(62, 9, n).round(1),
            "sex": rng.choice(["female", "male"], n),
        }
    )
    return values, patients, truth
