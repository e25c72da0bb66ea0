"""Options and input rows of the competing-risks models, and their shared result layout.

Two input layouts are read:

- **endpoints layout** (``schemas.ENDPOINTS``): one row per patient and endpoint with
  ``years``, ``event`` (1/0), ``competing`` (1 when death ended follow-up first) and
  ``reason``. The endpoint named by ``event_of_interest`` is modelled; a row is the
  event when ``event == 1``, a competing event when ``competing == 1`` or when it is
  censored with a ``reason`` listed in ``competing_events`` (e.g. ``kidney_failure``
  for an eGFR-decline endpoint), and censored otherwise. Rows with a null ``event``
  (not evaluable) are left out with their reason.
- **event-type layout**: one row per patient with ``patient_id``, ``years`` and a text
  column ``event_type``: null or ``"censored"`` for censoring, ``event_of_interest``
  for the event, any label of ``competing_events`` for a competing event (all other
  labels when that list is empty).
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import polars as pl
from pydantic import Field, model_validator

from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort._rules import RuleModel, resolve_rules
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.models._design import encode_covariates, split_complete_cases

logger = logging.getLogger(__name__)

__all__ = [
    "CompetingRisksRule",
    "CompetingRows",
    "prepare_competing_rows",
    "resolve_rule",
    "subset_rows",
]

CENSORED, EVENT, COMPETING = 0, 1, 2
CENSORED_LABEL = "censored"


class CompetingRisksRule(RuleModel):
    """Options of the competing-risks analyses (``competing_risks`` in the survival settings)."""

    event_of_interest: str | None = Field(
        None,
        description="Endpoint modelled (endpoints layout) or event_type label of the event "
        "(event-type layout); default: the only endpoint in the table.",
    )
    competing_events: list[str] = Field(
        default_factory=list,
        description="Further competing events: censoring reasons of the endpoints table "
        "(death, competing = 1, always competes) or event_type labels (empty: every label "
        "other than the event of interest).",
    )
    group_column: str | None = Field(
        "group", description="Column naming the arm or exposure group; null fits covariates only."
    )
    reference_group: str | None = Field(
        None, description="Group every hazard ratio is relative to (default: first, sorted)."
    )
    covariates: list[str] = Field(
        default_factory=list, description="Patients columns adjusted for in every model."
    )
    confidence: float = Field(0.95, gt=0, lt=1, description="Confidence level of intervals.")
    horizons_years: list[float] = Field(
        default_factory=lambda: [1.0, 2.0, 3.0],
        description="Times (years) at which cumulative incidence is reported.",
    )
    gray_test_strata: list[str] = Field(
        default_factory=list,
        description="Patients columns stratifying Gray's test (a patient missing one is left "
        "out, as for a missing covariate).",
    )
    gray_test_rho: float = Field(
        0.0, ge=-5, le=5, description="Power rho of Gray's weight (1 - F(t-))^rho; 0 as usual."
    )
    cause_specific_ties: Literal["efron", "breslow"] = Field(
        "efron", description="Handling of tied event times in the cause-specific Cox models."
    )
    max_iterations: int = Field(
        50, ge=1, le=500, description="Newton–Raphson iterations before a fit is declared failed."
    )

    @model_validator(mode="after")
    def _distinct_events(self) -> CompetingRisksRule:
        if self.event_of_interest is not None and self.event_of_interest in self.competing_events:
            raise ValueError(
                f"competing_events: '{self.event_of_interest}' is the event of interest; "
                "an event cannot compete with itself"
            )
        if any(h < 0 for h in self.horizons_years):
            raise ValueError(
                f"horizons_years: expected non-negative years, got {self.horizons_years}"
            )
        return self


def resolve_rule(
    spec: CompetingRisksRule | None, options: dict[str, Any], where: str
) -> CompetingRisksRule:
    """``spec`` (or defaults) updated by keyword ``options``; misspelt keys refused."""
    return resolve_rules(CompetingRisksRule, spec, options, where)


@dataclass(frozen=True)
class TermFamily:
    """Indicator terms of one categorical column and its reference level."""

    column: str
    reference: str
    terms: list[int]


@dataclass(frozen=True)
class CompetingRows:
    """One row per patient: time, cause code (0 censored, 1 event, 2 competing), design."""

    event_label: str
    competing_label: str
    patient_id: np.ndarray
    time: np.ndarray
    cause: np.ndarray
    group: np.ndarray
    groups: list[str]
    reference_group: str | None
    design: np.ndarray
    terms: list[str]
    families: list[TermFamily]
    strata: np.ndarray | None
    excluded: pl.DataFrame
    layout: str
    group_column: str | None = None

    @property
    def n_patients(self) -> int:
        return int(self.time.size)

    def count(self, cause: int) -> int:
        return int(np.count_nonzero(self.cause == cause))


def _event_type_causes(frame: pl.DataFrame, spec: CompetingRisksRule) -> tuple[pl.DataFrame, str]:
    labels = sorted(frame["event_type"].drop_nulls().cast(pl.String).unique().to_list())
    labels = [v for v in labels if v != CENSORED_LABEL]
    wanted = spec.event_of_interest
    if wanted is None:
        raise InputDataError(
            f"event_of_interest: needed with an event_type column; choose one of {labels}"
        )
    competing = spec.competing_events or [v for v in labels if v != wanted]
    unknown = [v for v in labels if v != wanted and v not in competing]
    if unknown:
        raise InputDataError(
            f"endpoints: event_type '{unknown[0]}' is neither the event of interest nor listed "
            f"in competing_events {competing}{did_you_mean(unknown[0], [wanted, *competing])}; "
            "list it there or recode it as 'censored'"
        )
    kind = pl.col("event_type").cast(pl.String)
    cause = (
        pl.when(kind == wanted)
        .then(EVENT)
        .when(kind.is_in(competing))
        .then(COMPETING)
        .otherwise(CENSORED)
    )
    return frame.with_columns(cause.cast(pl.Int8).alias("_cause"), kind.alias("_label")), wanted


def _endpoint_causes(frame: pl.DataFrame, spec: CompetingRisksRule) -> tuple[pl.DataFrame, str]:
    require_columns(frame, ("endpoint", "event"), "endpoints")
    names = sorted(frame["endpoint"].drop_nulls().cast(pl.String).unique().to_list())
    wanted = spec.event_of_interest
    if wanted is None:
        if len(names) != 1:
            raise InputDataError(
                f"endpoints: the table holds {len(names)} endpoints {names}; set "
                "event_of_interest to choose one"
            )
        wanted = names[0]
    elif wanted not in names:
        raise InputDataError(
            f"event_of_interest: endpoint '{wanted}' is not in the table (endpoints: {names})"
            f"{did_you_mean(wanted, names)}"
        )
    if "competing" not in frame.columns and not spec.competing_events:
        raise InputDataError(
            "endpoints: missing column 'competing' (1 when death ended follow-up); add it or "
            "name the competing censoring reasons in competing_events"
        )
    frame = frame.filter(pl.col("endpoint") == wanted)
    for name in ("competing", "reason"):
        if name not in frame.columns:
            frame = frame.with_columns(pl.lit(None, dtype=pl.String).alias(name))
    event = pl.col("event").cast(pl.Int64, strict=False)
    death = pl.col("competing").cast(pl.Int64, strict=False).fill_null(0) == 1
    listed = pl.col("reason").cast(pl.String).is_in(spec.competing_events)
    bad = frame.filter(pl.col("event").is_not_null() & ~event.is_in([0, 1]))
    if bad.height:
        raise InputDataError(
            f"endpoints: column 'event' of patient '{bad['patient_id'][0]}' is "
            f"{bad['event'][0]!r}; expected 1 (event), 0 (censored) or null (not evaluable)"
        )
    both = frame.filter((event == 1) & death)
    if both.height:
        raise InputDataError(
            f"endpoints: patient '{both['patient_id'][0]}' has event = 1 and competing = 1; "
            "a row ends in the endpoint or in the competing event, not both"
        )
    cause = (
        pl.when(event == 1)
        .then(EVENT)
        .when(death | listed.fill_null(False))
        .then(COMPETING)
        .otherwise(CENSORED)
    )
    reason = pl.col("reason").cast(pl.String)
    label = pl.when(death).then(reason.fill_null("death")).otherwise(reason)
    return frame.with_columns(cause.cast(pl.Int8).alias("_cause"), label.alias("_label")), wanted


def _not_evaluable(frame: pl.DataFrame, layout: str) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Rows without a usable outcome (null event) are left out with their reason."""
    if layout != "endpoints":
        return frame, pl.DataFrame(schema={"patient_id": pl.String, "reason": pl.String})
    missing = pl.col("event").is_null()
    reason = pl.col("reason").cast(pl.String).fill_null("not_evaluable")
    out = frame.filter(missing).select(pl.col("patient_id").cast(pl.String), reason.alias("reason"))
    return frame.filter(~missing), out


def _check_times(frame: pl.DataFrame) -> None:
    bad = frame.filter(
        pl.col("years").is_null()
        | ~pl.col("years").cast(pl.Float64).is_finite()
        | (pl.col("years") < 0)
    )
    if bad.height:
        raise InputDataError(
            f"endpoints: column 'years' of patient '{bad['patient_id'][0]}' is "
            f"{bad['years'][0]} ({bad.height} rows); follow-up must be a non-negative number "
            "of years"
        )
    duplicated = frame.filter(pl.col("patient_id").is_duplicated())
    if duplicated.height:
        raise InputDataError(
            f"endpoints: patient '{duplicated['patient_id'][0]}' has more than one row for the "
            "event of interest; give one time-to-event row per patient"
        )


def _join_patients(
    frame: pl.DataFrame, patients: FrameLike | None, wanted: Sequence[str]
) -> pl.DataFrame:
    missing = [c for c in dict.fromkeys(wanted) if c not in frame.columns]
    if not missing:
        return frame
    if patients is None:
        raise InputDataError(
            f"patients: needed for columns {missing} but not given; pass the patients table"
        )
    people = to_polars(patients, "patients")
    require_columns(people, ("patient_id",), "patients")
    for name in missing:
        if name not in people.columns:
            raise InputDataError(
                f"patients: missing column '{name}'{did_you_mean(name, people.columns)}"
            )
    duplicated = people.filter(pl.col("patient_id").is_duplicated())
    if duplicated.height:
        raise InputDataError(
            f"patients: patient_id '{duplicated['patient_id'][0]}' appears more than once; "
            "give one row per patient"
        )
    return frame.join(
        people.select(pl.col("patient_id").cast(frame.schema["patient_id"]), *missing),
        on="patient_id",
        how="left",
    )


def _group_terms(
    rows: pl.DataFrame, spec: CompetingRisksRule
) -> tuple[list[pl.Series], list[str], list[str], str | None]:
    if spec.group_column is None:
        return [], [], ["all"], None
    missing = rows.filter(pl.col("_group").is_null())
    if missing.height:
        raise InputDataError(
            f"endpoints: patient '{missing['patient_id'][0]}' has no '{spec.group_column}' "
            f"({missing.height} rows); add the patient to patients or fill its group"
        )
    groups = sorted(rows["_group"].unique().to_list())
    reference = spec.reference_group if spec.reference_group is not None else groups[0]
    if reference not in groups:
        raise InputDataError(
            f"reference_group: '{reference}' is not a value of '{spec.group_column}' "
            f"(values: {groups}){did_you_mean(reference, groups)}"
        )
    names = [f"{spec.group_column}={g}" for g in groups if g != reference]
    columns = [
        (rows["_group"] == g).cast(pl.Float64).alias(f"{spec.group_column}={g}")
        for g in groups
        if g != reference
    ]
    return columns, names, groups, reference


def _families(
    rows: pl.DataFrame,
    spec: CompetingRisksRule,
    names: list[str],
    n_group: int,
    reference: str | None,
) -> list[TermFamily]:
    """Indicator families whose levels must each hold events for a hazard ratio."""
    families = []
    if spec.group_column is not None and reference is not None and n_group:
        families.append(TermFamily(spec.group_column, reference, list(range(n_group))))
    for column in spec.covariates:
        dtype = rows.schema[column]
        if dtype == pl.Boolean:
            families.append(TermFamily(column, "false", [names.index(column, n_group)]))
        elif not dtype.is_numeric():
            levels = sorted(rows[column].drop_nulls().cast(pl.String).unique().to_list())
            prefix = f"{column}="
            idx = [i for i in range(n_group, len(names)) if names[i].startswith(prefix)]
            if levels and idx:
                families.append(TermFamily(column, levels[0], idx))
    return families


def prepare_competing_rows(
    endpoints: FrameLike, patients: FrameLike | None, spec: CompetingRisksRule
) -> CompetingRows:
    """Read either layout into :class:`CompetingRows` (complete cases, one row per patient).

    Raises
    ------
    InputDataError
        Missing columns, an unknown endpoint or label, bad times or event codes,
        duplicated patients, an unknown reference group, or no rows left.
    """
    frame = to_polars(endpoints, "endpoints")
    require_columns(frame, ("patient_id", "years"), "endpoints")
    layout = "event_type" if "event_type" in frame.columns else "endpoints"
    if layout == "event_type":
        frame, event_label = _event_type_causes(frame, spec)
    else:
        frame, event_label = _endpoint_causes(frame, spec)
    frame, excluded = _not_evaluable(frame, layout)
    _check_times(frame)
    extra = [*spec.covariates, *spec.gray_test_strata]
    group_source = [spec.group_column] if spec.group_column is not None else []
    if group_source and group_source[0] not in frame.columns and patients is None:
        frame = frame.with_columns(pl.lit("all").alias(group_source[0]))
    frame = _join_patients(frame, patients, [*group_source, *extra])
    group_expr = (
        pl.col(spec.group_column).cast(pl.String)
        if spec.group_column is not None
        else pl.lit("all")
    )
    frame = frame.with_columns(group_expr.alias("_group"))
    kept, dropped = split_complete_cases(frame, list(dict.fromkeys(extra)))
    if dropped.height:
        logger.warning(
            "%s: %d patients left out for missing covariates (see excluded_)",
            event_label,
            dropped.height,
        )
    if kept.height == 0:
        raise InputDataError(
            f"endpoints: no usable rows for '{event_label}' ({frame.height} rows read, "
            f"{excluded.height + dropped.height} left out); check the endpoint and covariates"
        )
    group_columns, group_names, groups, reference = _group_terms(kept, spec)
    encoded, covariate_names = encode_covariates(kept, spec.covariates, "patients")
    columns = group_columns + (encoded.get_columns() if encoded.width else [])
    names = group_names + covariate_names
    design = (
        np.column_stack([c.to_numpy() for c in columns]).astype(float)
        if columns
        else np.zeros((kept.height, 0))
    )
    labels = kept.filter(pl.col("_cause") == COMPETING)["_label"].fill_null("competing")
    observed = sorted(set(labels.to_list()))
    competing_label = (
        "+".join(observed) if observed else "+".join(spec.competing_events or ["death"])
    )
    strata = None
    if spec.gray_test_strata:
        strata = (
            kept.select(
                pl.concat_str(
                    [pl.col(s).cast(pl.String) for s in spec.gray_test_strata], separator="|"
                )
            )
            .to_series()
            .to_numpy()
        )
    return CompetingRows(
        event_label=event_label,
        competing_label=competing_label,
        patient_id=kept["patient_id"].cast(pl.String).to_numpy(),
        time=kept["years"].cast(pl.Float64).to_numpy(),
        cause=kept["_cause"].cast(pl.Int8).to_numpy(),
        group=kept["_group"].to_numpy(),
        groups=groups,
        reference_group=reference,
        design=design,
        terms=names,
        families=_families(kept, spec, names, len(group_names), reference),
        strata=strata,
        excluded=pl.concat([excluded, dropped]),
        layout=layout,
        group_column=spec.group_column,
    )


def subset_rows(rows: CompetingRows, keep: np.ndarray, terms: list[int]) -> CompetingRows:
    """The patients in ``keep`` and the design columns ``terms`` only."""
    return CompetingRows(
        event_label=rows.event_label,
        competing_label=rows.competing_label,
        patient_id=rows.patient_id[keep],
        time=rows.time[keep],
        cause=rows.cause[keep],
        group=rows.group[keep],
        groups=rows.groups,
        reference_group=rows.reference_group,
        design=rows.design[np.ix_(keep, np.asarray(terms, dtype=np.intp))],
        terms=[rows.terms[i] for i in terms],
        families=[],
        strata=None if rows.strata is None else rows.strata[keep],
        excluded=rows.excluded,
        layout=rows.layout,
        group_column=rows.group_column,
    )
