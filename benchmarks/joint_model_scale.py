"""How long the joint model of eGFR slope and dropout takes as the cohort grows.

Simulates a two-arm cohort of the shared-random-effects model (invented data, 8 planned
eGFR values per patient, dropout by kidney failure or death linked to the current eGFR)
and fits ``JointSlopeModel`` (random intercept and slope, piecewise baseline with 4
pieces, 3 Gauss-Hermite nodes per random effect). Prints one line per size: patients,
eGFR values, dropout events, seconds, peak traced memory (MB, tracemalloc: numpy arrays
included), and the growth exponent (slope of log time on log patients).

``python benchmarks/joint_model_scale.py --sizes 1250 5000 20000``; try ``--sizes 500``
first. Add ``--knot 0.5`` for the acute/chronic model (3 random effects).
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np

from kidneycohort.models.joint import JointCohortTruth, JointSlopeModel, simulate_joint_cohort


def run(n_patients: int, knot: float | None, nodes: int) -> tuple[int, int, int, float, float]:
    truth = JointCohortTruth(hazard_at_45=0.02, knot_years=knot)
    visits = np.array([0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0])
    egfr, patients, endpoints = simulate_joint_cohort(
        n_patients, truth=truth, visit_years=visits, seed=n_patients
    )
    tracemalloc.start()
    began = time.perf_counter()
    model = JointSlopeModel(knot, reference_group="placebo", quadrature_nodes=nodes).fit(
        egfr, patients, endpoints
    )
    seconds = time.perf_counter() - began
    peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    if not model.diagnostics_["converged"]:
        print(f"  (not converged: {model.diagnostics_['message']})")
    return n_patients, egfr.height, model.data_.n_events, seconds, peak


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--sizes", type=int, nargs="+", default=[1250, 5000, 20000])
    parser.add_argument("--knot", type=float, default=None)
    parser.add_argument("--nodes", type=int, default=3)
    args = parser.parse_args()
    rows = []
    print(
        f"{'patients':>9} {'values':>8} {'events':>7} {'seconds':>8} {'peak MB':>8} {'growth':>7}"
    )
    for size in args.sizes:
        rows.append(run(size, args.knot, args.nodes))
        patients, values, events, seconds, peak = rows[-1]
        growth = ""
        if len(rows) > 1:
            x = np.log([r[0] for r in rows])
            y = np.log([r[3] for r in rows])
            growth = f"{np.polyfit(x, y, 1)[0]:.2f}"
        print(f"{patients:>9} {values:>8} {events:>7} {seconds:>8.1f} {peak:>8.0f} {growth:>7}")


if __name__ == "__main__":
    main()
