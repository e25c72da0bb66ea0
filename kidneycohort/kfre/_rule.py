"""The KFRE rule (config key ``kfre``): which baseline survivals, which values, which thresholds."""

from __future__ import annotations

from typing import Literal

from pydantic import Field, field_validator

from kidneycohort._rules import RuleModel

__all__ = ["KfreRule"]


class KfreRule(RuleModel):
    """How the Kidney Failure Risk Equation is applied at baseline and summarised."""

    region: Literal["north_american", "non_north_american"] = Field(
        "north_american",
        description="Baseline-survival set of the 2016 KFRE recalibration (Tangri 2016).",
    )
    lookback_days: float = Field(
        365.0,
        gt=0,
        description="How far before the index date the eGFR and UACR used may lie (days).",
    )
    thresholds_2y: list[float] = Field(
        default_factory=lambda: [0.10, 0.40],
        description="2-year risk thresholds counted in the summary table (fractions).",
    )
    thresholds_5y: list[float] = Field(
        default_factory=lambda: [0.03, 0.05],
        description="5-year risk thresholds counted in the summary table (fractions).",
    )

    @field_validator("thresholds_2y", "thresholds_5y")
    @classmethod
    def _fractions(cls, values: list[float]) -> list[float]:
        for value in values:
            if not 0 < value < 1:
                raise ValueError(f"{value} is not a fraction in (0, 1); write 10 % as 0.10")
        return values
