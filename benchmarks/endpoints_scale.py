"""Scale benchmark: kidney endpoints on an invented cohort.

Default: 1,000,000 patients with 12 eGFR values each (12 million rows), four endpoint
definitions (confirmed 40 % decline, confirmed eGFR < 15, kidney failure and their
composite). Prints the timings. Use --patients for a smaller run while developing.
"""

from __future__ import annotations

import argparse
import datetime as dt
import time

import numpy as np
import polars as pl

from kidneycohort.endpoints import (
    Composite,
    EgfrBelow,
    EgfrDecline,
    KidneyFailure,
    derive_endpoints,
)


def make_cohort(n: int, per_patient: int, seed: int = 7) -> dict[str, pl.DataFrame]:
    """Invented cohort: linear eGFR trajectories with noise, some deaths and dialysis."""
    rng = np.random.default_rng(seed)
    ids = np.char.add("pt", np.arange(n).astype(str))
    index = np.datetime64("2018-01-01") + rng.integers(0, 365, n).astype("timedelta64[D]")
    base = rng.uniform(25, 100, n)
    slope = rng.normal(-3, 4, n)  # mL/min/1.73m2 per year
    days = np.sort(rng.integers(30, 365 * 5, (n, per_patient)), axis=1)
    egfr = np.clip(
        base[:, None] + slope[:, None] * days / 365.25 + rng.normal(0, 5, (n, per_patient)), 3, None
    )
    sample = index[:, None] + days.astype("timedelta64[D]")
    died = rng.random(n) < 0.08
    death = np.where(
        died, index + rng.integers(60, 365 * 5, n).astype("timedelta64[D]"), np.datetime64("NaT")
    )
    on_dialysis = rng.random(n) < 0.04
    pid_d = ids[on_dialysis]
    start = index[on_dialysis] + rng.integers(200, 365 * 5, on_dialysis.sum()).astype(
        "timedelta64[D]"
    )
    return {
        "egfr": pl.DataFrame(
            {
                "patient_id": np.repeat(ids, per_patient),
                "sample_date": sample.ravel(),
                "equation": "ckd_epi_2021_cr",
                "egfr": egfr.ravel(),
            }
        ).with_columns(pl.col("sample_date").cast(pl.Date)),
        "baseline": pl.DataFrame(
            {"patient_id": ids, "equation": "ckd_epi_2021_cr", "baseline_egfr": base}
        ),
        "patients": pl.DataFrame(
            {"patient_id": ids, "index_date": index, "death_date": death}
        ).with_columns(pl.col("index_date").cast(pl.Date), pl.col("death_date").cast(pl.Date)),
        "events": pl.DataFrame(
            {"patient_id": pid_d, "event_date": start, "event": "dialysis"}
        ).with_columns(
            pl.col("event_date").cast(pl.Date), pl.lit(None, dtype=pl.Date).alias("end_date")
        ),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--patients", type=int, default=1_000_000)
    parser.add_argument("--values-per-patient", type=int, default=12)
    args = parser.parse_args()
    t0 = time.perf_counter()
    tables = make_cohort(args.patients, args.values_per_patient)
    t1 = time.perf_counter()
    definitions = [
        EgfrDecline(percent=40),
        EgfrBelow(threshold=15),
        KidneyFailure(),
        Composite(
            name="decline_below_or_failure",
            paramcd="COMP3",
            components=["egfr_decline_40", "egfr_below_15", "kidney_failure"],
        ),
    ]
    out = derive_endpoints(
        tables["egfr"],
        tables["baseline"],
        tables["patients"],
        tables["events"],
        definitions,
        equation="ckd_epi_2021_cr",
        data_cut=dt.date(2023, 12, 31),
    )
    t2 = time.perf_counter()
    print(
        f"patients: {args.patients:,}  eGFR rows: {tables['egfr'].height:,}  definitions: {len(definitions)}"
    )
    print(f"make cohort: {t1 - t0:.1f} s")
    print(f"derive_endpoints: {t2 - t1:.1f} s  ({out.height:,} endpoint rows)")
    print(
        out.group_by("endpoint")
        .agg(pl.col("event").sum().alias("events"), pl.col("competing").sum().alias("competing"))
        .sort("endpoint")
    )


if __name__ == "__main__":
    main()
