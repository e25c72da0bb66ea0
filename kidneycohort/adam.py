"""Export of the endpoints table in the CDISC ADaM time-to-event (BDS-TTE) layout.

One row per subject per parameter, with the variables trial programmers expect:
``STUDYID``, ``USUBJID``, ``PARAMCD``, ``PARAM``, ``STARTDT``, ``ADT``, ``AVAL``,
``CNSR`` (0 = event, 1 = censored), ``EVNTDESC``, ``CNSDTDSC`` and a sponsor-defined
competing-event flag ``CMPEVFL`` ("Y" when death ended follow-up first).

References
----------
.. [1] CDISC Analysis Data Model Team. ADaM Basic Data Structure for Time-to-Event
   Analyses, version 1.0 (2012), and ADaM Implementation Guide v1.3 (2021).
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from typing import Any, Final, Literal

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, require_columns, to_polars
from kidneycohort.endpoints import EndpointDefinition, parse_endpoint_definitions
from kidneycohort.errors import ConfigError, InputDataError, did_you_mean

logger = logging.getLogger(__name__)

__all__ = ["ADAM_TTE_COLUMNS", "to_adam_tte"]

ADAM_TTE_COLUMNS: Final[dict[str, pl.DataType]] = {
    "STUDYID": pl.String(),
    "USUBJID": pl.String(),
    "PARAMCD": pl.String(),
    "PARAM": pl.String(),
    "STARTDT": pl.Date(),
    "ADT": pl.Date(),
    "AVAL": pl.Float64(),
    "CNSR": pl.Int8(),
    "EVNTDESC": pl.String(),
    "CNSDTDSC": pl.String(),
    "CMPEVFL": pl.String(),
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
}


def to_adam_tte(
    endpoints: FrameLike,
    definitions: Sequence[EndpointDefinition | Mapping[str, Any]],
    *,
    study_id: str = "",
    time_unit: Literal["days", "years"] = "days",
    count_start_day: bool = True,
) -> pl.DataFrame:
    r"""Turn the endpoints table into an ADaM time-to-event dataset.

    Parameters
    ----------
    endpoints
        Output of :func:`kidneycohort.endpoints.derive_endpoints` (polars or pandas).
    definitions
        The definitions that produced it; they give ``PARAMCD`` and ``PARAM``.
    study_id
        Value of ``STUDYID``.
    time_unit
        Unit of ``AVAL``, stated in ``PARAM`` (e.g. "... (days)").
    count_start_day
        In days, count the origin date as day 1 (common practice in trial analysis
        datasets, from memory):

        .. math:: \mathrm{AVAL} = \mathrm{ADT} - \mathrm{STARTDT} + 1 ;

        otherwise ``ADT - STARTDT``. In years, always
        :math:`(\mathrm{ADT} - \mathrm{STARTDT}) / 365.25`, as the ``years`` column.

    Returns
    -------
    polars.DataFrame
        :data:`ADAM_TTE_COLUMNS`, ordered by ``PARAMCD`` order of ``definitions`` then
        ``USUBJID``. Rows that could not be evaluated (null ``event``) are left out
        and counted in the log.

    Raises
    ------
    InputDataError
        A missing column, or an endpoint with no matching definition.
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
    unit = "days" if time_unit == "days" else "years"
    params = pl.DataFrame(
        {
            "endpoint": names,
            "PARAMCD": [d.paramcd for d in defs],
            "PARAM": [f"{d.label} ({unit})" for d in defs],
            "_order": list(range(len(defs))),
        }
    )
    not_evaluable = df.filter(pl.col("event").is_null()).height
    if not_evaluable:
        logger.info("ADaM export: %d not-evaluable rows left out", not_evaluable)

    days = (pl.col("end_date") - pl.col("start_date")).dt.total_days()
    if time_unit == "days":
        aval = (days + (1 if count_start_day else 0)).cast(pl.Float64)
    else:
        aval = days / schemas.DAYS_PER_YEAR
    event = pl.col("event") == 1
    components = pl.col("reason").str.split("+")
    # A composite's reason names its components: describe each by its own label.
    texts = {
        **_EVENT_TEXT,
        **{d.name: d.label.removeprefix("Time to ").removeprefix("time to ") for d in defs},
    }
    component_text = components.list.eval(
        pl.element().replace_strict(texts, default=pl.element(), return_dtype=pl.String)
    ).list.join(" and ")
    out = (
        df.filter(pl.col("event").is_not_null())
        .join(params, on="endpoint", how="left")
        .sort("_order", "patient_id")
        .select(
            pl.lit(study_id, dtype=pl.String).alias("STUDYID"),
            pl.col("patient_id").alias("USUBJID"),
            "PARAMCD",
            "PARAM",
            pl.col("start_date").alias("STARTDT"),
            pl.col("end_date").alias("ADT"),
            aval.alias("AVAL"),
            pl.when(event).then(0).otherwise(1).cast(pl.Int8).alias("CNSR"),
            pl.when(event)
            .then(component_text)
            .otherwise(
                pl.col("reason").replace_strict(
                    _CENSOR_TEXT, default=pl.col("reason"), return_dtype=pl.String
                )
            )
            .alias("EVNTDESC"),
            pl.when(event)
            .then(pl.lit(None, dtype=pl.String))
            .otherwise(
                pl.col("reason").replace_strict(
                    _CENSOR_TEXT, default=pl.col("reason"), return_dtype=pl.String
                )
            )
            .alias("CNSDTDSC"),
            pl.when(pl.col("competing") == 1)
            .then(pl.lit("Y"))
            .otherwise(pl.lit("N"))
            .alias("CMPEVFL"),
        )
    )
    return out.cast(ADAM_TTE_COLUMNS)
