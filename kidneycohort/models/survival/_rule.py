"""The survival analyses' rule (config key ``survival``) and the layouts of their results."""

from __future__ import annotations

from pydantic import Field

from kidneycohort._rules import RuleModel

__all__ = ["AT_RISK_COLUMNS", "CURVE_COLUMNS", "SurvivalRule"]

CURVE_COLUMNS = ("group", "years", "estimate", "lower", "upper", "measure")


AT_RISK_COLUMNS = ("group", "years", "n_at_risk")


class CompetingRisksPart(RuleModel):
    """The competing-risks analyses of a study (config key ``survival.competing_risks``):
    Fine–Gray and cause-specific hazard ratios side by side, with Gray's test."""

    endpoints: list[str] | None = Field(
        None,
        description="Endpoints analysed with competing risks; null: every endpoint with at "
        "least one competing event (death before the endpoint).",
    )
    gray_test_rho: float = Field(
        0.0, ge=0, description="Weight exponent of Gray's test (0: log-rank type weights)."
    )


class SurvivalRule(RuleModel):
    """Options of the survival analyses of one study (config key ``survival``)."""

    group_column: str | None = Field(
        "group",
        description="Patients column naming the arm or exposure group; null for the whole cohort.",
    )
    reference_group: str | None = Field(
        None, description="Group every hazard ratio is relative to (default: first group, sorted)."
    )
    covariates: list[str] = Field(
        default_factory=list, description="Patients columns adjusted for in the Cox model."
    )
    strata: list[str] = Field(
        default_factory=list,
        description="Patients columns stratifying the Cox baseline hazard (e.g. randomisation strata).",
    )
    horizons_years: list[float] = Field(
        default_factory=lambda: [1.0, 2.0, 3.0],
        description="Times (years) at which survival / cumulative incidence is reported.",
    )
    at_risk_years: list[float] = Field(
        default_factory=lambda: [0.0, 1.0, 2.0, 3.0, 4.0, 5.0],
        description="Times (years) of the numbers-at-risk table under the curves.",
    )
    confidence: float = Field(0.95, gt=0, lt=1, description="Confidence level of intervals.")
    min_events_per_group: int = Field(
        1,
        ge=1,
        description="A group's hazard ratio is reported only when the group and the reference "
        "group each have at least this many events (otherwise 'not estimable').",
    )
    competing_risks: CompetingRisksPart | None = Field(
        None,
        description="Competing-risks regression beside the Cox models (Fine–Gray and "
        "cause-specific hazard ratios side by side, Gray's test); null: not run.",
    )
    subgroups: list[str] = Field(
        default_factory=list,
        description="Patients columns whose levels each get their own Cox hazard ratios "
        "(subgroup analysis shown in the forest plot); the overall estimate is always kept.",
    )
