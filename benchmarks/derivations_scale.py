"""Scale of the longitudinal derivations: value filter, baseline, slopes, stages, transitions.

Builds an invented eGFR table of N patients (default 1 million) with about 12 results
each (one equation; creatinine, care setting and sample times included so that the AKI
flags run), then times each stage on it and prints rows, seconds and rows per second.
The target is the whole chain under 60 s on a 2-core machine.

Run: ``python benchmarks/derivations_scale.py [--patients N] [--per-patient K]``
"""

from __future__ import annotations

import argparse
import datetime as dt
import platform
import time

import numpy as np
import polars as pl

from kidneycohort.baseline import BaselineRule, egfr_baseline
from kidneycohort.kdigo import sustained_stages, transition_matrix, transitions
from kidneycohort.schemas import DAYS_PER_YEAR
from kidneycohort.slopes import egfr_slopes
from kidneycohort.value_filter import ValueFilterRule, apply_value_filter


def make_egfr(n_patients: int, per_patient: int, seed: int = 20240611) -> pl.DataFrame:
    """Long eGFR table: per patient K results from 1 year before to 4 years after index."""
    rng = np.random.default_rng(seed)
    counts = rng.poisson(per_patient - 1, n_patients) + 1
    n = int(counts.sum())
    pid = np.repeat(np.arange(n_patients), counts)
    days = rng.integers(-365, 4 * 365, n)
    start = rng.uniform(15, 110, n_patients)[pid]
    slope = rng.normal(-2.0, 3.0, n_patients)[pid]
    egfr = np.maximum(start + slope * days / DAYS_PER_YEAR + rng.normal(0, 4, n), 2.0)
    creat = 90.0 / egfr
    index = dt.datetime(2020, 1, 1)
    times = np.datetime64(index, "us") + (days * 86400 + rng.integers(0, 86400, n)).astype(
        "timedelta64[s]"
    )
    settings = np.where(rng.random(n) < 0.08, "inpatient", "outpatient")
    return pl.DataFrame(
        {
            "patient_id": pl.Series(pid).cast(pl.String),
            "sample_datetime": times,
            "years_from_index": days / DAYS_PER_YEAR,
            "equation": "ckd_epi_2021_cr",
            "egfr": egfr,
            "creatinine_mg_dl": creat,
            "setting": settings,
        }
    ).with_columns(sample_date=pl.col("sample_datetime").dt.date())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=1_000_000)
    parser.add_argument("--per-patient", type=int, default=12)
    args = parser.parse_args()

    t0 = time.perf_counter()
    egfr = make_egfr(args.patients, args.per_patient)
    print(
        f"{platform.machine()} {platform.python_version()} polars {pl.__version__}, "
        f"threads {pl.thread_pool_size()}"
    )
    print(
        f"built {egfr.height:,} eGFR rows for {args.patients:,} patients "
        f"in {time.perf_counter() - t0:.1f} s"
    )

    timings: list[tuple[str, int, float]] = []

    def run(name: str, fn):
        start = time.perf_counter()
        out = fn()
        timings.append((name, out.height, time.perf_counter() - start))
        return out

    filtered = run(
        "value filter (setting + AKI flags)", lambda: apply_value_filter(egfr, ValueFilterRule())
    )
    run("baseline (last in window)", lambda: egfr_baseline(filtered))
    run(
        "baseline (mean of last 2)",
        lambda: egfr_baseline(filtered, BaselineRule(method="mean_last_n")),
    )
    run("slopes", lambda: egfr_slopes(filtered))
    stages = run("sustained stages", lambda: sustained_stages(filtered))
    run("transitions", lambda: transitions(stages))
    run("transition matrix", lambda: transition_matrix(stages))

    total = sum(t for _, _, t in timings)
    width = max(len(n) for n, _, _ in timings)
    for name, rows, seconds in timings:
        print(
            f"{name:<{width}}  {seconds:7.2f} s  -> {rows:>11,} rows  "
            f"({egfr.height / seconds / 1e6:6.2f} M input rows/s)"
        )
    print(f"{'total':<{width}}  {total:7.2f} s  (target < 60 s)")


if __name__ == "__main__":
    main()
