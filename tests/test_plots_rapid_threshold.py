"""The rapid-decline line sits at a negative slope whatever sign the config uses."""

from __future__ import annotations

from kidneycohort.plots import RAPID_DECLINE_PER_YEAR
from kidneycohort.plots._write import rapid_decline_threshold
from kidneycohort.slopes import SlopeRule


def test_config_rate_of_fall_becomes_a_negative_slope() -> None:
    # KDIGO 2012: rapid progression is a sustained fall of more than 5 mL/min/1.73 m2/yr
    assert rapid_decline_threshold({"slopes": {"rapid_decline_per_year": 5}}) == -5.0
    assert rapid_decline_threshold({"slopes": {"rapid_decline_per_year": -4.0}}) == -4.0
    assert rapid_decline_threshold({}) == RAPID_DECLINE_PER_YEAR == -5.0


def test_default_matches_the_slope_rule() -> None:
    assert rapid_decline_threshold({}) == -SlopeRule().rapid_decline_per_year
