"""Scenario files: the typed model of a synthetic cohort and its loader.

A scenario is one YAML file (read with ``yaml.safe_load`` only) whose keys are the
fields of :class:`Scenario`. Every field has a default, so a scenario only states what
differs from a generic adult cohort. Validation errors become one-line
:class:`~kidneycohort.errors.ConfigError` messages naming the file and the dotted field,
with a "did you mean" for misspelt keys.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from kidneycohort import units
from kidneycohort._rules import error_facts, validate_config
from kidneycohort.errors import ConfigError, UnknownUnitError

__all__ = [
    "Arm",
    "Calendar",
    "CareSchedule",
    "CovariateEffects",
    "CreatinineLab",
    "CystatinLab",
    "DeathProcess",
    "Dirty",
    "Events",
    "Groups",
    "Inpatient",
    "KidneyFailureProcess",
    "Labs",
    "Population",
    "Range",
    "Scenario",
    "Site",
    "Trajectory",
    "UacrLab",
    "Visit",
    "VisitSchedule",
    "load_scenario",
]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Range(_Strict):
    """A normal distribution truncated to ``[min, max]``."""

    mean: float
    sd: float = Field(0.0, ge=0)
    min: float = -1e9
    max: float = 1e9

    @model_validator(mode="after")
    def _ordered(self) -> Range:
        if not self.min < self.max:
            raise ValueError(f"min ({self.min}) must be below max ({self.max})")
        if not self.min <= self.mean <= self.max:
            raise ValueError(f"mean ({self.mean}) must lie in [min, max]")
        return self


class Site(_Strict):
    """An invented site or health system and the units its laboratory reports in."""

    name: str
    weight: float = Field(1.0, gt=0)
    creatinine_unit: str = "mg/dL"
    cystatin_c_unit: str = "mg/L"
    uacr_unit: str = "mg/g"

    @model_validator(mode="after")
    def _known_units(self) -> Site:
        for analyte in units.ANALYTES:
            unit = getattr(self, f"{analyte}_unit")
            try:
                units.conversion_factor(analyte, unit)
            except UnknownUnitError as exc:
                raise ValueError(f"{analyte}_unit: {exc}") from None
        return self


class Arm(_Strict):
    """One group: a trial arm (randomised) or an exposure level (from diabetes status).

    ``acute_dip`` (mL/min/1.73 m2) is the mean early haemodynamic fall in true GFR,
    reached linearly over ``dip_days`` and then held (a negative value is an early
    rise; each patient's draw keeps the sign of the mean); ``slope_difference``
    (mL/min/1.73 m2/yr) is added to the chronic slope (positive = slower decline), with
    between-patient standard deviation ``slope_difference_sd``; ``uacr_log_change`` is
    the change in log UACR reached over the same ramp.
    """

    label: str
    fraction: float = Field(0.5, gt=0)
    acute_dip: float = 0.0
    acute_dip_sd: float = Field(0.0, ge=0)
    dip_days: float = Field(28.0, gt=0)
    slope_difference: float = 0.0
    slope_difference_sd: float = Field(0.0, ge=0)
    uacr_log_change: float = 0.0


class Groups(_Strict):
    """How patients get their ``group``: randomised by fraction, or by diabetes status."""

    assignment: Literal["randomised", "diabetes"] = "randomised"
    arms: tuple[Arm, ...] = (Arm(label="all", fraction=1.0),)

    @model_validator(mode="after")
    def _arms(self) -> Groups:
        labels = [a.label for a in self.arms]
        if len(set(labels)) != len(labels):
            raise ValueError(f"arm labels must be unique, got {labels}")
        if self.assignment == "diabetes" and len(self.arms) != 2:
            raise ValueError(
                "assignment 'diabetes' needs exactly two arms: [no diabetes, diabetes]"
            )
        return self


class Population(_Strict):
    """Baseline covariates of the enrolled patients."""

    age: Range = Range(mean=60, sd=12, min=18, max=90)
    female_fraction: float = Field(0.45, ge=0, le=1)
    diabetes_fraction: float = Field(0.3, ge=0, le=1)
    black_race_fraction: float = Field(0.0, ge=0, le=1)
    uacr_median_mg_g: float = Field(30.0, gt=0)
    uacr_median_ratio_diabetes: float = Field(2.5, gt=0)
    uacr_log_sd: float = Field(1.2, ge=0)
    height_cm_female: Range = Range(mean=162, sd=7, min=135, max=195)
    height_cm_male: Range = Range(mean=176, sd=7, min=145, max=210)
    bmi: Range = Range(mean=28, sd=5, min=16, max=55)


class CovariateEffects(_Strict):
    """Linear effects on the intercept or the slope, relative to the reference patient.

    The reference patient is 60 years old, male, without diabetes, with UACR 30 mg/g.
    """

    age_per_10_years: float = 0.0
    female: float = 0.0
    diabetes: float = 0.0
    log2_uacr: float = 0.0


class Trajectory(_Strict):
    """True GFR: correlated patient intercept and slope, optional acceleration, floor.

    .. math::

        \\mathrm{GFR}_i(t) = \\max\\{f,\\; b_{0i} + b_{1i} t + a_i t_+^2
        - D_i \\min(t_+/r, 1)\\}
    """

    intercept_mean: float = 60.0
    intercept_sd: float = Field(15.0, ge=0)
    intercept_min: float = 15.0
    intercept_max: float = 120.0
    slope_mean: float = -1.5
    slope_sd: float = Field(2.0, ge=0)
    intercept_slope_correlation: float = Field(0.0, ge=-0.99, le=0.99)
    intercept_effects: CovariateEffects = CovariateEffects()
    slope_effects: CovariateEffects = CovariateEffects()
    acceleration_mean: float = 0.0
    acceleration_sd: float = Field(0.0, ge=0)
    gfr_floor: float = Field(4.0, gt=0)
    total_slope_years: float = Field(3.0, gt=0)

    @model_validator(mode="after")
    def _bounds(self) -> Trajectory:
        if not self.gfr_floor < self.intercept_min < self.intercept_max:
            raise ValueError("need gfr_floor < intercept_min < intercept_max")
        return self


class Calendar(_Strict):
    """Calendar time: enrolment window, follow-up length and/or study closing date."""

    start_date: dt.date = dt.date(2020, 1, 1)
    enrolment_years: float = Field(1.0, ge=0)
    followup_years: float | None = Field(None, gt=0)
    end_date: dt.date | None = None
    lookback_years: float = Field(0.0, ge=0)

    @model_validator(mode="after")
    def _end(self) -> Calendar:
        if self.followup_years is None and self.end_date is None:
            raise ValueError("give followup_years or end_date (or both)")
        if self.end_date is not None and self.end_date <= self.start_date:
            raise ValueError("end_date must be after start_date")
        return self


class Visit(_Strict):
    """A scheduled visit: day relative to randomisation and the analytes drawn."""

    name: str
    day: int
    analytes: tuple[Literal["creatinine", "cystatin_c", "uacr"], ...] = ("creatinine",)


class VisitSchedule(_Strict):
    """Scheduled trial visits with jitter and missed visits (not screening/baseline)."""

    kind: Literal["visits"] = "visits"
    visits: tuple[Visit, ...]
    jitter_days: int = Field(7, ge=0)
    missed_visit_probability: float = Field(0.05, ge=0, lt=1)


class Inpatient(_Strict):
    """Hospital admissions with daily creatinine and transient AKI spikes."""

    admissions_per_year: float = Field(0.1, ge=0)
    admission_rate_ratio_per_10_years: float = Field(1.2, gt=0)
    admission_rate_ratio_per_10_below_60: float = Field(1.2, gt=0)
    mean_stay_days: float = Field(4.0, ge=1)
    aki_probability: float = Field(0.2, ge=0, le=1)
    aki_peak_creatinine_ratio_min: float = Field(1.5, ge=1)
    aki_peak_creatinine_ratio_max: float = Field(3.0, ge=1)


class CareSchedule(_Strict):
    """Irregular care-driven outpatient testing, more frequent at lower GFR."""

    kind: Literal["care"] = "care"
    outpatient_tests_per_year: float = Field(1.5, gt=0)
    rate_ratio_per_10_below_60: float = Field(1.3, gt=0)
    inpatient: Inpatient | None = Inpatient()


class CreatinineLab(_Strict):
    """Serum creatinine: equation inverted at the true GFR, plus within-person variation."""

    equation: str = "ckd_epi_2021_cr"
    biological_cv: float = Field(0.05, ge=0, lt=1)
    analytical_cv: float = Field(0.03, ge=0, lt=1)


class CystatinLab(_Strict):
    """Serum cystatin C: equation inverse, persistent non-GFR factor, variation."""

    equation: str = "ckd_epi_2012_cys"
    patient_fraction: float = Field(1.0, ge=0, le=1)
    per_sample_probability: float = Field(1.0, ge=0, le=1)
    non_gfr_log_sd: float = Field(0.08, ge=0)
    biological_cv: float = Field(0.04, ge=0, lt=1)
    analytical_cv: float = Field(0.03, ge=0, lt=1)


class UacrLab(_Strict):
    """Urine albumin/creatinine ratio: log-normal, its trend coupled to the GFR slope."""

    patient_fraction: float = Field(1.0, ge=0, le=1)
    per_sample_probability: float = Field(1.0, ge=0, le=1)
    within_person_log_sd: float = Field(0.35, ge=0)
    log_trend_per_slope_unit: float = -0.04


class Labs(_Strict):
    """The three analytes; cystatin C and UACR sampled for a subset when fractions < 1."""

    creatinine: CreatinineLab = CreatinineLab()
    cystatin_c: CystatinLab | None = CystatinLab()
    uacr: UacrLab | None = UacrLab()


class KidneyFailureProcess(_Strict):
    """Kidney failure with replacement therapy once true GFR is low enough."""

    gfr_threshold: Range = Range(mean=10, sd=2, min=5, max=15)
    probability: float = Field(0.85, ge=0, le=1)
    lag_years_mean: float = Field(0.25, ge=0)
    transplant_fraction: float = Field(0.15, ge=0, le=1)


class DeathProcess(_Strict):
    """Death hazard: Gompertz in age, rising at low true GFR and after kidney failure.

    .. math::

        h(t) = h_{60}\\, \\mathrm{HR}_{age}^{(\\mathrm{age}(t)-60)/10}\\,
        \\mathrm{HR}_{gfr}^{\\max(0, 60-\\mathrm{GFR}(t))/10}\\,
        \\mathrm{HR}_{kf}^{[t \\ge t_{kf}]}
    """

    rate_per_year_at_60: float = Field(0.01, ge=0)
    hazard_ratio_per_10_years: float = Field(1.8, gt=0)
    hazard_ratio_per_10_below_60: float = Field(1.3, gt=0)
    hazard_ratio_after_kidney_failure: float = Field(2.0, ge=1)


class Events(_Strict):
    """Kidney failure, death, loss to follow-up (administrative end: the calendar)."""

    kidney_failure: KidneyFailureProcess = KidneyFailureProcess()
    death: DeathProcess = DeathProcess()
    loss_to_followup_per_year: float = Field(0.02, ge=0)


class Dirty(_Strict):
    """Exact numbers of injected defects, for row-accounting checks.

    Lab-row defects fall on distinct clean rows of patients whose sex is kept; the
    ``missing_sex`` count is of patients.
    """

    unknown_unit: int = Field(0, ge=0)
    implausible_value: int = Field(0, ge=0)
    text_result: int = Field(0, ge=0)
    duplicate_export: int = Field(0, ge=0)
    orphan_patient: int = Field(0, ge=0)
    date_before_birth: int = Field(0, ge=0)
    missing_sex: int = Field(0, ge=0)


class Scenario(_Strict):
    """A whole synthetic cohort. See the scenario files in ``synthetic/`` for examples."""

    name: str = "synthetic cohort"
    description: str = ""
    seed: int = Field(1, ge=0)
    patients: int = Field(1000, ge=1)
    id_prefix: str = "P"
    noise_off: bool = False
    sites: tuple[Site, ...] = (Site(name="Site A"),)
    groups: Groups = Groups()
    population: Population = Population()
    trajectory: Trajectory = Trajectory()
    calendar: Calendar = Calendar(followup_years=3.0)
    schedule: VisitSchedule | CareSchedule = Field(
        default_factory=lambda: CareSchedule(), discriminator="kind"
    )
    labs: Labs = Labs()
    events: Events = Events()
    dirty: Dirty | None = None

    @model_validator(mode="after")
    def _consistent(self) -> Scenario:
        if isinstance(self.schedule, VisitSchedule):
            days = [v.day for v in self.schedule.visits]
            if 0 not in days:
                raise ValueError("schedule.visits: a visit at day 0 (randomisation) is needed")
            if days != sorted(days) or len(set(days)) != len(days):
                raise ValueError(f"schedule.visits: days must increase, got {days}")
        if len(set(s.name for s in self.sites)) != len(self.sites):
            raise ValueError("sites: names must be unique")
        return self

    def resolved(self, *, patients: int | None = None, seed: int | None = None) -> Scenario:
        """Return a copy with the command-line overrides applied (and, under
        ``noise_off``, every source of noise set to zero)."""
        update: dict[str, Any] = {}
        if patients is not None:
            if patients < 1:
                raise ConfigError(f"--patients: need at least 1, got {patients}")
            update["patients"] = patients
        if seed is not None:
            if seed < 0:
                raise ConfigError(f"--seed: need a non-negative integer, got {seed}")
            update["seed"] = seed
        out = self.model_copy(update=update)
        if out.noise_off:
            out = _without_noise(out)
        return out

    def to_plain(self) -> dict[str, Any]:
        """The scenario as plain YAML/JSON-ready values (dates as ISO strings)."""
        return self.model_dump(mode="json")


def _without_noise(s: Scenario) -> Scenario:
    labs = s.labs.model_copy(
        update={
            "creatinine": s.labs.creatinine.model_copy(
                update={"biological_cv": 0.0, "analytical_cv": 0.0}
            ),
            "cystatin_c": None
            if s.labs.cystatin_c is None
            else s.labs.cystatin_c.model_copy(
                update={"biological_cv": 0.0, "analytical_cv": 0.0, "non_gfr_log_sd": 0.0}
            ),
            "uacr": None
            if s.labs.uacr is None
            else s.labs.uacr.model_copy(update={"within_person_log_sd": 0.0}),
        }
    )
    schedule = s.schedule
    if isinstance(schedule, VisitSchedule):
        schedule = schedule.model_copy(update={"missed_visit_probability": 0.0})
    elif schedule.inpatient is not None:
        schedule = schedule.model_copy(
            update={"inpatient": schedule.inpatient.model_copy(update={"aki_probability": 0.0})}
        )
    return s.model_copy(update={"labs": labs, "schedule": schedule})


# ---- loading --------------------------------------------------------------------------


def load_scenario(source: str | Path | dict[str, Any] | Scenario) -> Scenario:
    """Read and validate a scenario from a YAML path, a mapping or a :class:`Scenario`.

    A file may start from another with ``extends: other.yaml`` (a path relative to the
    file); its own keys then replace the other's, nested mappings key by key.

    Raises
    ------
    ConfigError
        Missing or unreadable file, YAML that is not a mapping, an unknown key (with
        "did you mean"), or a value of the wrong type or range (naming the field).
    """
    if isinstance(source, Scenario):
        return source
    if isinstance(source, (str, Path)):
        data, where = _read_with_extends(Path(source), seen=())
    else:
        data, where = source, "scenario"
    if not isinstance(data, dict):
        raise ConfigError(
            f"{where}: expected a mapping of scenario keys, got {type(data).__name__}"
        )
    return validate_config(Scenario.model_validate, data, where, message=_one_line)


def _read_yaml(path: Path) -> Any:
    where = str(path)
    if not path.is_file():
        raise ConfigError(f"{where}: scenario file not found; give the path to a .yaml file")
    try:
        return yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        line = getattr(getattr(exc, "problem_mark", None), "line", None)
        at = f" at line {line + 1}" if line is not None else ""
        raise ConfigError(f"{where}: not valid YAML{at}; check indentation and quoting") from None


def _read_with_extends(path: Path, seen: tuple[Path, ...]) -> tuple[Any, str]:
    """Read ``path``; an ``extends: other.yaml`` key (relative to the file) is loaded
    first and this file's keys are merged into it, nested mappings key by key."""
    data = _read_yaml(path)
    where = str(path)
    if not isinstance(data, dict) or "extends" not in data:
        return data, where
    base_name = data.pop("extends")
    if not isinstance(base_name, str):
        raise ConfigError(f"{where}: field 'extends': expected a file name, got {base_name!r}")
    base_path = (path.parent / base_name).resolve()
    if base_path in seen or base_path == path.resolve():
        raise ConfigError(f"{where}: field 'extends': {base_name!r} extends itself in a cycle")
    base, _ = _read_with_extends(base_path, (*seen, path.resolve()))
    if not isinstance(base, dict):
        raise ConfigError(f"{base_path}: expected a mapping of scenario keys")
    return _merge(base, data), where


def _merge(base: dict[str, Any], top: dict[str, Any]) -> dict[str, Any]:
    out = dict(base)
    for key, value in top.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = value
    return out


def _one_line(exc: ValidationError, where: str) -> str:
    """``where: unknown key 'a.b' (did you mean ...)`` or ``where: field 'a.b': problem, got x``."""
    facts = error_facts(Scenario, exc)
    field = facts.path or "(top level)"
    if facts.kind == "extra_forbidden":
        return f"{where}: unknown key '{field}'{facts.suggestion}"
    got_text = "" if isinstance(facts.got, dict) else f", got {facts.got!r}"
    return f"{where}: field '{field}': {facts.message}{got_text}"
