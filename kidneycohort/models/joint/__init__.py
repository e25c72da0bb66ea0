"""Slope analysis under informative dropout: a shared-random-effects joint model of eGFR
and dropout (:class:`JointSlopeModel`), and sensitivity analyses of the slope difference
under missing-not-at-random dropout (delta adjustment with a tipping point; eGFR set to a
stated value at kidney failure).
"""

from __future__ import annotations

from kidneycohort.models.joint._model import JointSlopeModel
from kidneycohort.models.joint._rule import JointSlopeRule
from kidneycohort.models.joint._simulate import JointCohortTruth, simulate_joint_cohort

__all__ = [
    "JointCohortTruth",
    "JointSlopeModel",
    "JointSlopeRule",
    "simulate_joint_cohort",
]
