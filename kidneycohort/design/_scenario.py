"""From a design config to synthetic scenarios (effect and null) and the true effects.

The design does not have a generator of its own: its scenario keys are written onto a
:class:`~kidneycohort.synthetic.Scenario` (the package's invented two-arm trial unless
``scenario.base`` names another file), whose generator then draws every simulated
trial. The null scenario is the same with every treatment effect set to zero.
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path
from typing import Any

from scipy import stats

from kidneycohort.design._config import DesignConfig, DesignScenario
from kidneycohort.pipeline.config import builtin_config_dir
from kidneycohort.synthetic import Scenario, load_scenario

__all__ = [
    "CONTROL",
    "TREATMENT",
    "data_cut_date",
    "design_scenarios",
    "true_effects",
]

CONTROL = "control"
TREATMENT = "treatment"
_DEFAULT_BASE = "trial_two_arm.yaml"
_NO_EFFECTS = {"age_per_10_years": 0.0, "female": 0.0, "diabetes": 0.0, "log2_uacr": 0.0}


def _base_path(spec: DesignScenario, folder: Path) -> Path:
    if spec.base is not None:
        return (folder / spec.base).resolve()
    return builtin_config_dir().parent / "scenarios" / _DEFAULT_BASE


def _updates(spec: DesignScenario) -> dict[str, Any]:
    """Nested scenario keys the design replaces (only those it states)."""
    out: dict[str, Any] = {"trajectory": {}, "population": {}, "calendar": {}, "events": {}}
    # a stated distribution is the population's: the base's covariate effects on it go
    if spec.baseline_egfr is not None:
        b = spec.baseline_egfr
        out["trajectory"].update(
            intercept_mean=b.mean,
            intercept_sd=b.sd,
            intercept_min=b.min,
            intercept_max=b.max,
            intercept_effects=_NO_EFFECTS,
        )
    if spec.egfr_slope is not None:
        out["trajectory"].update(
            slope_mean=spec.egfr_slope.mean,
            slope_sd=spec.egfr_slope.sd,
            slope_effects=_NO_EFFECTS,
        )
    if spec.baseline_uacr is not None:
        out["population"].update(
            uacr_median_mg_g=spec.baseline_uacr.median_mg_g,
            uacr_log_sd=spec.baseline_uacr.log_sd,
            uacr_median_ratio_diabetes=1.0,
        )
    if spec.accrual_years is not None:
        out["calendar"]["enrolment_years"] = spec.accrual_years
    if spec.followup_years is not None:
        out["calendar"]["followup_years"] = spec.followup_years
    if spec.followup_until_close:
        out["calendar"]["end_date"] = "close"  # filled in once the calendar is known
    drop = spec.dropout
    if drop.loss_to_followup_per_year is not None:
        out["events"]["loss_to_followup_per_year"] = drop.loss_to_followup_per_year
    if drop.death_per_year_at_60 is not None:
        out["events"]["death"] = {"rate_per_year_at_60": drop.death_per_year_at_60}
    if drop.kidney_failure_gfr is not None:
        mean = drop.kidney_failure_gfr
        out["events"]["kidney_failure"] = {
            "gfr_threshold": {"mean": mean, "sd": 0.2 * mean, "min": 0.5 * mean, "max": 1.5 * mean}
        }
    if spec.visits is not None:
        v = spec.visits
        out["schedule"] = {
            "kind": "visits",
            "jitter_days": v.window_days,
            "missed_visit_probability": v.missed_fraction,
            "visits": [
                {"name": f"day_{d}".replace("-", "minus_"), "day": d, "analytes": ["creatinine"]}
                for d in v.days
            ],
        }
    if spec.measurement is not None:
        out["labs_creatinine"] = spec.measurement.model_dump()
    return out


def _merge(base: dict[str, Any], top: dict[str, Any]) -> dict[str, Any]:
    merged = dict(base)
    for key, value in top.items():
        if isinstance(value, dict) and isinstance(merged.get(key), dict) and key != "schedule":
            merged[key] = _merge(merged[key], value)
        else:
            merged[key] = value
    return merged


def _arms(spec: DesignScenario, null: bool) -> dict[str, Any]:
    t = spec.treatment
    treated: dict[str, Any] = {"label": TREATMENT, "fraction": t.fraction, "dip_days": t.acute_days}
    if not null:
        treated.update(
            acute_dip=-t.acute_effect,
            acute_dip_sd=t.acute_effect_sd,
            slope_difference=t.chronic_effect,
            slope_difference_sd=t.chronic_effect_sd,
        )
    return {
        "assignment": "randomised",
        "arms": [{"label": CONTROL, "fraction": 1.0 - t.fraction}, treated],
    }


def design_scenarios(config: DesignConfig, folder: Path) -> dict[str, Scenario]:
    """``{"effect": ..., "null": ...}``: the scenario with the treatment effects and the
    same scenario without them. Measurement stays creatinine only (no cystatin C or
    UACR samples: the analyses do not read them) and no export defects are injected."""
    base = load_scenario(_base_path(config.scenario, folder)).to_plain()
    updates = _updates(config.scenario)
    creatinine = updates.pop("labs_creatinine", None)
    plain = _merge(base, {k: v for k, v in updates.items() if v != {}})
    plain["labs"] = {
        "creatinine": {**plain["labs"]["creatinine"], **(creatinine or {})},
        "cystatin_c": None,
        "uacr": None,
    }
    plain.update(dirty=None, noise_off=False, name=config.design.name, id_prefix="T")
    calendar = plain["calendar"]
    if calendar.get("end_date") == "close":  # every patient followed until the study closes
        years = calendar["lookback_years"] + calendar["enrolment_years"]
        years += calendar["followup_years"] or 0.0
        start = dt.date.fromisoformat(str(calendar["start_date"]))
        calendar["end_date"] = (start + dt.timedelta(days=math.ceil(years * 365.25))).isoformat()
        calendar["followup_years"] = None
    where = f"scenario (from {_base_path(config.scenario, folder).name})"
    out = {}
    for label, null in (("effect", False), ("null", True)):
        data = {**plain, "groups": _arms(config.scenario, null)}
        try:
            out[label] = load_scenario(data)
        except Exception as exc:  # ConfigError with the scenario's own field name
            raise type(exc)(f"{where}: {exc}") from None
    return out


def data_cut_date(scenario: Scenario) -> dt.date:
    """A data cut after every patient's end of follow-up (follow-up ends by itself)."""
    cal = scenario.calendar
    if cal.end_date is not None:
        return cal.end_date
    years = cal.lookback_years + cal.enrolment_years + (cal.followup_years or 0.0)
    jitter = getattr(scenario.schedule, "jitter_days", 0)
    return cal.start_date + dt.timedelta(days=math.ceil(years * 365.25) + jitter + 1)


def _clipped_mean(mean: float, sd: float) -> float:
    """Mean of a normal draw clipped at zero on the side of its mean (the generator's
    rule for the acute effect): E[max(X, 0)] for mean >= 0, E[min(X, 0)] otherwise."""
    if sd == 0:
        return mean
    m = abs(mean)
    value = m * stats.norm.cdf(m / sd) + sd * stats.norm.pdf(m / sd)
    return math.copysign(value, mean) if mean != 0 else value


def true_effects(config: DesignConfig) -> dict[str, float]:
    """True treatment - control differences of the slope-model quantities in the
    scenario's mean GFR path (before the GFR floor, kidney failure and dropout).

    With acute effect :math:`A` (mean of the clipped draw) reached over :math:`r`
    years and chronic effect :math:`\\Delta`: chronic slope :math:`\\Delta`; change to
    the knot :math:`k` is :math:`A \\min(k/r, 1)`; total slope over :math:`T \\ge r`
    is :math:`\\Delta + A / T`. Acceleration and covariate effects are shared by both
    arms and cancel.
    """
    t = config.scenario.treatment
    acute = -_clipped_mean(-t.acute_effect, t.acute_effect_sd)
    ramp = t.acute_days / 365.25
    out: dict[str, float] = {}
    knot = config.slope_model.knot_years
    if knot is None:
        out["slope"] = math.nan  # a one-slope model of a dipping path has no single truth
        if t.acute_effect == 0:
            out["slope"] = t.chronic_effect
        return out
    out["acute_change"] = acute * min(knot / ramp, 1.0)
    out["chronic_slope"] = t.chronic_effect
    for horizon in config.slope_model.horizons_years:
        change = acute * min(horizon / ramp, 1.0)
        out[f"total_slope_{horizon:g}y"] = t.chronic_effect + change / horizon
    return out
