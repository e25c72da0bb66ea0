"""Column contracts of the tables that flow between stages.

One place names every canonical table's columns and types, so that stages written
separately agree, tests can check a stage's output against its contract, and the
run folder's schema version means something. The input tables are described for users in docs/data_contract.md (written from here).
"""

from __future__ import annotations

from typing import Final

import polars as pl

__all__ = [
    "AT_RISK",
    "BASELINE",
    "BASELINE_CATEGORIES",
    "CANONICAL_EVENTS",
    "COMPETING_HAZARDS",
    "COMPETING_TESTS",
    "DAYS_PER_YEAR",
    "DROPOUT_SENSITIVITY",
    "DROPOUT_SLOPES",
    "EGFR",
    "ENDPOINTS",
    "EVENTS",
    "EVENTS_REQUIRED",
    "HAZARD_RATIOS",
    "INCIDENCE_RATES",
    "KDIGO_GRID_COUNTS",
    "KFRE_AT_BASELINE",
    "LABS",
    "MODEL_SLOPES",
    "PATIENTS",
    "PATIENTS_REQUIRED",
    "RAW_LABS",
    "RAW_LABS_REQUIRED",
    "REJECTED",
    "SCHEMA_VERSION",
    "SLOPES",
    "SLOPE_MODEL_FIT",
    "SLOPE_SUMMARY",
    "STAGES",
    "SURVIVAL_CURVES",
    "TRAJECTORIES",
    "TRANSITIONS",
    "TRANSITION_COUNTS",
    "UACR_BASELINE",
]

SCHEMA_VERSION: Final = "1.0"

# ---- inputs (what the tool reads when no column map is given) -----------------------
PATIENTS_REQUIRED: Final = ("patient_id",)
PATIENTS: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "sex": pl.String(),  # "female" / "male"
    "birth_date": pl.Date(),
    "age_at_index": pl.Float64(),
    "index_date": pl.Date(),
    "group": pl.String(),
    "height_cm": pl.Float64(),
    "weight_kg": pl.Float64(),
    "black_race": pl.Boolean(),
    "death_date": pl.Date(),
    "kfrt_date": pl.Date(),
    "end_of_followup": pl.Date(),
}

RAW_LABS_REQUIRED: Final = ("patient_id", "sample_date", "analyte", "value", "unit")
RAW_LABS: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "sample_date": pl.Datetime("us"),  # a date is read as midnight
    "analyte": pl.String(),
    "value": pl.String(),  # as reported: "1.2", "<0.2", "0,9", "see comment"
    "unit": pl.String(),
    "setting": pl.String(),  # outpatient / inpatient / emergency
}

EVENTS_REQUIRED: Final = ("patient_id", "event_date", "event")
EVENTS: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "event_date": pl.Date(),
    "event": pl.String(),  # dialysis / transplant / death / kidney_death
    "end_date": pl.Date(),  # optional: end of a dialysis episode
}
CANONICAL_EVENTS: Final = ("dialysis", "transplant", "death", "kidney_death")

# ---- stage outputs ------------------------------------------------------------------
LABS: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "sample_date": pl.Date(),
    "sample_datetime": pl.Datetime("us"),
    "analyte": pl.String(),
    "value": pl.Float64(),  # in the analyte's standard unit (units.STANDARD_UNIT)
    "unit": pl.String(),  # the standard unit
    "reported_value": pl.String(),
    "reported_unit": pl.String(),
    "qualifier": pl.String(),  # null, "<" or ">"
    "setting": pl.String(),
    "source": pl.String(),
    "source_row": pl.Int64(),
    "n_collapsed": pl.Int32(),  # same patient/analyte/day results folded into this row
}

REJECTED: Final[dict[str, pl.DataType]] = {
    "table": pl.String(),
    "source": pl.String(),
    "source_row": pl.Int64(),
    "patient_id": pl.String(),
    "reason": pl.String(),  # a code of kidneycohort.harmonize.REASON_CODES
    "detail": pl.String(),
}

EGFR: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "sample_date": pl.Date(),
    "sample_datetime": pl.Datetime("us"),
    "years_from_index": pl.Float64(),
    "age_years": pl.Float64(),
    "equation": pl.String(),
    "egfr": pl.Float64(),  # NaN/null when not computable; see egfr_reason
    "egfr_unit": pl.String(),  # "mL/min/1.73m2" (indexed) or "mL/min" (clearance)
    "creatinine_mg_dl": pl.Float64(),
    "cystatin_c_mg_l": pl.Float64(),
    "setting": pl.String(),
    "qualified": pl.Boolean(),  # a creatinine / cystatin C reported with "<" or ">"
    "egfr_reason": pl.String(),  # null when computed
}

BASELINE: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "equation": pl.String(),
    "baseline_egfr": pl.Float64(),
    "baseline_date": pl.Date(),
    "baseline_n_values": pl.Int32(),
    "baseline_method": pl.String(),
    "baseline_reason": pl.String(),  # null when a baseline was found
}

SLOPES: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "equation": pl.String(),
    "n_values": pl.Int32(),
    "span_years": pl.Float64(),
    "slope_per_year": pl.Float64(),
    "intercept": pl.Float64(),
    "slope_se": pl.Float64(),
    "log_slope_pct_per_year": pl.Float64(),
    "eligible": pl.Boolean(),
    "ineligible_reason": pl.String(),
    "rapid_decline": pl.Boolean(),
}

TRANSITIONS: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "equation": pl.String(),
    "axis": pl.String(),  # "G" or "A"
    "transition_date": pl.Date(),
    "from_category": pl.String(),
    "to_category": pl.String(),
    "direction": pl.String(),  # "worsening" / "improvement"
}

ENDPOINTS: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "endpoint": pl.String(),
    "start_date": pl.Date(),
    "end_date": pl.Date(),
    "years": pl.Float64(),
    "event": pl.Int8(),  # 1 event, 0 censored
    "competing": pl.Int8(),  # 1 when follow-up ended by a competing event (death)
    "reason": pl.String(),  # which component fired, or why censored
}

STAGES: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "equation": pl.String(),  # null on the albuminuria axis
    "axis": pl.String(),  # "G" or "A"
    "stage_number": pl.Int32(),  # 0 before the first confirmed category
    "category": pl.String(),
    "start_date": pl.Date(),
    "start_years": pl.Float64(),
    "confirmed_date": pl.Date(),
    "end_date": pl.Date(),
    "end_years": pl.Float64(),
    "n_results": pl.Int32(),
    "is_last": pl.Boolean(),
}
"""Sustained KDIGO category stages (:func:`kidneycohort.kdigo.sustained_stages`)."""

UACR_BASELINE: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "baseline_uacr_mg_g": pl.Float64(),
    "baseline_date": pl.Date(),
    "baseline_n_values": pl.Int32(),
    "baseline_method": pl.String(),
    "baseline_reason": pl.String(),
}
"""Baseline UACR in mg/g (:func:`kidneycohort.baseline.uacr_baseline`)."""

BASELINE_CATEGORIES: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "equation": pl.String(),
    "baseline_egfr": pl.Float64(),
    "g_category": pl.String(),
    "g_reason": pl.String(),
    "baseline_uacr_mg_g": pl.Float64(),
    "a_category": pl.String(),
    "a_reason": pl.String(),
    "risk": pl.String(),  # KDIGO prognosis level of the G x A cell
}
"""KDIGO categories at baseline (:func:`kidneycohort.kdigo.baseline_categories`)."""

KFRE_AT_BASELINE: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "equation": pl.String(),
    "at_years": pl.Float64(),
    "age_years": pl.Float64(),
    "sex": pl.String(),
    "egfr": pl.Float64(),
    "egfr_years": pl.Float64(),
    "uacr_mg_g": pl.Float64(),
    "uacr_years": pl.Float64(),
    "kfre_2y": pl.Float64(),
    "kfre_5y": pl.Float64(),
    "kfre_region": pl.String(),
    "kfre_applicable": pl.Boolean(),
    "kfre_reason": pl.String(),
}
"""KFRE risk at the index date (:func:`kidneycohort.kfre.kfre_at_baseline`; plus the group)."""

# ---- model results (run folder ``models/``) ------------------------------------------
SURVIVAL_CURVES: Final[dict[str, pl.DataType]] = {
    "endpoint": pl.String(),
    "group": pl.String(),
    "years": pl.Float64(),
    "estimate": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
    "measure": pl.String(),  # "survival" or "cumulative_incidence"
}
"""Survival or cumulative-incidence curves per endpoint and group."""

AT_RISK: Final[dict[str, pl.DataType]] = {
    "endpoint": pl.String(),
    "group": pl.String(),
    "years": pl.Float64(),
    "n_at_risk": pl.Int64(),
}
"""Numbers at risk under the curves."""

HAZARD_RATIOS: Final[dict[str, pl.DataType]] = {
    "endpoint": pl.String(),
    "term": pl.String(),
    "subgroup": pl.String(),  # null for the whole cohort; "column=level" otherwise
    "hr": pl.Float64(),
    "hr_lower": pl.Float64(),
    "hr_upper": pl.Float64(),
    "p": pl.Float64(),
    "ph_p": pl.Float64(),  # proportional-hazards test of the term
    "events": pl.Int64(),  # events in the term's group (group terms only)
    "reference_events": pl.Int64(),  # events in the reference group (group terms only)
    "estimable": pl.Boolean(),  # the one estimability rule (models.survival)
    "reason": pl.String(),  # why not estimable (reason code), null when estimable
}
"""Cox hazard ratios per endpoint, term and subgroup; numbers null where not estimable."""

COMPETING_HAZARDS: Final[dict[str, pl.DataType]] = {
    "endpoint": pl.String(),
    "model": pl.String(),  # "subdistribution" (Fine–Gray) or "cause_specific" (Cox)
    "cause": pl.String(),  # event modelled: the endpoint or the competing event
    "term": pl.String(),
    "hr": pl.Float64(),
    "hr_lower": pl.Float64(),
    "hr_upper": pl.Float64(),
    "p": pl.Float64(),
    "log_hr": pl.Float64(),
    "se": pl.Float64(),
    "n_patients": pl.Int64(),
    "n_events": pl.Int64(),
    "estimable": pl.Boolean(),
    "reason": pl.String(),  # null when estimable; else one line saying why not
}
"""Fine–Gray and cause-specific hazard ratios per endpoint analysed with competing risks."""

DROPOUT_SLOPES: Final[dict[str, pl.DataType]] = {
    "model": pl.String(),  # "joint" (with the dropout model) or "mixed" (eGFR model alone)
    "contrast": pl.String(),
    "quantity": pl.String(),
    "estimate": pl.Float64(),
    "se": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
    "p": pl.Float64(),
    "estimable": pl.Boolean(),
    "reason": pl.String(),
    "note": pl.String(),
}
"""The joint model's slope contrasts beside the ordinary mixed model's."""

DROPOUT_SENSITIVITY: Final[dict[str, pl.DataType]] = {
    "analysis": pl.String(),  # "delta_adjusted" or "stated_value_at_kidney_failure"
    "delta": pl.Float64(),  # mL/min/1.73 m² per year since dropout (delta_adjusted)
    "step": pl.String(),  # grid / extension / bisection; observed / stated_value
    "contrast": pl.String(),
    "quantity": pl.String(),
    "estimate": pl.Float64(),
    "se": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
    "p": pl.Float64(),
    "tipping_point": pl.Float64(),  # the delta at which the conclusion changes, if any
    "estimable": pl.Boolean(),
    "reason": pl.String(),
    "note": pl.String(),
}
"""Sensitivity of the slope difference to dropout not at random, one row per analysis
step (each delta evaluated; the observed and the stated-value analysis)."""

COMPETING_TESTS: Final[dict[str, pl.DataType]] = {
    "endpoint": pl.String(),
    "cause": pl.String(),
    "groups": pl.String(),
    "test_statistic": pl.Float64(),
    "df": pl.Float64(),
    "p": pl.Float64(),
    "estimable": pl.Boolean(),
    "reason": pl.String(),
    "methods": pl.String(),  # the analysis' methods text (which hazard ratio is which)
}
"""Gray's test of the cumulative incidence curves per endpoint, with the methods text."""

INCIDENCE_RATES: Final[dict[str, pl.DataType]] = {
    "endpoint": pl.String(),
    "group": pl.String(),
    "events": pl.Int64(),
    "person_years": pl.Float64(),
    "rate_per_100py": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
}
"""Exact incidence rates per endpoint and group (unsuppressed; not for sharing)."""

KDIGO_GRID_COUNTS: Final[dict[str, pl.DataType]] = {
    "g_category": pl.String(),
    "a_category": pl.String(),
    "n": pl.Int64(),
    "risk": pl.String(),
}
"""Patients per KDIGO G x A cell at baseline, with the cell's prognosis level."""

TRANSITION_COUNTS: Final[dict[str, pl.DataType]] = {
    "axis": pl.String(),
    "from_category": pl.String(),
    "to_category": pl.String(),
    "n": pl.Int64(),
    "rate_per_100_person_years": pl.Float64(),
}
"""Transitions between sustained categories (G on the primary equation, and A)."""

SLOPE_SUMMARY: Final[dict[str, pl.DataType]] = {
    "model": pl.String(),  # "one_slope" or "two_slope"
    "contrast": pl.String(),  # a group, or "<group> - <reference>"
    "quantity": pl.String(),  # slope, acute_change, chronic_slope, total_slope_<T>y
    "estimate": pl.Float64(),
    "se": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
    "p": pl.Float64(),
}
"""Slope-model contrasts per group and between groups."""

TRAJECTORIES: Final[dict[str, pl.DataType]] = {
    "model": pl.String(),
    "group": pl.String(),
    "years": pl.Float64(),
    "mean": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
}
"""Model-based mean eGFR trajectories per group."""

MODEL_SLOPES: Final[dict[str, pl.DataType]] = {
    "patient_id": pl.String(),
    "group": pl.String(),
    "quantity": pl.String(),  # "chronic_slope" (two-slope model) or "slope"
    "estimate": pl.Float64(),  # mL/min/1.73 m2 per year, shrunken towards the group mean
    "se": pl.Float64(),
    "lower": pl.Float64(),
    "upper": pl.Float64(),
}
"""Per-patient model-based eGFR slopes (:meth:`kidneycohort.models.SlopeModel.patient_slopes`)."""

SLOPE_MODEL_FIT: Final[dict[str, pl.DataType]] = {
    "model": pl.String(),
    "engine": pl.String(),
    "structure": pl.String(),  # random-effects structure accepted (after any fallback)
    "converged": pl.Boolean(),
    "iterations": pl.Int64(),
    "gradient_norm": pl.Float64(),
    "log_likelihood": pl.Float64(),
    "n_patients": pl.Int64(),
    "n_values": pl.Int64(),
    "description": pl.String(),  # one sentence for the methods text
}
"""How the slope model was fitted (one row)."""

DAYS_PER_YEAR: Final = 365.25
