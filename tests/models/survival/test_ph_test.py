"""The vectorised Grambsch–Therneau proportional-hazards test.

References: lifelines ``proportional_hazard_test`` (the reference implementation this
one must reproduce), R survival's ``cox.zph`` before version 3.0 (the same
approximation) and its published output for the Rossi recidivism data (Fox J, "Cox
proportional-hazards regression for survival data", appendix to An R and S-PLUS
Companion to Applied Regression, 2002).
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import polars as pl
import pytest
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi
from lifelines.statistics import proportional_hazard_test

from kidneycohort.errors import InputDataError
from kidneycohort.models.survival import CoxModel, proportional_hazards_test

ROSSI_ALL = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]
TRANSFORMS = ["rank", "km", "identity", "log"]


def _ours(
    df: pd.DataFrame,
    fit: CoxPHFitter,
    names: list[str],
    transform: object,
    strata: list[str] | None = None,
) -> pl.DataFrame:
    return proportional_hazards_test(
        df[fit.duration_col].to_numpy(),
        df[fit.event_col].to_numpy(),
        df[names].to_numpy(),
        fit.params_.loc[names].to_numpy(),
        fit.variance_matrix_.loc[names, names].to_numpy(),
        strata=[df[s].to_numpy() for s in strata] if strata else None,
        time_transform=transform,  # type: ignore[arg-type]
        names=names,
    )


def _assert_matches_lifelines(df: pd.DataFrame, strata: list[str] | None = None) -> None:
    fit = CoxPHFitter().fit(df, "t", "e", strata=strata)
    names = list(fit.params_.index)
    for transform in TRANSFORMS:
        reference = proportional_hazard_test(fit, df, time_transform=transform).summary
        ours = _ours(df, fit, names, transform, strata)
        np.testing.assert_allclose(
            ours["test_statistic"].to_numpy()[:-1],
            reference.loc[names, "test_statistic"].to_numpy(),
            rtol=1e-6,
            atol=1e-9,
            err_msg=f"time_transform={transform}",
        )
        np.testing.assert_allclose(
            ours["p"].to_numpy()[:-1], reference.loc[names, "p"].to_numpy(), rtol=1e-6, atol=1e-12
        )


def _rossi() -> pd.DataFrame:
    return load_rossi().rename(columns={"week": "t", "arrest": "e"})


def _tied_data(n: int = 2000, seed: int = 3) -> pd.DataFrame:
    """Heavy ties (times on a 0.05 grid), a continuous and a binary covariate, 3 strata."""
    rng = np.random.default_rng(seed)
    a = rng.normal(size=n)
    b = rng.integers(0, 2, n).astype(float)
    rate = np.exp(0.3 * a + 0.5 * b * (1 + rng.random(n)))
    return pd.DataFrame(
        {
            "a": a,
            "b": b,
            "s": rng.choice(["x", "y", "z"], n),
            "t": np.ceil(rng.exponential(1 / rate) * 20) / 20 + 0.01,
            "e": (rng.random(n) < 0.7).astype(int),
        }
    )


def test_matches_lifelines_on_rossi() -> None:
    """lifelines 0.30 ``proportional_hazard_test`` is the reference: same statistics."""
    _assert_matches_lifelines(_rossi())


def test_matches_lifelines_with_strata_on_rossi() -> None:
    _assert_matches_lifelines(_rossi(), strata=["wexp"])


def test_matches_lifelines_with_heavy_ties_and_strata() -> None:
    data = _tied_data()
    _assert_matches_lifelines(data[["a", "b", "t", "e"]])
    _assert_matches_lifelines(data, strata=["s"])


def test_row_order_does_not_matter() -> None:
    data = _rossi()
    fit = CoxPHFitter().fit(data, "t", "e")
    shuffled = data.sample(frac=1.0, random_state=1)
    for transform in ("km", "identity", "log"):  # rank breaks ties by input order
        a = _ours(data, fit, ROSSI_ALL, transform)["test_statistic"].to_numpy()
        b = _ours(shuffled, fit, ROSSI_ALL, transform)["test_statistic"].to_numpy()
        np.testing.assert_allclose(a, b, rtol=1e-10)


def _left_continuous_km(t: np.ndarray, e: np.ndarray) -> np.ndarray:
    """R survival < 3.0 ``cox.zph(transform = "km")``: 1 - KM just before the time."""
    _, inverse = np.unique(t, return_inverse=True)
    deaths = np.bincount(inverse, weights=e)
    at_risk = t.size - np.concatenate([[0], np.cumsum(np.bincount(inverse))[:-1]])
    survival = np.cumprod(1.0 - deaths / at_risk)
    before = np.concatenate([[1.0], survival[:-1]])
    return 1.0 - before[inverse]


def test_rossi_against_published_cox_zph() -> None:
    """Fox (2002), appendix "Cox proportional-hazards regression", section 4:
    ``cox.zph(coxph(Surv(week, arrest) ~ fin + age + prio))`` (survival 2.x, km
    transform) printed chisq fin 0.00507, age 6.54118, prio 0.77263, GLOBAL 7.12999
    (df 3). Values from memory; the same approximation and transform as here (R's
    left-continuous Kaplan–Meier), so agreement to the printed precision of the fit."""
    data = _rossi()[["fin", "age", "prio", "t", "e"]]
    fit = CoxPHFitter().fit(data, "t", "e")
    ours = _ours(data, fit, ["fin", "age", "prio"], _left_continuous_km)
    published = [0.00507, 6.54118, 0.77263, 7.12999]
    np.testing.assert_allclose(ours["test_statistic"].to_numpy(), published, rtol=1e-3)
    assert ours["df"].to_list() == [1, 1, 1, 3]
    # age is the term that breaks proportionality (p = 0.0105 printed)
    assert ours.filter(pl.col("term") == "age")["p"][0] == pytest.approx(0.0105, abs=2e-4)


def test_cox_model_uses_it_and_reports_global() -> None:
    data = load_rossi()
    endpoints = pl.DataFrame(
        {
            "patient_id": [str(i) for i in range(len(data))],
            "endpoint": "arrest",
            "years": data["week"].to_numpy() / 52.0,
            "event": data["arrest"].to_numpy().astype(bool),
            "competing": False,
        }
    )
    patients = pl.from_pandas(data[ROSSI_ALL]).with_columns(
        pl.Series("patient_id", [str(i) for i in range(len(data))]), group=pl.lit("all")
    )
    model = CoxModel(group_column=None, covariates=ROSSI_ALL).fit(endpoints, patients)
    fit = CoxPHFitter().fit(data, "week", "arrest")
    reference = proportional_hazard_test(fit, data, time_transform="km").summary
    got = dict(zip(model.ph_test_["term"], model.ph_test_["test_statistic"], strict=True))
    for term in ROSSI_ALL:
        assert got[term] == pytest.approx(reference.loc[term, "test_statistic"], rel=1e-5)
    assert model.ph_global_["df"][0] == len(ROSSI_ALL)


def test_unknown_transform_is_an_error() -> None:
    data = _rossi()
    fit = CoxPHFitter().fit(data, "t", "e")
    with pytest.raises(InputDataError, match="time_transform"):
        _ours(data, fit, ROSSI_ALL, "ranks")


_R_SCRIPT = r"""
library(survival)
r <- read.csv(commandArgs(TRUE)[1])
fit <- coxph(Surv(week, arrest) ~ fin + age + race + wexp + mar + paro + prio, data = r)
s <- as.matrix(resid(fit, "schoenfeld")); d <- nrow(s)
times <- as.numeric(rownames(s))
for (g in list(times, log(times))) {
  xx <- g - mean(g)
  z <- c((xx %*% s %*% fit$var * d)^2 / (diag(fit$var) * d * sum(xx^2)))
  u <- c(xx %*% s)
  cat(c(z, c(u %*% fit$var %*% u) * d / sum(xx^2)), "\n")
}
"""


def _r_with_survival() -> bool:
    if shutil.which("Rscript") is None:
        return False
    done = subprocess.run(
        ["Rscript", "-e", "library(survival)"], capture_output=True, check=False, timeout=60
    )
    return done.returncode == 0


@pytest.mark.skipif(
    os.environ.get("CI", "").lower() in {"1", "true"} or not _r_with_survival(),
    reason="optional cross-check: needs Rscript with the survival package, never run in CI",
)
def test_rossi_against_live_r(tmp_path: Path) -> None:
    """R survival's own Schoenfeld residuals (``resid(fit, "schoenfeld")``, Efron ties)
    and variance, put through the pre-3.0 ``cox.zph`` formulas (identity and log time),
    give the same statistics as ours."""
    csv = tmp_path / "rossi.csv"
    load_rossi().to_csv(csv, index=False)
    script = tmp_path / "zph.R"
    script.write_text(_R_SCRIPT)
    done = subprocess.run(
        ["Rscript", str(script), str(csv)], capture_output=True, text=True, check=True, timeout=120
    )
    rows = [np.array(line.split(), dtype=float) for line in done.stdout.strip().splitlines()]
    data = _rossi()
    fit = CoxPHFitter().fit(data, "t", "e")
    for transform, expected in zip(("identity", "log"), rows, strict=True):
        ours = _ours(data, fit, ROSSI_ALL, transform)["test_statistic"].to_numpy()
        np.testing.assert_allclose(ours, expected, rtol=1e-5)


def test_one_event_is_not_estimable() -> None:
    """With a single event there is no spread of event times to test a trend against:
    every statistic is NaN (not estimable), never a number and never a warning."""
    rng = np.random.default_rng(2)
    durations = np.linspace(0.5, 3.0, 30)
    events = np.zeros(30)
    events[4] = 1.0
    covariates = rng.normal(size=(30, 2))
    out = proportional_hazards_test(
        durations, events, covariates, np.array([0.1, -0.2]), np.eye(2) * 0.5
    )
    assert out.height == 3
    assert out["test_statistic"].is_nan().all() and out["p"].is_nan().all()


def test_one_event_time_is_not_testable_and_says_so_quietly() -> None:
    # a single event: the transformed event times have no spread, so the statistic is
    # 0/0; it is NaN (not a number that looks real) and numpy is not left to warn
    durations = np.linspace(0.5, 3.0, 12)
    events = np.zeros(12, dtype=int)
    events[0] = 1
    covariates = np.repeat([[0.0], [1.0]], 6, axis=0)
    with np.errstate(all="raise"):
        table = proportional_hazards_test(
            durations, events, covariates, np.array([0.3]), np.array([[0.8]]), names=["group"]
        )
    assert table["term"].to_list() == ["group", "GLOBAL"]
    assert np.isnan(table["p"].to_numpy()).all()
    assert np.isnan(table["test_statistic"].to_numpy()).all()
