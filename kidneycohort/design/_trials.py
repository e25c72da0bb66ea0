"""One chunk of simulated trials: generated together, analysed as a study would be.

A chunk is ``k`` trials of ``n`` patients drawn by one call of the synthetic generator
(``k * n`` patients; patient ``j`` belongs to trial ``first + j // n``). Harmonising,
eGFR, baseline and endpoint derivation are per-patient stages (the partition rule of
DEVELOPERS.md: the same rows on any partition of patients), so they run once over the
whole chunk. The two per-trial analyses then run trial by trial: the exact mixed-model
engine (:class:`~kidneycohort.models.mixed.SlopeModel`) and the treatment hazard ratio
of every time-to-event endpoint (:mod:`kidneycohort.design._cox`).
"""

from __future__ import annotations

import datetime as dt
import warnings
from dataclasses import dataclass

import numpy as np
import polars as pl
from scipy import stats

from kidneycohort.baseline import egfr_baseline
from kidneycohort.design._config import DesignConfig
from kidneycohort.design._cox import hazards_by_trial
from kidneycohort.design._scenario import CONTROL, TREATMENT
from kidneycohort.egfr import compute_egfr
from kidneycohort.endpoints import derive_endpoints
from kidneycohort.errors import InputDataError, KidneyCohortError
from kidneycohort.harmonize import harmonize_tables
from kidneycohort.models.mixed import SlopeModel, SlopeModelRule
from kidneycohort.synthetic import Scenario, generate_cohort

__all__ = ["ESTIMATES_SCHEMA", "Chunk", "simulate_chunk"]

ESTIMATES_SCHEMA: dict[str, pl.DataType] = {
    "scenario": pl.String(),
    "sample_size": pl.Int64(),
    "chunk": pl.Int64(),
    "chunk_seed": pl.UInt64(),
    "trial": pl.Int64(),
    "endpoint": pl.String(),
    "analysis": pl.String(),  # slope_model / cox
    "estimate": pl.Float64(),  # treatment - control difference, or log hazard ratio
    "se": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
    "p": pl.Float64(),
    "rejected": pl.Boolean(),  # p < alpha (two-sided); false when not estimable
    "estimable": pl.Boolean(),
    "reason": pl.String(),  # why not estimable (null when estimable)
    "note": pl.String(),  # the slope model's fallback warnings, if any
    "patients_control": pl.Int64(),
    "patients_treatment": pl.Int64(),
    "events_control": pl.Int64(),
    "events_treatment": pl.Int64(),
    "patients_not_evaluable": pl.Int64(),  # endpoint rows without follow-up (Cox only)
}


@dataclass(frozen=True)
class Chunk:
    """One unit of work: ``trials`` trials of ``sample_size`` under ``scenario_label``."""

    scenario_label: str
    sample_size: int
    index: int
    first_trial: int
    trials: int
    seed: int


def simulate_chunk(
    config: DesignConfig, scenario: Scenario, chunk: Chunk, data_cut: dt.date
) -> pl.DataFrame:
    """Generate and analyse one chunk; rows of :data:`ESTIMATES_SCHEMA`, one per trial
    and analysed endpoint."""
    n = chunk.sample_size
    cohort = generate_cohort(scenario, patients=n * chunk.trials, seed=chunk.seed)
    clean = harmonize_tables(cohort.labs, cohort.patients, cohort.events)
    problems = clean.unusable()
    if problems:
        raise InputDataError("simulated trial data: " + "; ".join(problems))
    patients = (
        clean.patients.with_row_index("_row")
        .with_columns(
            (pl.lit(chunk.first_trial) + pl.col("_row").cast(pl.Int64) // n).alias("trial")
        )
        .drop("_row")
    )
    equation = config.design.equation
    egfr = compute_egfr(clean.labs, patients, equations=[equation])
    baseline = egfr_baseline(egfr, rule=config.baseline)
    endpoints = derive_endpoints(
        egfr,
        baseline,
        patients,
        clean.events,
        config.endpoints.definitions,
        equation=equation,
        data_cut=data_cut,
        rule=config.endpoints.rule,
    )
    arms = patients.group_by("trial").agg(
        (pl.col("group") == CONTROL).sum().cast(pl.Int64).alias("patients_control"),
        (pl.col("group") == TREATMENT).sum().cast(pl.Int64).alias("patients_treatment"),
    )
    frames = [
        _slope_estimates(config, egfr, patients),
        _hazard_estimates(config, endpoints, patients),
    ]
    alpha = config.design.alpha
    z = stats.norm.ppf(1 - alpha / 2)
    out = (
        pl.concat([f for f in frames if f.height], how="diagonal_relaxed")
        .join(arms, on="trial", how="left")
        .with_columns(
            pl.lit(chunk.scenario_label).alias("scenario"),
            pl.lit(n, dtype=pl.Int64).alias("sample_size"),
            pl.lit(chunk.index, dtype=pl.Int64).alias("chunk"),
            pl.lit(chunk.seed, dtype=pl.UInt64).alias("chunk_seed"),
            pl.col("reason").is_null().alias("estimable"),
        )
        .with_columns(
            (pl.col("estimate") - z * pl.col("se")).alias("lower"),
            (pl.col("estimate") + z * pl.col("se")).alias("upper"),
            (pl.col("estimable") & (pl.col("p") < alpha)).fill_null(False).alias("rejected"),
        )
    )
    for column, dtype in ESTIMATES_SCHEMA.items():
        if column not in out.columns:
            out = out.with_columns(pl.lit(None, dtype=dtype).alias(column))
    return out.select([pl.col(c).cast(t) for c, t in ESTIMATES_SCHEMA.items()]).sort(
        "trial", "analysis", "endpoint"
    )


def _slope_estimates(
    config: DesignConfig, egfr: pl.DataFrame, patients: pl.DataFrame
) -> pl.DataFrame:
    """The slope model of each trial: treatment - control difference of each quantity."""
    quantities = config.slope_quantity_names()
    if not quantities:
        return pl.DataFrame()
    rule = config.slope_model.model_copy(
        update={
            "group_column": "group",
            "reference_group": CONTROL,
            "equation": config.design.equation,
        }
    )
    people = patients.select("patient_id", "group", "trial")
    values = egfr.join(people.select("patient_id", "trial"), on="patient_id", how="left")
    by_trial = {int(f["trial"][0]): f for f in values.partition_by("trial")}
    rows = []
    for group in people.sort("trial").partition_by("trial", maintain_order=True):
        trial = int(group["trial"][0])  # one exact mixed-model fit per trial
        rows.extend(_one_slope_fit(rule, by_trial.get(trial), group, trial, quantities))
    return pl.DataFrame(
        rows,
        schema={
            "trial": pl.Int64,
            "endpoint": pl.String,
            "estimate": pl.Float64,
            "se": pl.Float64,
            "p": pl.Float64,
            "reason": pl.String,
            "note": pl.String,
        },
        orient="row",
    ).with_columns(pl.lit("slope_model").alias("analysis"))


def _one_slope_fit(
    rule: SlopeModelRule,
    values: pl.DataFrame | None,
    people: pl.DataFrame,
    trial: int,
    quantities: list[str],
) -> list[tuple[object, ...]]:
    contrast = f"{TREATMENT} - {CONTROL}"
    nan = float("nan")
    if values is None or people["group"].n_unique() < 2:
        return [(trial, q, nan, nan, nan, "one_arm_only", None) for q in quantities]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            model = SlopeModel(rule).fit(values, people)
        except KidneyCohortError as exc:
            reason = f"slope_model_failed: {str(exc).splitlines()[0]}"
            return [(trial, q, nan, nan, nan, reason, None) for q in quantities]
    note = "; ".join(sorted({str(w.message).splitlines()[0] for w in caught})) or None
    summary = model.summary().filter(pl.col("contrast") == contrast)
    found = {r["quantity"]: r for r in summary.iter_rows(named=True)}
    out: list[tuple[object, ...]] = []
    for q in quantities:
        r = found.get(q)
        if r is None or not np.isfinite(r["se"]):
            out.append((trial, q, nan, nan, nan, "not_estimable_in_model", note))
        else:
            out.append((trial, q, r["estimate"], r["se"], r["p"], None, note))
    return out


def _hazard_estimates(
    config: DesignConfig, endpoints: pl.DataFrame, patients: pl.DataFrame
) -> pl.DataFrame:
    """Treatment log hazard ratio of each analysed endpoint in each trial."""
    names = config.time_to_event_names()
    if not names:
        return pl.DataFrame()
    every = endpoints.filter(pl.col("endpoint").is_in(names)).join(
        patients.select("patient_id", "group", "trial"), on="patient_id", how="left"
    )
    evaluable = pl.col("years").is_not_null() & pl.col("event").is_not_null()
    # patients a definition cannot evaluate (e.g. no baseline) are counted, not dropped
    not_evaluable = every.group_by("endpoint", "trial").agg(
        (~evaluable).sum().cast(pl.Int64).alias("patients_not_evaluable")
    )
    rows = every.filter(evaluable).select("endpoint", "trial", "group", "years", "event")
    # every (endpoint, trial) keeps its row, even one without any evaluable patient
    return not_evaluable.join(
        hazards_by_trial(rows, TREATMENT), on=["endpoint", "trial"], how="left"
    ).with_columns(
        pl.col("reason").fill_null(
            pl.when(pl.col("events_control").is_null()).then(pl.lit("no_evaluable_patients"))
        ),
        pl.lit("cox").alias("analysis"),
    )
