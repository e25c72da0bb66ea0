"""Proportional-hazards test: the vectorised one of kidneycohort vs lifelines.

Usage::

    python benchmarks/ph_test_scale.py                          # 50k, 200k, 1M rows
    python benchmarks/ph_test_scale.py --rows 50000,200000 --lifelines-max 200000

An invented cohort (made-up data): a two-level group, age and a binary covariate, event
times on a daily grid (ties, as in record data), 20 % events. lifelines' CoxPHFitter
is fitted once per size (and kidneycohort's ``VectorisedCoxPHFitter``, same fit, timed
beside it); then lifelines' ``proportional_hazard_test`` (km transform)
and ``kidneycohort.models.survival.proportional_hazards_test`` are timed on the same fit
and their statistics compared. lifelines is skipped above ``--lifelines-max`` rows
(its residuals grow faster than n squared). Prints seconds and the largest relative
difference of the statistics.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
from lifelines import CoxPHFitter
from lifelines.statistics import proportional_hazard_test

from kidneycohort.models.survival import VectorisedCoxPHFitter, proportional_hazards_test


def cohort(n: int, seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    group = rng.integers(0, 2, n).astype(float)
    age = rng.normal(60, 12, n)
    female = rng.integers(0, 2, n).astype(float)
    rate = 0.05 * np.exp(0.4 * group + 0.03 * (age - 60) - 0.1 * female)
    event_years = rng.exponential(1 / rate)
    censor_years = rng.uniform(0.5, 8.0, n)
    years = np.minimum(event_years, censor_years)
    return pd.DataFrame(
        {
            "group": group,
            "age": age,
            "female": female,
            "years": np.ceil(years * 365.25) / 365.25,
            "event": (event_years <= censor_years).astype(int),
        }
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", default="50000,200000,1000000")
    parser.add_argument("--lifelines-max", type=int, default=200_000)
    args = parser.parse_args()
    print(
        f"{'rows':>9} {'events':>7} {'fit s':>7} {'vec fit s':>10} {'lifelines s':>12} "
        f"{'ours s':>8} {'max rel diff':>13}"
    )
    for n in (int(s) for s in args.rows.split(",")):
        data = cohort(n)
        names = ["group", "age", "female"]
        started = time.perf_counter()
        fit = CoxPHFitter().fit(data, "years", "event")
        fit_s = time.perf_counter() - started
        started = time.perf_counter()
        vectorised = VectorisedCoxPHFitter().fit(data, "years", "event")
        vec_s = time.perf_counter() - started
        assert np.allclose(vectorised.params_, fit.params_, rtol=1e-9)
        started = time.perf_counter()
        ours = proportional_hazards_test(
            data["years"].to_numpy(),
            data["event"].to_numpy(),
            data[names].to_numpy(),
            fit.params_.loc[names].to_numpy(),
            fit.variance_matrix_.loc[names, names].to_numpy(),
            time_transform="km",
            names=names,
        )
        ours_s = time.perf_counter() - started
        lifelines_s, diff = float("nan"), float("nan")
        if n <= args.lifelines_max:
            started = time.perf_counter()
            reference = proportional_hazard_test(fit, data, time_transform="km").summary
            lifelines_s = time.perf_counter() - started
            expected = reference.loc[names, "test_statistic"].to_numpy()
            diff = float(
                np.max(np.abs(ours["test_statistic"].to_numpy()[:-1] - expected) / np.abs(expected))
            )
        print(
            f"{n:>9} {int(data['event'].sum()):>7} {fit_s:>7.2f} {vec_s:>10.2f} {lifelines_s:>12.2f} "
            f"{ours_s:>8.3f} {diff:>13.1e}"
        )


if __name__ == "__main__":
    main()
