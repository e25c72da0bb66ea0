"""Simulated long tables and reference fits for the mixed-model engine tests.

Invented data: made-up patients, arms, sites. The published and external references
(R lme4, statsmodels) are loaded or run here; each test names its source.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import polars as pl
import statsmodels

KNOT = 0.25


@dataclass(frozen=True)
class Design:
    """A model for the engine and statsmodels alike."""

    name: str
    fixed: tuple[str, ...]
    random: tuple[str, ...]
    covariance: str = "unstructured"


DESIGNS = {
    "one_slope": Design("one_slope", ("intercept", "t", "act", "act_t"), ("intercept", "t")),
    "two_slopes_knot": Design(
        "two_slopes_knot",
        ("intercept", "t1", "t2", "act", "act_t1", "act_t2"),
        ("intercept", "t1", "t2"),
    ),
    "covariates": Design(
        "covariates",
        ("intercept", "t", "act", "act_t", "age", "female", "site_b", "site_c"),
        ("intercept", "t"),
    ),
    "unbalanced_visits": Design(
        "unbalanced_visits", ("intercept", "t", "act", "act_t"), ("intercept", "t")
    ),
    "single_value_patients": Design(
        "single_value_patients", ("intercept", "t", "act", "act_t"), ("intercept", "t")
    ),
    "diagonal": Design(
        "diagonal", ("intercept", "t", "act", "act_t"), ("intercept", "t"), "diagonal"
    ),
    "random_intercept": Design(
        "random_intercept", ("intercept", "t", "act", "act_t"), ("intercept",)
    ),
}


def simulate_values(
    n_patients: int,
    seed: int,
    *,
    min_values: int = 3,
    max_values: int = 9,
    single_fraction: float = 0.0,
    residual_sd: tuple[float, float] = (3.0, 3.0),
) -> pl.DataFrame:
    """Long table: ``patient_id, egfr, t, t1, t2, act, act_t, act_t1, act_t2, age, female,
    site_b, site_c, arm``; patients get between ``min_values`` and ``max_values`` values at
    irregular times over 3 years (a ``single_fraction`` of them only one), a random
    intercept, acute slope and chronic slope, and residual SD per arm."""
    rng = np.random.default_rng(seed)
    counts = rng.integers(min_values, max_values + 1, n_patients)
    counts[rng.random(n_patients) < single_fraction] = 1
    patient = np.repeat(np.arange(n_patients), counts)
    act = (rng.random(n_patients) < 0.5).astype(float)
    age = rng.normal(0.0, 10.0, n_patients)
    female = (rng.random(n_patients) < 0.4).astype(float)
    site = rng.integers(0, 3, n_patients)
    # a third of the values fall in the first 4 months, so the acute slope is estimable
    early = rng.random(patient.size) < 1 / 3
    t = np.where(early, rng.uniform(0.0, 0.33, patient.size), rng.uniform(0.33, 3.0, patient.size))
    t1, t2 = np.minimum(t, KNOT), np.maximum(t - KNOT, 0.0)
    effects = rng.multivariate_normal(
        [0.0, 0.0, 0.0], [[100.0, 5.0, -2.0], [5.0, 36.0, 0.0], [-2.0, 0.0, 4.0]], n_patients
    )
    mean = 50.0 - 0.2 * age - 1.5 * female + 2.0 * (site == 1) - 3.0 * act
    egfr = (
        (mean + effects[:, 0])[patient]
        + (-4.0 * act + effects[:, 1])[patient] * t1
        + (-3.0 + 1.0 * act + effects[:, 2])[patient] * t2
        + rng.normal(0.0, 1.0, patient.size) * np.where(act, *residual_sd[::-1])[patient]
    )
    a = act[patient]
    return pl.DataFrame(
        {
            "patient_id": [f"P{k:04d}" for k in patient],
            "egfr": egfr,
            "t": t,
            "t1": t1,
            "t2": t2,
            "act": a,
            "act_t": a * t,
            "act_t1": a * t1,
            "act_t2": a * t2,
            "age": age[patient],
            "female": female[patient],
            "site_b": (site == 1).astype(float)[patient],
            "site_c": (site == 2).astype(float)[patient],
            "arm": np.where(a > 0, "active", "placebo"),
        }
    )


def design_data(name: str, seed: int = 8) -> pl.DataFrame:
    """The simulated table each named design is checked on."""
    if name == "unbalanced_visits":
        return simulate_values(90, seed, min_values=2, max_values=16)
    if name == "single_value_patients":
        return simulate_values(90, seed, single_fraction=0.3)
    return simulate_values(90, seed)


def design_matrix(frame: pl.DataFrame, names: tuple[str, ...]) -> np.ndarray:
    return np.column_stack(
        [np.ones(frame.height) if n == "intercept" else frame[n].to_numpy() for n in names]
    )


def statsmodels_reference(frame: pl.DataFrame, design: Design, reml: bool):
    """statsmodels MixedLM fitted to a tight gradient tolerance (BFGS, gtol 1e-10).

    Its default tolerance leaves estimates about 1e-6 from the optimum, too coarse
    for a 1e-6 comparison. At gtol 1e-10 scipy's BFGS stops with "precision loss"
    (it can improve no further), which statsmodels reports as a ConvergenceWarning;
    those warnings are silenced here only, and the tests check that the reference
    likelihood is not above ours.
    """
    from statsmodels.regression.mixed_linear_model import MixedLM, MixedLMParams

    exog = design_matrix(frame, design.fixed)
    exog_re = design_matrix(frame, design.random)
    model = MixedLM(
        frame["egfr"].to_numpy(), exog, groups=frame["patient_id"].to_numpy(), exog_re=exog_re
    )
    free = None
    if design.covariance == "diagonal":
        free = MixedLMParams.from_components(np.ones(exog.shape[1]), np.eye(exog_re.shape[1]))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = model.fit(reml=reml, method=["bfgs"], gtol=1e-10, free=free)
        hessian = model.hessian(result.params_object)[0]
    k = exog.shape[1]
    # lme4's vcov is sigma^2 (X'V^-1 X)^-1, the fixed-effect block of statsmodels' own
    # Hessian; statsmodels' bse_fe instead inverts the joint Hessian of fixed effects and
    # covariance parameters (observed information), which differs by about 1e-3 here.
    return model, result, np.linalg.inv(-hessian[:k, :k])


def dietox() -> pd.DataFrame:
    """Pig weights (Lauridsen et al. 1999; R package geepack), 72 pigs x 12 weeks, as
    shipped offline in statsmodels' own test files."""
    path = Path(statsmodels.__file__).parent / "regression" / "tests" / "results" / "dietox.csv"
    return pd.read_csv(path)


def rscript_with_lme4() -> str | None:
    """Path of Rscript when R with lme4 is installed, else None."""
    rscript = shutil.which("Rscript")
    if rscript is None:
        return None
    probe = subprocess.run(
        [rscript, "-e", "quit(status = !requireNamespace('lme4', quietly = TRUE))"],
        capture_output=True,
        timeout=120,
        check=False,
    )
    return rscript if probe.returncode == 0 else None


def run_r(script: str, timeout: int = 300) -> dict[str, pl.DataFrame]:
    """Run an R script in a temporary folder (``OUT`` = that folder) and read back every
    CSV file it wrote, by file stem."""
    rscript = rscript_with_lme4()
    if rscript is None:
        raise RuntimeError("Rscript with lme4 is not installed")
    with tempfile.TemporaryDirectory() as folder:
        code = f'OUT <- "{folder}"\n{script}'
        path = os.path.join(folder, "script.R")
        Path(path).write_text(code)
        subprocess.run([rscript, path], capture_output=True, timeout=timeout, check=True)
        return {p.stem: pl.read_csv(p) for p in Path(folder).glob("*.csv")}
