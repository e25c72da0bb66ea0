"""The polars engine beside the spark engine (local mode) on the cohort recipe.

Usage::

    python benchmarks/spark_engine.py                        # 100k patients
    python benchmarks/spark_engine.py --sizes 100k,1M --partitions 8
    python benchmarks/spark_engine.py --sizes 10k --master 'local[2]' --spark-memory 6g

For each size the invented health-record scenario (``synthetic/ehr_cohort.yaml``, no
real patients; cached in ``--data``) is run through the demo cohort config (recipe
``cohort_progression``) twice, each in a fresh child process: with the polars engine,
then with ``execution.engine: spark`` on ``--master`` with ``--partitions`` patient
partitions. Both write a full run folder; the data files are compared (they must be
the same).

Printed per step: the driver's seconds (polars: the whole step; Spark: reading the
partition files back, the cohort-level part and writing), Spark's executor seconds
summed over the partition tasks, and peak memory: the driver's Python process (highest
step peak), the Spark JVM (in local mode it hosts the executors' shuffle and the
scheduler; the kernel's high-water mark ``VmHWM``) and the largest Python worker of a
partition task. Run it on a quiet machine and quote the machine's size.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
SCENARIO = REPO / "synthetic" / "ehr_cohort.yaml"

_CHILD = """
import json, sys, time
from pathlib import Path
from kidneycohort.pipeline.config import load_config
from kidneycohort.pipeline.demo import demo_config_path
from kidneycohort.pipeline.runner import run_pipeline
data, out, engine, master, partitions, memory, inputs = sys.argv[1:8]
suffix = "" if inputs == "folders" else ".parquet"
overrides = [f"data.{k}.path={data}/{k}{suffix}" for k in ("patients", "labs", "events")]
overrides += [f"execution.engine={engine}", f"execution.partitions={partitions}"]
jvm = None
started = time.perf_counter()
if engine == "spark":
    import os
    from pyspark.sql import SparkSession
    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    spark = (SparkSession.builder.master(master).appName("kidneycohort-benchmark")
             .config("spark.driver.memory", memory)
             .config("spark.ui.showConsoleProgress", "false")
             .config("spark.sql.session.timeZone", "UTC").getOrCreate())
    spark.sparkContext.setLogLevel("ERROR")
    jvm = spark.sparkContext._gateway.proc.pid
    print(f"SPARKSTART {time.perf_counter() - started:.3f}")
run_pipeline(load_config(demo_config_path("cohort"), overrides=overrides), out_dir=Path(out), force=True)
print(f"WALL {time.perf_counter() - started:.3f}")
if jvm is not None:
    for line in Path(f"/proc/{jvm}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            print(f"JVMPEAK {int(line.split()[1]) / 1024:.0f}")
    # shuffle volume of the run's Spark stages, from Spark's own monitoring API
    import urllib.request
    sc = spark.sparkContext
    url = f"{sc.uiWebUrl}/api/v1/applications/{sc.applicationId}/stages"
    try:
        stages = json.loads(urllib.request.urlopen(url, timeout=30).read())
    except OSError as exc:
        print(f"# no Spark monitoring API at {url}: {exc}")
    else:
        print(f"SHUFFLEWRITE {sum(s.get('shuffleWriteBytes', 0) for s in stages) / 2**20:.1f}")
"""


def parse_size(text: str) -> int:
    text = text.strip().lower().replace("_", "")
    scale = {"k": 1_000, "m": 1_000_000}.get(text[-1:], 1)
    return int(float(text.rstrip("km")) * scale)


def label(n: int) -> str:
    if n % 1_000_000 == 0:
        return f"{n // 1_000_000}M"
    return f"{n // 1000}k" if n % 1000 == 0 else str(n)


def ensure_data(folder: Path, patients: int) -> Path:
    target = folder / f"ehr_{patients}"
    if not (target / "labs.parquet").exists():
        from kidneycohort.synthetic import write_cohort

        started = time.perf_counter()
        write_cohort(SCENARIO, target, patients=patients, fmt="parquet")
        print(f"# generated {patients:,} patients in {time.perf_counter() - started:.0f} s")
    return target


def as_folders(data: Path) -> Path:
    """Each table of ``data`` as a one-file Parquet dataset folder (hard links)."""
    target = data / "folders"
    for table in ("patients", "labs", "events"):
        link = target / table / "part-0.parquet"
        if not link.exists():
            link.parent.mkdir(parents=True, exist_ok=True)
            os.link(data / f"{table}.parquet", link)
    return target


def _value(text: str, key: str) -> float | None:
    if key not in text:
        return None
    return float(text.rsplit(key, 1)[1].split()[0])


def run_once(data: Path, out: Path, engine: str, args: argparse.Namespace) -> dict:
    done = subprocess.run(
        [
            sys.executable,
            "-c",
            _CHILD,
            str(data.resolve()),
            str(out.resolve()),
            engine,
            args.master,
            str(args.partitions),
            args.spark_memory,
            args.inputs,
        ],
        cwd=data.parent,
        capture_output=True,
        text=True,
        check=False,
    )
    if done.returncode != 0:
        sys.exit(f"{engine} run failed at {data.name}:\n{done.stderr[-3000:]}")
    manifest = json.loads((out / "manifest.json").read_text())
    return {
        "wall": _value(done.stdout, "WALL"),
        "spark_start": _value(done.stdout, "SPARKSTART"),
        "jvm_peak": _value(done.stdout, "JVMPEAK"),
        "shuffle_mib": _value(done.stdout, "SHUFFLEWRITE"),
        "steps": manifest["steps"],
    }


def same_data(a: Path, b: Path) -> str:
    """Compare the data files of two run folders (bytes, then sorted rows)."""
    import polars as pl
    from polars.testing import assert_frame_equal

    files = [
        p.relative_to(a)
        for p in a.rglob("*")
        if p.suffix in {".parquet", ".csv"} and not str(p.relative_to(a)).startswith("patient_")
    ]
    differ = []
    for rel in sorted(files):
        if (a / rel).read_bytes() == (b / rel).read_bytes():
            continue
        read = pl.read_parquet if rel.suffix == ".parquet" else pl.read_csv
        left, right = read(a / rel), read(b / rel)
        try:
            assert_frame_equal(left.sort(left.columns), right.sort(right.columns), abs_tol=1e-12)
        except (AssertionError, pl.exceptions.PolarsError):
            differ.append(str(rel))
    return f"{len(files)} data files, all equal" if not differ else f"DIFFER: {differ}"


def report(n: int, polars_run: dict, spark_run: dict) -> None:
    print(f"\n## {label(n)} patients")
    print(f"{'step':<22}{'polars s':>10}{'spark driver s':>16}{'spark executor s':>18}")
    spark_steps = {s["name"]: s for s in spark_run["steps"]}
    polars_steps = {s["name"]: s for s in polars_run["steps"]}
    for name in [s["name"] for s in spark_run["steps"]]:
        p = polars_steps.get(name, {}).get("seconds")
        s = spark_steps[name]
        cells = [
            f"{p:>10.2f}" if p is not None else f"{'-':>10}",
            f"{s['seconds']:>16.2f}",
            f"{s['executor_seconds']:>18.2f}" if s.get("executor_seconds") else f"{'-':>18}",
        ]
        print(f"{name:<22}{''.join(cells)}")
    print(f"{'total (wall)':<22}{polars_run['wall']:>10.1f}{spark_run['wall']:>16.1f}")
    print(f"  of which Spark session start: {spark_run['spark_start']:.1f} s")
    print(f"Spark wrote {spark_run['shuffle_mib']} MiB of shuffle")
    peak = lambda run, key: max((s.get(key) or 0) for s in run["steps"])  # noqa: E731
    print(
        f"peak MiB: polars process {peak(polars_run, 'peak_rss_mib'):.0f}; spark driver "
        f"(Python) {peak(spark_run, 'peak_rss_mib'):.0f}, JVM {spark_run['jvm_peak'] or 0:.0f}, "
        f"largest task worker {peak(spark_run, 'executor_peak_rss_mib'):.0f}"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="100k", help="patients, e.g. 100k,1M")
    parser.add_argument("--partitions", type=int, default=8)
    parser.add_argument("--master", default="local[2]")
    parser.add_argument("--spark-memory", default="4g", help="spark.driver.memory (local mode)")
    parser.add_argument(
        "--inputs",
        choices=["folders", "files"],
        default="folders",
        help="folders: each table as a Parquet dataset folder (Spark reads it, the driver "
        "does not); files: single Parquet files (read on the driver, handed to Spark)",
    )
    parser.add_argument("--data", type=Path, default=Path(tempfile.gettempdir()) / "kc_scale")
    parser.add_argument("--keep", type=Path, help="write the run folders here (default: temp)")
    args = parser.parse_args()
    sizes = sorted(parse_size(s) for s in args.sizes.split(","))
    print(
        f"# {os.cpu_count()} CPUs; {_memory_text()}; python {sys.version.split()[0]}; "
        f"spark {args.master}, {args.partitions} partitions, driver memory {args.spark_memory}"
    )
    with tempfile.TemporaryDirectory() as tmp:
        runs_dir = args.keep or Path(tmp)
        for n in sizes:
            data = ensure_data(args.data, n)
            if args.inputs == "folders":
                data = as_folders(data)
            polars_run = run_once(data, runs_dir / f"polars_{n}", "polars", args)
            spark_run = run_once(data, runs_dir / f"spark_{n}", "spark", args)
            report(n, polars_run, spark_run)
            print(same_data(runs_dir / f"polars_{n}", runs_dir / f"spark_{n}"), flush=True)


def _memory_text() -> str:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                return f"{int(line.split()[1]) / 2**20:.0f} GiB RAM"
    except OSError:
        pass
    return "RAM unknown"


if __name__ == "__main__":
    main()
