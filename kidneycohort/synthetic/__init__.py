"""Synthetic kidney cohorts whose true answers are known.

A scenario file (YAML, see the top-level ``synthetic/`` folder and
:class:`~kidneycohort.synthetic.scenario.Scenario`) describes an invented trial or
health-record cohort. :func:`generate_cohort` draws every patient at once with numpy
and returns the canonical input tables plus the truth behind them;
:func:`write_cohort` writes them to a folder (``kidneycohort synth``).

Model, in brief: each patient's true GFR follows
:math:`g(t) = \\max\\{f, b_0 + b_1 t + a t_+^2 - D \\min(t_+/r, 1)\\}` (years ``t``
from index; correlated intercept and slope depending on age, sex, diabetes and baseline
albuminuria; optional acceleration; an acute dip ``D`` over ``r`` for a haemodynamically
acting treatment). Measured creatinine and cystatin C invert a published equation at the
true GFR (``kidneycohort.equations.solve_creatinine`` / ``solve_cystatin_c``) and add
within-person variation; UACR is log-normal with a trend coupled to the slope. Kidney
failure follows the true GFR reaching a patient threshold (with lag); death has a
Gompertz hazard rising at low GFR and after kidney failure; loss to follow-up is
exponential; the end of study is administrative. Setting ``noise_off: true`` removes
all measurement variation, AKI spikes, missed visits and report rounding.

Files written (``.parquet``, or ``.csv`` with ``--format csv``)
----------------------------------------------------------------
``patients``
    ``schemas.PATIENTS`` columns, then ``site`` and ``diabetes``.
``labs``
    ``schemas.RAW_LABS`` columns (``value`` is text as a laboratory exports it) and
    ``sample_id`` (Int64, the laboratory accession number; a duplicate export repeats it).
``events``
    ``schemas.EVENTS``: ``dialysis`` / ``transplant`` (kidney failure) and ``death``.
``truth/patients``
    ``patient_id``, ``group``, ``site``, ``sex``, ``age_at_index``, ``diabetes``,
    ``baseline_uacr_mg_g`` (true median), ``true_intercept`` (true GFR at index before
    any dip), ``true_acute_dip`` (mL/min/1.73 m2, fall reached by ``dip_days``),
    ``dip_days``, ``true_chronic_slope`` (mL/min/1.73 m2/yr), ``true_acceleration``
    (per yr^2, <= 0), ``true_total_slope`` (``(g(T) - g(0)) / T``), ``total_slope_years``
    (``T``), ``cystatin_c_non_gfr_factor``.
``truth/samples``
    One row per clean lab row: ``sample_id`` (joins to ``labs``), ``patient_id``,
    ``sample_date`` (the true one, even where a defect moved it), ``analyte``,
    ``setting``, ``visit`` (trial visit name, ``index`` for the EHR entry test),
    ``admission`` (inpatient episode number), ``years_from_index``, ``age_at_sample``
    (years from birth date), ``true_gfr``, ``aki_creatinine_multiplier`` (1 outside
    AKI), ``noise_free_value`` (equation inverse at the true GFR; for UACR the true
    median) and ``measured_value`` (with variation and AKI), both in the analyte's
    standard unit (``units.STANDARD_UNIT``); the reported text and unit are in ``labs``
    (and, for rows a defect changed, in ``truth/defects``). ``age_at_sample`` equals
    ``age_at_index + years_from_index``.
``truth/events``
    ``patient_id``, ``index_date``, ``kfrt_threshold_gfr``, ``threshold_reached_date``, ``threshold_reached_years``
    (when the true path first reaches that threshold, even after follow-up),
    ``kfrt_date``, ``kfrt_years``, ``kfrt_modality``, ``death_date``, ``death_years``,
    ``loss_to_followup_date``, ``end_of_study_date``, ``end_of_followup``,
    ``end_of_followup_years``, ``end_reason`` (``death`` / ``loss_to_followup`` /
    ``end_of_study``), ``true_gfr_below_15_date``, ``true_decline_40_date`` and
    ``true_decline_57_date`` (first date the true path falls to 60 % / 43 % of
    ``true_intercept``). Crossing dates are null when they fall after the last
    native-kidney sample time (kidney failure or end of follow-up).
``truth/defects``
    One row per injected defect: ``defect``, ``table``, ``patient_id`` (the true one),
    ``sample_id``, ``column`` (the column changed), ``original`` (its clean value, as
    text) and ``written`` (what was written instead).
``truth/defect_counts.json``, ``truth/scenario.yaml``
    Exact count of each defect kind; the scenario as resolved (overrides applied).

Dates follow the calendar: an event at ``t`` years falls on index date +
``floor(t * 365.25)`` days.
"""

from kidneycohort.synthetic.cohort import SyntheticCohort, generate_cohort
from kidneycohort.synthetic.scenario import Scenario, load_scenario
from kidneycohort.synthetic.writer import write_cohort

__all__ = ["Scenario", "SyntheticCohort", "generate_cohort", "load_scenario", "write_cohort"]
