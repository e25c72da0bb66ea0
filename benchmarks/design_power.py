"""Per-trial cost of a design by simulation, and the projected time of a full design.

Runs the shipped example design (``configs/design_trial.yaml``: two-slope model with
total slopes at 2 and 3 years, seven Cox endpoints) with a reduced number of trials per
sample size, under the treatment effect and the null scenario, and prints:

- wall time and trials per second for each sample size (one process, then ``--workers``);
- the per-trial cost split into its parts for one chunk (generate, harmonise + eGFR +
  baseline + endpoints, slope model, Cox), by profiling one chunk;
- the projected wall time of ``--project-trials`` trials x ``--project-sizes`` sizes x
  ``--project-patients`` patients, with and without the null scenario, extrapolated
  linearly from the measured per-trial cost at the largest measured size (the per-trial
  cost grows about linearly with patients; the slope fit has a fixed part).

Run under the shared lock on a quiet machine, e.g.
``flock <lock file> python benchmarks/design_power.py --trials 40 --workers 2``.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

from kidneycohort.design import simulate_power

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "design_trial.yaml"


def _run(sizes: list[int], trials: int, workers: int, chunk: int) -> tuple[float, int]:
    with tempfile.TemporaryDirectory() as tmp:
        started = time.perf_counter()
        result = simulate_power(
            CONFIG,
            out=Path(tmp) / "d",
            workers=workers,
            overrides=[
                f"design.sample_sizes={sizes}",
                f"design.trials={trials}",
                f"design.null_trials={trials}",
                f"design.trials_per_chunk={chunk}",
            ],
        )
        seconds = time.perf_counter() - started
    return seconds, int(result.estimates.select("scenario", "sample_size", "trial").n_unique())


def _parts(size: int, chunk: int) -> dict[str, float]:
    """Seconds per trial of each stage for one chunk at ``size`` patients."""
    import polars as pl

    from kidneycohort.baseline import egfr_baseline
    from kidneycohort.design._config import load_design
    from kidneycohort.design._scenario import data_cut_date, design_scenarios
    from kidneycohort.design._threads import one_blas_thread
    from kidneycohort.design._trials import _hazard_estimates, _slope_estimates
    from kidneycohort.egfr import compute_egfr
    from kidneycohort.endpoints import derive_endpoints
    from kidneycohort.harmonize import harmonize_tables
    from kidneycohort.synthetic import generate_cohort

    config, folder = load_design(CONFIG)
    scenario = design_scenarios(config, folder)["effect"]
    cut = data_cut_date(scenario)
    times: dict[str, float] = {}
    with one_blas_thread():
        t = time.perf_counter()
        cohort = generate_cohort(scenario, patients=size * chunk, seed=1)
        times["generate"] = time.perf_counter() - t
        t = time.perf_counter()
        clean = harmonize_tables(cohort.labs, cohort.patients, cohort.events)
        patients = (
            clean.patients.with_row_index("_r")
            .with_columns((pl.col("_r").cast(pl.Int64) // size).alias("trial"))
            .drop("_r")
        )
        egfr = compute_egfr(clean.labs, patients, equations=[config.design.equation])
        base = egfr_baseline(egfr, rule=config.baseline)
        endpoints = derive_endpoints(
            egfr,
            base,
            patients,
            clean.events,
            config.endpoints.definitions,
            equation=config.design.equation,
            data_cut=cut,
            rule=config.endpoints.rule,
        )
        times["harmonise+egfr+baseline+endpoints"] = time.perf_counter() - t
        t = time.perf_counter()
        _slope_estimates(config, egfr, patients)
        times["slope model (exact engine)"] = time.perf_counter() - t
        t = time.perf_counter()
        _hazard_estimates(config, endpoints, patients)
        times[f"Cox x {len(config.time_to_event_names())} endpoints"] = time.perf_counter() - t
    return {k: v / chunk for k, v in times.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[300, 600])
    parser.add_argument("--trials", type=int, default=20, help="trials per size (measured)")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--chunk", type=int, default=10)
    parser.add_argument("--project-trials", type=int, default=1000)
    parser.add_argument("--project-sizes", type=int, default=4)
    parser.add_argument("--project-patients", type=int, default=600)
    args = parser.parse_args()
    print(f"machine: {os.cpu_count()} CPUs; config {CONFIG.name}; effect + null scenario")
    print("per-trial cost by stage (one process, one chunk of 10 trials):")
    for size in args.sizes:
        parts = _parts(size, 10)
        text = ", ".join(f"{k} {v * 1000:.0f} ms" for k, v in parts.items())
        print(f"  n={size}: {sum(parts.values()) * 1000:.0f} ms/trial ({text})")
    per_trial = {}
    for workers in sorted({1, args.workers}):
        for size in args.sizes:
            seconds, trials = _run([size], args.trials, workers, args.chunk)
            per_trial[(workers, size)] = seconds / trials
            print(
                f"workers={workers} n={size}: {trials} trials in {seconds:.1f} s "
                f"= {seconds / trials * 1000:.0f} ms/trial wall ({trials / seconds:.2f} trials/s)"
            )
    largest = max(args.sizes)
    cost = per_trial[(args.workers, largest)] * args.project_patients / largest
    effect_only = cost * args.project_trials * args.project_sizes
    print(
        f"projection ({args.workers} workers, linear in patients from n={largest}): "
        f"{args.project_trials} trials x {args.project_sizes} sizes x {args.project_patients} "
        f"patients: {effect_only / 60:.1f} min under the effect only, "
        f"{2 * effect_only / 60:.1f} min with as many null trials"
    )


if __name__ == "__main__":
    main()
