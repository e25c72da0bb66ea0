"""Patients: codes mapped, dates and numbers parsed, impossible rows rejected with a reason."""

from __future__ import annotations

from typing import Any, Final

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import conform, require_columns
from kidneycohort.harmonize._plausible import body_size, patient_checks
from kidneycohort.harmonize._rows import (
    Check,
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
from kidneycohort.io.readers import AS_READ_SUFFIX, parse_date_columns
from kidneycohort.vocabulary import fold_code_expr, sex_expr, unknown_sex_error

__all__ = ["_clean_patients", "_finish_patients"]

_PATIENT_DATES: Final = {c: t for c, t in schemas.PATIENTS.items() if t.is_temporal()}


_PATIENT_NUMBERS: Final = ("age_at_index", "height_cm", "weight_kg")


_TRUE_TEXT: Final = {
    "true": True,
    "t": True,
    "yes": True,
    "y": True,
    "1": True,
    "false": False,
    "f": False,
    "no": False,
    "n": False,
    "0": False,
}


def _clean_patients(
    patients: Any, rule: HarmonizeRule
) -> tuple[pl.DataFrame, pl.DataFrame, pl.DataFrame, pl.DataFrame, int]:
    """Return (used patients, status lookup, rejected, merged, rows read)."""
    frame = _lazy(patients, "patients")
    require_columns(frame, schemas.PATIENTS_REQUIRED, "patients")
    frame = _with_row_identity(frame, "patients")
    frame = parse_date_columns(frame, _PATIENT_DATES, name="patients", date_format=rule.date_format)
    names = frame.collect_schema().names()
    schema = frame.collect_schema()
    exprs: list[pl.Expr] = [_text("patient_id").alias("patient_id")]
    notes: list[pl.Expr] = [pl.col("assumption")]
    bad_number: list[str] = []
    if "sex" in names:
        mapped = sex_expr(pl.col("sex"), rule.sex_codes)
        # an unknown code is an error naming it (one sex vocabulary), not a missing sex
        unknown = (
            frame.select(_text("sex").alias("code"), mapped.alias("mapped"))
            .filter(pl.col("mapped").is_null() & pl.col("code").is_not_null())
            .select("code")
            .unique()
            .head(6)
            .collect()
        )
        if unknown.height:
            raise unknown_sex_error("patients.sex", unknown["code"].to_list())
        exprs.append(mapped.alias("sex"))
    for column in _PATIENT_NUMBERS:
        if column in names and not schema[column].is_numeric():
            number = (
                _text(column).str.replace(",", ".", literal=True).cast(pl.Float64, strict=False)
            )
            bad_number.append(column)
            exprs.append(number.alias(column))
    if "black_race" in names and schema["black_race"] != pl.Boolean:
        flag = fold_code_expr(pl.col("black_race")).replace_strict(
            _TRUE_TEXT, default=None, return_dtype=pl.Boolean
        )
        notes.append(
            pl.when(flag.is_null() & _text("black_race").is_not_null()).then(
                pl.lit("black_race value not recognised, set missing")
            )
        )
        exprs.append(flag.alias("black_race"))
    exprs.append(pl.concat_str(notes, separator="; ", ignore_nulls=True).alias("_note"))
    frame = frame.with_columns(pl.col(c).alias(f"_raw_{c}") for c in bad_number)
    frame = frame.with_columns(exprs)
    frame = frame.with_columns(
        pl.when(pl.col("_note") != "").then(pl.col("_note")).alias("assumption")
    ).drop("_note")
    data = _plausible_body_size(_in_source_order(frame.collect()), rule)
    n_read = data.height

    bookkeeping = {"_rid", "source", "source_row", "assumption"}
    content = [c for c in data.columns if c not in bookkeeping and not c.startswith("_raw_")]
    data, merged = _exact_duplicates(data, content, "patients")
    id_count = pl.len().over("patient_id")
    checks: list[Check] = [
        (pl.col("patient_id").is_null(), "missing_patient_id", pl.lit("patient_id is empty")),
    ]
    for column in _PATIENT_DATES:
        as_read = column + AS_READ_SUFFIX
        if as_read in data.columns:
            checks.append(
                (
                    pl.col(as_read).is_not_null(),
                    "unparseable_date",
                    pl.format("{} '{}' does not parse", pl.lit(column), pl.col(as_read)),
                )
            )
    for column in bad_number:
        raw = _text(f"_raw_{column}")
        checks.append(
            (
                pl.col(column).is_null() & raw.is_not_null(),
                "invalid_number",
                pl.format("{} '{}' is not a number", pl.lit(column), raw),
            )
        )
    checks.append(
        (
            (id_count > 1) & pl.col("patient_id").is_not_null(),
            "duplicate_patient_id",
            pl.format("patient_id '{}' on {} differing rows", pl.col("patient_id"), id_count),
        )
    )
    if "death_date" in data.columns and "birth_date" in data.columns:
        checks.append(
            (
                pl.col("death_date") < pl.col("birth_date"),
                "death_before_birth",
                pl.format(
                    "death {} before birth {}",
                    _date_text(pl.col("death_date")),
                    _date_text(pl.col("birth_date")),
                ),
            )
        )
    data = data.with_columns(_cascade(checks + patient_checks(data.columns, rule)))
    rejected = _rejected_rows(data, "patients", checks + patient_checks(data.columns, rule))
    used = data.filter(pl.col("_reason").is_null())
    lookup_cols = [c for c in ("birth_date", "death_date") if c in data.columns]
    status = (
        data.filter(pl.col("patient_id").is_not_null())
        .group_by("patient_id")
        .agg(
            (pl.col("_reason").is_null().all()).alias("_patient_ok"),
            *(pl.col(c).first() for c in lookup_cols),
        )
    )
    for c in ("birth_date", "death_date"):
        if c not in status.columns:
            status = status.with_columns(pl.lit(None, pl.Date).alias(c))
    return used, status, rejected, merged, n_read


def _plausible_body_size(data: pl.DataFrame, rule: HarmonizeRule) -> pl.DataFrame:
    """An implausible height or weight set missing, the reason added to ``assumption``."""
    exprs, notes = body_size(data.columns, rule)
    if not exprs:
        return data
    note = pl.concat_str([pl.col("assumption"), *notes], separator="; ", ignore_nulls=True)
    return data.with_columns(pl.when(note != "").then(note).alias("assumption")).with_columns(exprs)


def _finish_patients(used: pl.DataFrame) -> pl.DataFrame:
    extras = [
        c
        for c in used.columns
        if c not in schemas.PATIENTS
        and not c.startswith("_")
        and not c.endswith(AS_READ_SUFFIX)
        and c not in ("source", "source_row", "assumption")
    ]
    out = conform(used, schemas.PATIENTS)
    if extras:
        out = pl.concat([out, used.select(extras)], how="horizontal")
    return out.sort("patient_id")
