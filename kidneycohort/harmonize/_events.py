"""Events: codes mapped, dates parsed, orphan and impossible rows rejected with a reason."""

from __future__ import annotations

from typing import Any

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import conform, require_columns
from kidneycohort.harmonize._plausible import implausible_date
from kidneycohort.harmonize._rows import (
    Check,
    _assumption_counts,
    _cascade,
    _date_text,
    _exact_duplicates,
    _in_source_order,
    _lazy,
    _rejected_rows,
    _text,
    _with_row_identity,
)
from kidneycohort.harmonize._rule import HarmonizeRule
from kidneycohort.io.maps import (
    DEFAULT_EVENT_CODES,
)
from kidneycohort.io.readers import AS_READ_SUFFIX, parse_date_columns
from kidneycohort.vocabulary import fold_code, fold_code_expr

__all__ = ["_clean_events"]


def _clean_events(
    events: Any, status: pl.DataFrame, rule: HarmonizeRule
) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame, int, pl.DataFrame]:
    frame = _lazy(events, "events")
    require_columns(frame, schemas.EVENTS_REQUIRED, "events")
    frame = _with_row_identity(frame, "events")
    dates = {c: t for c, t in schemas.EVENTS.items() if t.is_temporal()}
    frame = parse_date_columns(frame, dates, name="events", date_format=rule.date_format)
    names = frame.collect_schema().names()
    codes = {
        **{e: e for e in schemas.CANONICAL_EVENTS},
        **{fold_code(e): e for e in schemas.CANONICAL_EVENTS},
        **DEFAULT_EVENT_CODES,
        **{fold_code(k): v for k, v in rule.event_codes.items()},
    }
    frame = frame.with_columns(
        _text("patient_id").alias("patient_id"),
        _text("event").alias("_event_raw"),
        fold_code_expr(_text("event"))
        .replace_strict(codes, default=None, return_dtype=pl.String)
        .alias("event"),
    )
    data = _in_source_order(frame.collect())
    n_read = data.height
    assumptions = _assumption_counts(data, "events")
    content = [c for c in data.columns if c not in ("_rid", "source", "source_row", "assumption")]
    data, merged = _exact_duplicates(data, content, "events")
    data = data.join(status, on="patient_id", how="left", maintain_order="left")
    as_read = [c for c in names if c.endswith(AS_READ_SUFFIX)]
    checks: list[Check] = [
        (pl.col("patient_id").is_null(), "missing_patient_id", pl.lit("patient_id is empty")),
        *(
            (
                pl.col(c).is_not_null(),
                "unparseable_date",
                pl.format(
                    "{} '{}' does not parse", pl.lit(c.removesuffix(AS_READ_SUFFIX)), pl.col(c)
                ),
            )
            for c in as_read
        ),
        (pl.col("event_date").is_null(), "missing_date", pl.lit("event_date is empty")),
        implausible_date(pl.col("event_date").cast(pl.Date), "event_date", rule),
        (
            pl.col("event").is_null(),
            "unknown_event",
            pl.format("event '{}' is not a known event", pl.col("_event_raw").fill_null("")),
        ),
        (
            pl.col("_patient_ok").is_null(),
            "unknown_patient",
            pl.format("patient_id '{}' not in patients", pl.col("patient_id")),
        ),
        (
            ~pl.col("_patient_ok"),
            "patient_rejected",
            pl.format("patient_id '{}' rejected in patients", pl.col("patient_id")),
        ),
        (
            pl.col("event_date") < pl.col("birth_date"),
            "before_birth",
            pl.format(
                "event {} before birth {}",
                _date_text(pl.col("event_date")),
                _date_text(pl.col("birth_date")),
            ),
        ),
        (
            pl.col("event_date") > pl.col("death_date"),
            "after_death",
            pl.format(
                "event {} after death {}",
                _date_text(pl.col("event_date")),
                _date_text(pl.col("death_date")),
            ),
        ),
    ]
    if rule.data_cut_date is not None:
        checks.append(
            (
                pl.col("event_date") > pl.lit(rule.data_cut_date, pl.Date),
                "after_data_cut",
                pl.format(
                    "event {} after data cut {}",
                    _date_text(pl.col("event_date")),
                    pl.lit(rule.data_cut_date.isoformat()),
                ),
            )
        )
    data = data.with_columns(_cascade(checks))
    rejected = _rejected_rows(data, "events", checks)
    extras = [
        c
        for c in data.columns
        if c not in schemas.EVENTS
        and not c.startswith("_")
        and not c.endswith(AS_READ_SUFFIX)
        and c not in ("source", "source_row", "assumption", "birth_date", "death_date")
    ]
    used = data.filter(pl.col("_reason").is_null())
    out = pl.concat([conform(used, schemas.EVENTS), used.select(extras)], how="horizontal")
    return (out.sort("patient_id", "event_date", "event"), rejected, merged, n_read, assumptions)
