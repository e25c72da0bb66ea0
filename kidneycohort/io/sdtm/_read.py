"""Read CDISC SDTM domains (DM, LB, DS, EX, PR) into kidneycohort's canonical raw tables.

* ``patients`` from DM (``USUBJID``, ``SEX``, ``BRTHDTC``, ``AGE``, ``ARM``/``ACTARM``,
  ``DTHDTC``, ``SITEID``), with the index date from EX (first dose), DS (randomisation) or
  DM (``RFSTDTC``), the end of follow-up from DS end-of-study records, and
  ``first_dose_date`` / ``actual_group`` kept for the ADaM population flags;
* ``labs`` from LB: the configured ``LBTESTCD`` values, the standard result (``LBSTRESN``,
  else ``LBSTRESC``, with ``LBSTRESU``) or the original one (``LBORRES``/``LBORRESU``), the
  other kept as reported; ``LBSTAT = "NOT DONE"`` rows carry the text "NOT DONE" and the
  reason (``LBREASND``) so the harmonise stage rejects them with reason ``not_done``;
  ``LBDTC`` partial dates follow the stated rule (``partial_date`` rejections when not
  imputed); ``source_row`` is the row number in the LB file;
* ``events`` from the event domain (default PR): dialysis and transplant by decoded term.

Every row of LB with a configured test goes to harmonise (nothing is dropped here);
every imputation and fallback is written to the ``assumption`` column.

References
----------
.. [1] CDISC SDTM Implementation Guide v3.4: DM, LB (LBSTAT, LBREASND, LBORRES,
   LBSTRESN), DS, EX, PR domains.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import polars as pl

from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.io.cdisc_files import read_dataset_json, read_xpt
from kidneycohort.io.readers import AS_READ_SUFFIX
from kidneycohort.io.sdtm._dates import read_dtc
from kidneycohort.io.sdtm._spec import SdtmSource

__all__ = ["SdtmTables", "read_domain", "read_sdtm"]

logger = logging.getLogger(__name__)

_SEX: dict[str, str] = {"F": "female", "M": "male"}


@dataclass(frozen=True)
class SdtmTables:
    """What :func:`read_sdtm` returns: canonical raw ``patients``, ``labs``, ``events``."""

    patients: pl.DataFrame
    labs: pl.DataFrame
    events: pl.DataFrame


def read_domain(spec: SdtmSource, domain: str, required: bool = True) -> pl.DataFrame | None:
    """One domain as a polars frame (XPT or Dataset-JSON), or None when optional and absent."""
    path = spec.file(domain)
    if path is None:
        if required:
            have = (
                sorted(p.name for p in Path(spec.folder).glob("*"))
                if Path(spec.folder).is_dir()
                else []
            )
            raise InputDataError(
                f"{spec.where()}: domain {domain.upper()} not found (looked for "
                f"{domain}.xpt / {domain}.json; files: {', '.join(have) or 'none'})"
            )
        return None
    if path.suffix == ".xpt":
        return read_xpt(path)
    return read_dataset_json(path)[0]


def _need(frame: pl.DataFrame, columns: tuple[str, ...], domain: str, spec: SdtmSource) -> None:
    for column in columns:
        if column not in frame.columns:
            raise InputDataError(
                f"{spec.where()}: {domain.upper()} has no variable {column}"
                f"{did_you_mean(column, frame.columns)}"
            )


def _text(frame: pl.DataFrame, column: str) -> pl.Expr:
    if column not in frame.columns:
        return pl.lit(None, pl.String)
    value = pl.col(column).cast(pl.String).str.strip_chars()
    return pl.when(value != "").then(value)


def _notes(notes: list[pl.Expr]) -> pl.Expr:
    joined = pl.concat_str(notes, separator="; ", ignore_nulls=True)
    return pl.when(joined != "").then(joined).alias("assumption")


# ---- labs ------------------------------------------------------------------------------
def read_labs(spec: SdtmSource, lb: pl.DataFrame) -> pl.DataFrame:
    """LB rows of the configured tests -> canonical raw labs (``schemas.RAW_LABS``)."""
    _need(lb, ("USUBJID", "LBTESTCD", "LBDTC"), "lb", spec)
    lb = lb.with_row_index("source_row", offset=1).filter(
        _text(lb, "LBTESTCD").is_in(list(spec.test_codes))
    )
    when, unused, note = read_dtc(_text(lb, "LBDTC"), spec.partial_dates, "LBDTC")
    standard_number = (
        pl.col("LBSTRESN").cast(pl.Float64)
        if "LBSTRESN" in lb.columns
        else pl.lit(None, pl.Float64)
    )
    standard = pl.coalesce(standard_number.cast(pl.String), _text(lb, "LBSTRESC"))
    original = _text(lb, "LBORRES")
    if spec.result == "standard":
        value, unit = standard, _text(lb, "LBSTRESU")
        reported, reported_unit = original, _text(lb, "LBORRESU")
    else:
        value, unit = original, _text(lb, "LBORRESU")
        reported, reported_unit = standard, _text(lb, "LBSTRESU")
    not_done = _text(lb, "LBSTAT").str.to_uppercase() == "NOT DONE"
    done_text = pl.concat_str(
        [pl.lit("NOT DONE"), _text(lb, "LBREASND")], separator=": ", ignore_nulls=True
    )
    fallback = pl.when(
        pl.lit(spec.result == "standard") & standard.is_null() & original.is_not_null() & ~not_done
    ).then(pl.lit("LB standard result empty"))
    return lb.select(
        _text(lb, "USUBJID").alias("patient_id"),
        when.alias("sample_date"),
        unused.alias("sample_date" + AS_READ_SUFFIX),
        _text(lb, "LBTESTCD").replace_strict(spec.test_codes, default=None).alias("analyte"),
        pl.when(not_done).then(done_text).otherwise(value).alias("value"),
        unit.alias("unit"),
        pl.lit(spec.lab_setting, pl.String).alias("setting"),
        reported.alias("reported_value"),
        reported_unit.alias("reported_unit"),
        pl.lit(spec.name).alias("source"),
        pl.col("source_row").cast(pl.Int64),
        _notes([note, fallback]),
    )


# ---- patients --------------------------------------------------------------------------
def _first_dose(spec: SdtmSource, ex: pl.DataFrame | None) -> pl.DataFrame:
    schema = {"USUBJID": pl.String, "first_dose_date": pl.Date}
    if ex is None:
        return pl.DataFrame(schema=schema)
    _need(ex, ("USUBJID", "EXSTDTC"), "ex", spec)
    start, _, _ = read_dtc(_text(ex, "EXSTDTC"), spec.partial_dates, "EXSTDTC")
    return (
        ex.select(
            _text(ex, "USUBJID").alias("USUBJID"), start.cast(pl.Date).alias("first_dose_date")
        )
        .group_by("USUBJID")
        .agg(pl.col("first_dose_date").min())
    )


def _disposition(spec: SdtmSource, ds: pl.DataFrame | None) -> pl.DataFrame:
    schema = {"USUBJID": pl.String, "randomization_date": pl.Date, "end_of_followup": pl.Date}
    if ds is None:
        return pl.DataFrame(schema=schema)
    _need(ds, ("USUBJID", "DSDECOD", "DSSTDTC"), "ds", spec)
    start, _, _ = read_dtc(_text(ds, "DSSTDTC"), spec.partial_dates, "DSSTDTC")
    rows = ds.select(
        _text(ds, "USUBJID").alias("USUBJID"),
        _text(ds, "DSDECOD").str.to_uppercase().alias("decod"),
        _text(ds, "DSCAT").str.to_uppercase().alias("cat"),
        start.cast(pl.Date).alias("date"),
    )
    return rows.group_by("USUBJID").agg(
        pl.col("date").filter(pl.col("decod") == "RANDOMIZED").min().alias("randomization_date"),
        pl.col("date")
        .filter(pl.col("cat") == spec.end_of_study_category.upper())
        .max()
        .alias("end_of_followup"),
    )


def read_patients(
    spec: SdtmSource, dm: pl.DataFrame, ex: pl.DataFrame | None, ds: pl.DataFrame | None
) -> pl.DataFrame:
    """DM (+ EX first dose, DS dates) -> canonical raw patients."""
    _need(dm, ("USUBJID", "SEX"), "dm", spec)
    birth, _, birth_note = read_dtc(_text(dm, "BRTHDTC"), spec.partial_dates, "BRTHDTC")
    death, death_unused, death_note = read_dtc(_text(dm, "DTHDTC"), spec.partial_dates, "DTHDTC")
    reference, _, _ = read_dtc(_text(dm, "RFSTDTC"), spec.partial_dates, "RFSTDTC")
    frame = dm.with_row_index("source_row", offset=1).select(
        "source_row",
        _text(dm, "USUBJID").alias("USUBJID"),
        _text(dm, "SEX").str.to_uppercase().replace_strict(_SEX, default=None).alias("sex"),
        birth.cast(pl.Date).alias("birth_date"),
        pl.col("AGE").cast(pl.Float64).alias("_age")
        if "AGE" in dm.columns
        else pl.lit(None, pl.Float64).alias("_age"),
        _text(dm, "ARM").alias("group"),
        pl.coalesce(_text(dm, "ACTARM"), _text(dm, "ARM")).alias("actual_group"),
        death.cast(pl.Date).alias("death_date"),
        reference.cast(pl.Date).alias("_reference_start"),
        _text(dm, "SITEID").alias("site"),
        birth_note.alias("_birth_note"),
        death_note.alias("_death_note"),
        pl.when(death_unused.is_not_null())
        .then(pl.lit("DTHDTC partial, not used (reject)"))
        .alias("_death_unused"),
    )
    frame = frame.join(_first_dose(spec, ex), on="USUBJID", how="left").join(
        _disposition(spec, ds), on="USUBJID", how="left"
    )
    index = {
        "first_dose": pl.col("first_dose_date"),
        "randomization": pl.col("randomization_date"),
        "reference_start": pl.col("_reference_start"),
    }[spec.index]
    age_note = pl.when(pl.col("birth_date").is_null() & pl.col("_age").is_not_null()).then(
        pl.lit("no complete BRTHDTC: age at index from DM.AGE")
    )
    return frame.select(
        pl.col("USUBJID").alias("patient_id"),
        "sex",
        "birth_date",
        pl.when(pl.col("birth_date").is_null()).then(pl.col("_age")).alias("age_at_index"),
        index.alias("index_date"),
        "group",
        "actual_group",
        "first_dose_date",
        "death_date",
        "end_of_followup",
        "site",
        pl.lit(spec.name).alias("source"),
        pl.col("source_row").cast(pl.Int64),
        _notes([pl.col("_birth_note"), pl.col("_death_note"), pl.col("_death_unused"), age_note]),
    )


# ---- events ----------------------------------------------------------------------------
def read_events(spec: SdtmSource, domain: pl.DataFrame | None) -> pl.DataFrame:
    """Dialysis / transplant records of the event domain -> canonical raw events."""
    schema: dict[str, pl.DataType] = {
        "patient_id": pl.String(),
        "event_date": pl.Datetime("us"),
        "event_date" + AS_READ_SUFFIX: pl.String(),
        "event": pl.String(),
        "end_date": pl.Datetime("us"),
        "source": pl.String(),
        "source_row": pl.Int64(),
        "assumption": pl.String(),
    }
    if domain is None:
        return pl.DataFrame(schema=schema)
    prefix = spec.event_domain
    _need(domain, ("USUBJID", f"{prefix}STDTC"), spec.event_domain.lower(), spec)
    term = pl.coalesce(
        _text(domain, f"{prefix}DECOD"),
        _text(domain, f"{prefix}TRT"),
        _text(domain, f"{prefix}TERM"),
    )
    terms = {k.upper(): v for k, v in spec.event_terms.items()}
    start, unused, note = read_dtc(
        _text(domain, f"{prefix}STDTC"), spec.partial_dates, f"{prefix}STDTC"
    )
    end, _, _ = read_dtc(_text(domain, f"{prefix}ENDTC"), spec.partial_dates, f"{prefix}ENDTC")
    rows = domain.with_row_index("source_row", offset=1).select(
        _text(domain, "USUBJID").alias("patient_id"),
        start.alias("event_date"),
        unused.alias("event_date" + AS_READ_SUFFIX),
        term.str.to_uppercase().replace_strict(terms, default=None).alias("event"),
        end.alias("end_date"),
        pl.lit(f"{spec.name}.{prefix.lower()}").alias("source"),
        pl.col("source_row").cast(pl.Int64),
        _notes([note]),
    )
    # only records of the listed terms are events; others are not part of the study's read
    return rows.filter(pl.col("event").is_not_null()).cast(pl.Schema(schema))


def read_sdtm(source: SdtmSource | Mapping[str, Any]) -> SdtmTables:
    """Read an SDTM folder (XPT or Dataset-JSON files) as canonical raw tables.

    Parameters
    ----------
    source
        An :class:`SdtmSource`, or a mapping of its fields.

    Returns
    -------
    SdtmTables
        ``patients``, ``labs``, ``events`` for :func:`kidneycohort.harmonize.harmonize`.

    Raises
    ------
    InputDataError
        A missing folder, domain (DM, LB) or variable, an unreadable file.
    """
    spec = source if isinstance(source, SdtmSource) else SdtmSource(**dict(source))
    if not Path(spec.folder).is_dir():
        raise InputDataError(f"{spec.where()}: folder not found")
    dm = read_domain(spec, "dm")
    lb = read_domain(spec, "lb")
    assert dm is not None and lb is not None
    ex = read_domain(spec, "ex", required=spec.index == "first_dose")
    ds = read_domain(spec, "ds", required=False)
    events = read_domain(spec, spec.event_domain.lower(), required=False)
    tables = SdtmTables(
        patients=read_patients(spec, dm, ex, ds),
        labs=read_labs(spec, lb),
        events=read_events(spec, events),
    )
    logger.info(
        "%s: %d subjects, %d lab rows of %d tests, %d events",
        spec.where(),
        tables.patients.height,
        tables.labs.height,
        len(spec.test_codes),
        tables.events.height,
    )
    return tables
