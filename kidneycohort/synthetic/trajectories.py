"""Patients and their true GFR trajectories, all drawn at once with numpy.

Every patient has a piecewise-quadratic true GFR path in years ``t`` from index:

.. math::

    g_i(t) = \\max\\{f,\\; b_{0i} + b_{1i} t + a_i t_+^2 - D_i \\min(t_+ / r_i, 1)\\}

with intercept :math:`b_{0i}`, chronic slope :math:`b_{1i}`, acceleration
:math:`a_i \\le 0`, acute dip :math:`D_i` (a fall; negative for an early rise) reached
over :math:`r_i` years, and
the physiological floor :math:`f`. Intercept and slope are bivariate normal given the
baseline covariates; the intercept is truncated to the scenario's inclusion range and
the slope is drawn from its conditional normal given the intercept residual, so the
pair keeps the stated correlation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import stats

from kidneycohort.synthetic.scenario import CovariateEffects, Range, Scenario

__all__ = [
    "REFERENCE_AGE",
    "REFERENCE_UACR_MG_G",
    "FloatArray",
    "Population",
    "Trajectories",
    "draw_population",
    "draw_trajectories",
    "first_crossing",
    "gfr_at",
    "truncated_normal",
    "truncated_normal_at",
]

FloatArray = npt.NDArray[np.float64]

REFERENCE_AGE = 60.0
REFERENCE_UACR_MG_G = 30.0


@dataclass(frozen=True)
class Population:
    """Baseline draws, one array element per patient (index = patient number)."""

    age_at_index: FloatArray
    female: npt.NDArray[np.bool_]
    diabetes: npt.NDArray[np.bool_]
    black_race: npt.NDArray[np.bool_]
    baseline_uacr_mg_g: FloatArray
    height_cm: FloatArray
    weight_kg: FloatArray
    site: npt.NDArray[np.int64]
    arm: npt.NDArray[np.int64]
    index_day: npt.NDArray[np.int64]  # days since 1970-01-01
    birth_day: npt.NDArray[np.int64]  # days since 1970-01-01


@dataclass(frozen=True)
class Trajectories:
    """True GFR path parameters (see module docstring)."""

    intercept: FloatArray
    chronic_slope: FloatArray
    acceleration: FloatArray
    acute_dip: FloatArray
    dip_years: FloatArray
    floor: float

    def gfr(self, patient: npt.NDArray[np.int64], years: FloatArray) -> FloatArray:
        """True GFR of ``patient[k]`` at ``years[k]`` from index (vectorised)."""
        return gfr_at(
            self.intercept[patient],
            self.chronic_slope[patient],
            self.acceleration[patient],
            self.acute_dip[patient],
            self.dip_years[patient],
            self.floor,
            years,
        )

    def total_slope(self, horizon_years: float) -> FloatArray:
        """True total slope: :math:`(g(T) - g(0)) / T` over the horizon ``T``."""
        everyone = np.arange(self.intercept.size)
        end = self.gfr(everyone, np.full(self.intercept.size, horizon_years))
        start = self.gfr(everyone, np.zeros(self.intercept.size))
        return (end - start) / horizon_years


def gfr_at(
    intercept: FloatArray,
    slope: FloatArray,
    acceleration: FloatArray,
    dip: FloatArray,
    dip_years: FloatArray,
    floor: float,
    years: FloatArray,
) -> FloatArray:
    """Evaluate :math:`g(t)` elementwise (all arguments broadcast together)."""
    t_plus = np.maximum(years, 0.0)
    raw = (
        intercept
        + slope * years
        + acceleration * t_plus**2
        - dip * np.minimum(t_plus / dip_years, 1.0)
    )
    return np.maximum(raw, floor)


def first_crossing(traj: Trajectories, level: FloatArray) -> FloatArray:
    """Earliest :math:`t \\ge 0` at which the unfloored path falls to ``level``.

    Each of the two quadratic pieces (during the dip ramp, after it) is solved in
    closed form; ``inf`` where the path never reaches the level, ``0`` where it starts
    at or below it. Levels at or below the floor are never reached.

    .. math::

        c_2 t^2 + c_1 t + c_0 = 0,\\quad
        t = \\frac{2 c_0}{-c_1 + \\sqrt{c_1^2 - 4 c_2 c_0}}
    """
    b0, b1, a = traj.intercept, traj.chronic_slope, traj.acceleration
    d, r = traj.acute_dip, traj.dip_years
    level = np.broadcast_to(np.asarray(level, dtype=np.float64), b0.shape)
    during = _first_root(b0 - level, b1 - d / r, a, 0.0, r)
    after = _first_root(b0 - d - level, b1, a, r, np.inf)
    out = np.where(np.isfinite(during), during, after)
    out = np.where(b0 <= level, 0.0, out)
    return np.where(level <= traj.floor, np.inf, out)


def _first_root(
    c0: FloatArray, c1: FloatArray, c2: FloatArray, lo: float | FloatArray, hi: float | FloatArray
) -> FloatArray:
    """First downward root in ``[lo, hi]`` of a concave (``c2 <= 0``) quadratic."""
    lo_arr = np.broadcast_to(np.asarray(lo, dtype=np.float64), c0.shape)
    hi_arr = np.broadcast_to(np.asarray(hi, dtype=np.float64), c0.shape)
    value_at_lo = c0 + c1 * lo_arr + c2 * lo_arr**2
    with np.errstate(divide="ignore", invalid="ignore"):
        disc = c1**2 - 4.0 * c2 * c0
        # the root where the concave quadratic descends through zero; the form
        # 2 c0 / (-c1 + sqrt(disc)) avoids cancellation when c2 is tiny
        quad_root = (2.0 * c0) / (-c1 + np.sqrt(np.maximum(disc, 0.0)))
        linear_root = np.where(c1 < 0, -c0 / c1, np.inf)
    root = np.where(c2 < 0, quad_root, linear_root)
    root = np.where(np.isnan(root) | (disc < 0) & (c2 < 0), np.inf, root)
    ok = (value_at_lo > 0) & (root >= lo_arr) & (root <= hi_arr)
    return np.where(ok, root, np.inf)


def truncated_normal(rng: np.random.Generator, spec: Range, size: int) -> FloatArray:
    """Draw from ``spec``'s normal truncated to ``[min, max]`` (inverse-CDF method)."""
    return truncated_normal_at(rng, np.full(size, spec.mean), spec.sd, spec.min, spec.max)


def truncated_normal_at(
    rng: np.random.Generator, mean: FloatArray, sd: float, lo: float, hi: float
) -> FloatArray:
    """Normal(``mean``, ``sd``) truncated to ``[lo, hi]``, one draw per mean."""
    if sd == 0:
        return np.clip(mean, lo, hi)
    a, b = (lo - mean) / sd, (hi - mean) / sd
    u = rng.uniform(size=mean.size)
    p = stats.norm.cdf(a) + u * (stats.norm.cdf(b) - stats.norm.cdf(a))
    return mean + sd * stats.norm.ppf(np.clip(p, 1e-15, 1 - 1e-15))


def draw_population(rng: np.random.Generator, s: Scenario) -> Population:
    """Baseline covariates, site, group and index date of ``s.patients`` patients."""
    n = s.patients
    pop = s.population
    age = truncated_normal(rng, pop.age, n)
    female = rng.uniform(size=n) < pop.female_fraction
    diabetes = rng.uniform(size=n) < pop.diabetes_fraction
    black = rng.uniform(size=n) < pop.black_race_fraction
    median = pop.uacr_median_mg_g * np.where(diabetes, pop.uacr_median_ratio_diabetes, 1.0)
    uacr = median * np.exp(pop.uacr_log_sd * rng.standard_normal(n))
    height = np.where(
        female,
        truncated_normal(rng, pop.height_cm_female, n),
        truncated_normal(rng, pop.height_cm_male, n),
    )
    weight = truncated_normal(rng, pop.bmi, n) * (height / 100.0) ** 2
    site_weights = np.array([x.weight for x in s.sites])
    site = rng.choice(len(s.sites), size=n, p=site_weights / site_weights.sum())
    if s.groups.assignment == "diabetes":
        arm = diabetes.astype(np.int64)
    else:
        arm = _allocate(rng, np.array([a.fraction for a in s.groups.arms]), n)
    start = np.datetime64(s.calendar.start_date, "D").astype(np.int64)
    first_index = start + round(s.calendar.lookback_years * 365.25)
    enrol_days = round(s.calendar.enrolment_years * 365.25)
    index_day = first_index + rng.integers(0, enrol_days + 1, size=n)
    # ages are whole-day differences of dates, as a later stage would compute them
    birth_day = index_day - np.round(age * 365.25).astype(np.int64)
    return Population(
        age_at_index=(index_day - birth_day) / 365.25,
        female=female,
        diabetes=diabetes,
        black_race=black,
        baseline_uacr_mg_g=uacr,
        height_cm=height,
        weight_kg=weight,
        site=site.astype(np.int64),
        arm=arm.astype(np.int64),
        index_day=index_day.astype(np.int64),
        birth_day=birth_day.astype(np.int64),
    )


def _allocate(rng: np.random.Generator, fractions: FloatArray, n: int) -> npt.NDArray[np.int64]:
    """Exact allocation by fraction (largest remainder), in random order."""
    share = fractions / fractions.sum() * n
    counts = np.floor(share).astype(np.int64)
    counts[np.argsort(-(share - counts), kind="stable")[: n - counts.sum()]] += 1
    return rng.permutation(np.repeat(np.arange(fractions.size), counts))


def _linear(effects: CovariateEffects, pop: Population) -> FloatArray:
    return (
        effects.age_per_10_years * (pop.age_at_index - REFERENCE_AGE) / 10.0
        + effects.female * pop.female
        + effects.diabetes * pop.diabetes
        + effects.log2_uacr * np.log2(pop.baseline_uacr_mg_g / REFERENCE_UACR_MG_G)
    )


def draw_trajectories(rng: np.random.Generator, s: Scenario, pop: Population) -> Trajectories:
    """Intercept, slope, acceleration and dip for every patient (see module docstring)."""
    tr = s.trajectory
    n = pop.arm.size
    mean0 = tr.intercept_mean + _linear(tr.intercept_effects, pop)
    intercept = truncated_normal_at(rng, mean0, tr.intercept_sd, tr.intercept_min, tr.intercept_max)
    z0 = (intercept - mean0) / tr.intercept_sd if tr.intercept_sd > 0 else np.zeros(n)
    rho = tr.intercept_slope_correlation
    z1 = rho * z0 + np.sqrt(1.0 - rho**2) * rng.standard_normal(n)
    arms = s.groups.arms
    slope_shift = np.array([a.slope_difference for a in arms])[pop.arm]
    slope = tr.slope_mean + _linear(tr.slope_effects, pop) + tr.slope_sd * z1 + slope_shift
    accel = np.minimum(tr.acceleration_mean + tr.acceleration_sd * rng.standard_normal(n), 0.0)
    dip_mean = np.array([a.acute_dip for a in arms])[pop.arm]
    dip_sd = np.array([a.acute_dip_sd for a in arms])[pop.arm]
    dip_draw = dip_mean + dip_sd * rng.standard_normal(n)
    # a dip stays a fall and a rise stays a rise: the draw keeps the sign of its arm's mean
    dip = np.where(dip_mean >= 0, np.maximum(dip_draw, 0.0), np.minimum(dip_draw, 0.0))
    dip_years = np.array([a.dip_days for a in arms])[pop.arm] / 365.25
    effect_sd = np.array([a.slope_difference_sd for a in arms])[pop.arm]
    if np.any(effect_sd > 0):  # drawn only when asked, so other scenarios keep their draws
        slope = slope + effect_sd * rng.standard_normal(n)
    return Trajectories(
        intercept=intercept,
        chronic_slope=slope,
        acceleration=accel,
        acute_dip=dip,
        dip_years=dip_years,
        floor=tr.gfr_floor,
    )
