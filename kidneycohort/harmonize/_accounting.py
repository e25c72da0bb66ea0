"""Row accounting (rows read = used + rejected + merged, per table and reason) and the
:func:`harmonize_tables` entry point.
"""

from __future__ import annotations

import logging
from typing import Any, Final

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, conform
from kidneycohort.errors import AccountingError
from kidneycohort.harmonize._events import _clean_events
from kidneycohort.harmonize._labs import (
    _GOOD_COLUMNS,
    _LAB_CONTENT,
    _collapse_same_day,
    _finish_labs,
    _prepare_labs,
)
from kidneycohort.harmonize._patients import _clean_patients, _finish_patients
from kidneycohort.harmonize._rows import (
    _assumption_counts,
    _exact_duplicates,
    _in_source_order,
    _rejected_rows,
)
from kidneycohort.harmonize._rule import REASON_CODES, HarmonizeResult, HarmonizeRule, resolve_rules

__all__ = ["harmonize_tables"]

logger = logging.getLogger(__name__)


def _account(
    table: str, n_read: int, n_used: int, rejected: pl.DataFrame, merged: pl.DataFrame
) -> tuple[dict[str, Any], pl.DataFrame]:
    row: dict[str, Any] = {
        "table": table,
        "rows_read": n_read,
        "rows_used": n_used,
        "rows_rejected": rejected.filter(pl.col("table") == table).height,
        "rows_merged": merged.filter(pl.col("table") == table).height,
    }
    if row["rows_read"] != row["rows_used"] + row["rows_rejected"] + row["rows_merged"]:
        raise AccountingError(
            f"{table}: rows read {row['rows_read']} != used {row['rows_used']} + rejected "
            f"{row['rows_rejected']} + merged {row['rows_merged']}"
        )
    by_reason = (
        pl.concat(
            [
                rejected.filter(pl.col("table") == table).with_columns(
                    pl.lit("rejected").alias("outcome")
                ),
                merged.filter(pl.col("table") == table).with_columns(
                    pl.lit("merged").alias("outcome")
                ),
            ]
        )
        .group_by("table", "outcome", "reason")
        .agg(pl.len().cast(pl.Int64).alias("rows"))
    )
    unknown = set(by_reason["reason"].to_list()) - set(REASON_CODES)
    if unknown:
        raise AccountingError(f"{table}: undocumented reason codes {sorted(unknown)}")
    return row, by_reason


_REJECTED_EMPTY: Final = pl.DataFrame(schema=schemas.REJECTED)


def harmonize_tables(
    labs: FrameLike,
    patients: FrameLike,
    events: FrameLike | None = None,
    rule: HarmonizeRule | None = None,
    **rule_fields: Any,
) -> HarmonizeResult:
    r"""Harmonise raw labs (and patients, events): standard units, reasons, accounting.

    Parameters
    ----------
    labs
        Raw lab results (polars DataFrame/LazyFrame or pandas) with the columns of
        ``schemas.RAW_LABS_REQUIRED``; ``value`` may be text (``"<0.2"``, ``"0,9"``) or
        numbers; ``sample_date`` text, date or datetime. Optional ``setting``,
        ``source`` and ``source_row`` (1-based row numbers are assigned when absent).
        Already-harmonised labs (``schemas.LABS``) are accepted and pass unchanged.
    patients
        Patients table (``schemas.PATIENTS``; only ``patient_id`` required). Covariate
        columns are kept.
    events
        Optional events table (``schemas.EVENTS``).
    rule
        :class:`HarmonizeRule`; keyword ``rule_fields`` override its fields.

    Returns
    -------
    HarmonizeResult
        ``.labs``, ``.rejected``, ``.merged``, ``.accounting``, ``.accounting_by_reason``,
        ``.assumptions``, ``.patients``, ``.events``.

    Raises
    ------
    InputDataError
        A required column is missing or a date column cannot be parsed at all.
    ConfigError
        An unknown or invalid rule.
    AccountingError
        Rows read differ from used + rejected + merged (a bug).

    Notes
    -----
    Values are converted to the standard unit :math:`x_\text{std} = f_u\,x_u` with
    :math:`f` from :func:`kidneycohort.units.conversion_factor` (creatinine
    :math:`1/88.4` per umol/L, UACR 8.84 per mg/mmol; KDIGO 2012). Same-day ``mean``
    weights each folded row by its ``n_collapsed``, so re-harmonising is a no-op.

    Examples
    --------
    >>> import polars as pl
    >>> labs = pl.DataFrame({"patient_id": ["a", "a"], "sample_date": ["2020-01-02"] * 2,
    ...                      "analyte": ["2160-0", "creatinine"], "value": ["88,4", "x"],
    ...                      "unit": ["umol/L", "mg/dL"]})
    >>> out = harmonize_tables(labs, pl.DataFrame({"patient_id": ["a"]}))
    >>> out.labs["value"].to_list(), out.rejected["reason"].to_list()
    ([1.0], ['not_a_result'])
    """
    resolved = resolve_rules(rule, rule_fields)
    used_patients, status, rejected_p, merged_p, n_patients = _clean_patients(patients, resolved)

    frame, lab_checks = _prepare_labs(labs, status, resolved)
    data = _in_source_order(frame.collect())
    del frame  # drops the plan's reference to the pre-join copy
    n_labs = data.height
    assumptions_l = _assumption_counts(data, "labs")
    # Identical rows always get the same reason, so duplicates can be looked for on the
    # rejected and the usable side separately; the usable side keeps only what it needs.
    is_bad = data["_reason"].is_not_null()
    bad = data.filter(is_bad)
    good = data.filter(~is_bad).select(_GOOD_COLUMNS)
    del data
    bad, merged_bad = _exact_duplicates(bad, list(_LAB_CONTENT), "labs")
    good, merged_good = _exact_duplicates(good, list(_LAB_CONTENT), "labs")
    merged_exact = pl.concat([merged_bad, merged_good])
    rejected_l = _rejected_rows(bad, "labs", lab_checks)
    del bad
    kept, merged_day = _collapse_same_day(good, resolved.same_day_rule)
    del good
    labs_out = _finish_labs(kept)

    patients_assumptions = (
        used_patients.filter(pl.col("assumption").is_not_null())
        .group_by("source", "assumption")
        .agg(pl.len().cast(pl.Int64).alias("rows"))
        .select(pl.lit("patients").alias("table"), "source", "assumption", "rows")
    )
    rejected_parts = [rejected_l, rejected_p]
    merged_parts = [merged_exact, merged_day, merged_p]
    assumption_parts = [assumptions_l, patients_assumptions]
    events_out = None
    n_events = 0
    if events is not None:
        events_out, rejected_e, merged_e, n_events, assumptions_e = _clean_events(
            events, status, resolved
        )
        rejected_parts.append(rejected_e)
        merged_parts.append(merged_e)
        assumption_parts.append(assumptions_e)

    rejected = pl.concat([conform(p, schemas.REJECTED) for p in rejected_parts]).sort(
        "table", "source", "source_row"
    )
    merged = pl.concat([conform(p, schemas.REJECTED) for p in merged_parts]).sort(
        "table", "source", "source_row"
    )
    rows, reasons = [], []
    for table, n_read, n_used in (
        ("labs", n_labs, labs_out.height),
        ("patients", n_patients, used_patients.height),
        *((("events", n_events, events_out.height),) if events_out is not None else ()),
    ):
        row, by_reason = _account(table, n_read, n_used, rejected, merged)
        rows.append(row)
        reasons.append(by_reason)
    accounting = pl.DataFrame(
        rows,
        schema={
            "table": pl.String,
            "rows_read": pl.Int64,
            "rows_used": pl.Int64,
            "rows_rejected": pl.Int64,
            "rows_merged": pl.Int64,
        },
    )
    accounting_by_reason = pl.concat(reasons).sort("table", "outcome", "reason")
    assumptions = pl.concat(assumption_parts).sort("table", "source", "assumption")
    if assumptions.height:
        logger.info("harmonize: assumptions applied: %s", assumptions.head(50).to_dicts())
    logger.info("harmonize: %s", accounting.to_dicts())
    return HarmonizeResult(
        labs=labs_out,
        rejected=rejected,
        merged=merged,
        accounting=accounting,
        accounting_by_reason=accounting_by_reason,
        assumptions=assumptions,
        patients=_finish_patients(used_patients),
        events=events_out,
        rule=resolved,
    )
