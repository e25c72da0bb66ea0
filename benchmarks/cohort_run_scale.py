"""The cohort recipe end to end at growing cohort sizes: time and peak memory per step.

Usage::

    python benchmarks/cohort_run_scale.py                    # 10k and 100k patients
    python benchmarks/cohort_run_scale.py --sizes 10k,100k,1M
    python benchmarks/cohort_run_scale.py --sizes 10k --keep /tmp/kc-bench

For each size the invented health-record scenario (``synthetic/ehr_cohort.yaml``: two
made-up health systems, no real patients) is generated at that many patients (cached
in ``--data`` between runs), then a fresh child process runs the demo cohort config
(``configs/demo_cohort.yaml``, recipe ``cohort_progression``) on it, so each run's
memory is its own. The child's run folder manifest gives each step's time and peak
resident memory (``peak_rss_mib``: the kernel's high-water mark, reset before each
step); the run's peak is the largest step peak. Prints one table per measure with a
column per size and the growth exponent of each step, the slope of log(value) on
log(patients) fitted over the sizes (1: linear; 2: quadratic), and the totals.

``--pythonpath`` runs another checkout's code (e.g. a ``git worktree`` of main) on
the same data, for before/after figures; a manifest without per-step memory shows
``-``. Run it on a quiet machine and quote the machine's size with the figures.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
SCENARIO = REPO / "synthetic" / "ehr_cohort.yaml"

_CHILD = """
import sys, time
from pathlib import Path
from kidneycohort.pipeline.config import load_config
from kidneycohort.pipeline.demo import demo_config_path
from kidneycohort.pipeline.runner import run_pipeline
data, out = Path(sys.argv[1]), Path(sys.argv[2])
overrides = [f"data.{k}.path={(data / (k + '.parquet')).as_posix()}"
             for k in ("patients", "labs", "events")]
started = time.perf_counter()
run_pipeline(load_config(demo_config_path("cohort"), overrides=overrides), out_dir=out, force=True)
print(f"WALL {time.perf_counter() - started:.3f}")
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


def run_once(data: Path, out: Path, pythonpath: str | None) -> dict:
    env = dict(os.environ)
    if pythonpath:
        env["PYTHONPATH"] = pythonpath + os.pathsep + env.get("PYTHONPATH", "")
    # run from the data folder: ``python -c`` puts the working directory first on the
    # path, which would shadow --pythonpath with a checkout's own package
    done = subprocess.run(
        [sys.executable, "-c", _CHILD, str(data.resolve()), str(out.resolve())],
        cwd=data.parent,
        env=env,
        capture_output=True,
        text=True,
        check=False,
    )
    if done.returncode != 0:
        sys.exit(f"run failed at {data.name}:\n{done.stderr[-3000:]}")
    wall = float(done.stdout.rsplit("WALL", 1)[1].split()[0])
    manifest = json.loads((out / "manifest.json").read_text())
    return {"wall": wall, "steps": manifest["steps"]}


def exponent(sizes: list[int], values: list[float | None]) -> str:
    """Least-squares slope of log(value) on log(size) over the sizes with a value."""
    pairs = [(math.log(n), math.log(v)) for n, v in zip(sizes, values, strict=True) if v]
    if len(pairs) < 2:
        return "-"
    mx = sum(x for x, _ in pairs) / len(pairs)
    my = sum(y for _, y in pairs) / len(pairs)
    sxx = sum((x - mx) ** 2 for x, _ in pairs)
    return f"{sum((x - mx) * (y - my) for x, y in pairs) / sxx:.2f}"


def table(sizes: list[int], runs: list[dict], key: str, unit: str, fmt: str) -> None:
    steps = [s["name"] for s in runs[0]["steps"]]
    head = f"{'step':<22}" + "".join(f"{label(n):>10}" for n in sizes) + f"{'exponent':>10}"
    print(f"\n{key} ({unit})\n{head}")
    for step in steps:
        values = []
        for run in runs:
            found = [s.get(key) for s in run["steps"] if s["name"] == step]
            values.append(found[0] if found else None)
        cells = "".join(f"{v:>10{fmt}}" if v is not None else f"{'-':>10}" for v in values)
        print(f"{step:<22}{cells}{exponent(sizes, values):>10}")
    if key == "seconds":
        totals = [r["wall"] for r in runs]
        label_total = "total (wall)"
    else:
        peaks = [[s.get(key) for s in r["steps"] if s.get(key) is not None] for r in runs]
        totals = [max(p) if p else None for p in peaks]
        label_total = "run peak"
    cells = "".join(f"{v:>10{fmt}}" if v is not None else f"{'-':>10}" for v in totals)
    print(f"{label_total:<22}{cells}{exponent(sizes, totals):>10}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="10k,100k", help="patients, e.g. 10k,100k,1M")
    parser.add_argument("--data", type=Path, default=Path(tempfile.gettempdir()) / "kc_scale")
    parser.add_argument("--keep", type=Path, help="write the run folders here (default: temp)")
    parser.add_argument("--pythonpath", help="run this checkout's kidneycohort instead")
    args = parser.parse_args()
    sizes = sorted(parse_size(s) for s in args.sizes.split(","))
    print(f"# {os.cpu_count()} CPUs; {_memory_text()}; python {sys.version.split()[0]}")
    runs = []
    with tempfile.TemporaryDirectory() as tmp:
        runs_dir = args.keep or Path(tmp)
        for n in sizes:
            data = ensure_data(args.data, n)
            runs.append(run_once(data, runs_dir / f"run_{n}", args.pythonpath))
            print(f"# {label(n)} patients: {runs[-1]['wall']:.1f} s", flush=True)
    table(sizes, runs, "seconds", "s", ".2f")
    table(sizes, runs, "peak_rss_mib", "MiB", ".0f")


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
