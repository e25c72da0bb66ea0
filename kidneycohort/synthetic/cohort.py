"""Assemble a whole synthetic cohort (patients, labs, events and truth) in memory."""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from kidneycohort import schemas, units
from kidneycohort._frames import conform
from kidneycohort.synthetic.defects import DEFECTS_SCHEMA, defect_counts, inject_defects
from kidneycohort.synthetic.events import EventTimes, draw_events
from kidneycohort.synthetic.labs import measure
from kidneycohort.synthetic.scenario import Scenario, load_scenario
from kidneycohort.synthetic.schedules import SETTINGS, draw_occasions, visit_names
from kidneycohort.synthetic.trajectories import (
    FloatArray,
    Population,
    Trajectories,
    draw_population,
    draw_trajectories,
    first_crossing,
)

__all__ = ["SyntheticCohort", "generate_cohort", "patient_ids"]

logger = logging.getLogger(__name__)

# independent random streams, so that changing one part leaves the others' draws intact
_STREAMS = ("population", "trajectories", "events", "schedule", "labs", "defects")


@dataclass(frozen=True)
class SyntheticCohort:
    """A generated cohort: the three canonical input tables and the truth behind them.

    ``patients``, ``labs`` and ``events`` follow ``schemas.PATIENTS`` (plus ``site``
    and ``diabetes``), ``schemas.RAW_LABS`` (plus ``sample_id``) and
    ``schemas.EVENTS``. ``truth`` maps ``"patients"``, ``"samples"``, ``"events"`` and
    ``"defects"`` to frames (columns in the package docstring).
    """

    scenario: Scenario
    patients: pl.DataFrame
    labs: pl.DataFrame
    events: pl.DataFrame
    truth: dict[str, pl.DataFrame] = field(default_factory=dict)
    defect_counts: dict[str, int] = field(default_factory=dict)


def generate_cohort(
    scenario: Scenario | str | Path | dict[str, Any],
    *,
    patients: int | None = None,
    seed: int | None = None,
) -> SyntheticCohort:
    """Generate a synthetic cohort with known truth, entirely in memory.

    Parameters
    ----------
    scenario
        A :class:`Scenario`, a path to a scenario YAML file, or a mapping of its keys.
    patients, seed
        Override the scenario's number of patients and random seed.

    Returns
    -------
    SyntheticCohort
        Same scenario and seed give identical frames.

    Raises
    ------
    ConfigError
        A scenario that fails validation, or ``dirty`` counts the cohort cannot hold.

    Notes
    -----
    True GFR follows (see :mod:`kidneycohort.synthetic.trajectories`)

    .. math::

        g_i(t) = \\max\\{f,\\; b_{0i} + b_{1i} t + a_i t_+^2 - D_i \\min(t_+ / r_i, 1)\\}

    and measured creatinine / cystatin C are the inverse of the scenario's equation at
    :math:`g_i(t)` times mean-one log-normal variation.

    References
    ----------
    .. [1] Inker LA et al. New creatinine- and cystatin C-based equations to estimate
       GFR without race. N Engl J Med 2021;385:1737-49. doi:10.1056/NEJMoa2102953
    .. [2] Inker LA et al. Estimating glomerular filtration rate from serum creatinine
       and cystatin C. N Engl J Med 2012;367:20-9. doi:10.1056/NEJMoa1114248
    .. [3] Lewis PAW, Shedler GS. Simulation of nonhomogeneous Poisson processes by
       thinning. Naval Res Logist Q 1979;26:403-13. doi:10.1002/nav.3800260304

    Examples
    --------
    >>> cohort = generate_cohort({"patients": 5, "seed": 1, "labs": {"cystatin_c": None}})
    >>> cohort.patients.height, sorted(cohort.truth)
    (5, ['defects', 'events', 'patients', 'samples'])
    """
    s = load_scenario(scenario).resolved(patients=patients, seed=seed)
    streams = dict(zip(_STREAMS, np.random.SeedSequence(s.seed).spawn(len(_STREAMS)), strict=True))
    rng = {k: np.random.default_rng(v) for k, v in streams.items()}
    pop = draw_population(rng["population"], s)
    traj = draw_trajectories(rng["trajectories"], s, pop)
    ev = draw_events(rng["events"], s, pop, traj)
    occasions = draw_occasions(rng["schedule"], s, pop, traj, ev)
    cys = s.labs.cystatin_c
    non_gfr = np.exp(
        (cys.non_gfr_log_sd if cys is not None else 0.0) * rng["labs"].standard_normal(s.patients)
    )
    samples = measure(rng["labs"], s, pop, traj, occasions, non_gfr)
    logger.info("generated %d patients, %d lab results", s.patients, samples.height)

    ids = patient_ids(s.id_prefix, s.patients, s.dirty.orphan_patient if s.dirty else 0)
    patient_frame = _patients_table(s, pop, ev, ids)
    names = visit_names(s)
    samples = samples.sort(
        ["patient", "sample_us", "analyte"]
    ).with_columns(  # ids sort as their numbers
        patient_id=ids.gather(samples["patient"].sort()),
        sample_id=pl.int_range(1, pl.len() + 1, dtype=pl.Int64),
        analyte=_decode("analyte", units.ANALYTES),
        setting=_decode("setting", SETTINGS),
        visit=_decode("visit", names),
    )
    labs = samples.select(
        "patient_id",
        pl.col("sample_us").cast(pl.Datetime("us")).alias("sample_date"),
        "analyte",
        "value",
        "unit",
        "setting",
        "sample_id",
    )
    if s.dirty is not None:
        patient_frame, labs, defects = inject_defects(
            rng["defects"], s.dirty, patient_frame, labs, ids.slice(s.patients)
        )
    else:
        defects = pl.DataFrame(schema=DEFECTS_SCHEMA)
    truth = {
        "patients": _truth_patients(s, pop, traj, non_gfr, ids),
        "samples": _truth_samples(samples),
        "events": _truth_events(pop, traj, ev, ids),
        "defects": defects,
    }
    return SyntheticCohort(
        scenario=s,
        patients=patient_frame,
        labs=labs,
        events=_events_table(pop, ev, ids),
        truth=truth,
        defect_counts=defect_counts(defects),
    )


def _decode(column: str, names: tuple[str, ...]) -> pl.Expr:
    return pl.col(column).replace_strict(
        list(range(len(names))), list(names), return_dtype=pl.String
    )


def patient_ids(prefix: str, n: int, extra: int = 0) -> pl.Series:
    """``n`` patient ids (then ``extra`` unused ones for orphan rows), zero-padded so that
    text order is number order."""
    width = max(6, len(str(n + extra)))
    return pl.select(
        (pl.lit(prefix) + pl.int_range(1, n + extra + 1).cast(pl.String).str.zfill(width)).alias(
            "patient_id"
        )
    ).to_series()


def _date(index_day: np.ndarray, years: FloatArray) -> pl.Series:
    """Calendar date of a time in years from index; null where the time is infinite."""
    finite = np.isfinite(years)
    days = index_day + np.floor(np.where(finite, years, 0.0) * 365.25).astype(np.int64)
    return (
        pl.Series(np.where(finite, days, 0))
        .cast(pl.Int32)
        .cast(pl.Date)
        .scatter(np.flatnonzero(~finite), None)
    )


def _years_or_null(years: FloatArray) -> pl.Series:
    return pl.Series(np.where(np.isfinite(years), years, np.nan)).fill_nan(None)


def _day_series(days: np.ndarray) -> pl.Series:
    return pl.Series(days).cast(pl.Int32).cast(pl.Date)


def _patients_table(s: Scenario, pop: Population, ev: EventTimes, ids: pl.Series) -> pl.DataFrame:
    n = s.patients
    labels = np.array([a.label for a in s.groups.arms])
    frame = pl.DataFrame(
        {
            "patient_id": ids.head(n),
            "sex": np.where(pop.female, "female", "male"),
            "birth_date": _day_series(pop.birth_day),
            "age_at_index": np.round(pop.age_at_index, 4),
            "index_date": _day_series(pop.index_day),
            "group": labels[pop.arm],
            "height_cm": np.round(pop.height_cm, 1),
            "weight_kg": np.round(pop.weight_kg, 1),
            "black_race": pop.black_race,
            "death_date": _date(pop.index_day, ev.death),
            "kfrt_date": _date(pop.index_day, ev.kfrt),
            "end_of_followup": _date(pop.index_day, ev.end_of_followup),
        }
    )
    extras = pl.DataFrame(
        {"site": np.array([x.name for x in s.sites])[pop.site], "diabetes": pop.diabetes}
    )
    return pl.concat([conform(frame, schemas.PATIENTS), extras], how="horizontal")


def _events_table(pop: Population, ev: EventTimes, ids: pl.Series) -> pl.DataFrame:
    n = pop.arm.size
    pid = ids.head(n)
    kfrt = pl.DataFrame(
        {
            "patient_id": pid,
            "event_date": _date(pop.index_day, ev.kfrt),
            "event": np.where(ev.kfrt_transplant, "transplant", "dialysis"),
        }
    )
    death = pl.DataFrame(
        {"patient_id": pid, "event_date": _date(pop.index_day, ev.death), "event": "death"}
    )
    both = pl.concat([kfrt, death]).drop_nulls("event_date")
    return conform(both, schemas.EVENTS).sort(["patient_id", "event_date", "event"])


def _truth_patients(
    s: Scenario, pop: Population, traj: Trajectories, non_gfr: FloatArray, ids: pl.Series
) -> pl.DataFrame:
    horizon = s.trajectory.total_slope_years
    labels = np.array([a.label for a in s.groups.arms])
    return pl.DataFrame(
        {
            "patient_id": ids.head(pop.arm.size),
            "group": labels[pop.arm],
            "site": np.array([x.name for x in s.sites])[pop.site],
            "sex": np.where(pop.female, "female", "male"),
            "age_at_index": pop.age_at_index,
            "diabetes": pop.diabetes,
            "baseline_uacr_mg_g": pop.baseline_uacr_mg_g,
            "true_intercept": traj.intercept,
            "true_acute_dip": traj.acute_dip,
            "dip_days": traj.dip_years * 365.25,
            "true_chronic_slope": traj.chronic_slope,
            "true_acceleration": traj.acceleration,
            "true_total_slope": traj.total_slope(horizon),
            "total_slope_years": np.full(pop.arm.size, horizon),
            "cystatin_c_non_gfr_factor": non_gfr,
        }
    )


def _truth_samples(samples: pl.DataFrame) -> pl.DataFrame:
    return samples.select(
        "sample_id",
        "patient_id",
        pl.col("sample_us").cast(pl.Datetime("us")).alias("sample_date"),
        "analyte",
        "setting",
        "visit",
        "admission",
        pl.col("years").alias("years_from_index"),
        "age_at_sample",
        "true_gfr",
        pl.col("aki_multiplier").alias("aki_creatinine_multiplier"),
        "noise_free_value",
        "measured_value",
    )


def _truth_events(
    pop: Population, traj: Trajectories, ev: EventTimes, ids: pl.Series
) -> pl.DataFrame:
    n = pop.arm.size
    observable = ev.last_native_lab

    def within(t: FloatArray) -> FloatArray:
        return np.where(t <= observable, t, np.inf)

    reached = within(ev.threshold_reached)
    below_15 = within(first_crossing(traj, np.full(n, 15.0)))
    decline_40 = within(first_crossing(traj, 0.60 * traj.intercept))
    decline_57 = within(first_crossing(traj, 0.43 * traj.intercept))
    return pl.DataFrame(
        {
            "patient_id": ids.head(n),
            "index_date": _day_series(pop.index_day),
            "kfrt_threshold_gfr": ev.kfrt_threshold,
            "threshold_reached_date": _date(pop.index_day, reached),
            "threshold_reached_years": _years_or_null(ev.threshold_reached),
            "kfrt_date": _date(pop.index_day, ev.kfrt),
            "kfrt_years": _years_or_null(ev.kfrt),
            "kfrt_modality": pl.Series(
                np.where(ev.kfrt_transplant, "transplant", "dialysis")
            ).zip_with(pl.Series(np.isfinite(ev.kfrt)), pl.Series([None] * n, dtype=pl.String)),
            "death_date": _date(pop.index_day, ev.death),
            "death_years": _years_or_null(ev.death),
            "loss_to_followup_date": _date(pop.index_day, ev.lost),
            "end_of_study_date": _date(pop.index_day, ev.end_of_study),
            "end_of_followup": _date(pop.index_day, ev.end_of_followup),
            "end_of_followup_years": ev.end_of_followup,
            "end_reason": ev.end_reason,
            "true_gfr_below_15_date": _date(pop.index_day, below_15),
            "true_decline_40_date": _date(pop.index_day, decline_40),
            "true_decline_57_date": _date(pop.index_day, decline_57),
        }
    )
