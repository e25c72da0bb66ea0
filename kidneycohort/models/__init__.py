"""Models of kidney outcomes: eGFR slope mixed models, survival models, incidence rates.

Model objects follow one pattern: configure (keyword arguments or a typed spec),
``fit(...)`` returns the model, fitted results end in ``_``, ``summary()`` returns a
polars table. The fitting is done by statsmodels and lifelines.
"""

from kidneycohort.models.mixed import SlopeModel, SlopeModelRule
from kidneycohort.models.rates import (
    exact_poisson_interval,
    incidence_rates,
    rate_difference,
    rate_ratio,
)
from kidneycohort.models.survival import (
    CoxModel,
    CumulativeIncidence,
    KaplanMeier,
    SurvivalRule,
    numbers_at_risk,
)

__all__ = [
    "CoxModel",
    "CumulativeIncidence",
    "KaplanMeier",
    "SlopeModel",
    "SlopeModelRule",
    "SurvivalRule",
    "exact_poisson_interval",
    "incidence_rates",
    "numbers_at_risk",
    "rate_difference",
    "rate_ratio",
]
