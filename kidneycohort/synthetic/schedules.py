"""Measurement schedules: when each patient gives a blood or urine sample.

Two kinds, chosen by the scenario's ``schedule.kind``:

* ``visits`` (trials): every patient is offered every scheduled visit; visits after day
  0 are shifted by a uniform jitter of +/- ``jitter_days`` and missed with
  ``missed_visit_probability``; screening and the day-0 visit are always attended.
* ``care`` (EHR): an outpatient sample at cohort entry (the index test), then
  care-driven outpatient testing at a rate rising with lower true GFR, and hospital
  admissions with a daily creatinine for the length of stay; a share of admissions
  carries a transient acute-kidney-injury spike in creatinine.

Samples stop at kidney failure or the end of follow-up. Within one patient and day at
most one occasion is kept (index test, then admission, then outpatient), so the clean
cohort holds one result per patient, analyte and day.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from kidneycohort.synthetic.events import EventTimes, min_gfr_on, thinned_poisson
from kidneycohort.synthetic.scenario import CareSchedule, Inpatient, Scenario, VisitSchedule
from kidneycohort.synthetic.trajectories import FloatArray, Population, Trajectories

__all__ = [
    "DAYS_PER_YEAR",
    "DAY_OFFSET",
    "EMERGENCY",
    "INDEX_VISIT",
    "INPATIENT",
    "MINUTES_PER_DAY",
    "OCCASION_SCHEMA",
    "OUTPATIENT",
    "OUTPATIENT_MINUTES",
    "SETTINGS",
    "VISIT_MINUTES",
    "WARD_ROUND_MINUTES",
    "draw_occasions",
    "visit_names",
]

MINUTES_PER_DAY = 1440
DAYS_PER_YEAR = 365.25
# working hours of the outpatient laboratory and the inpatient morning round (common practice)
OUTPATIENT_MINUTES = (7 * 60, 18 * 60)
VISIT_MINUTES = (8 * 60, 12 * 60)
WARD_ROUND_MINUTES = (5 * 60, 7 * 60)

# settings and visits travel as small integer codes and become text only when the
# tables are assembled (text columns of tens of millions of rows are slow to build)
SETTINGS = ("outpatient", "inpatient", "emergency")
OUTPATIENT, INPATIENT, EMERGENCY = 0, 1, 2
INDEX_VISIT = "index"
DAY_OFFSET = 1 << 15  # keeps (day + offset) positive in a packed sort key

OCCASION_SCHEMA = {
    "patient": pl.Int64,
    "day": pl.Int64,
    "minute": pl.Int64,
    "setting": pl.Int8,
    "visit": pl.Int16,
    "admission": pl.Int64,
    "aki_multiplier": pl.Float64,
    "creatinine": pl.Boolean,
    "cystatin_c": pl.Boolean,
    "uacr": pl.Boolean,
}


def draw_occasions(
    rng: np.random.Generator,
    s: Scenario,
    pop: Population,
    traj: Trajectories,
    ev: EventTimes,
) -> pl.DataFrame:
    """All sampling occasions (one row each, :data:`OCCASION_SCHEMA`), sorted by
    patient, day and minute, with ``years`` from index added."""
    if isinstance(s.schedule, VisitSchedule):
        occasions = _visit_occasions(rng, s, s.schedule, ev)
    else:  # already one row per patient and day, in patient and day order
        occasions = _care_occasions(rng, s, s.schedule, pop, traj, ev)
    occasions = _subset_analytes(rng, s, occasions)
    return occasions.with_columns(
        years=(pl.col("day") * MINUTES_PER_DAY + pl.col("minute"))
        / (MINUTES_PER_DAY * DAYS_PER_YEAR)
    )


def visit_names(s: Scenario) -> tuple[str, ...]:
    """Names behind the ``visit`` codes of :func:`draw_occasions`."""
    if isinstance(s.schedule, VisitSchedule):
        return tuple(v.name for v in s.schedule.visits)
    return (INDEX_VISIT,)


def _minutes(rng: np.random.Generator, window: tuple[int, int], size: int) -> np.ndarray:
    return rng.integers(window[0], window[1], size=size)


def _visit_occasions(
    rng: np.random.Generator, s: Scenario, sched: VisitSchedule, ev: EventTimes
) -> pl.DataFrame:
    n, visits = s.patients, sched.visits
    v = len(visits)
    patient = np.repeat(np.arange(n), v)
    which = np.tile(np.arange(v), n)
    day0 = np.array([x.day for x in visits])[which]
    fixed = day0 <= 0
    # a visit's window never reaches half-way to its neighbours, so visits keep their order
    days = np.array([x.day for x in visits])
    gaps = np.diff(days)
    half_gap = np.minimum(
        np.concatenate([[sched.jitter_days], (gaps - 1) // 2]),
        np.concatenate([(gaps - 1) // 2, [sched.jitter_days]]),
    )
    window = np.minimum(sched.jitter_days, half_gap)[which]
    jitter = np.floor(rng.uniform(size=patient.size) * (2 * window + 1)).astype(np.int64) - window
    day = np.where(day0 == 0, 0, day0 + jitter)
    if sched.jitter_days:
        # a jittered screening visit must stay before randomisation
        day = np.where(fixed & (day0 < 0), np.minimum(day, -1), day)
    attended = fixed | (rng.uniform(size=patient.size) >= sched.missed_visit_probability)
    minute = _minutes(rng, VISIT_MINUTES, patient.size)
    years = (day * MINUTES_PER_DAY + minute) / (MINUTES_PER_DAY * DAYS_PER_YEAR)
    keep = attended & (fixed | (years <= ev.last_native_lab[patient]))
    has = {
        a: np.array([a in x.analytes for x in visits])[which]
        for a in ("creatinine", "cystatin_c", "uacr")
    }
    frame = pl.DataFrame(
        {
            "patient": patient,
            "day": day,
            "minute": minute,
            "setting": np.full(patient.size, OUTPATIENT, dtype=np.int8),
            "visit": which.astype(np.int16),
            "admission": pl.Series([None] * patient.size, dtype=pl.Int64),
            "aki_multiplier": np.ones(patient.size),
            **has,
        },
        schema=OCCASION_SCHEMA,
    )
    return frame.filter(pl.Series(keep)).sort(["patient", "day"])


def _care_occasions(
    rng: np.random.Generator,
    s: Scenario,
    sched: CareSchedule,
    pop: Population,
    traj: Trajectories,
    ev: EventTimes,
) -> pl.DataFrame:
    n = s.patients
    start = np.full(n, -s.calendar.lookback_years)
    stop = ev.last_native_lab
    low = min_gfr_on(traj, start, stop)
    base, ratio = sched.outpatient_tests_per_year, sched.rate_ratio_per_10_below_60

    def test_rate(patient: np.ndarray, t: FloatArray) -> FloatArray:
        return base * ratio ** (np.maximum(60.0 - traj.gfr(patient, t), 0.0) / 10.0)

    bound = base * np.maximum(ratio, 1.0) ** (np.maximum(60.0 - low, 0.0) / 10.0)
    who, when = thinned_poisson(rng, bound, start, stop, test_rate)
    # the index test defines cohort entry: an outpatient creatinine on day 0
    index_day = np.zeros(n, dtype=np.int64)
    cols: dict[str, np.ndarray] = {
        "patient": np.concatenate([np.arange(n), who]),
        "day": np.concatenate([index_day, np.floor(when * DAYS_PER_YEAR).astype(np.int64)]),
        "priority": np.concatenate([index_day, np.full(who.size, 2)]),
        "setting": np.full(n + who.size, OUTPATIENT, dtype=np.int8),
        "admission": np.full(n + who.size, -1),
        "aki_multiplier": np.ones(n + who.size),
    }
    cols["minute"] = _minutes(rng, OUTPATIENT_MINUTES, cols["patient"].size)
    if sched.inpatient is not None and sched.inpatient.admissions_per_year > 0:
        ward = _inpatient_occasions(rng, sched.inpatient, pop, traj, start, stop, low)
        cols = {k: np.concatenate([v, ward[k]]) for k, v in cols.items()}
    years = (cols["day"] * MINUTES_PER_DAY + cols["minute"]) / (MINUTES_PER_DAY * DAYS_PER_YEAR)
    keep = (years <= stop[cols["patient"]]) | (cols["priority"] == 0)
    cols = {k: v[keep] for k, v in cols.items()}
    # one occasion per patient and day: the index test, else the ward, else outpatient
    patient_day = (cols["patient"] << 16) | (cols["day"] + DAY_OFFSET)
    order = np.argsort((patient_day << 2) | cols["priority"], kind="stable")
    patient_day = patient_day[order]
    first = np.concatenate([[True], patient_day[1:] != patient_day[:-1]])
    cols = {k: v[order[first]] for k, v in cols.items()}
    m = cols["patient"].size
    is_index = cols["priority"] == 0
    return pl.DataFrame(
        {
            "patient": cols["patient"],
            "day": cols["day"],
            "minute": cols["minute"],
            "setting": cols["setting"],
            "visit": pl.Series(np.zeros(m, dtype=np.int16)).scatter(
                np.flatnonzero(~is_index), None
            ),
            "admission": pl.Series(cols["admission"]).scatter(
                np.flatnonzero(cols["admission"] < 0), None
            ),
            "aki_multiplier": cols["aki_multiplier"],
            "creatinine": np.ones(m, dtype=bool),
            "cystatin_c": is_index,
            "uacr": is_index,
        },
        schema=OCCASION_SCHEMA,
    )


def _inpatient_occasions(
    rng: np.random.Generator,
    ip: Inpatient,
    pop: Population,
    traj: Trajectories,
    start: FloatArray,
    stop: FloatArray,
    low: FloatArray,
) -> dict[str, np.ndarray]:
    base = ip.admissions_per_year
    r_age, r_gfr = ip.admission_rate_ratio_per_10_years, ip.admission_rate_ratio_per_10_below_60

    def admission_rate(patient: np.ndarray, t: FloatArray) -> FloatArray:
        age = pop.age_at_index[patient] + t
        gfr = traj.gfr(patient, t)
        return base * r_age ** ((age - 60.0) / 10.0) * r_gfr ** (np.maximum(60.0 - gfr, 0.0) / 10.0)

    oldest = pop.age_at_index + np.where(r_age >= 1, np.maximum(stop, start), start)
    bound = (
        base
        * r_age ** ((oldest - 60.0) / 10.0)
        * np.maximum(r_gfr, 1.0) ** (np.maximum(60.0 - low, 0.0) / 10.0)
    )
    who, when = thinned_poisson(rng, bound, start, stop, admission_rate)
    n_adm = who.size
    stay = 1 + rng.poisson(ip.mean_stay_days - 1.0, size=n_adm)
    aki = rng.uniform(size=n_adm) < ip.aki_probability
    peak_ratio = rng.uniform(
        ip.aki_peak_creatinine_ratio_min, ip.aki_peak_creatinine_ratio_max, size=n_adm
    )
    admission = np.repeat(np.arange(n_adm), stay)
    first_row = np.repeat(np.cumsum(stay) - stay, stay)
    day_in_stay = np.arange(admission.size) - first_row
    peak_day = np.minimum(2, stay - 1)[admission]
    # a smooth rise and recovery of creatinine around the peak day of the stay
    bump = np.exp(-(((day_in_stay - peak_day) / 1.5) ** 2))
    multiplier = np.where(aki[admission], 1.0 + (peak_ratio[admission] - 1.0) * bump, 1.0)
    first_day = np.floor(when * DAYS_PER_YEAR).astype(np.int64)
    minute = np.where(
        day_in_stay == 0,
        rng.integers(0, MINUTES_PER_DAY, size=admission.size),
        _minutes(rng, WARD_ROUND_MINUTES, admission.size),
    )
    return {
        "patient": who[admission],
        "day": first_day[admission] + day_in_stay,
        "priority": np.ones(admission.size, dtype=np.int64),
        "setting": np.where(day_in_stay == 0, EMERGENCY, INPATIENT).astype(np.int8),
        "admission": admission.astype(np.int64),
        "aki_multiplier": multiplier,
        "minute": minute,
    }


def _subset_analytes(rng: np.random.Generator, s: Scenario, occ: pl.DataFrame) -> pl.DataFrame:
    """Cystatin C and UACR for the scenario's share of patients and of their samples.

    At a patient's index occasion (trial day 0, EHR entry test) the analytes are kept
    whenever the patient is in the subset, so that a baseline exists.
    """
    patient = occ["patient"].to_numpy()
    outpatient = (occ["setting"] == OUTPATIENT).to_numpy()
    is_index = (occ["day"] == 0).to_numpy() & outpatient
    updates = {}
    for name, spec in (("cystatin_c", s.labs.cystatin_c), ("uacr", s.labs.uacr)):
        wanted = occ[name].to_numpy()
        if spec is None:
            updates[name] = np.zeros(patient.size, dtype=bool)
            continue
        in_subset = rng.uniform(size=s.patients) < spec.patient_fraction
        drawn = rng.uniform(size=patient.size) < spec.per_sample_probability
        if isinstance(s.schedule, VisitSchedule):
            offered = wanted
        else:
            offered = outpatient
        updates[name] = in_subset[patient] & offered & (drawn | is_index)
    return occ.with_columns(**{k: pl.Series(v) for k, v in updates.items()})
