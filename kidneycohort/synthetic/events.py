"""Event times: kidney failure, death, loss to follow-up and the end of study.

Times are in years from index. Time-varying rates (death hazard, testing and admission
rates) are sampled as non-homogeneous Poisson processes by thinning (Lewis & Shedler
1979, Naval Research Logistics Quarterly 26:403-413): candidate points from a
homogeneous process at each patient's own upper bound of the rate, each kept with
probability rate(t) / bound. All patients are handled at once with ``np.repeat``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from kidneycohort.synthetic.scenario import DeathProcess, Scenario
from kidneycohort.synthetic.trajectories import (
    FloatArray,
    Population,
    Trajectories,
    first_crossing,
    truncated_normal,
)

__all__ = [
    "REASON_DEATH",
    "REASON_END",
    "REASON_LOST",
    "EventTimes",
    "IntArray",
    "death_rate",
    "draw_events",
    "end_of_study_years",
    "min_gfr_on",
    "thinned_poisson",
]

IntArray = npt.NDArray[np.int64]

REASON_DEATH, REASON_LOST, REASON_END = "death", "loss_to_followup", "end_of_study"


@dataclass(frozen=True)
class EventTimes:
    """Per-patient event times in years from index (``inf`` = does not happen)."""

    kfrt_threshold: FloatArray
    threshold_reached: FloatArray
    kfrt: FloatArray  # observed kidney failure (inf when after end of follow-up)
    kfrt_transplant: npt.NDArray[np.bool_]
    death: FloatArray  # observed death (inf when censored first)
    lost: FloatArray
    end_of_study: FloatArray
    end_of_followup: FloatArray
    end_reason: npt.NDArray[np.str_]

    @property
    def last_native_lab(self) -> FloatArray:
        """Labs of native kidney function stop at kidney failure or end of follow-up."""
        return np.minimum(self.kfrt, self.end_of_followup)


def thinned_poisson(
    rng: np.random.Generator,
    bound: FloatArray,
    start: FloatArray,
    stop: FloatArray,
    rate: Callable[[IntArray, FloatArray], FloatArray],
) -> tuple[IntArray, FloatArray]:
    """Points of a non-homogeneous Poisson process on ``[start_i, stop_i)`` per patient.

    ``rate(patient, t)`` must not exceed ``bound[patient]``. Returns the patient index
    and time of every kept point, grouped by patient (times within a patient unsorted).
    """
    span = np.maximum(stop - start, 0.0)
    counts = rng.poisson(bound * span)
    patient = np.repeat(np.arange(bound.size), counts)
    times = start[patient] + rng.uniform(size=patient.size) * span[patient]
    keep = rng.uniform(size=patient.size) * bound[patient] < rate(patient, times)
    return patient[keep], times[keep]


def min_gfr_on(traj: Trajectories, start: FloatArray, stop: FloatArray) -> FloatArray:
    """Lowest true GFR on ``[start, stop]``: the path is concave on each piece, so the
    minimum is at an end point or at the end of the dip ramp."""
    everyone = np.arange(start.size)
    ramp = np.clip(traj.dip_years, start, stop)
    return np.minimum.reduce(
        [traj.gfr(everyone, start), traj.gfr(everyone, stop), traj.gfr(everyone, ramp)]
    )


def death_rate(
    d: DeathProcess,
    age_at_index: FloatArray,
    traj: Trajectories,
    kfrt: FloatArray,
) -> Callable[[IntArray, FloatArray], FloatArray]:
    """Death hazard of :class:`~kidneycohort.synthetic.scenario.DeathProcess` as a rate."""

    def rate(patient: IntArray, t: FloatArray) -> FloatArray:
        age = age_at_index[patient] + t
        gfr = traj.gfr(patient, t)
        return (
            d.rate_per_year_at_60
            * d.hazard_ratio_per_10_years ** ((age - 60.0) / 10.0)
            * d.hazard_ratio_per_10_below_60 ** (np.maximum(60.0 - gfr, 0.0) / 10.0)
            * np.where(t >= kfrt[patient], d.hazard_ratio_after_kidney_failure, 1.0)
        )

    return rate


def end_of_study_years(s: Scenario, pop: Population) -> FloatArray:
    """Administrative end: index + follow-up (plus the last visit's window for trials),
    capped at the calendar end date."""
    end = np.full(pop.index_day.size, np.inf)
    cal = s.calendar
    if cal.followup_years is not None:
        days = cal.followup_years * 365.25
        jitter = getattr(s.schedule, "jitter_days", 0)
        end = np.full(pop.index_day.size, (np.ceil(days) + jitter) / 365.25)
    if cal.end_date is not None:
        close = np.datetime64(cal.end_date, "D").astype(np.int64)
        end = np.minimum(end, (close - pop.index_day) / 365.25)
    return end


def draw_events(
    rng: np.random.Generator, s: Scenario, pop: Population, traj: Trajectories
) -> EventTimes:
    """Kidney failure, death, loss to follow-up and end of follow-up for every patient."""
    n = pop.arm.size
    kf = s.events.kidney_failure
    end_study = end_of_study_years(s, pop)
    threshold = truncated_normal(rng, kf.gfr_threshold, n)
    reached = first_crossing(traj, threshold)
    starts = rng.uniform(size=n) < kf.probability
    lag = rng.exponential(kf.lag_years_mean, size=n) if kf.lag_years_mean > 0 else np.zeros(n)
    kfrt_any = np.where(starts, reached + lag, np.inf)
    transplant = rng.uniform(size=n) < kf.transplant_fraction

    d = s.events.death
    zero = np.zeros(n)
    with np.errstate(invalid="ignore"):
        horizon = np.where(np.isfinite(end_study), end_study, 0.0)
    low = min_gfr_on(traj, zero, horizon)
    bound = (
        d.rate_per_year_at_60
        * d.hazard_ratio_per_10_years ** ((pop.age_at_index + horizon - 60.0) / 10.0)
        * d.hazard_ratio_per_10_below_60 ** (np.maximum(60.0 - low, 0.0) / 10.0)
        * np.where(kfrt_any < horizon, d.hazard_ratio_after_kidney_failure, 1.0)
    )
    # the Gompertz age term may fall with time when its ratio is below 1
    bound = bound * np.maximum(1.0, d.hazard_ratio_per_10_years ** (-horizon / 10.0))
    who, when = thinned_poisson(
        rng, bound, zero, horizon, death_rate(d, pop.age_at_index, traj, kfrt_any)
    )
    death_any = np.full(n, np.inf)
    np.minimum.at(death_any, who, when)

    rate_lost = s.events.loss_to_followup_per_year
    lost_any = rng.exponential(1.0 / rate_lost, size=n) if rate_lost > 0 else np.full(n, np.inf)

    end_followup = np.minimum.reduce([death_any, lost_any, end_study])
    reason = np.where(
        death_any <= np.minimum(lost_any, end_study),
        REASON_DEATH,
        np.where(lost_any <= end_study, REASON_LOST, REASON_END),
    )
    observed_kfrt = np.where(kfrt_any <= end_followup, kfrt_any, np.inf)
    observed_death = np.where(reason == REASON_DEATH, death_any, np.inf)
    observed_lost = np.where(reason == REASON_LOST, lost_any, np.inf)
    return EventTimes(
        kfrt_threshold=threshold,
        threshold_reached=reached,
        kfrt=observed_kfrt,
        kfrt_transplant=transplant & np.isfinite(observed_kfrt),
        death=observed_death,
        lost=observed_lost,
        end_of_study=end_study,
        end_of_followup=end_followup,
        end_reason=reason,
    )
