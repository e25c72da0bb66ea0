"""Scale of the synthetic generator: the EHR scenario at one million patients.

Generates the cohort in memory, then writes it as Parquet to a temporary folder, and
prints wall times, rows and the process's peak resident memory. Target on a 2-core,
24 GiB machine: under 2 minutes and under 8 GB for 1,000,000 patients.

    python benchmarks/synth_scale.py [--patients N] [--scenario PATH] [--keep DIR]
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

from kidneycohort.synthetic import generate_cohort
from kidneycohort.synthetic.writer import write_frames

HERE = Path(__file__).resolve().parent


def peak_rss_gib() -> float:
    """Peak resident set size of this process (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024**2


def cpu_seconds() -> float:
    """User + system CPU time of this process so far."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--patients", type=int, default=1_000_000)
    parser.add_argument("--seed", type=int, default=None)
    parser.add_argument(
        "--scenario", type=Path, default=HERE.parent / "synthetic" / "ehr_cohort.yaml"
    )
    parser.add_argument("--keep", type=Path, default=None, help="write here instead of a temp dir")
    args = parser.parse_args()

    load_before = os.getloadavg()[0]
    start = time.perf_counter()
    cohort = generate_cohort(args.scenario, patients=args.patients, seed=args.seed)
    generated = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        out = args.keep or Path(tmp)
        (out / "truth").mkdir(parents=True, exist_ok=True)
        files = write_frames(cohort, out, "parquet")
        size = sum(f.stat().st_size for f in files)
    written = time.perf_counter()

    print(f"scenario           {args.scenario.name}")
    print(f"patients           {cohort.patients.height:,}")
    print(f"lab rows           {cohort.labs.height:,}")
    print(f"event rows         {cohort.events.height:,}")
    print(f"generate (s)       {generated - start:.1f}")
    print(f"write parquet (s)  {written - generated:.1f}")
    print(f"total (s)          {written - start:.1f}")
    print(f"lab rows per s     {cohort.labs.height / (written - start):,.0f}")
    print(f"files / MB         {len(files)} / {size / 1e6:.0f}")
    print(f"CPU user+sys (s)   {cpu_seconds():.1f}")
    print(f"peak RSS (GiB)     {peak_rss_gib():.2f}")
    print(
        f"load avg start/end {load_before:.1f} / {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
