"""Read an OMOP CDM database into kidneycohort's canonical raw tables.

The selection runs in the database (:mod:`kidneycohort.io.omop._sql`); results stream
as Arrow batches and are mapped with polars expressions (no per-row Python) onto

* ``labs`` (``schemas.RAW_LABS``): analyte from the measurement concept's LOINC set,
  value from ``value_as_number`` or, when it is empty, from ``value_source_value`` (text,
  so the harmonise stage rejects "see comment" with reason ``not_a_result``), qualifier
  from ``operator_concept_id``, unit from the unit concept's UCUM code or, for a concept
  outside the configured units with no UCUM code, from ``unit_source_value``, care setting
  from the visit's concept; ``source_row`` is ``measurement_id``;
* ``patients``: sex from the gender concept, birth date from ``birth_datetime`` (or year,
  month and day, a missing part imputed by the stated rule), index date and group from
  the cohort (or the first observation period), death date from DEATH, end of follow-up
  from the last observation period, ``kfrt_date`` from kidney-failure diagnoses;
* ``events``: dialysis and transplant records, and kidney deaths.

Nothing is dropped here: a result of a person missing from PERSON, a value that is not a
number, a unit with no mapping stay in ``labs`` and meet the harmonise stage's checks
(``unknown_patient``, ``not_a_result``, ``unknown_unit``/``missing_unit``), which count
them with a reason; every reading assumption is written to the ``assumption`` column and
:attr:`OmopTables.report` counts them.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import polars as pl

from kidneycohort.errors import ConfigError
from kidneycohort.io.omop import _sql
from kidneycohort.io.omop._connect import OmopConnection, quote_identifier
from kidneycohort.io.omop._spec import OmopSource, check_source
from kidneycohort.io.omop._vocabulary import (
    UCUM,
    Vocabulary,
    check_unit_codes,
    resolve_vocabulary,
)

__all__ = ["OmopTables", "_check_catalogue", "read_omop"]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class OmopTables:
    """What :func:`read_omop` returns (polars DataFrames).

    Attributes
    ----------
    patients, labs, events
        Canonical raw tables for :func:`kidneycohort.harmonize.harmonize`.
    report
        ``table, item, rows``: rows read per CDM table and each reading assumption.
    """

    patients: pl.DataFrame
    labs: pl.DataFrame
    events: pl.DataFrame
    report: pl.DataFrame


def _note(condition: pl.Expr, text: pl.Expr | str) -> pl.Expr:
    value = pl.lit(text) if isinstance(text, str) else text
    return pl.when(condition).then(value)


def _join_notes(notes: list[pl.Expr]) -> pl.Expr:
    joined = pl.concat_str(notes, separator="; ", ignore_nulls=True)
    return pl.when(joined != "").then(joined).alias("assumption")


def _person_key(spec: OmopSource, frame: pl.DataFrame) -> pl.Expr:
    if spec.patient_id == "person_source_value" and "person_source_value" in frame.columns:
        return pl.coalesce(
            pl.col("person_source_value"),
            pl.format("person_id {}", pl.col("person_id")),
        ).alias("patient_id")
    return pl.col("person_id").cast(pl.String).alias("patient_id")


# ---- labs ------------------------------------------------------------------------------
def _stream_measurements(con: OmopConnection, vocab: Vocabulary) -> pl.DataFrame:
    """Stream MEASUREMENT and map each Arrow batch as it arrives: client memory holds the
    canonical rows read so far and one raw batch."""
    sql = _sql.measurement_sql(con.spec, vocab.labs, vocab.units)
    parts: list[pl.DataFrame] = []
    for batch in con.batches(sql, "MEASUREMENT"):
        frame = pl.from_arrow(batch)
        assert isinstance(frame, pl.DataFrame)
        parts.append(map_measurements(frame, con.spec, vocab))
    if not parts:
        return map_measurements(con.frame(sql, "MEASUREMENT"), con.spec, vocab)
    return pl.concat(parts, how="vertical_relaxed")


def _unit_columns(vocab: Vocabulary) -> tuple[pl.Expr, pl.Expr]:
    """(UCUM code, why there is none) of each row's unit concept.

    A configured unit concept gives its UCUM code; another concept of the UCUM vocabulary
    gives its code (the harmonise stage then judges the unit); concept 0, a concept of
    another vocabulary or one missing from CONCEPT has no UCUM code.
    """
    concept = pl.col("unit_concept_id")
    configured = concept.replace_strict(vocab.units, default=None, return_dtype=pl.String)
    other_ucum = pl.when(pl.col("unit_vocabulary") == UCUM).then(pl.col("unit_code"))
    ucum = pl.coalesce(configured, other_ucum)
    where = (
        pl.when(pl.col("unit_vocabulary").is_not_null())
        .then(pl.format("vocabulary {}", pl.col("unit_vocabulary")))
        .otherwise(pl.lit("not in CONCEPT"))
    )
    why = (
        pl.when(ucum.is_not_null() | concept.is_null())
        .then(pl.lit(None, pl.String))
        .when(concept == 0)
        .then(pl.lit("unit concept 0 (unmapped)"))
        .otherwise(pl.format("unit concept {} ({}) has no UCUM code", concept, where))
    )
    return ucum, why


def map_measurements(raw: pl.DataFrame, spec: OmopSource, vocab: Vocabulary) -> pl.DataFrame:
    """MEASUREMENT rows -> canonical raw labs (``schemas.RAW_LABS`` + bookkeeping)."""
    value_number = pl.col("value_as_number")
    source_text = pl.col("value_source_value").str.strip_chars()
    has_source_text = source_text.is_not_null() & (source_text != "")
    operator = pl.col("operator_concept_id")
    qualifier = operator.replace_strict(vocab.operators, default=None, return_dtype=pl.String)
    unit_source = pl.col("unit_source_value").str.strip_chars()
    setting = (
        pl.col("visit_concept_id").replace_strict(
            vocab.settings, default=None, return_dtype=pl.String
        )
        if "visit_concept_id" in raw.columns
        else pl.lit(None, pl.String)
    )
    unit_from_source = pl.col("_ucum").is_null() & pl.col("_why").is_not_null()
    notes = [
        _note(value_number.is_null() & has_source_text, "value from value_source_value"),
        _note(
            operator.is_not_null() & ~operator.is_in(list(vocab.operators)),
            pl.format("operator concept {} unknown, read as '='", operator),
        ),
        _note(
            unit_from_source & unit_source.is_not_null(),
            pl.format("{}; unit_source_value used", pl.col("_why")),
        ),
    ]
    if "visit_concept_id" in raw.columns:
        notes.append(
            _note(
                pl.col("visit_concept_id").is_not_null()
                & ~pl.col("visit_concept_id").is_in(list(vocab.settings)),
                pl.format("visit concept {} not in visit_settings", pl.col("visit_concept_id")),
            )
        )
    ucum, why = _unit_columns(vocab)
    return raw.with_columns(ucum.alias("_ucum"), why.alias("_why")).select(
        _person_key(spec, raw),
        pl.coalesce(
            pl.col("measurement_datetime").cast(pl.Datetime("us")),
            pl.col("measurement_date").cast(pl.Datetime("us")),
        ).alias("sample_date"),
        pl.col("measurement_concept_id")
        .replace_strict(vocab.labs, default=None, return_dtype=pl.String)
        .alias("analyte"),
        pl.when(value_number.is_not_null())
        .then(value_number.cast(pl.String))
        .otherwise(source_text)
        .alias("value"),
        pl.when(pl.col("_ucum").is_not_null())
        .then(pl.col("_ucum"))
        .when(unit_from_source)
        .then(unit_source)
        .alias("unit"),
        qualifier.alias("qualifier"),
        setting.alias("setting"),
        pl.col("value_source_value").alias("reported_value"),
        pl.coalesce(unit_source, pl.col("_ucum")).alias("reported_unit"),
        pl.lit(spec.name).alias("source"),
        pl.col("measurement_id").cast(pl.Int64).alias("source_row"),
        _join_notes(notes),
    )


# ---- patients --------------------------------------------------------------------------
def _birth_date(rule: str) -> tuple[pl.Expr, pl.Expr]:
    month_default, day_default = (7, 1) if rule == "middle" else (1, 1)
    day_when_month = 15 if rule == "middle" else 1
    month = pl.col("month_of_birth").fill_null(month_default)
    day = (
        pl.when(pl.col("month_of_birth").is_null())
        .then(pl.lit(day_default))
        .otherwise(pl.col("day_of_birth").fill_null(day_when_month))
    )
    parts = pl.date(pl.col("year_of_birth"), month, day)
    birth = pl.coalesce(pl.col("birth_datetime").cast(pl.Date), parts)
    imputed = pl.col("birth_datetime").is_null() & (
        pl.col("month_of_birth").is_null() | pl.col("day_of_birth").is_null()
    )
    note = _note(imputed, f"birth date imputed from year_of_birth ({rule})")
    return birth, note


def _patients(con: OmopConnection, vocab: Vocabulary) -> tuple[pl.DataFrame, int]:
    spec = con.spec
    persons = con.frame(_sql.person_sql(spec), "PERSON")
    observed = con.frame(_sql.observation_sql(spec), "OBSERVATION_PERIOD")
    deaths = con.frame(_sql.death_sql(spec, vocab.kidney_death), "DEATH")
    frame = persons.join(observed, on="person_id", how="left").join(
        deaths.select("person_id", "death_date"), on="person_id", how="left"
    )
    kfrt = _kidney_failure_dates(con, vocab)
    frame = frame.join(kfrt, on="person_id", how="left")
    if spec.cohort is not None:
        entries = (
            con.frame(_sql.cohort_sql(spec), "COHORT")
            .sort("person_id", "cohort_start_date", "cohort_definition_id")
            .unique("person_id", keep="first", maintain_order=True)
        )
        groups = {int(k): v for k, v in spec.cohort.groups.items()}
        frame = frame.join(entries, on="person_id", how="left").with_columns(
            pl.col("cohort_start_date").cast(pl.Date).alias("index_date"),
            pl.col("cohort_definition_id")
            .replace_strict(groups, default=None, return_dtype=pl.String)
            .alias("group"),
        )
    else:
        frame = frame.with_columns(
            pl.col("observation_start").cast(pl.Date).alias("index_date"),
            pl.lit(None, pl.String).alias("group"),
        )
    birth, birth_note = _birth_date(spec.birth_date_rule)
    gender = pl.col("gender_concept_id")
    sex_note = _note(
        ~gender.is_in(list(vocab.sexes)),
        pl.format("gender concept {} not in sex_codes", gender),
    )
    out = frame.select(
        _person_key(spec, frame),
        gender.replace_strict(vocab.sexes, default=None, return_dtype=pl.String).alias("sex"),
        birth.alias("birth_date"),
        "index_date",
        "group",
        pl.col("death_date").cast(pl.Date),
        pl.col("kfrt_date").cast(pl.Date),
        pl.col("observation_end").cast(pl.Date).alias("end_of_followup"),
        pl.lit(spec.name).alias("source"),
        pl.col("person_id").alias("source_row"),
        _join_notes([birth_note, sex_note]),
    ).sort("source_row")
    kidney_deaths = int(deaths["kidney_cause"].sum()) if deaths.height else 0
    return out, kidney_deaths


def _kidney_failure_dates(con: OmopConnection, vocab: Vocabulary) -> pl.DataFrame:
    frames = [
        con.frame(_sql.event_sql(con.spec, table, ids), table.upper())
        for (table, event), ids in vocab.events.items()
        if event == "kidney_failure"
    ]
    if not frames:
        return pl.DataFrame(schema={"person_id": pl.Int64, "kfrt_date": pl.Date})
    return (
        pl.concat(frames, how="vertical_relaxed")
        .group_by("person_id")
        .agg(pl.col("start_date").min().cast(pl.Date).alias("kfrt_date"))
    )


# ---- events ----------------------------------------------------------------------------
def _events(con: OmopConnection, vocab: Vocabulary) -> pl.DataFrame:
    spec = con.spec
    parts = []
    for (table, event), ids in vocab.events.items():
        if event == "kidney_failure":
            continue
        rows = con.frame(_sql.event_sql(spec, table, ids), table.upper())
        if spec.patient_id == "person_source_value":
            persons = con.frame(
                f"SELECT CAST(person_id AS BIGINT) AS person_id, person_source_value "
                f"FROM {_sql.table(spec, 'person')}",
                "PERSON",
            )
            rows = rows.join(persons, on="person_id", how="left")
        parts.append(
            rows.select(
                _person_key(spec, rows),
                pl.col("start_date").cast(pl.Date).alias("event_date"),
                pl.lit(event).alias("event"),
                pl.col("end_date").cast(pl.Date).alias("end_date"),
                pl.lit(f"{spec.name}.{table}").alias("source"),
                pl.col("record_id").alias("source_row"),
            )
        )
    schema = pl.Schema(
        {
            "patient_id": pl.String,
            "event_date": pl.Date,
            "event": pl.String,
            "end_date": pl.Date,
            "source": pl.String,
            "source_row": pl.Int64,
        }
    )
    if vocab.kidney_death:
        deaths = con.frame(_sql.death_sql(spec, vocab.kidney_death), "DEATH").filter(
            pl.col("kidney_cause") == 1
        )
        parts.append(
            deaths.select(
                pl.col("person_id").cast(pl.String).alias("patient_id"),
                pl.col("death_date").cast(pl.Date).alias("event_date"),
                pl.lit("kidney_death").alias("event"),
                pl.lit(None, pl.Date).alias("end_date"),
                pl.lit(f"{spec.name}.death").alias("source"),
                pl.col("person_id").alias("source_row"),
            )
        )
    if not parts:
        return pl.DataFrame(schema=schema)
    return pl.concat([p.cast(schema) for p in parts]).sort("source", "source_row")


# ---- whole read ------------------------------------------------------------------------
def _check_catalogue(con: OmopConnection) -> None:
    spec = con.spec
    needed = {t: c for t, c in _sql.REQUIRED_COLUMNS.items() if t not in _sql.EVENT_TABLES}
    if not spec.read_settings:
        needed.pop("visit_occurrence")
    for event in spec.events:
        needed[event.table] = _sql.REQUIRED_COLUMNS[event.table]
    con.require_tables(spec.cdm_schema, needed, "data.source.cdm_schema")
    con.require_tables(
        spec.vocabulary_schema_name, _sql.VOCABULARY_COLUMNS, "data.source.vocabulary_schema"
    )
    if spec.cohort is not None:
        quote_identifier(spec.cohort.table)
        con.require_tables(
            spec.cohort.table_schema or spec.cdm_schema,
            {spec.cohort.table: _sql.COHORT_COLUMNS},
            "data.source.cohort",
        )


def _report(labs: pl.DataFrame, patients: pl.DataFrame, events: pl.DataFrame) -> pl.DataFrame:
    rows = [
        ("MEASUREMENT", "rows read", labs.height),
        ("PERSON", "rows read", patients.height),
        ("events", "rows read", events.height),
        (
            "MEASUREMENT",
            "person not in PERSON (orphan)",
            labs.filter(~pl.col("patient_id").is_in(patients["patient_id"].implode())).height,
        ),
    ]
    for table, frame in (("MEASUREMENT", labs), ("PERSON", patients)):
        notes = (
            frame.select(pl.col("assumption").str.split("; ").explode().drop_nulls())
            .group_by("assumption")
            .len()
            .sort("assumption")
        )
        rows += [(table, str(a), int(n)) for a, n in notes.iter_rows()]
    return pl.DataFrame(
        rows, schema={"table": pl.String, "item": pl.String, "rows": pl.Int64}, orient="row"
    )


def read_omop(source: OmopSource | Mapping[str, Any]) -> OmopTables:
    """Read an OMOP CDM v5.4 database (PostgreSQL or DuckDB) as canonical raw tables.

    Parameters
    ----------
    source
        An :class:`OmopSource`, or a mapping of its fields.

    Returns
    -------
    OmopTables
        ``patients``, ``labs``, ``events`` for the harmonise stage and a ``report`` of
        rows read and reading assumptions.

    Raises
    ------
    ConfigError
        A bad source option (an unknown unit code, a missing connection variable).
    InputDataError
        A refused connection or wrong password (the secret never shown), a missing
        schema, table or column, a configured code absent from CONCEPT.

    Notes
    -----
    Cost: the database filters MEASUREMENT by concept (an index on
    ``measurement_concept_id``, standard in OMOP deployments, makes this a range scan),
    date and cohort; the result streams as Arrow batches of ``batch_rows`` rows, so
    client memory is the canonical table (about 80 bytes per result) plus one batch.
    Mapping is a handful of vectorised polars expressions and two joins to small
    lookups, linear in rows.
    """
    spec = source if isinstance(source, OmopSource) else OmopSource(**dict(source))
    check_source(spec)
    check_unit_codes(spec)
    started = time.perf_counter()
    with OmopConnection(spec) as con:
        _check_catalogue(con)
        vocab = resolve_vocabulary(con)
        if not vocab.labs:
            raise ConfigError("data.source.labs: no LOINC codes given")
        patients, _ = _patients(con, vocab)
        labs = _stream_measurements(con, vocab)
        events = _events(con, vocab)
    report = _report(labs, patients, events)
    logger.info(
        "%s: %d persons, %d lab results, %d events read in %.1f s",
        spec.where(),
        patients.height,
        labs.height,
        events.height,
        time.perf_counter() - started,
    )
    return OmopTables(patients=patients, labs=labs, events=events, report=report)
