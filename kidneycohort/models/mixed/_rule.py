"""The slope model's rule (config key ``slope_model``) and the layouts of its results."""

from __future__ import annotations

from typing import Literal

from pydantic import Field, model_validator

from kidneycohort._rules import RuleModel

__all__ = ["TRAJECTORY_COLUMNS", "RandomEffects", "SlopeModelRule"]

RandomEffects = Literal["unstructured", "diagonal", "intercept_and_slope", "intercept"]


SUMMARY_COLUMNS = ("contrast", "quantity", "estimate", "se", "lower", "upper", "p")


TRAJECTORY_COLUMNS = ("group", "years", "mean", "lower", "upper")


class SlopeModelRule(RuleModel):
    """Options of the eGFR slope model of one study (config key ``slope_model``)."""

    knot_years: float | None = Field(
        0.25,
        gt=0,
        description="Knot of the two-slope model in years (3 months = 0.25); null for one slope.",
    )
    horizons_years: list[float] = Field(
        default_factory=lambda: [2.0, 3.0],
        description="Horizons (years) of the total slope, each longer than the knot.",
    )
    covariates: list[str] = Field(
        default_factory=list,
        description="Patients columns adjusted for (centred, so trajectories are at their mean).",
    )
    group_column: str | None = Field(
        "group",
        description="Patients column naming the arm or group; null fits the whole cohort as one.",
    )
    reference_group: str | None = Field(
        None, description="Group the differences are taken against (default: first, sorted)."
    )
    equation: str | None = Field(
        None, description="eGFR equation to model when the eGFR table holds several."
    )
    max_years: float | None = Field(
        None, gt=0, description="Leave out values after this time (reported as after_max_years)."
    )
    random_effects: RandomEffects = Field(
        "unstructured",
        description="Random-effects structure to try first; simpler ones follow on non-convergence.",
    )
    confidence: float = Field(0.95, gt=0, lt=1, description="Confidence level.")
    engine: Literal["exact", "statsmodels"] = Field(
        "exact",
        description="Fitting engine: the exact per-patient-block REML engine of this package "
        "(fast, memory linear in patients), or statsmodels MixedLM (for cross-checks).",
    )
    trajectory_step_years: float = Field(
        0.25, gt=0, description="Spacing (years) of the model-based mean trajectories."
    )

    @model_validator(mode="after")
    def _horizons_after_knot(self) -> SlopeModelRule:
        for horizon in self.horizons_years:
            if horizon <= 0 or (self.knot_years is not None and horizon <= self.knot_years):
                raise ValueError(
                    f"horizons_years: {horizon} must be positive and after the knot "
                    f"({self.knot_years} years)"
                )
        return self
