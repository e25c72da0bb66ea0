"""KDIGO 2012 categories, the prognosis grid, sustained categories, transitions, progression.

Categories (KDIGO 2012 CKD guideline, Tables 5 and 6 and Figure 2; unchanged in 2024)
---------------------------------------------------------------------------------------
GFR (mL/min/1.73 m2): G1 >= 90, G2 60-89, G3a 45-59, G3b 30-44, G4 15-29, G5 < 15.
Albuminuria (UACR): A1 < 30 mg/g (< 3 mg/mmol), A2 30-300 mg/g (3-30 mg/mmol),
A3 > 300 mg/g (> 30 mg/mmol). The bounds, the prognosis grid and the defaults below that
come from the guideline are registered with their provenance in
:mod:`kidneycohort.provenance` (ids ``kdigo.*``).

**Non-integer eGFR.** The guideline writes the G ranges with integers (60-89) but
defines them by thresholds: CKD is "GFR < 60", G1 is ">= 90", G5 "< 15". We apply
the thresholds to the unrounded value, so each category is a half-open interval
``[lower, next lower)``: 59.5 is **G3a** (it is below 60), 89.99 is G2, 90 is G1.
Rounding first would make the category depend on the reporting precision of the
laboratory or equation, and 59.5 would become "no reduced GFR" although it is below the
guideline's CKD threshold. Values are compared after rounding to 9 decimal places only
to remove floating-point noise (an eGFR computed as 59.9999999999 is 60).

**Albuminuria.** The boundaries 30 and 300 mg/g belong to A2 ("30-300"); A3 is strictly
above 300. The mg/mmol thresholds (3 and 30) are the guideline's own rounded
equivalents, not exact conversions (3 mg/mmol = 26.5 mg/g), so a result *reported* in
mg/mmol is classified on the mg/mmol thresholds by default
(``SustainRule.albuminuria_thresholds="as_reported"``); ``"mg/g"`` classifies every
result on its mg/g value.

Sustained categories ("stages")
-------------------------------
CKD requires abnormality for more than 3 months, so a single low value is not a
category change. A result is **confirmed** when the first usable result of the same
patient, equation and axis at least ``confirm_after_days`` later (default 90) is in the
same category (and, optionally, at most ``confirm_within_days`` later). Results in
between are not consulted. Confirmed results, in time order, form the sustained
sequence; consecutive confirmed results of one category make one stage.

:func:`sustained_stages` returns one row per stage:

============== ======== =====================================================================
column         type     meaning
============== ======== =====================================================================
patient_id     str
equation       str      eGFR equation; null on the albuminuria axis
axis           str      ``"G"`` or ``"A"``
stage_number   i32      0 = the period before the first confirmed category (category null);
                        1, 2, ... the sustained stages in time order
category       str      G1 ... G5 or A1 ... A3 (null for stage 0)
start_date     date     date of the first result of the stage (its onset)
start_years    f64      years from index of that result
confirmed_date date     date of the result that confirmed the onset
end_date       date     start of the next stage, or the last usable result for the last stage
end_years      f64      as ``end_date``, in years from index
n_results      i32      usable results from start to end (end excluded unless last stage)
is_last        bool     the stage in force at the last usable result
============== ======== =====================================================================

From the stages come the transitions (``schemas.TRANSITIONS``), the transition count
matrix with rates per 100 person-years spent in the "from" category, and the time to
first worsening from index.

Progression (KDIGO 2012, recommendation 2.1.3)
----------------------------------------------
A **certain drop** is a drop in G category accompanied by a decline of at least 25 % from
baseline eGFR; here the first result after index that is confirmed in a G category worse
than the baseline category and is at most 75 % of the baseline value. **Rapid
progression** is a sustained decline of more than 5 mL/min/1.73 m2/yr, taken from
:func:`kidneycohort.slopes.egfr_slopes` (``rapid_decline``).

References
----------
.. [1] Kidney Disease: Improving Global Outcomes (KDIGO) CKD Work Group. KDIGO 2012
   clinical practice guideline for the evaluation and management of chronic kidney
   disease. Kidney Int Suppl 2013;3:1-150. doi:10.1038/kisup.2012.73
.. [2] KDIGO 2024 clinical practice guideline for the evaluation and management of
   chronic kidney disease. Kidney Int 2024;105(4S):S117-S314.
"""

from __future__ import annotations

from kidneycohort.kdigo._baseline import (
    BASELINE_CATEGORIES,
    BASELINE_CATEGORY_REASONS,
    KdigoGridRule,
    baseline_categories,
    kdigo_grid_counts,
)
from kidneycohort.kdigo._categories import (
    A_CATEGORIES,
    A_UPPER_BOUNDS,
    G_CATEGORIES,
    G_LOWER_BOUNDS,
    RISK_GRID,
    RISK_LEVELS,
    albuminuria_category,
    albuminuria_category_expr,
    gfr_category,
    gfr_category_expr,
    kdigo_risk_expr,
    risk_grid,
)
from kidneycohort.kdigo._progression import (
    ckd_status,
    kdigo_progression,
)
from kidneycohort.kdigo._sustained import (
    STAGES,
    SustainRule,
    category_results,
    sustained_stages,
)
from kidneycohort.kdigo._transitions import (
    time_to_first_worsening,
    transition_matrix,
    transitions,
)

__all__ = [
    "A_CATEGORIES",
    "A_UPPER_BOUNDS",
    "BASELINE_CATEGORIES",
    "BASELINE_CATEGORY_REASONS",
    "G_CATEGORIES",
    "G_LOWER_BOUNDS",
    "RISK_GRID",
    "RISK_LEVELS",
    "STAGES",
    "KdigoGridRule",
    "SustainRule",
    "albuminuria_category",
    "albuminuria_category_expr",
    "baseline_categories",
    "category_results",
    "ckd_status",
    "gfr_category",
    "gfr_category_expr",
    "kdigo_grid_counts",
    "kdigo_progression",
    "kdigo_risk_expr",
    "risk_grid",
    "sustained_stages",
    "time_to_first_worsening",
    "transition_matrix",
    "transitions",
]
