"""Design configs shared by the design tests: small, fast scenarios with known answers."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from tests._fixtures import REPO_ROOT

TRIAL_SCENARIO = REPO_ROOT / "synthetic" / "trial_two_arm.yaml"
QUARTERLY_DAYS = list(range(0, 1093, 91))  # 13 visits, day 0 to day 1092


def write_plain_base(folder: Path) -> str:
    """A base scenario whose slopes vary only by a random patient effect: no covariate
    effects on the slope, no intercept-slope correlation, no acceleration."""
    zero = {"age_per_10_years": 0.0, "female": 0.0, "diabetes": 0.0, "log2_uacr": 0.0}
    text = (
        f"extends: {TRIAL_SCENARIO.resolve()}\n"
        "trajectory:\n"
        f"  slope_effects: {zero}\n"
        f"  intercept_effects: {zero}\n"
        "  intercept_slope_correlation: 0.0\n"
        "  acceleration_mean: 0.0\n"
        "  acceleration_sd: 0.0\n"
    )
    path = folder / "plain_base.yaml"
    path.write_text(text, encoding="utf-8")
    return str(path)


def slope_design(
    base: str, *, sizes: list[int], trials: int, effect: float, null_trials: int | None = None
) -> dict[str, Any]:
    """One-slope model only, complete quarterly visits, no dropout, small creatinine CV."""
    return {
        "design": {
            "seed": 11,
            "sample_sizes": sizes,
            "trials": trials,
            "null_trials": trials if null_trials is None else null_trials,
            "trials_per_chunk": 25,
            "time_to_event_endpoints": [],
        },
        "scenario": {
            "base": base,
            "baseline_egfr": {"mean": 50, "sd": 8, "min": 35, "max": 65},
            "egfr_slope": {"mean": -2.0, "sd": 3.0},
            "treatment": {"chronic_effect": effect},
            "dropout": {
                "death_per_year_at_60": 0.0,
                "loss_to_followup_per_year": 0.0,
                "kidney_failure_gfr": 5.0,
            },
            "followup_years": 3.0,
            "visits": {"days": QUARTERLY_DAYS, "window_days": 0, "missed_fraction": 0.0},
            "measurement": {"biological_cv": 0.01, "analytical_cv": 0.0},
        },
        "slope_model": {"knot_years": None},
    }


def cox_design(*, sizes: list[int], trials: int, reference: int = 0) -> dict[str, Any]:
    """Time-to-event only (no slope model): a chronic effect without an acute one."""
    return {
        "design": {
            "seed": 5,
            "sample_sizes": sizes,
            "trials": trials,
            "null_trials": trials,
            "trials_per_chunk": 50,
            "slope_quantities": [],
            "time_to_event_endpoints": ["egfr_decline_40", "decline_40_or_kidney_failure"],
            "reference_patients": reference,
        },
        "scenario": {
            "baseline_egfr": {"mean": 45, "sd": 10, "min": 25, "max": 70},
            "egfr_slope": {"mean": -5.0, "sd": 3.0},
            "treatment": {"chronic_effect": 0.75},
            "followup_years": 3.0,
        },
    }


@pytest.fixture
def plain_base(tmp_path: Path) -> str:
    return write_plain_base(tmp_path)
