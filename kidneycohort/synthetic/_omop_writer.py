"""Write a synthetic cohort as an OMOP CDM v5.4 database (``kidneycohort synth --format omop``).

The same patients, lab rows (defects included) and events as the canonical files, in
OMOP's layout: PERSON, OBSERVATION_PERIOD, VISIT_OCCURRENCE, MEASUREMENT,
PROCEDURE_OCCURRENCE (dialysis, transplant), CONDITION_OCCURRENCE (end-stage kidney
disease at kidney failure), DEATH, COHORT / COHORT_DEFINITION (index date and group, one
cohort definition per arm or exposure group), CDM_SOURCE, and a CONCEPT table holding
only the concepts used. Concept ids are invented (site-local range from 2,000,000,001);
codes are the standard LOINC, UCUM and SNOMED CT codes, so a reader that resolves codes
through CONCEPT finds them as in a real vocabulary.

Written to ``omop/``: ``omop_cdm.duckdb`` (schema ``cdm``), ``csv/<table>.csv`` and
``load_postgresql.sql``, which loads the same tables into PostgreSQL with one command::

    cd OUT/omop && psql "$DATABASE_URI" -v ON_ERROR_STOP=1 -f load_postgresql.sql

How values are stored (common ETL practice): ``value_as_number`` holds a numeric result,
``operator_concept_id`` its ``<``/``>`` prefix, ``value_source_value`` the text as
reported (the only value of a text result such as "see comment"); ``unit_concept_id`` is
the UCUM concept of the reported unit, 0 when the spelling has no UCUM mapping (then
``unit_source_value`` keeps it). Rows OMOP cannot hold (no patient id or no date) are
left out and counted in the returned summary.
"""

from __future__ import annotations

import datetime as dt
import logging
from pathlib import Path
from typing import Final

import polars as pl

from kidneycohort import units
from kidneycohort.errors import UnknownUnitError
from kidneycohort.io.loinc import LOINC_CODES
from kidneycohort.io.omop._ddl import CDM_TABLES, create_table_sql, index_sql
from kidneycohort.io.omop._spec import DEFAULT_EVENTS
from kidneycohort.synthetic.cohort import SyntheticCohort

__all__ = ["write_omop"]

logger = logging.getLogger(__name__)

SCHEMA: Final = "cdm"
FIRST_CONCEPT_ID: Final = 2_000_000_001
_DAY: Final = dt.date(1970, 1, 1)
# Unit spellings (folded by kidneycohort.units) -> UCUM code.
UCUM_CODES: Final = {
    "mg/dl": "mg/dL",
    "umol/l": "umol/L",
    "mmol/l": "mmol/L",
    "mg/l": "mg/L",
    "mg/g": "mg/g",
    "mg/mmol": "mg/mmol",
    "g/g": "g/g",
}
# (vocabulary, code, name, domain, class) of every concept written besides LOINC
_OTHER_CONCEPTS: Final = (
    *(("UCUM", code, code, "Unit", "Unit") for code in sorted(set(UCUM_CODES.values()))),
    ("UCUM", "U/L", "unit per liter", "Unit", "Unit"),
    ("Gender", "F", "FEMALE", "Gender", "Gender"),
    ("Gender", "M", "MALE", "Gender", "Gender"),
    ("Visit", "IP", "Inpatient Visit", "Visit", "Visit"),
    ("Visit", "ER", "Emergency Room Visit", "Visit", "Visit"),
    ("Visit", "ERIP", "Emergency Room and Inpatient Visit", "Visit", "Visit"),
    ("Visit", "OP", "Outpatient Visit", "Visit", "Visit"),
    *(
        ("Meas Value Operator", op, op, "Meas Value Operator", "Meas Value Operator")
        for op in ("<", "<=", "=", ">=", ">")
    ),
    ("SNOMED", "108241001", "Dialysis procedure", "Procedure", "Procedure"),
    ("SNOMED", "70536003", "Transplantation of kidney", "Procedure", "Procedure"),
    ("SNOMED", "46177005", "End-stage renal disease", "Condition", "Clinical Finding"),
)
_SETTING_VISITS: Final = {"outpatient": "OP", "inpatient": "IP", "emergency": "ER"}
_NUMBER: Final = r"^\s*(?P<op><=|>=|<|>)?\s*(?P<num>[+-]?\d+(?:\.\d+)?(?:[eE][+-]?\d+)?)\s*$"


def concept_table() -> pl.DataFrame:
    """The small vocabulary: every concept the synthetic database uses, ids invented."""
    rows = [("LOINC", e.code, e.long_name, "Measurement", "Lab Test") for e in LOINC_CODES] + list(
        _OTHER_CONCEPTS
    )
    return pl.DataFrame(
        {
            "concept_id": list(range(FIRST_CONCEPT_ID, FIRST_CONCEPT_ID + len(rows))),
            "concept_name": [r[2] for r in rows],
            "domain_id": [r[3] for r in rows],
            "vocabulary_id": [r[0] for r in rows],
            "concept_class_id": [r[4] for r in rows],
            "standard_concept": ["S"] * len(rows),
            "concept_code": [r[1] for r in rows],
            "valid_start_date": [dt.date(1970, 1, 1)] * len(rows),
            "valid_end_date": [dt.date(2099, 12, 31)] * len(rows),
            "invalid_reason": pl.Series([None] * len(rows), dtype=pl.String),
        }
    )


def _ids(concepts: pl.DataFrame, vocabulary: str) -> dict[str, int]:
    rows = concepts.filter(pl.col("vocabulary_id") == vocabulary)
    return dict(zip(rows["concept_code"].to_list(), rows["concept_id"].to_list(), strict=True))


def _ucum(unit: str | None) -> str | None:
    if unit is None:
        return None
    if unit.strip() == "U/L":
        return "U/L"
    try:
        return UCUM_CODES.get(units.normalize_unit(unit))
    except UnknownUnitError:
        return None


def omop_tables(cohort: SyntheticCohort) -> tuple[dict[str, pl.DataFrame], dict[str, int]]:
    """The cohort as OMOP tables (name -> frame) and the rows left out, per table."""
    concepts = concept_table()
    loinc, ucum = _ids(concepts, "LOINC"), _ids(concepts, "UCUM")
    person_ids = _person_ids(cohort)
    patients = cohort.patients.join(person_ids, on="patient_id", how="left")
    labs = cohort.labs.join(person_ids, on="patient_id", how="left")
    left_out = {
        "measurement": labs.filter(
            pl.col("person_id").is_null() | pl.col("sample_date").is_null()
        ).height
    }
    labs = labs.filter(pl.col("person_id").is_not_null() & pl.col("sample_date").is_not_null())
    visits, labs = _visits(labs, _ids(concepts, "Visit"))
    arms = [a.label for a in cohort.scenario.groups.arms]
    tables = {
        "concept": concepts,
        "person": _person(patients, _ids(concepts, "Gender")),
        "observation_period": _observation(patients, labs),
        "visit_occurrence": visits,
        "measurement": _measurement(labs, loinc, ucum, _ids(concepts, "Meas Value Operator")),
        "procedure_occurrence": _procedures(cohort.events, person_ids, _ids(concepts, "SNOMED")),
        "condition_occurrence": _conditions(patients, _ids(concepts, "SNOMED")),
        "death": _death(patients),
        "cohort": _cohort(patients, arms),
        "cohort_definition": _cohort_definition(arms),
        "cdm_source": _cdm_source(cohort),
    }
    return tables, left_out


def _person_ids(cohort: SyntheticCohort) -> pl.DataFrame:
    """person_id = the number in the patient id (orphan rows' ids are not in PERSON)."""
    ids = (
        pl.concat([cohort.patients.select("patient_id"), cohort.labs.select("patient_id")])
        .unique()
        .drop_nulls()
    )
    return ids.with_columns(
        pl.col("patient_id").str.extract(r"(\d+)$").cast(pl.Int64).alias("person_id")
    )


def _person(patients: pl.DataFrame, genders: dict[str, int]) -> pl.DataFrame:
    sex = pl.col("sex").replace_strict({"female": "F", "male": "M"}, default=None)
    return patients.select(
        "person_id",
        sex.replace_strict(genders, default=0, return_dtype=pl.Int64).alias("gender_concept_id"),
        pl.col("birth_date").dt.year().alias("year_of_birth"),
        pl.col("birth_date").dt.month().alias("month_of_birth"),
        pl.col("birth_date").dt.day().alias("day_of_birth"),
        pl.col("birth_date").cast(pl.Datetime("us")).alias("birth_datetime"),
        pl.lit(0).alias("race_concept_id"),
        pl.lit(0).alias("ethnicity_concept_id"),
        pl.col("patient_id").alias("person_source_value"),
        sex.alias("gender_source_value"),
    )


def _observation(patients: pl.DataFrame, labs: pl.DataFrame) -> pl.DataFrame:
    first = labs.group_by("person_id").agg(
        pl.col("sample_date").min().dt.date().alias("_first"),
        pl.col("sample_date").max().dt.date().alias("_last"),
    )
    frame = patients.join(first, on="person_id", how="left")
    # an observation period never opens before birth (a sample dated before the
    # birth date is a defect of that row, not of the person's observation)
    start = pl.max_horizontal(pl.min_horizontal("index_date", "_first"), "birth_date")
    end = pl.coalesce("end_of_followup", pl.max_horizontal("index_date", "_last"))
    return frame.select(
        pl.col("person_id").alias("observation_period_id"),
        "person_id",
        start.alias("observation_period_start_date"),
        pl.max_horizontal(start, end).alias("observation_period_end_date"),
        pl.lit(0).alias("period_type_concept_id"),
    ).filter(pl.col("observation_period_start_date").is_not_null())


def _visits(labs: pl.DataFrame, visit_ids: dict[str, int]) -> tuple[pl.DataFrame, pl.DataFrame]:
    """One visit per person, day and setting; labs get their visit_occurrence_id."""
    keyed = labs.with_columns(pl.col("sample_date").dt.date().alias("_day"))
    visits = (
        keyed.filter(pl.col("setting").is_not_null())
        .select("person_id", "_day", "setting")
        .unique()
        .sort("person_id", "_day", "setting")
        .with_columns(pl.int_range(1, pl.len() + 1, dtype=pl.Int64).alias("visit_occurrence_id"))
    )
    code = pl.col("setting").replace_strict(_SETTING_VISITS, default=None)
    table = visits.select(
        "visit_occurrence_id",
        "person_id",
        code.replace_strict(visit_ids, default=0, return_dtype=pl.Int64).alias("visit_concept_id"),
        pl.col("_day").alias("visit_start_date"),
        pl.col("_day").alias("visit_end_date"),
        pl.lit(0).alias("visit_type_concept_id"),
        pl.col("setting").alias("visit_source_value"),
    )
    labs = keyed.join(
        visits, on=["person_id", "_day", "setting"], how="left", maintain_order="left"
    ).drop("_day")
    return table, labs


def _measurement(
    labs: pl.DataFrame, loinc: dict[str, int], ucum: dict[str, int], operators: dict[str, int]
) -> pl.DataFrame:
    # LOINC code per analyte: the first code of the built-in table in the unit's property
    codes = {
        "creatinine": ("2160-0", "14682-9"),  # mass / molar concentration
        "cystatin_c": ("33863-2", "33863-2"),
        "uacr": ("9318-7", "14959-1"),
    }
    parsed = pl.col("value").str.extract_groups(_NUMBER)
    unit_codes = {u: _ucum(u) for u in labs["unit"].drop_nulls().unique().to_list()}
    unit = pl.col("unit").replace_strict(unit_codes, default=None, return_dtype=pl.String)
    molar = unit.is_in(["umol/L", "mmol/L", "mg/mmol"])
    loinc_code: pl.Expr = pl.lit(None, pl.String)
    for analyte, (mass_code, molar_code) in codes.items():
        loinc_code = (
            pl.when(pl.col("analyte") == analyte)
            .then(pl.when(molar).then(pl.lit(molar_code)).otherwise(pl.lit(mass_code)))
            .otherwise(loinc_code)
        )
    return labs.with_row_index("measurement_id", offset=1).select(
        pl.col("measurement_id").cast(pl.Int64),
        "person_id",
        loinc_code.replace_strict(loinc, default=0, return_dtype=pl.Int64).alias(
            "measurement_concept_id"
        ),
        pl.col("sample_date").dt.date().alias("measurement_date"),
        pl.col("sample_date").alias("measurement_datetime"),
        pl.lit(0).alias("measurement_type_concept_id"),
        parsed.struct.field("op")
        .replace_strict(operators, default=None, return_dtype=pl.Int64)
        .alias("operator_concept_id"),
        parsed.struct.field("num").cast(pl.Float64).alias("value_as_number"),
        pl.when(pl.col("unit").is_null())
        .then(None)
        .otherwise(unit.replace_strict(ucum, default=0, return_dtype=pl.Int64))
        .alias("unit_concept_id"),
        "visit_occurrence_id",
        pl.col("analyte").alias("measurement_source_value"),
        pl.col("unit").alias("unit_source_value"),
        pl.col("value").alias("value_source_value"),
    )


def _procedures(
    events: pl.DataFrame, person_ids: pl.DataFrame, snomed: dict[str, int]
) -> pl.DataFrame:
    concept = {e.event: snomed[e.codes[0]] for e in DEFAULT_EVENTS if e.event != "kidney_failure"}
    rows = events.filter(pl.col("event").is_in(list(concept))).join(
        person_ids, on="patient_id", how="left"
    )
    return rows.with_row_index("procedure_occurrence_id", offset=1).select(
        pl.col("procedure_occurrence_id").cast(pl.Int64),
        "person_id",
        pl.col("event")
        .replace_strict(concept, return_dtype=pl.Int64)
        .alias("procedure_concept_id"),
        pl.col("event_date").alias("procedure_date"),
        pl.col("end_date").alias("procedure_end_date"),
        pl.lit(0).alias("procedure_type_concept_id"),
        pl.col("event").alias("procedure_source_value"),
    )


def _conditions(patients: pl.DataFrame, snomed: dict[str, int]) -> pl.DataFrame:
    rows = patients.filter(pl.col("kfrt_date").is_not_null())
    return rows.with_row_index("condition_occurrence_id", offset=1).select(
        pl.col("condition_occurrence_id").cast(pl.Int64),
        "person_id",
        pl.lit(snomed["46177005"], pl.Int64).alias("condition_concept_id"),
        pl.col("kfrt_date").alias("condition_start_date"),
        pl.lit(0).alias("condition_type_concept_id"),
        pl.lit("end-stage kidney disease").alias("condition_source_value"),
    )


def _death(patients: pl.DataFrame) -> pl.DataFrame:
    return patients.filter(pl.col("death_date").is_not_null()).select(
        "person_id", "death_date", pl.lit(0).alias("death_type_concept_id")
    )


def _cohort(patients: pl.DataFrame, arms: list[str]) -> pl.DataFrame:
    ids = {arm: i for i, arm in enumerate(arms, start=1)}
    return patients.filter(pl.col("index_date").is_not_null()).select(
        pl.col("group").replace_strict(ids, return_dtype=pl.Int64).alias("cohort_definition_id"),
        pl.col("person_id").alias("subject_id"),
        pl.col("index_date").alias("cohort_start_date"),
        pl.max_horizontal("index_date", pl.col("end_of_followup")).alias("cohort_end_date"),
    )


def _cohort_definition(arms: list[str]) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "cohort_definition_id": list(range(1, len(arms) + 1)),
            "cohort_definition_name": arms,
            "definition_type_concept_id": [0] * len(arms),
            "subject_concept_id": [0] * len(arms),
        }
    )


def _cdm_source(cohort: SyntheticCohort) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "cdm_source_name": [f"{cohort.scenario.name} (synthetic)"],
            "cdm_source_abbreviation": ["KC-SYNTH"],
            "cdm_holder": ["kidneycohort synthetic generator"],
            "source_release_date": [_DAY],
            "cdm_release_date": [_DAY],
            "cdm_version": ["5.4"],
            "cdm_version_concept_id": [0],
            "vocabulary_version": ["synthetic subset"],
        }
    )


def _full(name: str, frame: pl.DataFrame) -> pl.DataFrame:
    """All columns of CDM table ``name`` in order (absent ones null), typed for writing."""
    kinds: dict[str, pl.DataType] = {
        "integer": pl.Int64(),
        "numeric": pl.Float64(),
        "date": pl.Date(),
        "timestamp": pl.Datetime("us"),
    }
    if frame.width == 0:
        return pl.DataFrame(schema={c: kinds.get(k, pl.String()) for c, k, _ in CDM_TABLES[name]})
    return frame.select(
        (pl.col(c) if c in frame.columns else pl.lit(None)).cast(kinds.get(k, pl.String())).alias(c)
        for c, k, _ in CDM_TABLES[name]
    )


def write_omop(cohort: SyntheticCohort, out: Path) -> tuple[list[Path], dict[str, int]]:
    """Write ``out/omop/``: DuckDB file, CSV files and the PostgreSQL load script.

    Returns the files written and the rows left out per table (rows OMOP cannot hold).
    """
    import duckdb

    folder = out / "omop"
    (folder / "csv").mkdir(parents=True, exist_ok=True)
    tables, left_out = omop_tables(cohort)
    path = folder / "omop_cdm.duckdb"
    path.unlink(missing_ok=True)
    files = [path]
    script = ["\\set ON_ERROR_STOP on", "BEGIN;", f"CREATE SCHEMA IF NOT EXISTS {SCHEMA};"]
    with duckdb.connect(str(path)) as con:
        con.execute(f"CREATE SCHEMA {SCHEMA}")
        for name, frame in tables.items():
            full = _full(name, frame)
            con.execute(create_table_sql(name, SCHEMA, "duckdb"))
            arrow_table = full.to_arrow()  # noqa: F841 - read by name in the SQL below
            con.execute(f"INSERT INTO {SCHEMA}.{name} SELECT * FROM arrow_table")
            csv = folder / "csv" / f"{name}.csv"
            full.write_csv(csv, datetime_format="%Y-%m-%d %H:%M:%S")
            files.append(csv)
            script.append(create_table_sql(name, SCHEMA, "postgresql"))
            script.append(
                f"\\copy {SCHEMA}.{name} FROM 'csv/{name}.csv' WITH (FORMAT csv, HEADER true)"
            )
        for name in tables:
            for statement in index_sql(name, SCHEMA):
                con.execute(statement)
                script.append(statement)
    script += ["COMMIT;", "ANALYZE;", ""]
    loader = folder / "load_postgresql.sql"
    loader.write_text("\n".join(script), encoding="utf-8")
    files.append(loader)
    if any(left_out.values()):
        logger.info("OMOP layout: rows left out (no patient id or date): %s", left_out)
    return files, left_out
