"""Endpoint definitions and their confirmation and timing rule: typed models a study config
fills under the same keys.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Annotated, Any, Final, Literal

from pydantic import (
    BaseModel,
    Field,
    TypeAdapter,
    ValidationError,
    field_validator,
    model_validator,
)

from kidneycohort._rules import RuleModel, rule_error_message, validate_config
from kidneycohort.errors import ConfigError, did_you_mean

__all__ = [
    "NOT_EVALUABLE_REASONS",
    "_LAB_KINDS",
    "_PERCENT_TOLERANCE",
    "Composite",
    "Death",
    "EgfrBelow",
    "EgfrDecline",
    "EndpointDefinition",
    "EndpointRule",
    "KidneyDeath",
    "KidneyFailure",
    "_resolve_order",
    "_validate",
    "parse_endpoint_definitions",
    "usual_kidney_composite",
]

# A fall that equals the threshold percentage to within floating-point rounding counts
# (100 -> 60 is a 40 % fall even if (100 - 60) / 100 * 100 rounds to 39.999...).
_PERCENT_TOLERANCE: Final = 1e-9


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
    death_before_event: Literal["competing", "censor_at_last_assessment"] = Field(
        "competing",
        description=(
            "Death before a laboratory endpoint occurred (or was confirmed): a competing "
            "event at the death date (for cumulative incidence and subdistribution "
            "hazards), or censoring at the last eligible eGFR assessment, as "
            "cause-specific analysis plans state it."
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


def _percent_not_fraction(value: float | None) -> float | None:
    """A percentage below 1 is almost always a fraction typed where a percent is meant
    (0.4 for 40 %); no published eGFR-decline endpoint is below 1 %."""
    if value is not None and value < 1:
        raise ValueError(
            f"{value:g} is a percent below 1; percentages are given as 40 for 40 % "
            f"(did you mean {value * 100:g}?)"
        )
    return value


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

    @field_validator("percent")
    @classmethod
    def _percent_not_fraction(cls, value: float) -> float:
        _percent_not_fraction(value)
        return value

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

    @field_validator("and_decline_percent")
    @classmethod
    def _percent_not_fraction(cls, value: float | None) -> float | None:
        return _percent_not_fraction(value)

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
    # a list of definitions has no single model: suggest among every kind's fields
    fields: set[str] = set(EndpointRule.model_fields)
    for model in _ALL_KINDS:
        fields |= set(model.model_fields)
    kinds = [m.model_fields["kind"].default for m in _ALL_KINDS]
    return rule_error_message(where, exc, fields=sorted(fields), kinds=kinds)


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


def _unique_names(definitions: Sequence[EndpointDefinition]) -> None:
    names = [d.name for d in definitions]
    twice = [n for n in dict.fromkeys(names) if names.count(n) > 1]
    if twice:
        raise ConfigError(
            f"endpoints: name {twice[0]!r} is used twice; give each definition its own name"
        )
    codes = [d.paramcd for d in definitions]
    twice = [c for c in dict.fromkeys(codes) if codes.count(c) > 1]
    if twice:
        raise ConfigError(
            f"endpoints: paramcd {twice[0]!r} is used by more than one definition; "
            "set paramcd explicitly"
        )


def _known_components(definitions: Sequence[EndpointDefinition]) -> None:
    names = [d.name for d in definitions]
    for d in definitions:
        for c in d.components if isinstance(d, Composite) else ():
            if c not in names:
                raise ConfigError(
                    f"endpoints.{d.name}.components: unknown endpoint {c!r}"
                    f"{did_you_mean(c, names)}; components name other definitions"
                )
            if c == d.name:
                raise ConfigError(
                    f"endpoints.{d.name}.components: a composite cannot contain itself"
                )


def _resolve_order(definitions: Sequence[EndpointDefinition]) -> None:
    """Unique names and codes, known components, and no cycle among composites."""
    _unique_names(definitions)
    _known_components(definitions)
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
