"""eGFR slope models: linear mixed models with random intercept and slope(s) per patient.

Two models, one class (:class:`SlopeModel`):

- ``knot_years=None``: one slope, eGFR ~ group x time with a random intercept and a
  random slope per patient (unstructured 2 x 2 covariance), REML.
- ``knot_years=k`` (default 0.25 y, 3 months): a linear spline in time with a knot at
  ``k``, fixed effects per group for the intercept, the acute slope (0 to k) and the
  chronic slope (after k), random effects on all three (unstructured 3 x 3). It reports
  the acute change (baseline to knot), the chronic slope and the total slope over each
  horizon, per group and as differences between groups (delta method, 95 % CI, p).

The fitting is the package's exact engine (:func:`fit_mixed_model`): REML or ML for one
grouping level from per-patient blocks, covariance parameters profiled (Bates et al.,
J Stat Softw 2015, section 3); statsmodels ``MixedLM`` stays available as a cross-check
engine. Non-convergence follows a stated fallback sequence, each step announced by a
:class:`~kidneycohort.errors.StatisticalWarning`.
"""

from __future__ import annotations

from kidneycohort.models.mixed._engine import (
    MixedModelFit,
    fit_mixed_model,
    patient_blocks,
)
from kidneycohort.models.mixed._rule import (
    RandomEffects,
    SlopeModelRule,
)
from kidneycohort.models.mixed._slope_model import (
    SlopeModel,
)

__all__ = [
    "MixedModelFit",
    "RandomEffects",
    "SlopeModel",
    "SlopeModelRule",
    "fit_mixed_model",
    "patient_blocks",
]
