"""Models of kidney outcomes: eGFR slope mixed models, survival models, incidence rates.

Model objects follow one pattern: configure (keyword arguments or a typed spec),
``fit(...)`` returns the model, fitted results end in ``_``, ``summary()`` returns a
polars table. Mixed models are fitted by the package's exact engine (statsmodels as a
cross-check), survival models by lifelines and the package's own vectorised code.
"""

from kidneycohort.models.competing import (
    CauseSpecificCox,
    CompetingRisks,
    CompetingRisksRule,
    FineGray,
    gray_test,
)
from kidneycohort.models.joint import (
    DropoutAnalysisRule,
    JointSlopeModel,
    JointSlopeRule,
    delta_adjusted_slopes,
    dropout_analysis,
    simulate_joint_cohort,
    stated_value_at_kidney_failure,
)
from kidneycohort.models.mixed import (
    MixedModelFit,
    SlopeModel,
    SlopeModelRule,
    fit_mixed_model,
    patient_blocks,
)
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
    "CauseSpecificCox",
    "CompetingRisks",
    "CompetingRisksRule",
    "CoxModel",
    "CumulativeIncidence",
    "DropoutAnalysisRule",
    "FineGray",
    "JointSlopeModel",
    "JointSlopeRule",
    "KaplanMeier",
    "MixedModelFit",
    "SlopeModel",
    "SlopeModelRule",
    "SurvivalRule",
    "delta_adjusted_slopes",
    "dropout_analysis",
    "exact_poisson_interval",
    "fit_mixed_model",
    "gray_test",
    "incidence_rates",
    "numbers_at_risk",
    "patient_blocks",
    "rate_difference",
    "rate_ratio",
    "simulate_joint_cohort",
    "stated_value_at_kidney_failure",
]
