"""A tiny hand-made OMOP CDM v5.4 database (DuckDB) whose every row is known.

Concepts come from the synthetic writer's small vocabulary (invented ids, standard
codes), plus one unit concept of a non-UCUM vocabulary. Persons 1 and 2 exist; person 9
does not (its result is an orphan). Measurements, by ``measurement_id``:

== ======================================================================================
1  creatinine 1.10 mg/dL, outpatient visit
2  creatinine 97 umol/L, inpatient visit
3  creatinine, value_as_number empty, value_source_value "see comment"
4  creatinine "<0.20" -> 0.2 with operator '<', mg/dL
5  creatinine 1.3, unit concept 0 (unmapped), unit_source_value "mg/dl"
6  creatinine 1.4, unit concept of vocabulary "Local units" (no UCUM code), source "mg/dL"
7  creatinine 1.5, no unit at all (unit concept and source empty)
8  creatinine 1.2 of person 9 (not in PERSON)
9  UACR 30 mg/g, emergency visit
10 a measurement concept outside the lab sets (not selected)
== ======================================================================================
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import polars as pl

from kidneycohort.io.omop._ddl import create_table_sql
from kidneycohort.synthetic._omop_writer import _full, concept_table

LOCAL_UNIT_ID = 1_999_000_001


def concept_id(concepts: pl.DataFrame, vocabulary: str, code: str) -> int:
    """The invented id of a concept of the small vocabulary."""
    row = concepts.filter(
        (pl.col("vocabulary_id") == vocabulary) & (pl.col("concept_code") == code)
    )
    return int(row["concept_id"][0])


def tiny_tables() -> dict[str, pl.DataFrame]:
    """The tables of the tiny database (see the module docstring)."""
    concepts = concept_table()
    local = concepts.head(1).with_columns(
        concept_id=pl.lit(LOCAL_UNIT_ID),
        concept_name=pl.lit("milligram per decilitre (local)"),
        vocabulary_id=pl.lit("Local units"),
        concept_code=pl.lit("MGDL"),
        domain_id=pl.lit("Unit"),
    )
    concepts = pl.concat([concepts, local], how="vertical_relaxed")

    def c(vocabulary: str, code: str) -> int:
        return concept_id(concepts, vocabulary, code)

    day = dt.date(2022, 3, 1)
    person = pl.DataFrame(
        {
            "person_id": [1, 2],
            "gender_concept_id": [c("Gender", "F"), c("Gender", "M")],
            "year_of_birth": [1960, 1955],
            "month_of_birth": [5, None],
            "day_of_birth": [17, None],
            "birth_datetime": [dt.datetime(1960, 5, 17), None],
            "race_concept_id": [0, 0],
            "ethnicity_concept_id": [0, 0],
            "person_source_value": ["P-1", "P-2"],
        }
    )
    observation = pl.DataFrame(
        {
            "observation_period_id": [1, 2],
            "person_id": [1, 2],
            "observation_period_start_date": [day, day],
            "observation_period_end_date": [dt.date(2024, 1, 1), dt.date(2023, 6, 30)],
            "period_type_concept_id": [0, 0],
        }
    )
    visit = pl.DataFrame(
        {
            "visit_occurrence_id": [1, 2, 3],
            "person_id": [1, 1, 2],
            "visit_concept_id": [c("Visit", "OP"), c("Visit", "IP"), c("Visit", "ER")],
            "visit_start_date": [day, day, day],
            "visit_end_date": [day, day, day],
            "visit_type_concept_id": [0, 0, 0],
        }
    )
    cr, uacr = c("LOINC", "2160-0"), c("LOINC", "9318-7")
    mg_dl, umol_l, mg_g = c("UCUM", "mg/dL"), c("UCUM", "umol/L"), c("UCUM", "mg/g")
    measurement = pl.DataFrame(
        {
            "measurement_id": list(range(1, 11)),
            "person_id": [1, 1, 1, 1, 2, 2, 2, 9, 2, 1],
            "measurement_concept_id": [cr] * 8 + [uacr, c("SNOMED", "46177005")],
            "measurement_date": [day + dt.timedelta(days=i) for i in range(10)],
            "measurement_datetime": [dt.datetime(2022, 3, 1 + i, 9, 30) for i in range(10)],
            "measurement_type_concept_id": [0] * 10,
            "operator_concept_id": [None, None, None, c("Meas Value Operator", "<")] + [None] * 6,
            "value_as_number": [1.10, 97.0, None, 0.2, 1.3, 1.4, 1.5, 1.2, 30.0, 5.0],
            "unit_concept_id": [
                mg_dl,
                umol_l,
                mg_dl,
                mg_dl,
                0,
                LOCAL_UNIT_ID,
                None,
                mg_dl,
                mg_g,
                None,
            ],
            "visit_occurrence_id": [1, 2, None, None, None, None, None, None, 3, None],
            "unit_source_value": [
                "mg/dL",
                "umol/L",
                "mg/dL",
                "mg/dL",
                "mg/dl",
                "mg/dL",
                None,
                "mg/dL",
                "mg/g",
                None,
            ],
            "value_source_value": [
                "1.10",
                "97",
                "see comment",
                "<0.20",
                "1.3",
                "1.4",
                "1.5",
                "1.2",
                "30",
                "5",
            ],
        }
    )
    empty = {"procedure_occurrence", "condition_occurrence", "death", "cohort"}
    tables = {
        "concept": concepts,
        "person": person,
        "observation_period": observation,
        "visit_occurrence": visit,
        "measurement": measurement,
    }
    return tables | {name: pl.DataFrame() for name in empty}


def write_tiny_cdm(path: Path, schema: str = "cdm", drop: tuple[str, ...] = ()) -> Path:
    """Write the tiny database to ``path`` (DuckDB), leaving out the tables in ``drop``."""
    with duckdb.connect(str(path)) as con:
        con.execute(f"CREATE SCHEMA {schema}")
        for name, frame in tiny_tables().items():
            if name in drop:
                continue
            con.execute(create_table_sql(name, schema, "duckdb"))
            if frame.height:
                arrow_table = _full(name, frame).to_arrow()  # noqa: F841 - used by name below
                con.execute(f"INSERT INTO {schema}.{name} SELECT * FROM arrow_table")
    return path
