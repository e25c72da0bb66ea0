"""How long the slope mixed models and the Cox model take as the cohort grows.

Simulates a two-arm cohort (invented data) with about 8 eGFR values per patient and
one time-to-event row per patient, then times:

- ``linear``: SlopeModel(knot_years=None) - random intercept and slope (2 x 2);
- ``two_slope``: SlopeModel(knot_years=0.25) - spline with 3 correlated random effects;
- ``cox``: CoxModel with the arm and two covariates.

Run at full scale under the shared lock, e.g.
``flock <lock file> python benchmarks/models_scale.py --sizes 1000 5000 20000``;
try ``--sizes 200`` first. Prints one line per model and size and a growth exponent
(slope of log time on log patients).
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
import polars as pl

from kidneycohort.errors import StatisticalWarning
from kidneycohort.models.mixed import SlopeModel
from kidneycohort.models.survival import CoxModel

VISITS = np.array([0.0, 0.0833, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0])


def simulate(n_patients: int, seed: int = 1) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame]:
    rng = np.random.default_rng(seed)
    ids = np.array([f"B{i:06d}" for i in range(n_patients)])
    active = rng.random(n_patients) < 0.5
    b0 = 50 + rng.normal(0, 10, n_patients)
    b1 = np.where(active, -12.0, 0.0) + rng.normal(0, 8, n_patients)
    b2 = np.where(active, -2.0, -3.0) + rng.normal(0, 1.5, n_patients)
    t = np.clip(VISITS[None, :] + rng.uniform(-0.02, 0.02, (n_patients, VISITS.size)), 0, None)
    t[:, 0] = 0.0
    egfr = (
        b0[:, None]
        + b1[:, None] * np.minimum(t, 0.25)
        + b2[:, None] * np.maximum(t - 0.25, 0)
        + rng.normal(0, 3, t.shape)
    )
    values = pl.DataFrame(
        {
            "patient_id": np.repeat(ids, VISITS.size),
            "years_from_index": t.ravel(),
            "egfr": egfr.ravel(),
        }
    )
    patients = pl.DataFrame(
        {
            "patient_id": ids,
            "group": np.where(active, "active", "placebo"),
            "age_at_index": rng.normal(62, 9, n_patients),
            "diabetes": rng.random(n_patients) < 0.4,
        }
    )
    hazard = (
        0.08
        * np.where(active, 0.75, 1.0)
        * np.exp(0.02 * (patients["age_at_index"].to_numpy() - 62))
    )
    event_time = rng.exponential(1 / hazard)
    censor_time = rng.uniform(1.0, 4.0, n_patients)
    endpoints = pl.DataFrame(
        {
            "patient_id": ids,
            "endpoint": "kidney_composite",
            "years": np.minimum(event_time, censor_time),
            "event": (event_time <= censor_time).astype(np.int8),
            "competing": np.zeros(n_patients, dtype=np.int8),
        }
    )
    return values, patients, endpoints


def time_fit(
    kind: str, values: pl.DataFrame, patients: pl.DataFrame, endpoints: pl.DataFrame
) -> tuple[float, str]:
    start = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", StatisticalWarning)
        if kind == "linear":
            model = SlopeModel(knot_years=None, reference_group="placebo").fit(values, patients)
            note = model.random_effects_structure_
        elif kind == "two_slope":
            model = SlopeModel(knot_years=0.25, reference_group="placebo").fit(values, patients)
            note = model.random_effects_structure_
        else:
            cox = CoxModel(reference_group="placebo", covariates=["age_at_index", "diabetes"]).fit(
                endpoints, patients
            )
            note = f"{cox.n_events_} events"
    elapsed = time.perf_counter() - start
    if caught:
        note += f"; {len(caught)} warnings"
    return elapsed, note


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[1000, 5000, 20000])
    parser.add_argument(
        "--models",
        nargs="+",
        default=["linear", "two_slope", "cox"],
        choices=["linear", "two_slope", "cox"],
    )
    args = parser.parse_args()
    timings: dict[str, list[tuple[int, float]]] = {kind: [] for kind in args.models}
    for size in args.sizes:
        values, patients, endpoints = simulate(size)
        for kind in args.models:
            elapsed, note = time_fit(kind, values, patients, endpoints)
            timings[kind].append((size, elapsed))
            print(
                f"{kind:>10}  patients {size:>6}  values {values.height:>7}  "
                f"{elapsed:8.2f} s  {1000 * elapsed / size:6.2f} ms/patient  ({note})",
                flush=True,
            )
    for kind, points in timings.items():
        if len(points) > 1:
            n, seconds = np.log([p[0] for p in points]), np.log([p[1] for p in points])
            exponent = np.polyfit(n, seconds, 1)[0]
            print(f"{kind:>10}  time grows as patients^{exponent:.2f}")


if __name__ == "__main__":
    main()
