"""The endpoints table in the CDISC ADaM time-to-event (BDS-TTE) layout: ADTTE.

One row per subject per parameter, for every randomised subject: a subject whose
endpoint could not be evaluated (no baseline, kidney failure before the origin, ...) is
kept, censored at the origin date, with the reason in the censoring description. Rows
carry treatment (``TRTP``/``TRTA`` and their numbers), population flags, ``PARAMN``,
source-record variables (``SRCDOM``, ``SRCVAR``, ``SRCSEQ``: which dataset variable gave
``ADT``) and a sponsor-defined competing-event flag ``CMPEVFL`` ("Y" when death ended
follow-up first).

References
----------
.. [1] CDISC Analysis Data Model Team. The ADaM Basic Data Structure for Time-to-Event
   Analyses, version 1.0 (2012): STARTDT, ADT, AVAL, CNSR (0 = event, 1 = censored),
   EVNTDESC, CNSDTDSC, SRCDOM/SRCVAR/SRCSEQ.
.. [2] CDISC Analysis Data Model Team. ADaM Implementation Guide v1.3 (2021).
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from typing import Any, Final, Literal

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, follows_input, require_columns, to_polars
from kidneycohort.adam._metadata import AdamDataset, Variable, make_dataset, standard
from kidneycohort.adam._subjects import subject_facts
from kidneycohort.endpoints import (
    NOT_EVALUABLE_REASONS,
    Composite,
    EndpointDefinition,
    parse_endpoint_definitions,
)
from kidneycohort.errors import ConfigError, InputDataError, did_you_mean

logger = logging.getLogger(__name__)

__all__ = ["ADAM_TTE_COLUMNS", "adtte_dataset", "to_adam_tte"]

ADAM_TTE_COLUMNS: Final[dict[str, pl.DataType]] = {
    "STUDYID": pl.String(),
    "USUBJID": pl.String(),
    "TRTP": pl.String(),
    "TRTPN": pl.Int64(),
    "TRTA": pl.String(),
    "TRTAN": pl.Int64(),
    "ITTFL": pl.String(),
    "SAFFL": pl.String(),
    "PARAMCD": pl.String(),
    "PARAM": pl.String(),
    "PARAMN": pl.Int64(),
    "STARTDT": pl.Date(),
    "ADT": pl.Date(),
    "AVAL": pl.Float64(),
    "CNSR": pl.Int64(),
    "EVNTDESC": pl.String(),
    "CNSDTDSC": pl.String(),
    "CMPEVFL": pl.String(),
    "SRCDOM": pl.String(),
    "SRCVAR": pl.String(),
    "SRCSEQ": pl.Int64(),
}

# Plain-language descriptions of the endpoints table's reason codes.
_EVENT_TEXT: Final = {
    "confirmed": "eGFR criterion met and confirmed by a later value",
    "sustained": "eGFR criterion met and sustained to the last value",
    "unconfirmed_then_death": "eGFR criterion met, death before confirmation",
    "unconfirmed_then_kidney_failure": "eGFR criterion met, kidney failure before confirmation",
    "unconfirmed_last_value": "eGFR criterion met at the last value (unconfirmed)",
    "dialysis": "chronic dialysis started",
    "transplant": "kidney transplant",
    "kfrt_date": "kidney replacement therapy started",
    "death": "death",
    "kidney_death": "kidney death",
}
_CENSOR_TEXT: Final = {
    "last_assessment": "last eGFR assessment",
    "no_post_index_assessment": "no eGFR assessment after the origin date",
    "kidney_failure": "kidney failure (eGFR no longer assessable)",
    "data_cut": "data cut-off",
    "end_of_followup": "end of follow-up",
    "death": "death (competing event)",
    "death_censored_at_last_assessment": "death before an event: censored at the last eGFR "
    "assessment (cause-specific)",
    **{code: f"origin date: not evaluable, {text}" for code, text in NOT_EVALUABLE_REASONS.items()},
}
# Which dataset variable gives ADT, by reason code (SRCDOM, SRCVAR). eGFR-based dates
# point at the eGFR analysis dataset's record (SRCSEQ = its ASEQ).
EGFR_DATASET: Final = "ADEGFR"
_SOURCE: Final[dict[str, tuple[str, str]]] = {
    **{
        code: (EGFR_DATASET, "ADT")
        for code in (
            "confirmed",
            "sustained",
            "unconfirmed_then_death",
            "unconfirmed_then_kidney_failure",
            "unconfirmed_last_value",
            "last_assessment",
            "death_censored_at_last_assessment",
        )
    },
    "dialysis": ("ADSL", "KFRTDT"),
    "transplant": ("ADSL", "KFRTDT"),
    "kfrt_date": ("ADSL", "KFRTDT"),
    "kidney_failure": ("ADSL", "KFRTDT"),
    "death": ("ADSL", "DTHDT"),
    "kidney_death": ("ADSL", "DTHDT"),
    "data_cut": ("ADSL", "DCUTDT"),
    "end_of_followup": ("ADSL", "EOSDT"),
    "no_post_index_assessment": ("ADSL", "RANDDT"),
    **{code: ("ADSL", "RANDDT") for code in NOT_EVALUABLE_REASONS},
}
# The source of a composite's event is that of its first component's kind.
_KIND_SOURCE: Final = {
    "egfr_decline": (EGFR_DATASET, "ADT"),
    "egfr_below": (EGFR_DATASET, "ADT"),
    "kidney_failure": ("ADSL", "KFRTDT"),
    "death": ("ADSL", "DTHDT"),
    "kidney_death": ("ADSL", "DTHDT"),
}

_VARIABLES: Final = (
    standard("STUDYID", "text", "Assigned", "study.name or adam.study_id"),
    standard("USUBJID", "text", "Predecessor", "patients.patient_id"),
    standard("TRTP", "text", "Predecessor", "patients.group (randomised arm)"),
    standard("TRTPN", "integer", "Derived", "arm number in arm order"),
    standard("TRTA", "text", "Predecessor", "patients.actual_group, else the planned arm"),
    standard("TRTAN", "integer", "Derived", "arm number in arm order"),
    standard("ITTFL", "text", "Derived", "Y when the subject has an arm and an index date"),
    standard("SAFFL", "text", "Derived", "see ADSL.SAFFL"),
    standard("PARAMCD", "text", "Assigned", "endpoint definition paramcd"),
    standard("PARAM", "text", "Assigned", "endpoint definition label and time unit"),
    standard("PARAMN", "integer", "Assigned", "order of the endpoint definitions, from 1"),
    standard("STARTDT", "date", "Derived", "endpoints.start_date (the index date)"),
    standard("ADT", "date", "Derived", "endpoints.end_date; STARTDT when not evaluable"),
    standard("AVAL", "float", "Derived", "ADT - STARTDT + 1 days (or years)"),
    standard("CNSR", "integer", "Derived", "0 event, 1 censored (endpoints.event)"),
    standard("EVNTDESC", "text", "Derived", "endpoints.reason in words"),
    standard("CNSDTDSC", "text", "Derived", "censoring reason in words; null for events"),
    Variable(
        "CMPEVFL",
        "Competing Event Flag",
        "text",
        "Derived",
        "Y when death ended follow-up before the event (endpoints.competing)",
    ),
    standard("SRCDOM", "text", "Derived", "dataset holding the date in ADT"),
    standard("SRCVAR", "text", "Derived", "variable holding the date in ADT"),
    standard("SRCSEQ", "integer", "Derived", "ADEGFR.ASEQ of the record dated ADT"),
)


@follows_input
def to_adam_tte(
    endpoints: FrameLike,
    definitions: Sequence[EndpointDefinition | Mapping[str, Any]],
    *,
    subjects: FrameLike | None = None,
    egfr_records: FrameLike | None = None,
    arm_order: Sequence[str] | None = None,
    study_id: str = "",
    time_unit: Literal["days", "years"] = "days",
    count_start_day: bool = True,
) -> pl.DataFrame:
    """Turn the endpoints table into an ADaM time-to-event dataset (the rows of ADTTE).

    See :func:`adtte_dataset` (which also returns the variable metadata) for the
    parameters.

    Returns
    -------
    polars.DataFrame
        :data:`ADAM_TTE_COLUMNS`, ordered by ``PARAMN`` then ``USUBJID``.
    """
    return adtte_dataset(
        endpoints,
        definitions,
        subjects=subjects,
        egfr_records=egfr_records,
        arm_order=arm_order,
        study_id=study_id,
        time_unit=time_unit,
        count_start_day=count_start_day,
    ).data


def adtte_dataset(
    endpoints: FrameLike,
    definitions: Sequence[EndpointDefinition | Mapping[str, Any]],
    *,
    subjects: FrameLike | None = None,
    egfr_records: FrameLike | None = None,
    arm_order: Sequence[str] | None = None,
    study_id: str = "",
    time_unit: Literal["days", "years"] = "days",
    count_start_day: bool = True,
) -> AdamDataset:
    r"""ADTTE: one row per randomised subject and endpoint, with variable metadata.

    Parameters
    ----------
    endpoints
        Output of :func:`kidneycohort.endpoints.derive_endpoints` (polars or pandas).
    definitions
        The definitions that produced it; they give ``PARAMCD``, ``PARAM`` and ``PARAMN``.
    subjects
        Harmonised patients (``patient_id``, ``group``, ``index_date``; optional
        ``actual_group``, ``first_dose_date``) for treatment and population flags;
        without it those variables are empty.
    egfr_records
        Rows of the eGFR analysis dataset for the endpoints' equation (``USUBJID``,
        ``ADT``, ``ASEQ``; see :func:`kidneycohort.adam.adegfr_dataset`) to fill
        ``SRCSEQ`` of eGFR-dated rows (the first record of that day); without it
        ``SRCSEQ`` is empty.
    arm_order
        Arms in numbering order (``TRTPN``); default text order.
    study_id
        Value of ``STUDYID``.
    time_unit
        Unit of ``AVAL``, stated in ``PARAM`` (e.g. "... (days)").
    count_start_day
        In days, count the origin date as day 1 (common practice in trial analysis
        datasets, from memory):

        .. math:: \mathrm{AVAL} = \mathrm{ADT} - \mathrm{STARTDT} + 1 ;

        otherwise ``ADT - STARTDT``. In years, always
        :math:`(\mathrm{ADT} - \mathrm{STARTDT}) / 365.25`.

    Returns
    -------
    AdamDataset
        Rows ordered by ``PARAMN`` then ``USUBJID``. A not-evaluable row is censored at
        its origin (``ADT = STARTDT``, ``CNSR = 1``) with the reason in ``EVNTDESC`` and
        ``CNSDTDSC``. Only rows without an origin date (no index date: not randomised)
        are left out, and counted in the log.

    Raises
    ------
    InputDataError
        A missing column, an endpoint with no matching definition, an arm not in
        ``arm_order``.
    ConfigError
        An unknown ``time_unit``.
    """
    if time_unit not in ("days", "years"):
        raise ConfigError(
            f"time_unit: expected 'days' or 'years', got {time_unit!r}"
            f"{did_you_mean(str(time_unit), ['days', 'years'])}"
        )
    df = to_polars(endpoints, "endpoints")
    require_columns(df, tuple(schemas.ENDPOINTS), "endpoints")
    defs = parse_endpoint_definitions(list(definitions), where="definitions")
    names = [d.name for d in defs]
    unknown = sorted(set(df["endpoint"].unique().drop_nulls().to_list()) - set(names))
    if unknown:
        raise InputDataError(
            f"endpoints: endpoint {unknown[0]!r} has no definition{did_you_mean(unknown[0], names)}; "
            "pass the definitions used to derive the table"
        )
    no_origin = df.filter(pl.col("start_date").is_null())
    if no_origin.height:
        logger.info(
            "ADTTE: %d rows of %d subjects without an origin (index) date left out",
            no_origin.height,
            no_origin["patient_id"].n_unique(),
        )
    rows = _rows(df.filter(pl.col("start_date").is_not_null()), defs, time_unit, count_start_day)
    rows = rows.with_columns(pl.lit(study_id, pl.String).alias("STUDYID"))
    rows = _with_subjects(rows, subjects, arm_order)
    rows = _with_source_sequence(rows, egfr_records, defs)
    rows = rows.sort("PARAMN", "USUBJID")
    return make_dataset(
        "ADTTE", "Time-to-Event Analysis Dataset", rows, _VARIABLES, keys=("USUBJID", "PARAMCD")
    )


def _rows(
    df: pl.DataFrame,
    defs: Sequence[EndpointDefinition],
    time_unit: str,
    count_start_day: bool,
) -> pl.DataFrame:
    unit = "days" if time_unit == "days" else "years"
    params = pl.DataFrame(
        {
            "endpoint": [d.name for d in defs],
            "PARAMCD": [d.paramcd for d in defs],
            "PARAM": [f"{d.label} ({unit})" for d in defs],
            "PARAMN": list(range(1, len(defs) + 1)),
            "_kind_source": [
                "|".join(_composite_source(d, defs)) if isinstance(d, Composite) else None
                for d in defs
            ],
        },
        schema_overrides={"PARAMN": pl.Int64},
    )
    evaluable = pl.col("event").is_not_null()
    adt = pl.when(evaluable).then(pl.col("end_date")).otherwise(pl.col("start_date"))
    days = (adt - pl.col("start_date")).dt.total_days()
    if time_unit == "days":
        aval = (days + (1 if count_start_day else 0)).cast(pl.Float64)
    else:
        aval = days / schemas.DAYS_PER_YEAR
    event = pl.col("event") == 1
    # A composite's reason names its components: describe each by its own label.
    texts = {
        **_EVENT_TEXT,
        **{d.name: d.label.removeprefix("Time to ").removeprefix("time to ") for d in defs},
    }
    component_text = (
        pl.col("reason")
        .str.split("+")
        .list.eval(pl.element().replace_strict(texts, default=pl.element(), return_dtype=pl.String))
        .list.join(" and ")
    )
    censor_text = pl.col("reason").replace_strict(
        _CENSOR_TEXT, default=pl.col("reason"), return_dtype=pl.String
    )
    source = pl.col("reason").replace_strict(
        {k: "|".join(v) for k, v in _SOURCE.items()}, default=None, return_dtype=pl.String
    )
    # composites' events: the first component's source (reason names the components)
    source = (
        pl.when(event & pl.col("_kind_source").is_not_null())
        .then(pl.col("_kind_source"))
        .otherwise(source)
    )
    return (
        df.join(params, on="endpoint", how="left")
        .with_columns(source.alias("_source"))
        .select(
            pl.col("patient_id").cast(pl.String).alias("USUBJID"),
            "PARAMCD",
            "PARAM",
            "PARAMN",
            pl.col("start_date").alias("STARTDT"),
            adt.alias("ADT"),
            aval.alias("AVAL"),
            pl.when(event).then(0).otherwise(1).cast(pl.Int64).alias("CNSR"),
            pl.when(event).then(component_text).otherwise(censor_text).alias("EVNTDESC"),
            pl.when(event).then(pl.lit(None, pl.String)).otherwise(censor_text).alias("CNSDTDSC"),
            pl.when(pl.col("competing") == 1)
            .then(pl.lit("Y"))
            .otherwise(pl.lit("N"))
            .alias("CMPEVFL"),
            pl.col("_source").str.split_exact("|", 1).struct.field("field_0").alias("SRCDOM"),
            pl.col("_source").str.split_exact("|", 1).struct.field("field_1").alias("SRCVAR"),
        )
    )


def _composite_source(composite: Composite, defs: Sequence[EndpointDefinition]) -> tuple[str, str]:
    by_name = {d.name: d for d in defs}
    first = by_name.get(composite.components[0])
    if first is None:
        return _KIND_SOURCE["egfr_decline"]
    return _KIND_SOURCE.get(first.kind, _KIND_SOURCE["egfr_decline"])


def _with_subjects(
    rows: pl.DataFrame, subjects: FrameLike | None, arm_order: Sequence[str] | None
) -> pl.DataFrame:
    if subjects is None:
        logger.info("ADTTE: no subjects table given; treatment and population flags left empty")
        return rows.with_columns(
            pl.lit(None, pl.String).alias(c) for c in ("TRTP", "TRTA", "ITTFL", "SAFFL")
        ).with_columns(pl.lit(None, pl.Int64).alias(c) for c in ("TRTPN", "TRTAN"))
    facts, _ = subject_facts(subjects, arm_order)
    return rows.join(
        facts.select("USUBJID", "TRTP", "TRTPN", "TRTA", "TRTAN", "ITTFL", "SAFFL"),
        on="USUBJID",
        how="left",
    )


def _with_source_sequence(
    rows: pl.DataFrame, egfr_records: FrameLike | None, defs: Sequence[EndpointDefinition]
) -> pl.DataFrame:
    if egfr_records is None:
        return rows.with_columns(pl.lit(None, pl.Int64).alias("SRCSEQ"))
    records = to_polars(egfr_records, "egfr_records")
    require_columns(records, ("USUBJID", "ADT", "ASEQ"), "egfr_records")
    first = records.group_by("USUBJID", "ADT").agg(pl.col("ASEQ").min().alias("_seq"))
    return (
        rows.join(first, on=["USUBJID", "ADT"], how="left")
        .with_columns(
            pl.when(pl.col("SRCDOM") == EGFR_DATASET)
            .then(pl.col("_seq"))
            .otherwise(None)
            .cast(pl.Int64)
            .alias("SRCSEQ")
        )
        .drop("_seq")
    )
