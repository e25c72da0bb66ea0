"""The design config: scenario, candidate endpoints, sample sizes, trials, alpha, seed.

A design config is one YAML file with the sections below; it is validated by these
pydantic models (frozen, unknown keys refused) and every problem is one
:class:`~kidneycohort.errors.ConfigError` line naming the file and the dotted field.
The ``endpoints``, ``baseline`` and ``slope_model`` sections are the very option models
a study config uses, so a design is analysed the way the study will be.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from pydantic import Field, ValidationError, model_validator

from kidneycohort._rules import RuleModel, rule_error_message, validate_config
from kidneycohort.baseline import BaselineRule
from kidneycohort.endpoints import EndpointRule
from kidneycohort.errors import ConfigError
from kidneycohort.models.mixed import SlopeModelRule
from kidneycohort.pipeline.config import apply_overrides, read_yaml
from kidneycohort.pipeline.steps import EndpointsSection

__all__ = [
    "BaselineEgfr",
    "BaselineUacr",
    "DesignConfig",
    "DesignOutput",
    "DesignScenario",
    "DesignSection",
    "Dropout",
    "EgfrSlope",
    "Measurement",
    "Treatment",
    "VisitPlan",
    "default_design_endpoints",
    "load_design",
]


class BaselineEgfr(RuleModel):
    """True GFR at randomisation: a normal distribution truncated to the inclusion range."""

    mean: float = Field(description="Mean true GFR at randomisation (mL/min/1.73 m²).")
    sd: float = Field(0.0, ge=0, description="Between-patient standard deviation.")
    min: float = Field(15.0, gt=0, description="Lowest GFR enrolled (inclusion criterion).")
    max: float = Field(120.0, gt=0, description="Highest GFR enrolled (inclusion criterion).")

    @model_validator(mode="after")
    def _ordered(self) -> BaselineEgfr:
        if not self.min <= self.mean <= self.max or not self.min < self.max:
            raise ValueError(f"need min < max and mean in [min, max], got {self.model_dump()}")
        return self


class BaselineUacr(RuleModel):
    """Urine albumin/creatinine ratio at randomisation: log-normal."""

    median_mg_g: float = Field(gt=0, description="Median UACR (mg/g).")
    log_sd: float = Field(1.0, ge=0, description="Standard deviation of log UACR.")


class EgfrSlope(RuleModel):
    """Chronic eGFR slope of the control arm, between patients."""

    mean: float = Field(description="Mean chronic slope (mL/min/1.73 m² per year).")
    sd: float = Field(0.0, ge=0, description="Between-patient standard deviation.")


class Treatment(RuleModel):
    """The treatment's effect on true GFR, against the control arm."""

    acute_effect: float = Field(
        0.0,
        description="Mean early change in true GFR caused by treatment (mL/min/1.73 m²; "
        "negative = an acute dip, positive = an acute rise), reached over acute_days.",
    )
    acute_effect_sd: float = Field(
        0.0, ge=0, description="Between-patient standard deviation of the acute effect."
    )
    acute_days: float = Field(
        28.0, gt=0, description="Days over which the acute effect is reached (then held)."
    )
    chronic_effect: float = Field(
        0.0,
        description="Difference in chronic slope, treatment - control (mL/min/1.73 m² per "
        "year; positive = slower decline).",
    )
    chronic_effect_sd: float = Field(
        0.0, ge=0, description="Between-patient standard deviation of the chronic effect."
    )
    fraction: float = Field(
        0.5, gt=0, lt=1, description="Fraction of patients randomised to treatment."
    )


class Dropout(RuleModel):
    """Why follow-up ends early: death, kidney failure, loss to follow-up."""

    death_per_year_at_60: float | None = Field(
        None,
        ge=0,
        description="Death rate per year at age 60 and GFR >= 60 (null: the base scenario's).",
    )
    kidney_failure_gfr: float | None = Field(
        None,
        gt=0,
        description="Mean true GFR at which kidney failure starts (between-patient SD 20 % "
        "of it, truncated to 0.5-1.5 times it; null: the base scenario's).",
    )
    loss_to_followup_per_year: float | None = Field(
        None, ge=0, description="Rate of loss to follow-up per year (null: the base scenario's)."
    )


class VisitPlan(RuleModel):
    """Scheduled creatinine visits, days from randomisation (0 must be one of them)."""

    days: list[int] = Field(min_length=2, description="Visit days; must include 0 and increase.")
    window_days: int = Field(
        7, ge=0, description="Visits fall uniformly within +/- this many days."
    )
    missed_fraction: float = Field(
        0.05, ge=0, lt=1, description="Probability that a post-randomisation visit is missed."
    )

    @model_validator(mode="after")
    def _days(self) -> VisitPlan:
        if 0 not in self.days:
            raise ValueError(f"a visit at day 0 (randomisation) is needed, got {self.days}")
        if self.days != sorted(set(self.days)):
            raise ValueError(f"days must increase, got {self.days}")
        return self


class Measurement(RuleModel):
    """Within-person variation of measured creatinine (coefficients of variation)."""

    biological_cv: float = Field(0.05, ge=0, lt=1, description="Biological CV of creatinine.")
    analytical_cv: float = Field(0.03, ge=0, lt=1, description="Analytical (laboratory) CV.")


class DesignScenario(RuleModel):
    """The simulated trial population and treatment (config key ``scenario``).

    Starts from a synthetic scenario file (``base``; the package's invented two-arm
    trial by default) and replaces what is given here; a key left null keeps the base
    scenario's value. The base's arms are replaced by ``control`` and ``treatment``.
    """

    base: str | None = Field(
        None,
        description="Synthetic scenario file to start from (relative to the config); null "
        "uses the package's invented two-arm trial scenario.",
    )
    baseline_egfr: BaselineEgfr | None = Field(
        None,
        description="True GFR at randomisation (replaces the base's intercept and its "
        "covariate effects).",
    )
    baseline_uacr: BaselineUacr | None = Field(None, description="UACR at randomisation.")
    egfr_slope: EgfrSlope | None = Field(
        None,
        description="Chronic slope of the control arm (replaces the base's slope and its "
        "covariate effects).",
    )
    treatment: Treatment = Field(default_factory=Treatment, description="Treatment effects.")
    dropout: Dropout = Field(default_factory=Dropout, description="Death, kidney failure, loss.")
    accrual_years: float | None = Field(None, ge=0, description="Enrolment period (years).")
    followup_years: float | None = Field(
        None,
        gt=0,
        description="Follow-up after randomisation (years): of each patient, or with "
        "followup_until_close the minimum (that of the last patient enrolled).",
    )
    followup_until_close: bool = Field(
        False,
        description="Follow every patient until the study closes (accrual_years + "
        "followup_years after the first randomisation), so early patients are followed "
        "longer; list visits up to the longest follow-up. False: each patient for "
        "followup_years.",
    )
    visits: VisitPlan | None = Field(None, description="Visit schedule (creatinine only).")
    measurement: Measurement | None = Field(None, description="Creatinine variation.")


class DesignSection(RuleModel):
    """What to simulate: sizes, trials, alpha, seed and the analyses compared."""

    name: str = Field("trial design", description="Name of the design (report title).")
    description: str = Field("", description="Free text for the report.")
    seed: int = Field(ge=0, description="Root seed; every chunk's stream is spawned from it.")
    sample_sizes: list[int] = Field(
        min_length=1, description="Patients per trial (both arms), one power per size."
    )
    trials: int = Field(ge=1, description="Simulated trials per sample size under the effect.")
    null_trials: int | None = Field(
        None,
        ge=0,
        description="Simulated trials per sample size under the null scenario (no treatment "
        "effect; type I error); null means as many as trials, 0 skips the null scenario.",
    )
    alpha: float = Field(0.05, gt=0, lt=1, description="Two-sided significance level.")
    trials_per_chunk: int = Field(
        20,
        ge=1,
        description="Trials generated together and saved as one file (the unit of resuming "
        "and of the seed streams; changing it changes the draws).",
    )
    workers: int = Field(1, ge=1, description="Processes running chunks in parallel.")
    equation: str = Field("ckd_epi_2021_cr", description="eGFR equation analysed.")
    slope_quantities: list[str] | None = Field(
        None,
        description="Slope-model quantities analysed as endpoints (acute_change, "
        "chronic_slope, total_slope_<T>y); null = all of them.",
    )
    time_to_event_endpoints: list[str] | None = Field(
        None,
        description="Endpoint definitions analysed by Cox (names); null = all definitions.",
    )
    reference_patients: int = Field(
        0,
        ge=0,
        description="Patients of one large simulated trial under the treatment effect whose "
        "Cox log hazard ratio is the reference ('true') value for bias and coverage of the "
        "hazard ratios (under the null it is 0); 0 = none (their bias and coverage under "
        "the effect are then reported as not estimable).",
    )

    @model_validator(mode="after")
    def _sizes(self) -> DesignSection:
        if any(n < 4 for n in self.sample_sizes):
            raise ValueError(f"each sample size needs at least 4 patients, got {self.sample_sizes}")
        if len(set(self.sample_sizes)) != len(self.sample_sizes):
            raise ValueError(f"sample sizes must be distinct, got {self.sample_sizes}")
        return self

    @property
    def null_trial_count(self) -> int:
        """Trials per sample size under the null scenario."""
        return self.trials if self.null_trials is None else self.null_trials


class DesignOutput(RuleModel):
    """Where the design folder goes."""

    dir: str | None = Field(None, description="Output folder (relative to the config file).")


def default_design_endpoints() -> EndpointsSection:
    """Confirmed 30 / 40 / 57 % eGFR decline or kidney failure (three composites)."""
    definitions: list[dict[str, Any]] = [
        {"kind": "egfr_decline", "percent": 30},
        {"kind": "egfr_decline", "percent": 40},
        {"kind": "egfr_decline", "percent": 57},
        {"kind": "kidney_failure"},
    ]
    for percent in (30, 40, 57):
        definitions.append(
            {
                "kind": "composite",
                "name": f"decline_{percent}_or_kidney_failure",
                "paramcd": f"DEC{percent}KF",
                "components": [f"egfr_decline_{percent}", "kidney_failure"],
            }
        )
    return EndpointsSection.model_validate({"definitions": definitions, "rule": EndpointRule()})


def _trial_baseline() -> BaselineRule:
    # the trial recipe's baseline: mean of screening and randomisation values
    return BaselineRule(method="mean_last_n", n=2, window_start_days=-42, window_end_days=0)


class DesignConfig(RuleModel):
    """A whole design config (see the module docstring)."""

    design: DesignSection
    scenario: DesignScenario = Field(default_factory=DesignScenario)
    endpoints: EndpointsSection = Field(default_factory=default_design_endpoints)
    baseline: BaselineRule = Field(default_factory=_trial_baseline)
    slope_model: SlopeModelRule = Field(default_factory=SlopeModelRule)
    output: DesignOutput = Field(default_factory=DesignOutput)

    @model_validator(mode="after")
    def _names(self) -> DesignConfig:
        known = [d.name for d in self.endpoints.definitions]
        codes = [d.paramcd for d in self.endpoints.definitions]
        for what, values in (("name", known), ("paramcd", codes)):
            twice = sorted({v for v in values if values.count(v) > 1})
            if twice:
                raise ValueError(
                    f"endpoints.definitions: {what} {twice} used by more than one "
                    f"definition; give each its own {what}"
                )
        for d in self.endpoints.definitions:
            missing = [c for c in getattr(d, "components", []) if c not in known]
            if missing:
                raise ValueError(
                    f"endpoints.definitions: composite '{d.name}' names unknown "
                    f"components {missing} (definitions: {known})"
                )
        for name in self.design.time_to_event_endpoints or []:
            if name not in known:
                raise ValueError(
                    f"design.time_to_event_endpoints: '{name}' is not an endpoint "
                    f"definition (definitions: {known})"
                )
        horizons = [f"total_slope_{h:g}y" for h in self.slope_model.horizons_years]
        quantities = (
            ["acute_change", "chronic_slope", *horizons]
            if self.slope_model.knot_years is not None
            else ["slope"]
        )
        for name in self.design.slope_quantities or []:
            if name not in quantities:
                raise ValueError(
                    f"design.slope_quantities: '{name}' is not a quantity of the slope "
                    f"model (quantities: {quantities})"
                )
        return self

    def slope_quantity_names(self) -> list[str]:
        """The slope-model quantities analysed, in the model's order."""
        if self.slope_model.knot_years is None:
            every = ["slope"]
        else:
            horizons = [f"total_slope_{h:g}y" for h in self.slope_model.horizons_years]
            every = ["acute_change", "chronic_slope", *horizons]
        chosen = self.design.slope_quantities
        return every if chosen is None else [q for q in every if q in chosen]

    def time_to_event_names(self) -> list[str]:
        """The endpoint definitions analysed by Cox, in definition order."""
        every = [d.name for d in self.endpoints.definitions]
        chosen = self.design.time_to_event_endpoints
        return every if chosen is None else [n for n in every if n in chosen]


def _one_line(exc: ValidationError, where: str) -> str:
    return rule_error_message(where, exc, schema=DesignConfig)


def load_design(
    source: str | Path | dict[str, Any] | DesignConfig, overrides: list[str] | None = None
) -> tuple[DesignConfig, Path]:
    """Read and validate a design config; returns it with the folder relative paths
    are resolved against (the config file's folder, or the working folder).

    Raises
    ------
    ConfigError
        Missing or unreadable file, not a mapping, an unknown key (with "did you mean"),
        or a bad value, as one line naming the file and the field.
    """
    if isinstance(source, DesignConfig):
        return source, Path.cwd()
    if isinstance(source, dict):
        raw, where, folder = dict(source), "design config", Path.cwd()
    else:
        path = Path(source)
        raw, where, folder = read_yaml(path, what="design config"), str(path), path.parent
    if overrides:
        raw = apply_overrides(raw, overrides)
    if "design" not in raw:
        raise ConfigError(
            f"{where}: section 'design' missing; add design: with seed, sample_sizes and trials"
        )
    config = validate_config(DesignConfig.model_validate, raw, where, message=_one_line)
    return config, folder.resolve()
