"""Competing risks: Fine–Gray subdistribution hazards, cause-specific Cox, Gray's test.

In kidney cohorts death (and, for a decline endpoint, kidney failure) ends follow-up
before the endpoint can happen. Two hazard ratios answer different questions and are
reported side by side (Austin, Lee & Fine, Circulation 2016;133:601-609,
doi:10.1161/CIRCULATIONAHA.115.017719):

- the **subdistribution** hazard ratio (Fine & Gray 1999) compares the cumulative
  incidence of the event, with the competing event kept in the risk set;
- the **cause-specific** hazard ratio (Cox, competing events censored) compares the rate
  of the event among patients still free of both.

:class:`CompetingRisks` runs both, Gray's test of the cumulative incidence curves and
the Aalen–Johansen curves per group, and words the methods text. Whatever cannot be
estimated is a row with ``estimable = False`` and a reason, never a number.
"""

from __future__ import annotations

from kidneycohort.models.competing._analysis import CURVE_COLUMNS, CompetingRisks
from kidneycohort.models.competing._by_endpoint import (
    COMPETING_HAZARDS,
    COMPETING_TESTS,
    competing_risks_tables,
)
from kidneycohort.models.competing._cause_specific import (
    CauseSpecificCox,
    CoxFit,
    cause_specific_arrays,
)
from kidneycohort.models.competing._data import CompetingRisksRule
from kidneycohort.models.competing._fine_gray import (
    FineGray,
    FineGrayFit,
    censoring_survival,
    fine_gray_arrays,
)
from kidneycohort.models.competing._gray_test import (
    GrayTestResult,
    aalen_johansen_by_group,
    gray_test,
)
from kidneycohort.models.competing._results import HAZARD_COLUMNS

__all__ = [
    "COMPETING_HAZARDS",
    "COMPETING_TESTS",
    "CURVE_COLUMNS",
    "HAZARD_COLUMNS",
    "CauseSpecificCox",
    "CompetingRisks",
    "CompetingRisksRule",
    "CoxFit",
    "FineGray",
    "FineGrayFit",
    "GrayTestResult",
    "aalen_johansen_by_group",
    "cause_specific_arrays",
    "censoring_survival",
    "competing_risks_tables",
    "fine_gray_arrays",
    "gray_test",
]
