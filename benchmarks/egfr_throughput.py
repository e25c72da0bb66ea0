"""Throughput of the equation library against a bare numpy floor.

For CKD-EPI 2021 creatinine, EKFC creatinine and CKD-EPI 2021 creatinine-cystatin C,
times ``kidneycohort.equations.evaluate`` on N rows (default 10 million) and, in the same
run, a bare numpy expression of the same formula (no input checks, no reasons, sex
already a boolean array). Prints rows per second for both and their ratio; the target
is evaluate within 3x of the floor.

Run: ``python benchmarks/egfr_throughput.py [--rows N] [--repeat R] [--sex-input KIND]``
"""

from __future__ import annotations

import argparse
import platform
import time
from collections.abc import Callable

import numpy as np
import polars as pl

from kidneycohort.equations import evaluate


def make_inputs(n: int, seed: int = 20240601) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {
        "creatinine_mg_dl": rng.lognormal(np.log(1.0), 0.4, n),
        "cystatin_c_mg_l": rng.lognormal(np.log(1.0), 0.35, n),
        "age": rng.uniform(18, 95, n),
        "female": rng.random(n) < 0.5,
    }


# --------------------------------------------------------------------------- floors
# The formulas exactly as published, written the plain numpy way.


def floor_ckd_epi_2021_cr(scr: np.ndarray, age: np.ndarray, female: np.ndarray) -> np.ndarray:
    kappa = np.where(female, 0.7, 0.9)
    alpha = np.where(female, -0.241, -0.302)
    r = scr / kappa
    return (
        142
        * np.minimum(r, 1) ** alpha
        * np.maximum(r, 1) ** -1.200
        * 0.9938**age
        * np.where(female, 1.012, 1.0)
    )


def floor_ekfc_cr(scr: np.ndarray, age: np.ndarray, female: np.ndarray) -> np.ndarray:
    a = age
    la = np.log(a)
    q_child = np.exp(
        np.where(
            female,
            3.080 + 0.177 * a - 0.223 * la - 0.00596 * a**2 + 0.0000686 * a**3,
            3.200 + 0.259 * a - 0.543 * la - 0.00763 * a**2 + 0.0000790 * a**3,
        )
    )
    q = np.where(a < 25, q_child, np.where(female, 62.0, 80.0)) / 88.4
    r = scr / q
    return 107.3 * r ** np.where(r < 1, -0.322, -1.132) * 0.990 ** np.maximum(a - 40, 0)


def floor_ckd_epi_2021_crcys(
    scr: np.ndarray, cys: np.ndarray, age: np.ndarray, female: np.ndarray
) -> np.ndarray:
    kappa = np.where(female, 0.7, 0.9)
    alpha = np.where(female, -0.219, -0.144)
    r = scr / kappa
    c = cys / 0.8
    return (
        135
        * np.minimum(r, 1) ** alpha
        * np.maximum(r, 1) ** -0.544
        * np.minimum(c, 1) ** -0.323
        * np.maximum(c, 1) ** -0.778
        * 0.9961**age
        * np.where(female, 0.963, 1.0)
    )


def best_seconds(func: Callable[[], np.ndarray], repeat: int) -> tuple[float, np.ndarray]:
    best, out = float("inf"), np.empty(0)
    for _ in range(repeat):
        start = time.perf_counter()
        out = func()
        best = min(best, time.perf_counter() - start)
    return best, out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10_000_000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument(
        "--sex-input",
        choices=["polars", "numpy"],
        default="polars",
        help="sex passed to evaluate as a polars String Series or a numpy str array",
    )
    args = parser.parse_args()
    n = args.rows
    data = make_inputs(n)
    labels = np.where(data["female"], "female", "male")
    sex = pl.Series("sex", labels) if args.sex_input == "polars" else labels
    scr, cys, age, female = (
        data["creatinine_mg_dl"],
        data["cystatin_c_mg_l"],
        data["age"],
        data["female"],
    )

    cases: list[tuple[str, Callable[[], np.ndarray], Callable[[], np.ndarray]]] = [
        (
            "ckd_epi_2021_cr",
            lambda: evaluate("ckd_epi_2021_cr", creatinine_mg_dl=scr, age=age, sex=sex),
            lambda: floor_ckd_epi_2021_cr(scr, age, female),
        ),
        (
            "ekfc_cr",
            lambda: evaluate("ekfc_cr", creatinine_mg_dl=scr, age=age, sex=sex),
            lambda: floor_ekfc_cr(scr, age, female),
        ),
        (
            "ckd_epi_2021_crcys",
            lambda: evaluate(
                "ckd_epi_2021_crcys",
                creatinine_mg_dl=scr,
                cystatin_c_mg_l=cys,
                age=age,
                sex=sex,
            ),
            lambda: floor_ckd_epi_2021_crcys(scr, cys, age, female),
        ),
    ]
    print(
        f"rows={n:,} repeat={args.repeat} (best of) sex input={args.sex_input} "
        f"python={platform.python_version()} numpy={np.__version__} polars={pl.__version__}"
    )
    print(
        f"{'equation':<20} {'evaluate rows/s':>16} {'floor rows/s':>14} {'ratio':>6} {'max rel diff':>13}"
    )
    for name, ours, floor in cases:
        t_ours, v_ours = best_seconds(ours, args.repeat)
        t_floor, v_floor = best_seconds(floor, args.repeat)
        diff = float(np.max(np.abs(v_ours / v_floor - 1)))
        print(
            f"{name:<20} {n / t_ours:>16,.0f} {n / t_floor:>14,.0f} "
            f"{t_ours / t_floor:>6.2f} {diff:>13.1e}"
        )


if __name__ == "__main__":
    main()
