"""Measured laboratory values from the true GFR at each sampling occasion.

* Creatinine: the chosen published creatinine equation is inverted at the true GFR and
  the patient's age and sex at the sample (``kidneycohort.equations.solve_creatinine``;
  also outside the equation's validated ages, e.g. a look-back sample at age 17),
  multiplied by the AKI factor of an inpatient day, and by a mean-one log-normal factor
  whose coefficient of variation combines biological and analytical variation,
  :math:`\\mathrm{CV} = \\sqrt{\\mathrm{CV}_b^2 + \\mathrm{CV}_a^2}` (common practice:
  independent variance components add; Fraser, Biological Variation, AACC Press 2001).
* Cystatin C: likewise from a cystatin C equation, times a persistent per-patient
  non-GFR factor (log-normal, median 1).
* UACR: log-normal around the patient's baseline, its log trend coupled to the chronic
  GFR slope, shifted by the arm's ``uacr_log_change`` over the dip ramp.

A mean-one log-normal factor with coefficient of variation CV is
:math:`\\exp(\\sigma z - \\sigma^2/2)`, :math:`\\sigma^2 = \\log(1 + \\mathrm{CV}^2)`.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from kidneycohort import units
from kidneycohort.synthetic.scenario import Scenario
from kidneycohort.synthetic.trajectories import FloatArray, Population, Trajectories

__all__ = [
    "MICROSECONDS_PER_DAY",
    "REPORT_DECIMALS",
    "format_values",
    "lognormal_factor",
    "measure",
]

MICROSECONDS_PER_DAY = 86_400_000_000

# decimals a laboratory prints for each (analyte, unit key); common practice
REPORT_DECIMALS = {
    ("creatinine", "mg/dl"): 2,
    ("creatinine", "umol/l"): 0,
    ("creatinine", "mmol/l"): 3,
    ("creatinine", "mg/l"): 1,
    ("cystatin_c", "mg/l"): 2,
    ("cystatin_c", "mg/dl"): 3,
    ("uacr", "mg/g"): 1,
    ("uacr", "mg/mmol"): 1,
    ("uacr", "g/g"): 4,
}


def lognormal_factor(rng: np.random.Generator, cv: float, size: int) -> FloatArray:
    """Mean-one log-normal multipliers with coefficient of variation ``cv``."""
    if cv == 0:
        return np.ones(size)
    sigma2 = np.log1p(cv**2)
    return np.exp(np.sqrt(sigma2) * rng.standard_normal(size) - sigma2 / 2.0)


def measure(
    rng: np.random.Generator,
    s: Scenario,
    pop: Population,
    traj: Trajectories,
    occasions: pl.DataFrame,
    non_gfr: FloatArray,
) -> pl.DataFrame:
    """One row per (occasion, analyte) with the true GFR and the measured value.

    ``non_gfr`` is each patient's persistent cystatin C factor (non-GFR determinants).

    Columns: ``patient``, ``sample_us`` (epoch microseconds), ``years``,
    ``age_at_sample``, ``analyte`` (code into ``units.ANALYTES``), ``setting`` and
    ``visit`` (codes, see :mod:`~kidneycohort.synthetic.schedules`), ``admission``,
    ``aki_multiplier``, ``true_gfr``, ``noise_free_value`` and ``measured_value`` (both
    in the analyte's standard unit), ``unit`` (as reported) and ``value`` (the
    reported text of the measured value in that unit).
    """
    from kidneycohort import equations

    parts = [
        occasions.filter(pl.col(a)).with_columns(analyte=pl.lit(code, dtype=pl.Int8))
        for code, a in enumerate(units.ANALYTES)
    ]
    rows = pl.concat(parts).drop(list(units.ANALYTES))
    patient = rows["patient"].to_numpy()
    years = rows["years"].to_numpy()
    day = rows["day"].to_numpy()
    minute = rows["minute"].to_numpy()
    sample_us = (pop.index_day[patient] + day) * MICROSECONDS_PER_DAY + minute * 60_000_000
    age = (sample_us - pop.birth_day[patient] * MICROSECONDS_PER_DAY) / (
        365.25 * MICROSECONDS_PER_DAY
    )
    gfr = traj.gfr(patient, years)
    code = rows["analyte"].to_numpy()
    n = patient.size
    noise_free = np.full(n, np.nan)
    measured = np.full(n, np.nan)

    is_cr = code == 0
    cr = s.labs.creatinine
    noise_free[is_cr] = equations.solve_creatinine(
        cr.equation,
        gfr[is_cr],
        age=age[is_cr],
        sex=_sex_text(pop, patient[is_cr]),
        allow_outside_age=True,
    )
    aki = rows["aki_multiplier"].to_numpy()
    cv_cr = float(np.hypot(cr.biological_cv, cr.analytical_cv))
    measured[is_cr] = (
        noise_free[is_cr] * aki[is_cr] * lognormal_factor(rng, cv_cr, int(is_cr.sum()))
    )

    is_cys = code == 1
    cys = s.labs.cystatin_c
    if cys is not None and is_cys.any():
        noise_free[is_cys] = equations.solve_cystatin_c(
            cys.equation,
            gfr[is_cys],
            age=age[is_cys],
            sex=_sex_text(pop, patient[is_cys]),
            allow_outside_age=True,
        )
        cv_cys = float(np.hypot(cys.biological_cv, cys.analytical_cv))
        measured[is_cys] = (
            noise_free[is_cys]
            * non_gfr[patient[is_cys]]
            * lognormal_factor(rng, cv_cys, int(is_cys.sum()))
        )

    is_ua = code == 2
    ua = s.labs.uacr
    if ua is not None and is_ua.any():
        p = patient[is_ua]
        t_plus = np.maximum(years[is_ua], 0.0)
        arm_change = np.array([a.uacr_log_change for a in s.groups.arms])[pop.arm]
        log_mean = (
            np.log(pop.baseline_uacr_mg_g[p])
            + ua.log_trend_per_slope_unit * traj.chronic_slope[p] * t_plus
            + arm_change[p] * np.minimum(t_plus / traj.dip_years[p], 1.0)
        )
        noise_free[is_ua] = np.exp(log_mean)
        measured[is_ua] = np.exp(log_mean + ua.within_person_log_sd * rng.standard_normal(p.size))

    # one small (analyte, site) table gives each row its unit, factor and decimals
    cells = [(a, getattr(site, f"{a}_unit")) for a in units.ANALYTES for site in s.sites]
    cell_factor = np.array([units.conversion_factor(a, u) for a, u in cells])
    cell_decimals = np.array(
        [
            -1 if s.noise_off else REPORT_DECIMALS.get((a, units.normalize_unit(u)), 2)
            for a, u in cells
        ]
    )
    cell = code.astype(np.int64) * len(s.sites) + pop.site[patient]
    exact = measured / cell_factor[cell]
    unit = pl.Series(cell).replace_strict(
        list(range(len(cells))), [u for _, u in cells], return_dtype=pl.String
    )
    return rows.select(
        "patient", "years", "analyte", "setting", "visit", "admission", "aki_multiplier"
    ).with_columns(
        sample_us=pl.Series(sample_us, dtype=pl.Int64),
        age_at_sample=pl.Series(age),
        true_gfr=pl.Series(gfr),
        noise_free_value=pl.Series(noise_free),
        measured_value=pl.Series(measured),
        unit=unit,
        value=format_values(exact, cell_decimals[cell]),
    )


def _sex_text(pop: Population, patient: np.ndarray) -> pl.Series:
    female = pl.Series(pop.female).gather(patient)
    return pl.select(
        pl.when(pl.lit(female)).then(pl.lit("female")).otherwise(pl.lit("male"))
    ).to_series()


def format_values(values: FloatArray, decimals: np.ndarray) -> pl.Series:
    """Text as a laboratory prints it: ``decimals`` places (0 = integer); ``-1`` keeps
    the full round-trip precision (used when noise is off)."""
    scale = 10.0 ** np.maximum(decimals, 0)
    rounded = np.where(decimals >= 0, np.round(values * scale) / scale, values)
    frame = pl.DataFrame({"v": rounded, "d": decimals})
    return frame.select(
        pl.when(pl.col("d") == 0)
        .then(pl.col("v").cast(pl.Int64).cast(pl.String))
        .otherwise(pl.col("v").cast(pl.String))
        .alias("value")
    ).to_series()
