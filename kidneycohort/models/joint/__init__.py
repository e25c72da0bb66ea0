"""Slope analysis under informative dropout: a shared-random-effects joint model of eGFR
and dropout (:class:`JointSlopeModel`), and sensitivity analyses of the slope difference
under missing-not-at-random dropout (delta adjustment with a tipping point; eGFR set to a
stated value at kidney failure).
"""

from __future__ import annotations

from kidneycohort.models.joint._analysis import (
    DropoutAnalysis,
    DropoutAnalysisRule,
    StatedValuePart,
    TippingPointPart,
    dropout_analysis,
)
from kidneycohort.models.joint._dropout_sensitivity import (
    DeltaAdjustedResult,
    StatedValueResult,
    delta_adjusted_slopes,
    stated_value_at_kidney_failure,
)
from kidneycohort.models.joint._model import JointSlopeModel
from kidneycohort.models.joint._rule import JointSlopeRule
from kidneycohort.models.joint._simulate import JointCohortTruth, simulate_joint_cohort

__all__ = [
    "DeltaAdjustedResult",
    "DropoutAnalysis",
    "DropoutAnalysisRule",
    "JointCohortTruth",
    "JointSlopeModel",
    "JointSlopeRule",
    "StatedValuePart",
    "StatedValueResult",
    "TippingPointPart",
    "delta_adjusted_slopes",
    "dropout_analysis",
    "simulate_joint_cohort",
    "stated_value_at_kidney_failure",
]
