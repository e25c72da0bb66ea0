"""Report options (config key ``report``): the headline results and display labels."""

from __future__ import annotations

from pydantic import Field

from kidneycohort._rules import RuleModel

__all__ = ["ReportRule"]


class ReportRule(RuleModel):
    """What the report leads with, and how codes read (config key ``report``)."""

    primary_endpoint: str | None = Field(
        None,
        description="Endpoint name of the headline result; default: the first endpoint "
        "definition of the config.",
    )
    primary_slope: str | None = Field(
        None,
        description="Slope-model quantity of the headline contrast (e.g. 'chronic_slope', "
        "'total_slope_3y'); default: the chronic slope when the model has one, else the "
        "model's first quantity.",
    )
    labels: dict[str, str] = Field(
        default_factory=dict,
        description="Display labels of codes: endpoint names, groups, equation ids "
        "(e.g. {active: Active drug}); used in the report and the figures.",
    )
