"""Kidney endpoints: confirmed eGFR decline, eGFR below a threshold, kidney failure,
death, kidney death and composites, as one time-to-event row per patient per endpoint.

Every endpoint is a typed definition (a pydantic model with a ``kind`` field) that a
study config fills under the same key names; the confirmation and timing rules are
their own model, :class:`EndpointRule`, with stated defaults. One call,
:func:`derive_endpoints`, turns a list of definitions into the ``endpoints`` table of
:data:`kidneycohort.schemas.ENDPOINTS`.

Time zero is the patient's ``index_date``. Follow-up ends at the earliest of the data
cut, the patient's ``end_of_followup`` and death. eGFR values on or after the onset of
kidney failure (chronic dialysis, transplant, ``kfrt_date``) and values inside a short
(acute) dialysis episode do not measure native kidney function and are never used
for decline detection [1]_.

References
----------
.. [1] Levey AS, Inker LA, Matsushita K, et al. GFR decline as an end point for
   clinical trials in CKD: a scientific workshop sponsored by the National Kidney
   Foundation and the US Food and Drug Administration. Am J Kidney Dis.
   2014;64(6):821-835. doi:10.1053/j.ajkd.2014.07.030
.. [2] Coresh J, Turin TC, Matsushita K, et al. Decline in estimated glomerular
   filtration rate and subsequent risk of end-stage renal disease and mortality.
   JAMA. 2014;311(24):2518-2531. doi:10.1001/jama.2014.6634
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Iterable, Mapping, Sequence
from typing import Annotated, Any, Final, Literal

import numpy as np
import polars as pl
from pydantic import BaseModel, Field, TypeAdapter, ValidationError, model_validator

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, conform, require_columns, to_polars
from kidneycohort._rules import RuleModel, first_error, rule_error_message, validate_config
from kidneycohort.errors import ConfigError, InputDataError, did_you_mean

logger = logging.getLogger(__name__)

__all__ = [
    "Composite",
    "Death",
    "EgfrBelow",
    "EgfrDecline",
    "EndpointDefinition",
    "EndpointRule",
    "KidneyDeath",
    "KidneyFailure",
    "derive_endpoints",
    "parse_endpoint_definitions",
    "usual_kidney_composite",
]

# A fall that equals the threshold percentage to within floating-point rounding counts
# (100 -> 60 is a 40 % fall even if (100 - 60) / 100 * 100 rounds to 39.999...).
_PERCENT_TOLERANCE: Final = 1e-9
# Composite integer sort key: patient code in the high bits, day number in the low bits.
_DAY_SLOTS: Final = np.int64(2**32)
_DAY_OFFSET: Final = np.int64(2**31)

# Why a patient has no time-to-event row values (event, end_date, years are null).
NOT_EVALUABLE_REASONS: Final = {
    "no_index_date": "the patient has no index_date",
    "index_after_data_cut": "the index date is after the data cut",
    "end_of_followup_before_index": "end_of_followup is before the index date",
    "death_before_index": "death is dated before the index date",
    "kidney_failure_before_index": "kidney failure began before the index date (prevalent)",
    "no_baseline": "no baseline eGFR for the study equation",
}


# ---------------------------------------------------------------------------- models
class _ConfigModel(RuleModel):
    """Frozen, typo-proof config model whose bad values raise :class:`ConfigError`."""

    @classmethod
    def _error_message(cls, exc: ValidationError) -> str:
        return _one_line(exc, cls.__name__)


class EndpointRule(_ConfigModel):
    """Confirmation and timing rules of lab-based endpoints (and what counts as dialysis).

    Defaults are the common practice of kidney trials' analysis plans; each one is a
    choice the plan must state [1]_.

    References
    ----------
    .. [1] Levey AS et al. Am J Kidney Dis. 2014;64(6):821-835.
       doi:10.1053/j.ajkd.2014.07.030
    """

    confirmation: Literal["next_value", "sustained_to_end"] = Field(
        "next_value",
        description=(
            "How a qualifying eGFR value is confirmed. 'next_value': the next eligible "
            "value at least confirm_after_days later still meets the criterion (values "
            "in between are ignored). 'sustained_to_end': every later eligible value "
            "meets it, and at least one is confirm_after_days or more later."
        ),
    )
    confirm_after_days: int = Field(
        28,
        ge=1,
        description=(
            "Minimum days between a qualifying value and the value that confirms it "
            "(4 weeks is common practice)."
        ),
    )
    confirm_within_days: int | None = Field(
        None,
        ge=1,
        description=(
            "Optional maximum days between a qualifying value and its confirming value "
            "('next_value' only); null means no upper limit."
        ),
    )
    unconfirmed_last_value: Literal["censor", "event_if_death_or_failure", "event"] = Field(
        "event_if_death_or_failure",
        description=(
            "A qualifying value that cannot be confirmed because no eligible value "
            "follows it at least confirm_after_days later (and every later value still "
            "qualifies): 'censor' = not an event; 'event_if_death_or_failure' = an "
            "event when death or kidney failure follows within "
            "death_or_failure_within_days; 'event' = always an event."
        ),
    )
    death_or_failure_within_days: int = Field(
        30,
        ge=0,
        description=(
            "Days after an unconfirmed qualifying value within which death or kidney "
            "failure makes it an event (rule 'event_if_death_or_failure')."
        ),
    )
    event_date: Literal["first_qualifying", "confirming"] = Field(
        "first_qualifying",
        description=(
            "Date given to a confirmed decline: the first qualifying value's date, or "
            "the confirming value's date (for an unconfirmed value counted because of "
            "death or kidney failure, that event's date)."
        ),
    )
    grace_period_days: int = Field(
        0,
        ge=0,
        description=(
            "Values up to this many days after the index date never trigger an event "
            "(e.g. to skip an expected acute dip). Values on or before the index date "
            "never trigger events."
        ),
    )
    lab_censoring: Literal["last_assessment", "end_of_followup"] = Field(
        "last_assessment",
        description=(
            "Censoring date of lab-based endpoints without an event: the last eligible "
            "eGFR assessment, or the end of follow-up (kidney failure onset, "
            "end_of_followup or data cut, whichever is first)."
        ),
    )
    min_dialysis_days: int = Field(
        90,
        ge=0,
        description=(
            "A dialysis episode with a recorded end_date counts as kidney failure only "
            "if it lasted at least this many days or ended by death or transplant; "
            "shorter episodes are acute (their eGFR values are set aside). Episodes "
            "without end_date always count. 0 counts every episode."
        ),
    )

    @model_validator(mode="after")
    def _window_after_minimum(self) -> EndpointRule:
        if self.confirm_within_days is not None and (
            self.confirm_within_days < self.confirm_after_days
        ):
            raise ValueError(
                f"confirm_within_days ({self.confirm_within_days}) must be at least "
                f"confirm_after_days ({self.confirm_after_days})"
            )
        return self


class _Endpoint(_ConfigModel):
    name: str = Field(
        "",
        description=(
            "Endpoint name used in the endpoints table and by composites; defaults to a "
            "name built from the kind and its numbers (e.g. 'egfr_decline_40')."
        ),
    )
    label: str = Field(
        "",
        description="Human-readable description (the ADaM PARAM text); a default is built.",
    )
    paramcd: str = Field(
        "",
        description="ADaM parameter code (PARAMCD), at most 8 characters, A-Z and 0-9.",
    )

    @model_validator(mode="before")
    @classmethod
    def _fill_names(cls, data: Any) -> Any:
        if isinstance(data, Mapping):
            data = dict(data)
            default_name, default_label, default_code = cls._defaults(data)
            for key, value in (
                ("name", default_name),
                ("label", default_label),
                ("paramcd", default_code),
            ):
                if not data.get(key):
                    data[key] = value
        return data

    @model_validator(mode="after")
    def _check_paramcd(self) -> _Endpoint:
        code = self.paramcd
        if len(code) > 8 or not code[:1].isalpha() or not code.isalnum() or not code.isupper():
            raise ValueError(
                f"paramcd '{code}' must be 1-8 upper-case letters or digits starting with "
                "a letter; set paramcd explicitly"
            )
        if not self.name.strip():
            raise ValueError("name must not be empty")
        return self

    @classmethod
    def _defaults(cls, data: Mapping[str, Any]) -> tuple[str, str, str]:
        raise NotImplementedError  # pragma: no cover - every kind defines it


def _number_text(value: Any) -> str:
    try:
        return f"{float(value):g}"
    except (TypeError, ValueError):
        return str(value)


class _LabEndpoint(_Endpoint):
    rule: EndpointRule | None = Field(
        None,
        description="Rules for this endpoint only; null uses the rules given to derive_endpoints.",
    )


class EgfrDecline(_LabEndpoint):
    r"""A confirmed fall of at least ``percent`` % from baseline eGFR.

    A value qualifies when

    .. math:: 100 \cdot \frac{\mathrm{eGFR}_{baseline} - \mathrm{eGFR}}
              {\mathrm{eGFR}_{baseline}} \ge P ,

    and counts once confirmed under :class:`EndpointRule`. 30, 40 and 50 % are the
    usual surrogate thresholds and 57 % approximates a doubling of serum creatinine [1]_.

    References
    ----------
    .. [1] Levey AS et al. Am J Kidney Dis. 2014;64(6):821-835.
       doi:10.1053/j.ajkd.2014.07.030
    """

    kind: Literal["egfr_decline"] = Field(
        "egfr_decline", description="Endpoint kind: confirmed eGFR decline from baseline."
    )
    percent: float = Field(
        ..., gt=0, lt=100, description="Minimum fall from baseline eGFR, in percent."
    )

    @classmethod
    def _defaults(cls, data: Mapping[str, Any]) -> tuple[str, str, str]:
        p = _number_text(data.get("percent"))
        return (
            f"egfr_decline_{p}",
            f"Time to confirmed eGFR decline of at least {p}% from baseline",
            "DEC" + p.replace(".", "P"),
        )


class EgfrBelow(_LabEndpoint):
    r"""Confirmed eGFR below ``threshold`` (optionally also ``and_decline_percent`` % down).

    A value qualifies when :math:`\mathrm{eGFR} < T` and, when ``and_decline_percent``
    is set, the fall from baseline is at least that percentage. eGFR < 15
    mL/min/1.73 m² is KDIGO category G5 (KDIGO 2012 CKD guideline, chapter 1).
    """

    kind: Literal["egfr_below"] = Field(
        "egfr_below", description="Endpoint kind: confirmed eGFR below a threshold."
    )
    threshold: float = Field(
        15.0, gt=0, description="eGFR threshold in mL/min/1.73 m²; values strictly below qualify."
    )
    and_decline_percent: float | None = Field(
        None,
        gt=0,
        lt=100,
        description="Optional: the value must also be at least this many percent below baseline.",
    )

    @classmethod
    def _defaults(cls, data: Mapping[str, Any]) -> tuple[str, str, str]:
        t = _number_text(data.get("threshold", 15.0))
        p = data.get("and_decline_percent")
        name, label, code = (
            f"egfr_below_{t}",
            f"Time to confirmed eGFR below {t} mL/min/1.73m2",
            "LT" + t.replace(".", "P"),
        )
        if p is not None:
            pt = _number_text(p)
            name += f"_and_decline_{pt}"
            label += f" and at least {pt}% below baseline"
            code += "D" + pt.replace(".", "P")
        return name, label, code


class KidneyFailure(_Endpoint):
    """Kidney failure: chronic dialysis or kidney transplant (KFRT).

    Sources: ``events`` rows ``dialysis`` (an episode with a recorded ``end_date`` must
    last ``rule.min_dialysis_days``, or end by death or transplant) and ``transplant``,
    and the patients' ``kfrt_date``. The event date is the earliest enabled source.
    """

    kind: Literal["kidney_failure"] = Field(
        "kidney_failure", description="Endpoint kind: kidney failure (dialysis or transplant)."
    )
    dialysis: bool = Field(True, description="Count chronic dialysis from the events table.")
    transplant: bool = Field(True, description="Count kidney transplant from the events table.")
    patient_kfrt_date: bool = Field(
        True, description="Count the patients table's kfrt_date column."
    )
    rule: EndpointRule | None = Field(
        None,
        description="Rules for this endpoint (min_dialysis_days); null uses the call's rule.",
    )

    @classmethod
    def _defaults(cls, data: Mapping[str, Any]) -> tuple[str, str, str]:
        return "kidney_failure", "Time to kidney failure (dialysis or transplant)", "KFRT"


class Death(_Endpoint):
    """All-cause death (``patients.death_date`` and ``death``/``kidney_death`` events)."""

    kind: Literal["death"] = Field("death", description="Endpoint kind: all-cause death.")

    @classmethod
    def _defaults(cls, data: Mapping[str, Any]) -> tuple[str, str, str]:
        return "death", "Time to death from any cause", "DEATH"


class KidneyDeath(_Endpoint):
    """Death from kidney causes (``kidney_death`` events); other deaths compete."""

    kind: Literal["kidney_death"] = Field(
        "kidney_death", description="Endpoint kind: death from kidney causes."
    )

    @classmethod
    def _defaults(cls, data: Mapping[str, Any]) -> tuple[str, str, str]:
        return "kidney_death", "Time to kidney death", "KDEATH"


class Composite(_Endpoint):
    r"""The earliest of named component endpoints.

    .. math:: T = \min_k T_k

    over the components' event times; with no component event the composite is
    censored at the earliest component end (competing when that end is a death).
    Components name other definitions passed in the same call.
    """

    kind: Literal["composite"] = Field(
        "composite", description="Endpoint kind: earliest of the named components."
    )
    components: list[str] = Field(
        ..., min_length=1, description="Names of the component endpoints (other definitions)."
    )

    @classmethod
    def _defaults(cls, data: Mapping[str, Any]) -> tuple[str, str, str]:
        return "composite", "Time to first composite kidney endpoint", "COMPOS"


EndpointDefinition = Annotated[
    EgfrDecline | EgfrBelow | KidneyFailure | Death | KidneyDeath | Composite,
    Field(discriminator="kind"),
]
_LAB_KINDS: Final = (EgfrDecline, EgfrBelow)
_DEFINITIONS_ADAPTER: Final = TypeAdapter(list[EndpointDefinition])
_ALL_KINDS: Final = (EgfrDecline, EgfrBelow, KidneyFailure, Death, KidneyDeath, Composite)


def _one_line(exc: ValidationError, where: str) -> str:
    err = first_error(exc)
    if err["type"] in ("union_tag_invalid", "union_tag_not_found"):
        loc = ".".join(str(x) for x in err["loc"])
        kinds = [m.model_fields["kind"].default for m in _ALL_KINDS]
        tag = err.get("ctx", {}).get("tag")
        return (
            f"{where}.{loc}.kind: unknown or missing endpoint kind {tag!r}"
            f"{did_you_mean(str(tag), kinds)}; kind must be one of {', '.join(kinds)}"
        )
    # a list of definitions has no single model: suggest among every kind's fields
    fields: set[str] = set(EndpointRule.model_fields)
    for model in _ALL_KINDS:
        fields |= set(model.model_fields)
    return rule_error_message(where, exc, fields=sorted(fields))


def parse_endpoint_definitions(
    items: Sequence[Mapping[str, Any] | BaseModel], where: str = "endpoints"
) -> list[EndpointDefinition]:
    """Build endpoint definitions from config mappings (the YAML ``endpoints:`` list).

    Parameters
    ----------
    items
        Mappings with a ``kind`` key and that kind's fields (or definitions already).
    where
        Config location used in error messages.

    Returns
    -------
    list of EndpointDefinition

    Raises
    ------
    ConfigError
        Naming the item and field, the value got and, for a misspelt key, the
        closest field name.
    """
    raw = [i.model_dump() if isinstance(i, BaseModel) else i for i in items]
    return _validate(_DEFINITIONS_ADAPTER.validate_python, raw, where)


def _validate(validator: Any, raw: Any, where: str) -> Any:
    return validate_config(validator, raw, where, message=_one_line)


def usual_kidney_composite(
    decline_percent: float = 40.0, below_threshold: float = 15.0
) -> list[EndpointDefinition]:
    """The usual kidney composite and its components.

    Confirmed ``decline_percent`` % eGFR decline, confirmed eGFR <
    ``below_threshold``, kidney failure and kidney death, plus the composite
    ``kidney_composite`` (Levey 2014 Am J Kidney Dis, doi:10.1053/j.ajkd.2014.07.030).
    """
    parts: list[EndpointDefinition] = [
        EgfrDecline(percent=decline_percent),
        EgfrBelow(threshold=below_threshold),
        KidneyFailure(),
        KidneyDeath(),
    ]
    composite = Composite(
        name="kidney_composite",
        paramcd="KIDCOMP",
        label=(
            f"Time to {_number_text(decline_percent)}% eGFR decline, eGFR < "
            f"{_number_text(below_threshold)}, kidney failure or kidney death"
        ),
        components=[p.name for p in parts],
    )
    return [*parts, composite]


# ------------------------------------------------------------------- input handling
def _parse_date(value: dt.date | str, field: str) -> dt.date:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    try:
        return dt.date.fromisoformat(str(value))
    except ValueError:
        raise ConfigError(
            f"{field}: expected a date (YYYY-MM-DD), got {value!r}; give e.g. '2024-06-30'"
        ) from None


def _dates_as_date(df: pl.DataFrame, columns: Iterable[str], name: str) -> pl.DataFrame:
    """Cast date-like columns to Date (ISO strings parsed; datetimes truncated)."""
    exprs = []
    for column in columns:
        if column not in df.columns:
            continue
        dtype = df.schema[column]
        if dtype == pl.String:
            bad = df.filter(
                pl.col(column).is_not_null()
                & pl.col(column).str.to_date("%Y-%m-%d", strict=False).is_null()
            )
            if bad.height:
                raise InputDataError(
                    f"{name}: column '{column}' has {bad.height} values that are not dates "
                    f"(first: {bad[column][0]!r}); use YYYY-MM-DD"
                )
            exprs.append(pl.col(column).str.to_date("%Y-%m-%d", strict=False))
        elif isinstance(dtype, pl.Datetime):
            exprs.append(pl.col(column).dt.date())
        elif dtype not in (pl.Date, pl.Null):
            raise InputDataError(
                f"{name}: column '{column}' must hold dates, got type {dtype}; convert it to dates"
            )
    return df.with_columns(exprs) if exprs else df


def _prepare_patients(patients: FrameLike) -> pl.DataFrame:
    df = to_polars(patients, "patients")
    require_columns(df, ("patient_id", "index_date"), "patients")
    df = _dates_as_date(
        df, ("index_date", "death_date", "kfrt_date", "end_of_followup"), "patients"
    )
    cols = ("patient_id", "index_date", "death_date", "kfrt_date", "end_of_followup")
    df = conform(df, {c: schemas.PATIENTS[c] for c in cols})
    if df["patient_id"].null_count():
        raise InputDataError("patients: column 'patient_id' has missing values; fill them")
    dup = df.filter(pl.col("patient_id").is_duplicated())
    if dup.height:
        raise InputDataError(
            f"patients: patient_id must be unique, got {dup.height} duplicated rows "
            f"(first: {dup['patient_id'][0]!r}); keep one row per patient"
        )
    return df


def _prepare_events(events: FrameLike | None) -> pl.DataFrame:
    schema = schemas.EVENTS
    if events is None:
        return pl.DataFrame(schema=schema)
    df = to_polars(events, "events")
    require_columns(df, schemas.EVENTS_REQUIRED, "events")
    df = _dates_as_date(df, ("event_date", "end_date"), "events")
    df = conform(df, schema).with_columns(pl.col("event").str.strip_chars().str.to_lowercase())
    unknown = df.filter(
        ~pl.col("event").is_in(schemas.CANONICAL_EVENTS) | pl.col("event").is_null()
    )
    if unknown.height:
        got = unknown["event"][0]
        raise InputDataError(
            f"events: column 'event' has {unknown.height} unknown values (first: {got!r})"
            f"{did_you_mean(str(got), schemas.CANONICAL_EVENTS)}; use one of "
            + ", ".join(schemas.CANONICAL_EVENTS)
            + " (map site codes first)"
        )
    undated = df.filter(pl.col("event_date").is_null())
    if undated.height:
        raise InputDataError(
            f"events: column 'event_date' is missing on {undated.height} rows "
            f"(first patient {undated['patient_id'][0]!r}); date them or remove them"
        )
    return df


def _prepare_baseline(baseline: FrameLike, equation: str) -> pl.DataFrame:
    df = to_polars(baseline, "baseline")
    require_columns(df, ("patient_id", "equation", "baseline_egfr"), "baseline")
    df = conform(
        df.select("patient_id", "equation", "baseline_egfr"),
        {
            "patient_id": pl.String(),
            "equation": pl.String(),
            "baseline_egfr": pl.Float64(),
        },
    )
    equations = df["equation"].unique().drop_nulls().to_list()
    df = df.filter(pl.col("equation") == equation)
    if df.height == 0 and equations:
        raise InputDataError(
            f"baseline: no rows for equation {equation!r}{did_you_mean(equation, equations)}; "
            f"available: {', '.join(sorted(equations))}"
        )
    dup = df.filter(pl.col("patient_id").is_duplicated())
    if dup.height:
        raise InputDataError(
            f"baseline: more than one row per patient for equation {equation!r} "
            f"(first: {dup['patient_id'][0]!r}); keep one baseline per patient"
        )
    bad = df.filter(pl.col("baseline_egfr") <= 0)
    if bad.height:
        raise InputDataError(
            f"baseline: baseline_egfr must be positive, got {bad['baseline_egfr'][0]} for "
            f"patient {bad['patient_id'][0]!r}"
        )
    return df.select(
        "patient_id",
        pl.col("baseline_egfr").fill_nan(None).alias("baseline_egfr"),
    )


def _prepare_egfr(egfr: FrameLike, equation: str, needed: bool) -> pl.DataFrame:
    if not needed:
        return pl.DataFrame(
            schema={"patient_id": pl.String(), "date": pl.Date(), "egfr": pl.Float64()}
        )
    df = to_polars(egfr, "egfr")
    require_columns(df, ("patient_id", "sample_date", "equation", "egfr"), "egfr")
    df = _dates_as_date(df, ("sample_date",), "egfr")
    df = df.select(
        pl.col("patient_id").cast(pl.String),
        pl.col("sample_date").alias("date"),
        pl.col("equation").cast(pl.String),
        pl.col("egfr").cast(pl.Float64),
    )
    equations = df["equation"].unique().drop_nulls().to_list()
    df = df.filter(pl.col("equation") == equation)
    if df.height == 0 and equations:
        raise InputDataError(
            f"egfr: no rows for equation {equation!r}{did_you_mean(equation, equations)}; "
            f"available: {', '.join(sorted(equations)) or 'none'}"
        )
    unusable = df.filter(
        pl.col("egfr").is_null() | pl.col("egfr").is_nan() | pl.col("date").is_null()
    ).height
    if unusable:
        logger.info("egfr: %d rows without a computed eGFR or a date are not assessments", unusable)
    return df.filter(
        pl.col("egfr").is_not_null() & pl.col("egfr").is_not_nan() & pl.col("date").is_not_null()
    ).select("patient_id", "date", "egfr")


# -------------------------------------------------------------------- patient frame
def _patient_frame(patients: pl.DataFrame, events: pl.DataFrame, data_cut: dt.date) -> pl.DataFrame:
    """One row per patient: time zero, follow-up end, death, kidney death, transplant."""
    unknown = events.join(patients.select("patient_id"), on="patient_id", how="anti").height
    if unknown:
        logger.warning("events: %d rows name patients not in the patients table; not used", unknown)
    per_event = events.group_by("patient_id").agg(
        pl.col("event_date")
        .filter(pl.col("event").is_in(["death", "kidney_death"]))
        .min()
        .alias("_death_ev"),
        pl.col("event_date").filter(pl.col("event") == "kidney_death").min().alias("_kdeath_ev"),
        pl.col("event_date").filter(pl.col("event") == "transplant").min().alias("transplant_date"),
    )
    cut = pl.lit(data_cut, dtype=pl.Date)
    p = (
        patients.sort("patient_id")
        .with_row_index("pcode")
        .with_columns(pl.col("pcode").cast(pl.Int64))
        .join(per_event, on="patient_id", how="left")
        .with_columns(
            pl.min_horizontal("death_date", "_death_ev").alias("death_date"),
            pl.min_horizontal("end_of_followup", cut).alias("fu_end"),
        )
        .with_columns(
            # A kidney_death record attributes the patient's (earliest) death to kidney causes.
            pl.when(pl.col("_kdeath_ev").is_not_null())
            .then(pl.col("death_date"))
            .alias("kidney_death_date"),
            pl.when(pl.col("end_of_followup").is_not_null() & (pl.col("end_of_followup") < cut))
            .then(pl.lit("end_of_followup"))
            .otherwise(pl.lit("data_cut"))
            .alias("fu_end_reason"),
        )
    )
    beyond = (
        events.join(p.select("patient_id", "fu_end"), on="patient_id")
        .filter(pl.col("event_date") > pl.col("fu_end"))
        .height
    )
    if beyond:
        logger.info("events: %d rows dated after the end of follow-up are not used", beyond)
    disagree = p.filter(pl.col("_kdeath_ev") != pl.col("death_date")).height
    if disagree:
        logger.warning(
            "events: %d kidney_death dates differ from the earliest death date; the earliest is used",
            disagree,
        )
    return p.drop("_death_ev", "_kdeath_ev")


def _kidney_failure_onset(
    p: pl.DataFrame, events: pl.DataFrame, min_days: int
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Per-patient onset of each kidney-failure source, and the acute dialysis episodes."""
    dialysis = (
        events.filter(pl.col("event") == "dialysis")
        .join(p.select("patient_id", "pcode", "death_date", "transplant_date"), on="patient_id")
        .with_columns(
            (
                pl.col("end_date").is_null()
                | ((pl.col("end_date") - pl.col("event_date")).dt.total_days() >= min_days)
                | (
                    pl.col("death_date").is_not_null()
                    & (pl.col("end_date") >= pl.col("death_date"))
                )
                | (
                    pl.col("transplant_date").is_not_null()
                    & (pl.col("end_date") >= pl.col("transplant_date"))
                )
            ).alias("chronic")
        )
    )
    onset = (
        dialysis.filter("chronic")
        .group_by("pcode")
        .agg(pl.col("event_date").min().alias("dialysis_date"))
    )
    acute = dialysis.filter(~pl.col("chronic")).select(
        "pcode", pl.col("event_date").alias("start"), pl.col("end_date").alias("end")
    )
    kf = (
        p.select("pcode", "transplant_date", "kfrt_date")
        .join(onset, on="pcode", how="left", maintain_order="left")
        .with_columns(
            pl.min_horizontal("dialysis_date", "transplant_date", "kfrt_date").alias("kf_date")
        )
    )
    return kf, acute


def _key_expr() -> pl.Expr:
    """Sort key of (patient, day): pcode in the high bits, day number in the low bits."""
    return pl.col("pcode").cast(pl.Int64) * int(_DAY_SLOTS) + (
        pl.col("date").cast(pl.Int32).cast(pl.Int64) + int(_DAY_OFFSET)
    )


def _keys(pcode: pl.Series, date: pl.Series) -> np.ndarray:
    return pcode.to_numpy().astype(np.int64) * _DAY_SLOTS + (
        date.to_physical().to_numpy().astype(np.int64) + _DAY_OFFSET
    )


def _inside_acute_episode(values: pl.DataFrame, acute: pl.DataFrame) -> np.ndarray:
    """Boolean mask: value date falls inside a short dialysis episode of its patient."""
    if acute.height == 0 or values.height == 0:
        return np.zeros(values.height, dtype=bool)
    # Running maximum of episode ends covers overlapping episodes (sorted cumulative trick).
    ep = acute.sort("pcode", "start").with_columns(
        pl.col("end").cum_max().over("pcode").alias("end")
    )
    ekey = _keys(ep["pcode"], ep["start"])
    vkey = values["key"].to_numpy()
    j = np.searchsorted(ekey, vkey, side="right") - 1
    jj = np.clip(j, 0, None)
    same = (j >= 0) & (ep["pcode"].to_numpy()[jj] == values["pcode"].to_numpy())
    end_days = ep["end"].to_physical().to_numpy()[jj]
    return same & (end_days >= values["date"].to_physical().to_numpy())


def _with_next_value(values: pl.DataFrame, after_days: int) -> pl.DataFrame:
    """Add the first value of the same patient at least ``after_days`` later.

    ``values`` must be sorted by (pcode, date) with one row per patient and date.
    """
    n = values.height
    if n == 0:
        return values.with_columns(
            pl.lit(None, dtype=pl.Date).alias("next_date"),
            pl.lit(None, dtype=pl.Float64).alias("next_egfr"),
        )
    key = values["key"].to_numpy()
    idx = np.minimum(np.searchsorted(key, key + np.int64(after_days), side="left"), n)
    pcode = values["pcode"].to_numpy()
    idx_c = np.minimum(idx, n - 1)
    found = (idx < n) & (pcode[idx_c] == pcode)
    return (
        values.with_columns(
            pl.Series(
                "next_date", values["date"].to_physical().to_numpy()[idx_c], dtype=pl.Int32
            ).cast(pl.Date),
            pl.Series("next_egfr", values["egfr"].to_numpy()[idx_c], dtype=pl.Float64),
            pl.Series("_found", found, dtype=pl.Boolean),
        )
        .with_columns(
            pl.when("_found").then(pl.col("next_date")).alias("next_date"),
            pl.when("_found").then(pl.col("next_egfr")).alias("next_egfr"),
        )
        .drop("_found")
    )


# ------------------------------------------------------------------ the derivation
class _Context:
    """Inputs prepared once and the per-rules caches of eligible values.

    Internally a patient is its integer ``pcode`` (row number in ``patient_id`` order),
    so per-value lookups of patient columns are gathers rather than string joins.
    """

    def __init__(
        self,
        p: pl.DataFrame,
        events: pl.DataFrame,
        egfr: pl.DataFrame,
        baseline: pl.DataFrame,
    ) -> None:
        self.p = p.join(baseline, on="patient_id", how="left", maintain_order="left")
        self.events = events
        self.egfr = egfr
        self._coded: pl.DataFrame | None = None
        self._kf: dict[int, tuple[pl.DataFrame, pl.DataFrame]] = {}
        self._base: dict[int, pl.DataFrame] = {}
        self._values: dict[int, tuple[pl.DataFrame, pl.DataFrame]] = {}
        self._next: dict[tuple[int, int], pl.DataFrame] = {}

    def kidney_failure(self, min_days: int) -> tuple[pl.DataFrame, pl.DataFrame]:
        if min_days not in self._kf:
            self._kf[min_days] = _kidney_failure_onset(self.p, self.events, min_days)
        return self._kf[min_days]

    def patient_base(self, min_days: int) -> pl.DataFrame:
        """Patients (in pcode order) with kidney-failure onset and not-evaluable reasons."""
        if min_days not in self._base:
            kf, _ = self.kidney_failure(min_days)
            self._base[min_days] = self.p.join(
                kf.select("pcode", "dialysis_date", "kf_date"),
                on="pcode",
                how="left",
                maintain_order="left",
            ).with_columns(
                pl.when(pl.col("index_date").is_null())
                .then(pl.lit("no_index_date"))
                .when(pl.col("fu_end") < pl.col("index_date"))
                .then(
                    pl.when(pl.col("fu_end_reason") == "data_cut")
                    .then(pl.lit("index_after_data_cut"))
                    .otherwise(pl.lit("end_of_followup_before_index"))
                )
                .when(pl.col("death_date") < pl.col("index_date"))
                .then(pl.lit("death_before_index"))
                .alias("not_evaluable"),
                pl.when(pl.col("kf_date") < pl.col("index_date"))
                .then(pl.lit("kidney_failure_before_index"))
                .alias("prevalent_kf"),
            )
        return self._base[min_days]

    def coded_egfr(self) -> pl.DataFrame:
        """eGFR as (pcode, date, egfr), sorted, one assessment per patient and day."""
        if self._coded is None:
            coded = (
                self.egfr.join(self.p.select("patient_id", "pcode"), on="patient_id", how="inner")
                .select(_key_expr().alias("key"), "pcode", "date", "egfr")
                .sort("key")
            )
            orphans = self.egfr.height - coded.height
            if orphans:
                logger.warning(
                    "egfr: %d assessments of patients not in the patients table; not used", orphans
                )
            repeat = (pl.col("pcode") == pl.col("pcode").shift(1)) & (
                pl.col("date") == pl.col("date").shift(1)
            )
            if coded.select(repeat.any()).item():
                # Several values on one day (repeat draws) are one assessment: their mean
                # (common practice).
                coded = (
                    coded.group_by("key", "pcode", "date")
                    .agg(pl.col("egfr").mean())
                    .sort("key")
                    .select("key", "pcode", "date", "egfr")
                )
            self._coded = coded
        return self._coded

    def values(self, min_days: int) -> tuple[pl.DataFrame, pl.DataFrame]:
        """Eligible eGFR assessments (after index, within follow-up, native kidney) with
        their patient's columns, and each patient's last eligible assessment date."""
        if min_days not in self._values:
            base = self.patient_base(min_days)
            _, acute = self.kidney_failure(min_days)
            coded = self.coded_egfr()
            pcode = coded["pcode"]
            joined = coded.with_columns(
                base[c].gather(pcode)
                for c in ("index_date", "fu_end", "death_date", "kf_date", "baseline_egfr")
            )
            in_window = joined.filter(
                (pl.col("date") > pl.col("index_date"))
                & (pl.col("date") <= pl.col("fu_end"))
                & (pl.col("death_date").is_null() | (pl.col("date") <= pl.col("death_date")))
            )
            native = in_window.filter(
                pl.col("kf_date").is_null() | (pl.col("date") < pl.col("kf_date"))
            )
            acute_mask = _inside_acute_episode(native, acute)
            logger.info(
                "endpoints: %d eligible eGFR assessments; set aside %d after kidney failure and "
                "%d inside acute dialysis episodes",
                native.height - int(acute_mask.sum()),
                in_window.height - native.height,
                int(acute_mask.sum()),
            )
            native = native.filter(pl.Series(~acute_mask))
            last = native.filter(
                pl.col("pcode") != pl.col("pcode").shift(-1, fill_value=-1)
            ).select("pcode", pl.col("date").alias("last_date"))
            self._values[min_days] = (native, last)
        return self._values[min_days]

    def values_with_next(self, min_days: int, after_days: int) -> pl.DataFrame:
        key = (min_days, after_days)
        if key not in self._next:
            self._next[key] = _with_next_value(self.values(min_days)[0], after_days)
        return self._next[key]


def _days(expr: pl.Expr) -> pl.Expr:
    return expr.dt.total_days()


def _finish(frame: pl.DataFrame, name: str) -> pl.DataFrame:
    """Common output columns from start_date/end_date/event/competing/reason."""
    return frame.select(
        "pcode",
        "patient_id",
        pl.lit(name).alias("endpoint"),
        pl.col("index_date").alias("start_date"),
        "end_date",
        (_days(pl.col("end_date") - pl.col("index_date")) / schemas.DAYS_PER_YEAR).alias("years"),
        pl.col("event").cast(pl.Int8),
        pl.col("competing").cast(pl.Int8),
        "reason",
    )


def _not_evaluable(reason_col: str) -> list[pl.Expr]:
    ne = pl.col(reason_col).is_not_null()
    return [
        pl.when(ne).then(None).otherwise(pl.col("end_date")).alias("end_date"),
        pl.when(ne).then(None).otherwise(pl.col("event")).alias("event"),
        pl.when(ne).then(None).otherwise(pl.col("competing")).alias("competing"),
        pl.when(ne).then(pl.col(reason_col)).otherwise(pl.col("reason")).alias("reason"),
    ]


def _needs_baseline(defn: EgfrDecline | EgfrBelow) -> bool:
    return isinstance(defn, EgfrDecline) or defn.and_decline_percent is not None


def _criterion(defn: EgfrDecline | EgfrBelow, value: pl.Expr) -> pl.Expr:
    base = pl.col("baseline_egfr")
    fall = (base - value) / base * 100.0
    if isinstance(defn, EgfrDecline):
        return fall >= defn.percent - _PERCENT_TOLERANCE
    crit = value < defn.threshold
    if defn.and_decline_percent is not None:
        crit = crit & (fall >= defn.and_decline_percent - _PERCENT_TOLERANCE)
    return crit


def _lab_endpoint(ctx: _Context, defn: EgfrDecline | EgfrBelow, rule: EndpointRule) -> pl.DataFrame:
    base = ctx.patient_base(rule.min_dialysis_days)
    v = ctx.values_with_next(rule.min_dialysis_days, rule.confirm_after_days)
    _, last = ctx.values(rule.min_dialysis_days)
    needs_baseline = _needs_baseline(defn)
    if needs_baseline:
        v = v.filter(pl.col("baseline_egfr").is_not_null())
    qualifies = _criterion(defn, pl.col("egfr"))
    v = v.with_columns(qualifies.alias("q")).with_columns(
        pl.col("date").filter(~pl.col("q")).max().over("pcode").alias("last_nonqualifying"),
    )
    after_grace = pl.col("date") > pl.col("index_date") + pl.duration(days=rule.grace_period_days)
    trigger = pl.col("q") & after_grace
    stays = pl.col("last_nonqualifying").is_null() | (pl.col("date") > pl.col("last_nonqualifying"))
    has_next = pl.col("next_date").is_not_null()
    if rule.confirmation == "next_value":
        confirmed = trigger & has_next & _criterion(defn, pl.col("next_egfr")).fill_null(False)
        if rule.confirm_within_days is not None:
            confirmed = confirmed & (
                _days(pl.col("next_date") - pl.col("date")) <= rule.confirm_within_days
            )
        confirmed_reason = "confirmed"
    else:
        confirmed = trigger & has_next & stays
        confirmed_reason = "sustained"
    unconfirmable = trigger & ~has_next & stays

    fu_end = pl.col("fu_end")
    death_in = pl.when(pl.col("death_date") <= fu_end).then(pl.col("death_date"))
    kf_in = pl.when(pl.col("kf_date") <= fu_end).then(pl.col("kf_date"))
    follow = pl.min_horizontal(death_in, kf_in)
    follow_reason = (
        pl.when(death_in.is_not_null() & (death_in == follow))
        .then(pl.lit("unconfirmed_then_death"))
        .otherwise(pl.lit("unconfirmed_then_kidney_failure"))
    )
    followed = follow.is_not_null() & (
        _days(follow - pl.col("date")) <= rule.death_or_failure_within_days
    )
    first = rule.event_date == "first_qualifying"
    confirmed_date = pl.col("date") if first else pl.col("next_date")
    if rule.unconfirmed_last_value == "event":
        late_ok, late_date, late_reason = (
            pl.lit(True),
            pl.col("date"),
            pl.lit("unconfirmed_last_value"),
        )
    elif rule.unconfirmed_last_value == "event_if_death_or_failure":
        late_ok, late_date, late_reason = (
            followed,
            (pl.col("date") if first else follow),
            follow_reason,
        )
    else:
        late_ok, late_date, late_reason = pl.lit(False), pl.col("date"), pl.lit("")
    counted = (
        v.filter(confirmed | (unconfirmable & late_ok))
        .with_columns(
            pl.when(confirmed).then(confirmed_date).otherwise(late_date).alias("event_date"),
            pl.when(confirmed)
            .then(pl.lit(confirmed_reason))
            .otherwise(late_reason)
            .alias("event_reason"),
        )
        .sort("pcode", "event_date", "date")
        .group_by("pcode", maintain_order=True)
        .first()
        .select("pcode", "event_date", "event_reason")
    )
    out = base.join(counted, on="pcode", how="left", maintain_order="left").join(
        last, on="pcode", how="left", maintain_order="left"
    )

    death_competes = (pl.col("death_date") <= fu_end) & (
        pl.col("kf_date").is_null() | (pl.col("death_date") <= pl.col("kf_date"))
    )
    kf_ends = pl.col("kf_date") <= fu_end
    if rule.lab_censoring == "last_assessment":
        last_or_start = pl.coalesce("last_date", "index_date")
        kf_end, plain_end = last_or_start, last_or_start
        plain_reason = (
            pl.when(pl.col("last_date").is_null())
            .then(pl.lit("no_post_index_assessment"))
            .otherwise(pl.lit("last_assessment"))
        )
    else:
        kf_end, plain_end, plain_reason = pl.col("kf_date"), fu_end, pl.col("fu_end_reason")
    has_event = pl.col("event_date").is_not_null()
    out = out.with_columns(
        pl.when(has_event)
        .then(pl.col("event_date"))
        .when(death_competes)
        .then(pl.col("death_date"))
        .when(kf_ends)
        .then(kf_end)
        .otherwise(plain_end)
        .alias("end_date"),
        has_event.cast(pl.Int8).alias("event"),
        (~has_event & death_competes.fill_null(False)).cast(pl.Int8).alias("competing"),
        pl.when(has_event)
        .then(pl.col("event_reason"))
        .when(death_competes)
        .then(pl.lit("death"))
        .when(kf_ends)
        .then(pl.lit("kidney_failure"))
        .otherwise(plain_reason)
        .alias("reason"),
        pl.coalesce(
            "not_evaluable",
            "prevalent_kf",
            pl.when(pl.col("baseline_egfr").is_null() & pl.lit(needs_baseline)).then(
                pl.lit("no_baseline")
            ),
        ).alias("why_not"),
    ).with_columns(_not_evaluable("why_not"))
    return _finish(out, defn.name)


def _simple_event(
    base: pl.DataFrame, name: str, event_date: pl.Expr, reason: pl.Expr, death_competes: bool
) -> pl.DataFrame:
    fu_end = pl.col("fu_end")
    ev_in = event_date <= fu_end
    if death_competes:
        ev_in = ev_in & (pl.col("death_date").is_null() | (event_date <= pl.col("death_date")))
        comp = ~ev_in.fill_null(False) & (pl.col("death_date") <= fu_end).fill_null(False)
    else:
        comp = pl.lit(False)
    ev = ev_in.fill_null(False)
    out = base.with_columns(
        pl.when(ev)
        .then(event_date)
        .when(comp)
        .then(pl.col("death_date"))
        .otherwise(fu_end)
        .alias("end_date"),
        ev.cast(pl.Int8).alias("event"),
        comp.cast(pl.Int8).alias("competing"),
        pl.when(ev)
        .then(reason)
        .when(comp)
        .then(pl.lit("death"))
        .otherwise(pl.col("fu_end_reason"))
        .alias("reason"),
    )
    return out


def _kidney_failure_endpoint(
    ctx: _Context, defn: KidneyFailure, rule: EndpointRule
) -> pl.DataFrame:
    base = ctx.patient_base(rule.min_dialysis_days)
    sources = [
        (defn.dialysis, "dialysis_date", "dialysis"),
        (defn.transplant, "transplant_date", "transplant"),
        (defn.patient_kfrt_date, "kfrt_date", "kfrt_date"),
    ]
    used = [(c, r) for on, c, r in sources if on]
    if used:
        onset = pl.min_horizontal(*[pl.col(c) for c, _ in used])
        reason = pl.lit(None, dtype=pl.String)
        for column, label in reversed(used):
            reason = pl.when(pl.col(column) == onset).then(pl.lit(label)).otherwise(reason)
    else:
        onset, reason = pl.lit(None, dtype=pl.Date), pl.lit(None, dtype=pl.String)
    out = _simple_event(base, defn.name, onset, reason, death_competes=True)
    out = out.with_columns(
        pl.coalesce("not_evaluable", "prevalent_kf").alias("why_not")
    ).with_columns(_not_evaluable("why_not"))
    return _finish(out, defn.name)


def _death_endpoint(ctx: _Context, defn: Death | KidneyDeath, rule: EndpointRule) -> pl.DataFrame:
    base = ctx.patient_base(rule.min_dialysis_days)
    if isinstance(defn, Death):
        out = _simple_event(
            base, defn.name, pl.col("death_date"), pl.lit("death"), death_competes=False
        )
    else:
        out = _simple_event(
            base,
            defn.name,
            pl.col("kidney_death_date"),
            pl.lit("kidney_death"),
            death_competes=True,
        )
    out = out.with_columns(_not_evaluable("not_evaluable"))
    return _finish(out, defn.name)


def _composite(defn: Composite, parts: list[pl.DataFrame]) -> pl.DataFrame:
    """Combine component rows column-wise (every part is one row per patient, pcode order)."""
    frame = parts[0].select("pcode", "patient_id", pl.col("start_date").alias("index_date"))
    for k, part in enumerate(parts):
        frame = frame.with_columns(
            part["end_date"].alias(f"end_{k}"),
            pl.when(part["event"] == 1).then(part["end_date"]).alias(f"ev_{k}"),
            part["reason"].alias(f"reason_{k}"),
            (part["competing"] == 1).alias(f"comp_{k}"),
            pl.when(part["event"].is_null()).then(part["reason"]).alias(f"na_{k}"),
        )
    ks = range(len(parts))
    event_date = pl.min_horizontal([pl.col(f"ev_{k}") for k in ks])
    censor_date = pl.min_horizontal([pl.col(f"end_{k}") for k in ks])
    names = [defn.components[k] for k in ks]
    out = frame.with_columns(
        event_date.alias("event_date"),
        pl.concat_str(
            [pl.when(pl.col(f"ev_{k}") == event_date).then(pl.lit(names[k])) for k in ks],
            separator="+",
            ignore_nulls=True,
        ).alias("event_reason"),
        censor_date.alias("censor_date"),
        pl.coalesce(
            [pl.when(pl.col(f"end_{k}") == censor_date).then(pl.col(f"reason_{k}")) for k in ks]
        ).alias("censor_reason"),
        pl.any_horizontal(
            [
                ((pl.col(f"end_{k}") == censor_date) & pl.col(f"comp_{k}")).fill_null(False)
                for k in ks
            ]
        ).alias("censor_competing"),
        pl.coalesce([pl.col(f"na_{k}") for k in ks]).alias("why_not"),
    )
    has_event = pl.col("event_date").is_not_null()
    out = out.with_columns(
        pl.when(has_event)
        .then(pl.col("event_date"))
        .otherwise(pl.col("censor_date"))
        .alias("end_date"),
        has_event.cast(pl.Int8).alias("event"),
        (~has_event & pl.col("censor_competing")).cast(pl.Int8).alias("competing"),
        pl.when(has_event)
        .then(pl.col("event_reason"))
        .otherwise(pl.col("censor_reason"))
        .alias("reason"),
    ).with_columns(_not_evaluable("why_not"))
    return _finish(out, defn.name)


def _resolve_order(definitions: Sequence[EndpointDefinition]) -> None:
    names = [d.name for d in definitions]
    seen: set[str] = set()
    for d in definitions:
        if d.name in seen:
            raise ConfigError(
                f"endpoints: name {d.name!r} is used twice; give each definition its own name"
            )
        seen.add(d.name)
    codes = [d.paramcd for d in definitions]
    for code in codes:
        if codes.count(code) > 1:
            raise ConfigError(
                f"endpoints: paramcd {code!r} is used by more than one definition; set paramcd explicitly"
            )
    for d in definitions:
        if isinstance(d, Composite):
            for c in d.components:
                if c not in seen:
                    raise ConfigError(
                        f"endpoints.{d.name}.components: unknown endpoint {c!r}"
                        f"{did_you_mean(c, names)}; components name other definitions"
                    )
                if c == d.name:
                    raise ConfigError(
                        f"endpoints.{d.name}.components: a composite cannot contain itself"
                    )
    # cycle check over composites (a composite of composites is allowed)
    graph = {d.name: list(d.components) if isinstance(d, Composite) else [] for d in definitions}
    state: dict[str, int] = {}

    def visit(n: str, path: tuple[str, ...]) -> None:  # depth is the nesting of composites
        if state.get(n) == 2:
            return
        if state.get(n) == 1:
            raise ConfigError(
                f"endpoints: composites refer to each other in a cycle: {' -> '.join((*path, n))}"
            )
        state[n] = 1
        for m in graph[n]:
            visit(m, (*path, n))
        state[n] = 2

    for n in graph:
        visit(n, ())


def derive_endpoints(
    egfr: FrameLike,
    baseline: FrameLike,
    patients: FrameLike,
    events: FrameLike | None = None,
    definitions: Sequence[EndpointDefinition | Mapping[str, Any]] = (),
    *,
    equation: str,
    data_cut: dt.date | str,
    rule: EndpointRule | Mapping[str, Any] | None = None,
) -> pl.DataFrame:
    r"""Derive time-to-event rows, one per patient per endpoint definition.

    Parameters
    ----------
    egfr
        Long eGFR table (:data:`~kidneycohort.schemas.EGFR`; polars or pandas); only
        rows of ``equation`` are used. Same-day values are averaged.
    baseline
        Baseline table (:data:`~kidneycohort.schemas.BASELINE`); rows of ``equation``.
    patients
        Patients table: ``patient_id``, ``index_date`` and optionally ``death_date``,
        ``kfrt_date``, ``end_of_followup``.
    events
        Optional events table (``dialysis``, ``transplant``, ``death``,
        ``kidney_death``; ``end_date`` closes a dialysis episode).
    definitions
        Endpoint definitions (models, or config mappings with a ``kind`` key).
    equation
        The study's primary eGFR equation id.
    data_cut
        Data-cut date: nothing after it is used and every endpoint is censored at it.
    rule
        Default :class:`EndpointRule` (definitions may carry their own).

    Returns
    -------
    polars.DataFrame
        :data:`~kidneycohort.schemas.ENDPOINTS` columns, ordered by definition then
        ``patient_id``. ``years`` is

        .. math:: (\text{end\_date} - \text{start\_date})_{\text{days}} / 365.25 .

        ``event`` is 1 for an event and 0 for censoring; ``competing`` is 1 when death
        ended follow-up first (``end_date`` is then the death date). A patient who cannot
        be evaluated has null ``end_date``/``years``/``event``/``competing`` and a
        ``reason`` of :data:`NOT_EVALUABLE_REASONS`.

    Raises
    ------
    InputDataError
        Missing columns, unknown event codes, duplicated patients or baselines, an
        equation absent from the eGFR or baseline table.
    ConfigError
        Invalid definitions or rules (duplicate names, unknown composite components).

    Notes
    -----
    Follow-up of every endpoint ends at the earliest of ``data_cut``,
    ``end_of_followup`` and death; events after it are not used. For lab-based
    endpoints the patient is no longer at risk from kidney-failure onset; censoring
    then carries the reason ``kidney_failure``. A composite's event is the earliest
    component event; with none, it ends at the earliest component end.

    References
    ----------
    .. [1] Levey AS et al. GFR decline as an end point for clinical trials in CKD.
       Am J Kidney Dis. 2014;64(6):821-835. doi:10.1053/j.ajkd.2014.07.030
    """
    if isinstance(rule, EndpointRule) or rule is None:
        default_rules = rule or EndpointRule()
    else:
        default_rules = _validate(EndpointRule.model_validate, dict(rule), "rule")
    defs = parse_endpoint_definitions(list(definitions))
    if not defs:
        raise ConfigError("endpoints: no endpoint definitions given; pass definitions=[...]")
    _resolve_order(defs)
    cut = _parse_date(data_cut, "data_cut")
    needs_labs = any(isinstance(d, _LAB_KINDS) for d in defs)

    events_frame = _prepare_events(events)
    p = _patient_frame(_prepare_patients(patients), events_frame, cut)
    ctx = _Context(
        p=p,
        events=events_frame,
        egfr=_prepare_egfr(egfr, equation, needs_labs),
        baseline=(
            _prepare_baseline(baseline, equation)
            if needs_labs
            else pl.DataFrame(schema={"patient_id": pl.String(), "baseline_egfr": pl.Float64()})
        ),
    )
    results: dict[str, pl.DataFrame] = {}
    by_name = {d.name: d for d in defs}

    def evaluate(d: EndpointDefinition) -> pl.DataFrame:
        if d.name in results:
            return results[d.name]
        if isinstance(d, Composite):
            out = _composite(d, [evaluate(by_name[c]) for c in d.components])
        else:
            r = getattr(d, "rule", None) or default_rules
            if isinstance(d, _LAB_KINDS):
                out = _lab_endpoint(ctx, d, r)
            elif isinstance(d, KidneyFailure):
                out = _kidney_failure_endpoint(ctx, d, r)
            else:
                out = _death_endpoint(ctx, d, r)
        results[d.name] = out.sort("pcode")
        logger.info(
            "endpoint %s: %d events, %d competing, %d not evaluable",
            d.name,
            int(results[d.name]["event"].sum() or 0),
            int(results[d.name]["competing"].sum() or 0),
            results[d.name]["event"].null_count(),
        )
        return results[d.name]

    return conform(pl.concat([evaluate(d) for d in defs]), schemas.ENDPOINTS)
