"""How fast the exact mixed-model engine fits eGFR slope models, against statsmodels and lme4.

Generates one invented two-arm cohort per size (8 eGFR values per patient over 3 years,
random intercept, acute and chronic slopes), writes it to a temporary Parquet file (and
CSV for R), and fits on the same rows:

- ``one_slope``: egfr ~ arm x time, random intercept and slope per patient (2 x 2), REML;
- ``two_slopes``: egfr ~ arm x (time to 3 months, time after), random intercept, acute
  and chronic slopes (3 x 3 unstructured), REML.

Engines: ``engine`` (kidneycohort's blocks engine, from the in-memory table: blocks and
fit), ``statsmodels`` (MixedLM, L-BFGS, as the slope model used so far) and ``lme4``
(R ``lmer`` through Rscript, when R with lme4 is installed). Each fit runs in its own
process: the time is the fit alone (reading the file excluded), the memory is that
process's peak resident set (reading included, so it has a floor of the interpreter and
the table). statsmodels runs only where it takes under about 2 minutes, lme4 only up to
``--lme4-max`` patients (its sparse design grows with the values); the table says where
a run was skipped and why. Prints one row per model, size and engine, then how time
grows with patients (slope of log time on log patients).

Run under the shared lock, e.g.
``flock <lock file> python benchmarks/slope_engine.py``; try ``--sizes 2000
--two-slope-sizes 2000`` first.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

VISITS = np.array([0.0, 0.0833, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0])
KNOT = 0.25
# sizes above which a run would take more than about 2 minutes on 2 cores (statsmodels:
# 38.7 s one slope and 98 s two slopes at 20,000 patients, 213 s one slope at 100,000)
STATSMODELS_MAX = {"one_slope": 20_000, "two_slopes": 20_000}

ENGINE_RUN = """
import json, sys, time, warnings
import polars as pl
from kidneycohort.models.mixed._engine import fit_patient_mixed_model
rows = pl.read_parquet(sys.argv[1])
fixed, random = json.loads(sys.argv[2]), json.loads(sys.argv[3])
with warnings.catch_warnings(record=True) as caught:
    warnings.simplefilter("always")
    start = time.perf_counter()
    fit = fit_patient_mixed_model(rows, response="egfr", fixed=fixed, random=random)
    seconds = time.perf_counter() - start
state = fit.convergence
note = (f"{fit.structure}, {state.iterations} iterations, gradient {state.gradient_norm:.1e}"
        f"{'' if state.converged else ', NOT converged'}"
        f"{', boundary' if state.boundary else ''}{f', {len(caught)} warnings' if caught else ''}")
print(json.dumps({"seconds": seconds, "note": note, "beta": fit.fixed_effects.tolist()}))
"""

STATSMODELS_RUN = """
import json, sys, time, warnings
import numpy as np, polars as pl
from statsmodels.regression.mixed_linear_model import MixedLM
rows = pl.read_parquet(sys.argv[1])
fixed, random = json.loads(sys.argv[2]), json.loads(sys.argv[3])
exog = rows.select(fixed).to_numpy()
exog_re = rows.select(random).to_numpy()
with warnings.catch_warnings(record=True) as caught:
    warnings.simplefilter("always")
    start = time.perf_counter()
    result = MixedLM(rows["egfr"].to_numpy(), exog, groups=rows["patient_id"].to_numpy(),
                     exog_re=exog_re).fit(reml=True, method=["lbfgs"])
    seconds = time.perf_counter() - start
notes = sorted({str(w.message).splitlines()[0][:60] for w in caught})
note = ("converged" if result.converged else "NOT converged") + (f"; {'; '.join(notes)}" if notes else "")
print(json.dumps({"seconds": seconds, "note": note, "beta": list(map(float, result.fe_params))}))
"""

LME4_RUN = """
suppressMessages({library(lme4); library(data.table)})
args <- commandArgs(trailingOnly = TRUE)
rows <- as.data.frame(fread(args[1]))
form <- as.formula(args[2])
messages <- character(0)
seconds <- system.time(
  fit <- withCallingHandlers(lmer(form, rows, REML = TRUE),
    warning = function(w) { messages <<- c(messages, conditionMessage(w)); invokeRestart("muffleWarning") },
    message = function(m) { messages <<- c(messages, conditionMessage(m)); invokeRestart("muffleMessage") })
)[["elapsed"]]
note <- if (length(messages)) paste(substr(trimws(messages), 1, 60), collapse = "; ") else "no warning"
cat(sprintf('{"seconds": %.4f, "note": "%s", "beta": [%s]}\\n', seconds,
            gsub('"', "'", note), paste(sprintf("%.10g", fixef(fit)), collapse = ", ")))
"""

MODELS = {
    "one_slope": {
        "fixed": ["placebo", "placebo_t", "active", "active_t"],
        "random": ["intercept", "t"],
        "formula": "egfr ~ 0 + placebo + placebo_t + active + active_t + (t | patient_id)",
    },
    "two_slopes": {
        "fixed": ["placebo", "placebo_t1", "placebo_t2", "active", "active_t1", "active_t2"],
        "random": ["intercept", "t1", "t2"],
        "formula": (
            "egfr ~ 0 + placebo + placebo_t1 + placebo_t2 + active + active_t1 + active_t2"
            " + (t1 + t2 | patient_id)"
        ),
    },
}


def simulate(n_patients: int, seed: int = 1) -> pl.DataFrame:
    """Invented cohort: 8 values per patient, an acute dip in the active arm."""
    rng = np.random.default_rng(seed)
    active = rng.random(n_patients) < 0.5
    b0 = 50 + rng.normal(0, 10, n_patients)
    b1 = np.where(active, -12.0, 0.0) + rng.normal(0, 8, n_patients)
    b2 = np.where(active, -2.0, -3.0) + rng.normal(0, 1.5, n_patients)
    t = np.clip(VISITS[None, :] + rng.uniform(-0.02, 0.02, (n_patients, VISITS.size)), 0, None)
    t[:, 0] = 0.0
    t1, t2 = np.minimum(t, KNOT), np.maximum(t - KNOT, 0.0)
    egfr = b0[:, None] + b1[:, None] * t1 + b2[:, None] * t2 + rng.normal(0, 3, t.shape)
    arm = np.repeat(active, VISITS.size).astype(float)
    t, t1, t2 = t.ravel(), t1.ravel(), t2.ravel()
    return pl.DataFrame(
        {
            "patient_id": np.repeat(np.arange(n_patients), VISITS.size).astype(str),
            "egfr": egfr.ravel(),
            "intercept": np.ones(t.size),
            "t": t,
            "t1": t1,
            "t2": t2,
            "placebo": 1 - arm,
            "placebo_t": (1 - arm) * t,
            "placebo_t1": (1 - arm) * t1,
            "placebo_t2": (1 - arm) * t2,
            "active": arm,
            "active_t": arm * t,
            "active_t1": arm * t1,
            "active_t2": arm * t2,
        }
    )


def run_measured(command: list[str]) -> tuple[dict, float]:
    """Run a child process; its last output line (JSON) and its own peak resident memory
    in MB (``os.wait4`` reports the usage of that child alone)."""
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        child = subprocess.Popen(command, stdout=out, stderr=err, text=True)
        _, status, usage = os.wait4(child.pid, 0)
        child.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        err.seek(0)
        if child.returncode != 0:
            raise RuntimeError(f"{command[0]} failed: {err.read().strip().splitlines()[-3:]}")
        return json.loads(out.read().strip().splitlines()[-1]), usage.ru_maxrss / 1024


def lme4_available() -> str | None:
    rscript = shutil.which("Rscript")
    if rscript is None:
        return None
    probe = subprocess.run(
        [
            rscript,
            "-e",
            "quit(status = !(requireNamespace('lme4') && requireNamespace('data.table')))",
        ],
        capture_output=True,
        check=False,
    )
    return rscript if probe.returncode == 0 else None


def write_cohort(size: int, model: str, parquet: Path, csv: Path | None) -> None:
    """Simulate in a child process and write the files, so this process stays small: a
    child's peak memory counts the pages it shares with its parent when it starts."""
    command = [sys.executable, __file__, "--write", str(size), model, str(parquet)]
    subprocess.run([*command, str(csv or "")], check=True)


def measure(model: str, size: int, folder: Path, args: argparse.Namespace) -> list[dict]:
    spec = MODELS[model]
    parquet, csv = folder / f"{model}_{size}.parquet", folder / f"{model}_{size}.csv"
    wants_r = "lme4" in args.engines and size <= args.lme4_max and lme4_available() is not None
    write_cohort(size, model, parquet, csv if wants_r else None)
    values = size * VISITS.size
    fixed, random = json.dumps(spec["fixed"]), json.dumps(spec["random"])
    results = []

    def record(engine: str, outcome: dict | None, memory: float | None, note: str) -> None:
        results.append(
            {
                "model": model,
                "patients": size,
                "values": values,
                "engine": engine,
                "seconds": None if outcome is None else outcome["seconds"],
                "peak_mb": memory,
                "note": note,
                "beta": None if outcome is None else outcome["beta"],
            }
        )

    outcome, memory = run_measured([sys.executable, "-c", ENGINE_RUN, str(parquet), fixed, random])
    record("engine", outcome, memory, outcome["note"])
    if "statsmodels" in args.engines:
        if size <= STATSMODELS_MAX[model]:
            outcome, memory = run_measured(
                [sys.executable, "-c", STATSMODELS_RUN, str(parquet), fixed, random]
            )
            record("statsmodels", outcome, memory, outcome["note"])
        else:
            record("statsmodels", None, None, "skipped: would take more than 2 minutes")
    rscript = lme4_available() if "lme4" in args.engines else None
    if "lme4" in args.engines and rscript is None:
        record("lme4", None, None, "skipped: Rscript with lme4 and data.table not installed")
    elif rscript is not None and size > args.lme4_max:
        record(
            "lme4",
            None,
            None,
            f"skipped: above --lme4-max {args.lme4_max} patients (memory grows with values: "
            "about 0.75 GB at 100,000 patients, so some 7 GB at 1,000,000)",
        )
    elif rscript is not None:
        script = folder / "fit.R"
        script.write_text(LME4_RUN)
        outcome, memory = run_measured([rscript, str(script), str(csv), spec["formula"]])
        record("lme4", outcome, memory, outcome["note"])
        csv.unlink()
    parquet.unlink()
    return results


def print_results(results: list[dict]) -> None:
    print(
        f"{'model':<11} {'patients':>9} {'values':>9} {'engine':<12} {'seconds':>8} "
        f"{'peak MB':>8} {'x engine':>9} {'max |beta diff|':>15}  note",
        flush=True,
    )
    for row in results:
        ours = next(
            r
            for r in results
            if r["model"] == row["model"]
            and r["patients"] == row["patients"]
            and r["engine"] == "engine"
        )
        seconds = "-" if row["seconds"] is None else f"{row['seconds']:.2f}"
        memory = "-" if row["peak_mb"] is None else f"{row['peak_mb']:.0f}"
        ratio = "-" if row["seconds"] is None else f"{row['seconds'] / ours['seconds']:.1f}"
        diff = "-"
        if row["beta"] is not None and row["engine"] != "engine":
            diff = f"{np.max(np.abs(np.subtract(row['beta'], ours['beta']))):.1e}"
        print(
            f"{row['model']:<11} {row['patients']:>9} {row['values']:>9} {row['engine']:<12} "
            f"{seconds:>8} {memory:>8} {ratio:>9} {diff:>15}  {row['note']}",
            flush=True,
        )


def print_growth(results: list[dict]) -> None:
    """Slope of log time on log patients over all sizes, and between the two largest
    (small fits are dominated by fixed costs, so the second shows the growth at scale)."""
    keys = sorted({(r["model"], r["engine"]) for r in results})
    for model, engine in keys:
        points = [
            (r["patients"], r["seconds"])
            for r in results
            if r["model"] == model and r["engine"] == engine and r["seconds"]
        ]
        if len(points) > 1:
            size, seconds = np.log(np.array(points, dtype=float)).T
            overall = np.polyfit(size, seconds, 1)[0]
            last = (seconds[-1] - seconds[-2]) / (size[-1] - size[-2])
            print(
                f"{model:<11} {engine:<12} time grows as patients^{overall:.2f} from "
                f"{points[0][0]} to {points[-1][0]} patients; patients^{last:.2f} from "
                f"{points[-2][0]} to {points[-1][0]}"
            )


def main() -> None:
    if sys.argv[1:2] == ["--write"]:
        size, model, parquet, csv = sys.argv[2:6]
        rows = simulate(int(size))
        rows.write_parquet(parquet)
        if csv:
            spec = MODELS[model]
            rows.select("patient_id", "egfr", *spec["random"][1:], *spec["fixed"]).write_csv(csv)
        return
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="*", default=[2000, 20000, 100000, 1000000])
    parser.add_argument("--two-slope-sizes", type=int, nargs="*", default=[20000, 100000])
    parser.add_argument(
        "--engines",
        nargs="+",
        default=["engine", "statsmodels", "lme4"],
        choices=["engine", "statsmodels", "lme4"],
    )
    parser.add_argument(
        "--lme4-max",
        type=int,
        default=100_000,
        help="largest cohort lme4 is run on (default 100,000 patients)",
    )
    args = parser.parse_args()
    results: list[dict] = []
    with tempfile.TemporaryDirectory() as folder:
        for model, sizes in (("one_slope", args.sizes), ("two_slopes", args.two_slope_sizes)):
            for size in sizes:
                results.extend(measure(model, size, Path(folder), args))
    print_results(results)
    print()
    print_growth(results)


if __name__ == "__main__":
    main()
