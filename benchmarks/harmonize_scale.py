"""Scale benchmark: read ~12 million raw lab rows from Parquet, harmonise, three equations.

Usage::

    python benchmarks/harmonize_scale.py                  # 1 000 000 patients, ~12 M rows
    python benchmarks/harmonize_scale.py --patients 20000 # quick run while developing

The invented cohort (made-up study, two made-up laboratories) is generated with numpy
and written to Parquet in a temporary folder first; a fresh child process then reads,
harmonises and computes eGFR, so its peak memory (``ru_maxrss``) covers only that work.
About 4 % of rows are dirty: qualifiers, decimal commas, text results, missing units,
unknown patients, dates before birth, implausible values, exact duplicates and
same-day repeats. Prints wall time per phase and peak resident memory.
"""

from __future__ import annotations

import argparse
import datetime as dt
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

EQUATIONS = ["ckd_epi_2021_cr", "ckd_epi_2012_cys", "ckd_epi_2021_crcys"]


def generate(folder: Path, n_patients: int, rows_per_patient: float, seed: int = 7) -> int:
    rng = np.random.default_rng(seed)
    ids = pl.Series("patient_id", np.arange(n_patients)).cast(pl.String).str.zfill(7)
    ids = "K" + ids
    start = np.datetime64("1930-01-01", "D")
    birth = start + rng.integers(0, 365 * 75, n_patients)
    index = start + rng.integers(365 * 88, 365 * 92, n_patients)  # index 2018-2021
    patients = pl.DataFrame(
        {
            "patient_id": ids,
            "sex": rng.choice(["F", "M"], n_patients),
            "birth_date": birth,
            "index_date": index,
        }
    )
    patients.write_parquet(folder / "patients.parquet")

    n = int(n_patients * rows_per_patient)
    who = rng.integers(0, n_patients, n)
    analyte = rng.choice(["creatinine", "cystatin_c", "uacr"], n, p=[0.7, 0.15, 0.15])
    molar = rng.random(n) < 0.5  # laboratory B reports creatinine in umol/L, UACR in mg/mmol
    creat = np.exp(rng.normal(0.0, 0.35, n))
    value = np.select(
        [analyte == "creatinine", analyte == "cystatin_c"],
        [np.where(molar, creat * 88.4, creat), np.exp(rng.normal(0.1, 0.3, n))],
        np.where(molar, np.exp(rng.normal(1.0, 1.2, n)), np.exp(rng.normal(3.0, 1.2, n))),
    )
    unit = np.select(
        [analyte == "creatinine", analyte == "cystatin_c"],
        [np.where(molar, "µmol/L", "mg/dL"), np.full(n, "mg/L")],
        np.where(molar, "mg/mmol", "mg/g"),
    )
    code = np.where((analyte == "creatinine") & (rng.random(n) < 0.3), "2160-0", analyte)
    offsets = rng.integers(-365, 5 * 365, n)
    labs = pl.DataFrame(
        {
            "patient_id": ids.gather(who),
            "sample_date": index[who] + offsets,
            "analyte": code,
            "value": pl.Series(value).round(2).cast(pl.String),
            "unit": unit,
        }
    )
    # dirty rows (~4 %), each kind on its own random rows
    dirt = rng.random(n)
    labs = labs.with_columns(
        value=pl.when(pl.Series(dirt < 0.005))
        .then(pl.lit("see comment"))
        .when(pl.Series((dirt >= 0.005) & (dirt < 0.01)))
        .then(pl.col("value").str.replace(".", ",", literal=True))
        .when(pl.Series((dirt >= 0.01) & (dirt < 0.013)))
        .then(pl.lit("<0.2"))
        .when(pl.Series((dirt >= 0.013) & (dirt < 0.016)))
        .then(pl.lit("9999"))
        .otherwise(pl.col("value")),
        unit=pl.when(pl.Series((dirt >= 0.016) & (dirt < 0.02)))
        .then(None)
        .otherwise(pl.col("unit")),
        patient_id=pl.when(pl.Series((dirt >= 0.02) & (dirt < 0.025)))
        .then(pl.lit("UNKNOWN"))
        .otherwise(pl.col("patient_id")),
        sample_date=pl.when(pl.Series((dirt >= 0.025) & (dirt < 0.03)))
        .then(pl.lit(dt.date(1920, 1, 1)))
        .otherwise(pl.col("sample_date")),
    )
    duplicates = labs.sample(fraction=0.01, seed=seed)
    labs = pl.concat([labs, duplicates])
    labs.write_parquet(folder / "labs.parquet", row_group_size=1_000_000)
    return labs.height


def peak_gib() -> float:
    """Peak resident memory of this process in GiB.

    Linux keeps ``ru_maxrss`` across ``exec`` (so a child started from a big parent
    inherits its high-water mark); ``VmHWM`` belongs to the new address space.
    """
    status = Path("/proc/self/status")
    if status.exists():
        for line in status.read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024**2
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2


def measure(folder: Path) -> None:
    from kidneycohort.egfr import compute_egfr
    from kidneycohort.harmonize import harmonize_tables
    from kidneycohort.io import read_labs, read_patients

    t0 = time.perf_counter()
    labs = read_labs(folder / "labs.parquet")
    patients = read_patients(folder / "patients.parquet").collect()
    t1 = time.perf_counter()
    print(f"read (lazy scan + patients): {t1 - t0:6.1f} s   peak {peak_gib():.2f} GiB")
    result = harmonize_tables(labs, patients)
    t2 = time.perf_counter()
    print(f"harmonise:                   {t2 - t1:6.1f} s   peak {peak_gib():.2f} GiB")
    print(result.accounting)
    print(result.accounting_by_reason.filter(pl.col("table") == "labs"))
    egfr = compute_egfr(result.labs, result.patients, EQUATIONS)
    t3 = time.perf_counter()
    print(f"eGFR ({', '.join(EQUATIONS)}): {t3 - t2:6.1f} s   peak {peak_gib():.2f} GiB")
    print(f"egfr rows {egfr.height:,}, computed {egfr['egfr'].is_not_null().sum():,}")
    print(f"TOTAL read + harmonise + eGFR: {t3 - t0:.1f} s, peak memory {peak_gib():.2f} GiB")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=1_000_000)
    parser.add_argument("--rows-per-patient", type=float, default=11.9)
    parser.add_argument(
        "--data", type=Path, help="keep the generated Parquet files in this folder and reuse them"
    )
    parser.add_argument("--measure", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.measure is not None:
        measure(args.measure)
        return
    with tempfile.TemporaryDirectory() as tmp:
        folder = args.data or Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        if not (folder / "labs.parquet").exists():
            t = time.perf_counter()
            rows = generate(folder, args.patients, args.rows_per_patient)
            print(
                f"generated {args.patients:,} patients, {rows:,} lab rows "
                f"in {time.perf_counter() - t:.1f} s (not timed below)"
            )
        subprocess.run([sys.executable, __file__, "--measure", str(folder)], check=True)


if __name__ == "__main__":
    main()
