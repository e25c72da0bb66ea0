"""Survival analysis of kidney endpoints: Kaplan–Meier, Cox, Aalen–Johansen.

Every model reads the time-to-event table (``schemas.ENDPOINTS``: one row per patient
and endpoint with ``years``, ``event`` and ``competing``) and, for the group and
covariates, the patients table. The estimators are lifelines'; this module selects the
rows, converts only the needed columns at the boundary, and lays the results out as
polars tables with the column names the figures and tables read:

- curves: ``group, years, estimate, lower, upper, measure``
- numbers at risk: ``group, years, n_at_risk``
- Cox: ``term, hr, hr_lower, hr_upper, p`` and the proportional-hazards check
  ``term, test_statistic, p`` (:func:`proportional_hazards_test`, the Grambsch–Therneau
  test, vectorised).
"""

from __future__ import annotations

from kidneycohort.models.survival._by_endpoint import (
    evaluable_rows,
    hazard_ratio_table,
    survival_curves_by_endpoint,
)
from kidneycohort.models.survival._cox import (
    CoxModel,
)
from kidneycohort.models.survival._curves import (
    CumulativeIncidence,
    KaplanMeier,
)
from kidneycohort.models.survival._data import (
    numbers_at_risk,
)
from kidneycohort.models.survival._efron import (
    VectorisedCoxPHFitter,
    efron_derivatives,
)
from kidneycohort.models.survival._estimability import (
    MAX_LOG_HR_SE,
    NOT_ESTIMABLE_REASONS,
    estimability_note,
)
from kidneycohort.models.survival._ph_test import (
    proportional_hazards_test,
    schoenfeld_residuals,
)
from kidneycohort.models.survival._rule import (
    CompetingRisksPart,
    SurvivalRule,
)

__all__ = [
    "MAX_LOG_HR_SE",
    "NOT_ESTIMABLE_REASONS",
    "CompetingRisksPart",
    "CoxModel",
    "CumulativeIncidence",
    "KaplanMeier",
    "SurvivalRule",
    "VectorisedCoxPHFitter",
    "efron_derivatives",
    "estimability_note",
    "evaluable_rows",
    "hazard_ratio_table",
    "numbers_at_risk",
    "proportional_hazards_test",
    "schoenfeld_residuals",
    "survival_curves_by_endpoint",
]
