"""The vectorised Efron derivatives give lifelines' CoxPHFitter fit (the reference
implementation), on the Rossi data (lifelines.datasets) and on invented data with heavy
ties, strata, weights and several covariates."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from lifelines.datasets import load_rossi
from lifelines.fitters.coxph_fitter import SemiParametricPHFitter

from kidneycohort.models.survival import VectorisedCoxPHFitter, efron_derivatives


def _same_fit(data: pd.DataFrame, duration: str, event: str, **options: object) -> None:
    reference = CoxPHFitter().fit(data, duration, event, **options)
    ours = VectorisedCoxPHFitter().fit(data, duration, event, **options)
    np.testing.assert_allclose(ours.params_, reference.params_, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(
        ours.variance_matrix_, reference.variance_matrix_, rtol=1e-9, atol=1e-14
    )
    assert ours.log_likelihood_ == pytest.approx(reference.log_likelihood_, rel=1e-12)
    np.testing.assert_allclose(
        ours.baseline_cumulative_hazard_, reference.baseline_cumulative_hazard_, rtol=1e-9
    )


def _tied(n: int = 3000, seed: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    a = rng.normal(size=n)
    b = rng.integers(0, 2, n).astype(float)
    c = rng.normal(size=n)
    rate = np.exp(0.4 * a - 0.6 * b + 0.2 * c)
    return pd.DataFrame(
        {
            "a": a,
            "b": b,
            "c": c,
            "s": rng.choice(["x", "y"], n),
            "w": rng.integers(1, 4, n).astype(float),
            "t": np.ceil(rng.exponential(1 / rate) * 10) / 10 + 0.1,  # many ties
            "e": (rng.random(n) < 0.6).astype(int),
        }
    )


def test_rossi_fit_equals_lifelines() -> None:
    _same_fit(load_rossi(), "week", "arrest")


def test_rossi_stratified_fit_equals_lifelines() -> None:
    _same_fit(load_rossi(), "week", "arrest", strata=["wexp"])


def test_heavy_ties_strata_and_weights_equal_lifelines() -> None:
    data = _tied()
    _same_fit(data.drop(columns=["s", "w"]), "t", "e")
    _same_fit(data.drop(columns=["w"]), "t", "e", strata=["s"])
    _same_fit(data.drop(columns=["s"]), "t", "e", weights_col="w", robust=True)


def test_derivatives_equal_lifelines_loop() -> None:
    """The derivatives themselves, at a non-optimal beta, against lifelines' loop."""
    data = _tied().sort_values("t", kind="stable")
    x = data[["a", "b", "c"]]
    beta = np.array([0.3, -0.2, 0.1])
    loop = SemiParametricPHFitter()._get_efron_values_single(
        x, data["t"], data["e"].astype(bool), data["w"], None, beta
    )
    ours = efron_derivatives(
        x.to_numpy(), data["t"].to_numpy(), data["e"].to_numpy(), data["w"].to_numpy(), beta
    )
    for got, expected in zip(ours, loop, strict=True):
        np.testing.assert_allclose(got, expected, rtol=1e-10)
