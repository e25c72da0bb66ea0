"""Options of the joint slope-and-dropout model (:class:`JointSlopeRule`)."""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from kidneycohort._rules import RuleModel

__all__ = ["SUMMARY_COLUMNS", "JointSlopeRule"]

SUMMARY_COLUMNS = (
    "model",
    "contrast",
    "quantity",
    "estimate",
    "se",
    "lower",
    "upper",
    "p",
    "estimable",
    "reason",
    "note",
)

# reason code -> the one-line note printed beside a row that is not estimable
NOT_ESTIMABLE_NOTES: dict[str, str] = {
    "no_dropout_events": "no dropout event among the patients: the dropout model cannot be fitted",
    "too_few_events": "fewer dropout events than min_events: the dropout model is not estimable",
    "too_few_patients": "too few patients (or a group with too few) for the random effects",
    "not_converged": "the likelihood maximisation did not converge; no estimate is reported",
    "hessian_not_positive_definite": "the information matrix is not positive definite at "
    "the optimum; standard errors cannot be computed",
    "mixed_not_converged": "the mixed model alone could not be fitted",
    "not_fitted": "the joint model was not fitted (observed-data model only)",
}


class JointSlopeRule(RuleModel):
    """Options of the joint model of eGFR slope and dropout (:class:`JointSlopeModel`)."""

    knot_years: float | None = Field(
        None, gt=0, description="Knot of the acute/chronic slopes in years; null for one slope."
    )
    association: Literal["current_value", "slope"] = Field(
        "current_value",
        description="What links eGFR to the dropout hazard: the current true eGFR value, "
        "or the patient's random slope (chronic slope with a knot).",
    )
    baseline_hazard: Literal["piecewise", "weibull"] = Field(
        "piecewise", description="Baseline hazard of dropout: piecewise constant or Weibull."
    )
    hazard_pieces: int = Field(
        4, ge=1, le=12, description="Pieces of the piecewise-constant baseline hazard."
    )
    quadrature_nodes: int = Field(
        3, ge=1, le=31, description="Gauss-Hermite nodes per random effect."
    )
    group_column: str | None = Field(
        "group", description="Patients column naming the arm; null fits the cohort as one."
    )
    reference_group: str | None = Field(
        None, description="Group the differences are taken against (default: first, sorted)."
    )
    dropout_endpoints: tuple[str, ...] = Field(
        ("kidney_failure", "death"),
        min_length=1,
        description="Endpoints that end eGFR follow-up; dropout is the earliest of them.",
    )
    equation: str | None = Field(
        None, description="eGFR equation to model when the eGFR table holds several."
    )
    max_iterations: int = Field(500, gt=0, description="L-BFGS-B iterations per stage.")
    tolerance: float = Field(
        1e-6,
        gt=0,
        description="Largest Newton decrement (log-likelihood units) counted as converged.",
    )
    confidence: float = Field(0.95, gt=0, lt=1, description="Confidence level.")
    min_events: int = Field(5, ge=1, description="Fewest dropout events to fit the joint model.")
    min_patients_per_group: int = Field(
        5, ge=2, description="Fewest patients per group for the model to be estimable."
    )
    fixed_association: float | None = Field(
        None,
        description="Hold the association parameter at this value (0 for the separate "
        "models; used by the equivalence checks).",
    )
