"""The ADaM export rule (config key ``adam``)."""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from kidneycohort._rules import RuleModel
from kidneycohort.adam._bds import VisitWindow, default_visit_windows

__all__ = ["AdamRule"]


class AdamRule(RuleModel):
    """How the ADaM datasets are built and written (config key ``adam``)."""

    study_id: str | None = Field(None, description="STUDYID of every row; default `study.name`.")
    time_unit: Literal["days", "years"] = Field("days", description="Unit of ADTTE.AVAL.")
    count_start_day: bool = Field(
        True, description="In days, count the origin date as day 1 (AVAL = ADT - STARTDT + 1)."
    )
    visit_windows: list[VisitWindow] = Field(
        default_factory=default_visit_windows,
        description="ADEGFR analysis visits (name, target_day, first_day, last_day in study "
        "days, day 1 = index date); default every 3 months to month 36, +/- 45 days.",
    )
    paramcds: dict[str, str] = Field(
        default_factory=dict,
        description="Equation -> ADEGFR PARAMCD, for equations without a built-in code or "
        "to override one.",
    )
    files: bool = Field(
        True, description="Write ADSL, ADEGFR and ADTTE as XPT and Dataset-JSON to adam/."
    )
