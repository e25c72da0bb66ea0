"""How long the competing-risks analysis takes as the endpoints table grows.

Simulates a two-arm cohort (invented data): kidney failure with death competing,
uniform administrative censoring over 0.5-10 years, follow-up on a daily grid (so times
tie as they do when years come from dates), two covariates (age, sex). One endpoint row
per patient. For each size, in a fresh process (so that peak memory is that size's):

- ``prepare``: reading the endpoints and patients tables into model rows;
- ``fine_gray``: Fine–Gray fit with the robust variance and predicted incidence;
- ``gray_test``: Gray's test between the arms;
- ``cause_specific``: cause-specific Cox models of both causes (Efron ties);
- ``all``: the whole ``CompetingRisks`` analysis (the above plus the curves).

Beside it, R's cmprsk ``crr`` (with its variance) and ``cuminc`` on the same rows
(also at 2 000 and 5 000 rows, for R's growth exponent), at the sizes where crr is
projected to finish within ``--r-timeout`` seconds; larger sizes print a note instead.

Run under the shared lock, e.g.
``flock <lock file> python benchmarks/competing_risks_scale.py``
(default sizes 10 000, 100 000, 1 000 000; target: 1 000 000 rows under 60 s).
Prints one line per part and size, then each part's growth exponent (slope of log time
on log rows).
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

PARTS = ("prepare", "fine_gray", "gray_test", "cause_specific", "all")


def simulate(n: int, seed: int = 1) -> tuple[pl.DataFrame, pl.DataFrame]:
    rng = np.random.default_rng(seed)
    treated = rng.random(n) < 0.5
    age = rng.normal(62.0, 9.0, n)
    female = rng.random(n) < 0.45
    linear = 0.4 * treated + 0.03 * (age - 62.0) - 0.2 * female
    failure = rng.exponential(1.0 / (0.05 * np.exp(linear)))
    death = rng.exponential(1.0 / 0.04, n)
    censor = rng.uniform(0.5, 10.0, n)
    years = np.minimum.reduce([failure, death, censor])
    cause = np.where(years == failure, 1, np.where(years == death, 2, 0))
    years = np.ceil(years * 365.25) / 365.25
    ids = np.char.add("B", np.arange(n).astype(str))
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


def write_csv(endpoints: pl.DataFrame, patients: pl.DataFrame, path: str) -> None:
    """The rows as R reads them: t, cause (0/1/2), treated, age, female."""
    endpoints.join(patients, on="patient_id").select(
        pl.col("years").alias("t"),
        (pl.col("event") + 2 * pl.col("competing")).alias("cause"),
        (pl.col("group") == "treated").cast(pl.Int8).alias("treated"),
        "age",
        pl.col("female").cast(pl.Int8),
    ).write_csv(path, float_precision=17)


def peak_gib() -> float:
    """Peak resident memory of this process (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2


def measure_one(n: int, csv: str | None) -> dict[str, object]:
    """Time every part at one size (run in its own process)."""
    from kidneycohort.models.competing._analysis import CompetingRisks
    from kidneycohort.models.competing._cause_specific import CauseSpecificCox
    from kidneycohort.models.competing._data import CompetingRisksRule, prepare_competing_rows
    from kidneycohort.models.competing._fine_gray import FineGray
    from kidneycohort.models.competing._gray_test import gray_test

    spec = CompetingRisksRule(covariates=["age", "female"])
    CompetingRisks(spec).fit(*simulate(500, seed=2))  # first calls outside the timing
    endpoints, patients = simulate(n)
    before = peak_gib()
    seconds: dict[str, float] = {}
    start = time.perf_counter()
    rows = prepare_competing_rows(endpoints, patients, spec)
    seconds["prepare"] = time.perf_counter() - start
    start = time.perf_counter()
    fine_gray = FineGray(spec).fit_rows(rows)
    seconds["fine_gray"] = time.perf_counter() - start
    start = time.perf_counter()
    test = gray_test(rows.time, rows.cause, rows.group)
    seconds["gray_test"] = time.perf_counter() - start
    start = time.perf_counter()
    CauseSpecificCox(spec).fit_rows(rows)
    seconds["cause_specific"] = time.perf_counter() - start
    start = time.perf_counter()
    CompetingRisks(spec).fit(endpoints, patients)
    seconds["all"] = time.perf_counter() - start
    fit = fine_gray.fit_
    if csv is not None:
        write_csv(endpoints, patients, csv)
    return {
        "n": n,
        "seconds": seconds,
        "events": int(rows.count(1)),
        "competing": int(rows.count(2)),
        "distinct_times": int(np.unique(rows.time).size),
        "iterations": None if fit is None else fit.iterations,
        "gray_statistic": test.statistic,
        "peak_before_gib": before,
        "peak_gib": peak_gib(),
    }


R_TIMING = r"""
suppressMessages(library(cmprsk))
d <- read.csv(commandArgs(trailingOnly = TRUE)[1])
a <- system.time(crr(d$t, d$cause, cbind(d$treated, d$age, d$female)))[["elapsed"]]
b <- system.time(cuminc(d$t, d$cause, d$treated))[["elapsed"]]
cat(a, b, "\n")
"""


def time_r(csv: str, timeout: float) -> tuple[float, float] | str:
    """Seconds of crr and cuminc in R, or why not."""
    if shutil.which("Rscript") is None:
        return "Rscript not installed"
    with tempfile.NamedTemporaryFile("w", suffix=".R", delete=False) as script:
        script.write(R_TIMING)
    try:
        done = subprocess.run(
            ["Rscript", script.name, csv],
            capture_output=True,
            text=True,
            timeout=timeout,
            check=False,
        )
    except subprocess.TimeoutExpired:
        return f"did not finish within {timeout:.0f} s"
    finally:
        Path(script.name).unlink()
    if done.returncode != 0:
        return "R failed: " + (done.stderr.strip().splitlines() or ["?"])[-1]
    crr_s, cuminc_s = (float(v) for v in done.stdout.split())
    return crr_s, cuminc_s


def _r_rows(sizes: list[int], folder: str, timeout: float) -> list[tuple[int, float]]:
    """Time crr and cuminc at each size, skipping sizes projected beyond ``timeout``."""
    timed_rows: list[tuple[int, float]] = []
    for size in sizes:
        csv = str(Path(folder) / f"cohort_{size}.csv")
        if not Path(csv).exists():
            subprocess.run(
                [sys.executable, __file__, "--write", str(size), "--csv", csv], check=True
            )
        growth = 2.0
        if len(timed_rows) > 1:
            (n0, s0), (n1, s1) = timed_rows[-2:]
            growth = float(np.log(s1 / s0) / np.log(n1 / n0))
        if timed_rows:
            last_n, last_s = timed_rows[-1]
            projected = last_s * (size / last_n) ** growth
            if projected > timeout:
                print(
                    f"{'R cmprsk crr':>15}  rows {size:>9,}  skipped: projected "
                    f"{projected:,.0f} s (rows^{growth:.1f} from {last_n:,} rows)",
                    flush=True,
                )
                continue
        timed = time_r(csv, timeout)
        if isinstance(timed, str):
            print(f"{'R cmprsk crr':>15}  rows {size:>9,}  {timed}", flush=True)
            break
        timed_rows.append((size, timed[0]))
        print(f"{'R cmprsk crr':>15}  rows {size:>9,}  {timed[0]:8.2f} s", flush=True)
        print(f"{'R cuminc':>15}  rows {size:>9,}  {timed[1]:8.2f} s", flush=True)
    return timed_rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[10_000, 100_000, 1_000_000])
    parser.add_argument(
        "--r-sizes",
        type=int,
        nargs="+",
        default=[2_000, 5_000],
        help="extra sizes for R only (its growth exponent); R also runs at --sizes",
    )
    parser.add_argument("--r-timeout", type=float, default=120.0)
    parser.add_argument("--no-r", action="store_true", help="skip the R comparison rows")
    parser.add_argument("--one", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--write", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--csv", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one is not None:
        print(json.dumps(measure_one(args.one, args.csv)))
        return
    if args.write is not None:
        write_csv(*simulate(args.write), args.csv)
        return
    results = []
    with tempfile.TemporaryDirectory() as folder:
        for size in args.sizes:
            csv = str(Path(folder) / f"cohort_{size}.csv")
            done = subprocess.run(
                [sys.executable, __file__, "--one", str(size), "--csv", csv],
                capture_output=True,
                text=True,
                check=True,
            )
            found = json.loads(done.stdout.strip().splitlines()[-1])
            results.append(found)
            for part in PARTS:
                extra = ""
                if part == "all":
                    extra = (
                        f"  peak {found['peak_gib']:.2f} GiB (data alone "
                        f"{found['peak_before_gib']:.2f}); events {found['events']:,}, "
                        f"competing {found['competing']:,}, distinct times "
                        f"{found['distinct_times']:,}"
                    )
                print(
                    f"{part:>15}  rows {size:>9,}  {found['seconds'][part]:8.2f} s{extra}",
                    flush=True,
                )
        r_rows = (
            []
            if args.no_r
            else _r_rows(sorted(set(args.r_sizes + args.sizes)), folder, args.r_timeout)
        )
    if len(results) > 1:
        sizes = np.log([r["n"] for r in results])
        for part in PARTS:
            slope = np.polyfit(sizes, np.log([r["seconds"][part] for r in results]), 1)[0]
            print(f"{part:>15}  time grows as rows^{slope:.2f}")
    if len(r_rows) > 1:
        slope = np.polyfit(np.log([r[0] for r in r_rows]), np.log([r[1] for r in r_rows]), 1)[0]
        print(f"{'R cmprsk crr':>15}  time grows as rows^{slope:.2f}")


if __name__ == "__main__":
    main()
