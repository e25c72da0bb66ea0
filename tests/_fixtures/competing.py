"""Competing-risks test data: a literal 40-patient cohort, simulated cohorts and the
expanded (weighted, counting-process) data set of Geskus (2011). All data invented."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl

from kidneycohort.models.competing._fine_gray import censoring_survival, survival_before

# A 40-patient cohort on a half-year grid (ties of every kind), written out so that
# external programs read exactly these values. Cause: 0 censored, 1 kidney failure,
# 2 death.
SMALL_YEARS = [
    2.25, 0.75, 2.25, 1.25, 1.75, 1.25, 0.25, 0.75, 0.75, 1.75,
    0.75, 0.25, 2.25, 2.75, 3.75, 2.75, 0.75, 3.75, 0.25, 0.75,
    1.25, 3.25, 3.25, 2.75, 1.75, 0.75, 1.75, 0.75, 1.25, 0.75,
    0.25, 0.75, 1.25, 1.25, 0.75, 1.25, 2.75, 0.75, 1.75, 3.25,
]  # fmt: skip
SMALL_CAUSE = [
    0, 0, 1, 1, 1, 0, 2, 1, 1, 1, 1, 1, 1, 0, 0, 0, 1, 0, 2, 0,
    2, 2, 0, 2, 0, 1, 0, 1, 2, 0, 1, 2, 2, 2, 1, 0, 1, 1, 2, 0,
]  # fmt: skip
SMALL_TREATED = [
    0, 1, 1, 0, 1, 1, 1, 1, 1, 1, 0, 0, 0, 0, 0, 1, 1, 1, 1, 0,
    0, 0, 0, 0, 1, 0, 0, 0, 0, 1, 1, 0, 0, 0, 1, 0, 1, 0, 0, 0,
]  # fmt: skip
SMALL_AGE = [
    43, 56, 46, 62, 78, 51, 68, 68, 66, 58, 58, 61, 62, 62, 68, 59, 65, 63, 49, 51,
    66, 65, 71, 38, 66, 36, 59, 35, 73, 51, 82, 62, 68, 66, 78, 60, 49, 48, 51, 61,
]  # fmt: skip


def small_cohort() -> tuple[pl.DataFrame, pl.DataFrame]:
    """The literal cohort in the endpoints layout (endpoint ``kidney_failure``, death
    competing) and its patients table (``group`` control/treated, ``age``)."""
    ids = [f"S{i:02d}" for i in range(len(SMALL_YEARS))]
    cause = np.array(SMALL_CAUSE)
    endpoints = pl.DataFrame(
        {
            "patient_id": ids,
            "endpoint": "kidney_failure",
            "years": SMALL_YEARS,
            "event": (cause == 1).astype(np.int8),
            "competing": (cause == 2).astype(np.int8),
            "reason": np.where(cause == 1, "dialysis", np.where(cause == 2, "death", "data_cut")),
        }
    )
    patients = pl.DataFrame(
        {
            "patient_id": ids,
            "group": ["treated" if v else "control" for v in SMALL_TREATED],
            "age": SMALL_AGE,
        }
    )
    return endpoints, patients


def simulate_competing(
    n: int,
    seed: int,
    *,
    effect: float = 0.5,
    competing_rate: float = 0.4,
    censoring_rate: float = 0.3,
    decimals: int | None = None,
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Two-arm cohort with latent exponential times of kidney failure and death and
    exponential censoring; ``decimals`` rounds the years (to make ties)."""
    rng = np.random.default_rng(seed)
    treated = rng.random(n) < 0.5
    age = rng.normal(62.0, 9.0, n)
    female = rng.random(n) < 0.45
    linear = effect * treated + 0.03 * (age - 62.0) - 0.2 * female
    failure = rng.exponential(1.0 / (0.25 * np.exp(linear)))
    death = rng.exponential(1.0 / competing_rate, n)
    censor = rng.exponential(1.0 / censoring_rate, n)
    years = np.minimum.reduce([failure, death, censor])
    cause = np.where(years == failure, 1, np.where(years == death, 2, 0))
    if decimals is not None:
        years = np.round(years, decimals) + 10.0**-decimals
    ids = np.array([f"P{seed}-{i:06d}" for i in range(n)])
    endpoints = pl.DataFrame(
        {
            "patient_id": ids,
            "endpoint": "kidney_failure",
            "years": years,
            "event": (cause == 1).astype(np.int8),
            "competing": (cause == 2).astype(np.int8),
            "reason": np.where(cause == 1, "dialysis", np.where(cause == 2, "death", "data_cut")),
        }
    )
    patients = pl.DataFrame(
        {
            "patient_id": ids,
            "group": np.where(treated, "treated", "control"),
            "age": age,
            "female": female,
        }
    )
    return endpoints, patients


def geskus_expanded(time: np.ndarray, cause: np.ndarray, covariates: np.ndarray) -> pd.DataFrame:
    """Weighted counting-process rows of Geskus (2011, section 3): a patient with a
    competing event at :math:`T_j` keeps a row (0, T_j] with weight 1 and then one row
    per interval between consecutive censoring times after :math:`T_j`, weighted
    :math:`G(s)/G(T_j-)` with :math:`s` the start of the interval (G constant within).
    Other patients keep their one row. Columns ``id, start, stop, event, weight, x0..``."""
    g_times, g_values = censoring_survival(time, cause == 0)
    censor_times = np.unique(time[cause == 0])
    end = float(time.max()) + 1.0
    parts = []
    for j in np.flatnonzero(cause == 2):  # test oracle: a plain loop is the clearest form
        cuts = censor_times[censor_times > time[j]]
        starts = np.concatenate([[time[j]], cuts])
        stops = np.concatenate([cuts, [end]])
        g_start = np.concatenate([[1.0], g_values])[np.searchsorted(g_times, starts, "right")]
        g_own = survival_before(g_times, g_values, np.array([time[j]]))[0]
        parts.append(
            pd.DataFrame(
                {"id": j, "start": starts, "stop": stops, "event": 0, "weight": g_start / g_own}
            )
        )
    base = pd.DataFrame(
        {
            "id": np.arange(time.size),
            "start": 0.0,
            "stop": time,
            "event": (cause == 1).astype(int),
            "weight": 1.0,
        }
    )
    rows = pd.concat([base, *parts], ignore_index=True)
    rows = rows[rows["stop"] > rows["start"]].reset_index(drop=True)
    for c in range(covariates.shape[1]):
        rows[f"x{c}"] = covariates[rows["id"].to_numpy(), c]
    return rows
