"""The SQL the OMOP reader sends: selection pushed down, only the columns it maps.

Each query names its tables through validated, quoted identifiers and selects only the
needed columns, restricted in the database to the configured concepts, the date range
and (with a cohort) the cohort's persons. Numbers are cast to fixed widths (``BIGINT``,
``FLOAT8``) so PostgreSQL and DuckDB hand over the same Arrow types; ``NUMERIC`` values
become float64 (the value a lab reported has far fewer than 15 significant digits).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Final

from kidneycohort.io.omop._connect import quote_identifier, quote_literal
from kidneycohort.io.omop._spec import OmopSource

__all__ = [
    "COHORT_COLUMNS",
    "EVENT_TABLES",
    "REQUIRED_COLUMNS",
    "VOCABULARY_COLUMNS",
    "cohort_sql",
    "death_sql",
    "event_sql",
    "measurement_sql",
    "observation_sql",
    "person_sql",
    "table",
]

# Columns each CDM table must have (OMOP CDM v5.4) for the reader.
REQUIRED_COLUMNS: Final[dict[str, tuple[str, ...]]] = {
    "person": (
        "person_id",
        "gender_concept_id",
        "year_of_birth",
        "month_of_birth",
        "day_of_birth",
        "birth_datetime",
        "person_source_value",
    ),
    "observation_period": (
        "person_id",
        "observation_period_start_date",
        "observation_period_end_date",
    ),
    "measurement": (
        "measurement_id",
        "person_id",
        "measurement_concept_id",
        "measurement_date",
        "measurement_datetime",
        "operator_concept_id",
        "value_as_number",
        "unit_concept_id",
        "unit_source_value",
        "value_source_value",
        "visit_occurrence_id",
    ),
    "visit_occurrence": ("visit_occurrence_id", "visit_concept_id"),
    "death": ("person_id", "death_date", "cause_concept_id"),
    "procedure_occurrence": (
        "procedure_occurrence_id",
        "person_id",
        "procedure_concept_id",
        "procedure_date",
        "procedure_end_date",
    ),
    "condition_occurrence": (
        "condition_occurrence_id",
        "person_id",
        "condition_concept_id",
        "condition_start_date",
        "condition_end_date",
    ),
}
VOCABULARY_COLUMNS: Final = {"concept": ("concept_id", "vocabulary_id", "concept_code")}
COHORT_COLUMNS: Final = ("cohort_definition_id", "subject_id", "cohort_start_date")

# (id column, concept column, start date column, end date column) of the event tables
EVENT_TABLES: Final = {
    "procedure_occurrence": (
        "procedure_occurrence_id",
        "procedure_concept_id",
        "procedure_date",
        "procedure_end_date",
    ),
    "condition_occurrence": (
        "condition_occurrence_id",
        "condition_concept_id",
        "condition_start_date",
        "condition_end_date",
    ),
}


def table(spec: OmopSource, name: str) -> str:
    """A CDM table as ``"schema"."table"``."""
    return f"{quote_identifier(spec.cdm_schema)}.{quote_identifier(name)}"


def _ids(values: Iterable[int]) -> str:
    listed = sorted({int(v) for v in values})
    return ", ".join(str(v) for v in listed) if listed else "NULL"


def persons_clause(spec: OmopSource, column: str) -> str:
    """``AND column IN (the cohort's persons)`` when the source has a cohort, else ``""``."""
    if spec.cohort is None:
        return ""
    schema = quote_identifier(spec.cohort.table_schema or spec.cdm_schema)
    cohort = f"{schema}.{quote_identifier(spec.cohort.table)}"
    return (
        f" AND {column} IN (SELECT subject_id FROM {cohort} "
        f"WHERE cohort_definition_id IN ({_ids(spec.cohort.groups)}))"
    )


def date_clause(spec: OmopSource, column: str) -> str:
    """The configured date range on ``column`` as SQL (``""`` when none)."""
    out = ""
    if spec.first_date is not None:
        out += f" AND {column} >= DATE {quote_literal(spec.first_date.isoformat())}"
    if spec.last_date is not None:
        out += f" AND {column} <= DATE {quote_literal(spec.last_date.isoformat())}"
    return out


def measurement_sql(spec: OmopSource, concepts: Iterable[int], units: Iterable[int]) -> str:
    """Lab results of the configured concepts, with the visit's concept when needed and,
    for a unit concept outside the configured ``units``, its vocabulary and code."""
    visit = ""
    visit_column = ""
    if spec.read_settings:
        visit = (
            f" LEFT JOIN {table(spec, 'visit_occurrence')} v "
            "ON v.visit_occurrence_id = m.visit_occurrence_id"
        )
        visit_column = ", CAST(v.visit_concept_id AS BIGINT) AS visit_concept_id"
    person = ""
    person_column = ""
    if spec.patient_id == "person_source_value":
        person = f" LEFT JOIN {table(spec, 'person')} p ON p.person_id = m.person_id"
        person_column = ", p.person_source_value"
    vocabulary = f"{quote_identifier(spec.vocabulary_schema_name)}.{quote_identifier('concept')}"
    unit = (
        f" LEFT JOIN {vocabulary} uc ON uc.concept_id = m.unit_concept_id "
        f"AND m.unit_concept_id NOT IN ({_ids(units)})"
    )
    return (
        "SELECT CAST(m.measurement_id AS BIGINT) AS measurement_id, "
        "CAST(m.person_id AS BIGINT) AS person_id, "
        "CAST(m.measurement_concept_id AS BIGINT) AS measurement_concept_id, "
        "m.measurement_date, m.measurement_datetime, "
        "CAST(m.operator_concept_id AS BIGINT) AS operator_concept_id, "
        "CAST(m.value_as_number AS FLOAT8) AS value_as_number, "
        "CAST(m.unit_concept_id AS BIGINT) AS unit_concept_id, "
        "m.unit_source_value, m.value_source_value, "
        "uc.vocabulary_id AS unit_vocabulary, uc.concept_code AS unit_code"
        f"{visit_column}{person_column} "
        f"FROM {table(spec, 'measurement')} m{unit}{visit}{person} "
        f"WHERE m.measurement_concept_id IN ({_ids(concepts)})"
        f"{date_clause(spec, 'm.measurement_date')}"
        f"{persons_clause(spec, 'm.person_id')}"
    )


def person_sql(spec: OmopSource) -> str:
    """Sex, birth and source id of every person read."""
    return (
        "SELECT CAST(person_id AS BIGINT) AS person_id, "
        "CAST(gender_concept_id AS BIGINT) AS gender_concept_id, "
        "CAST(year_of_birth AS BIGINT) AS year_of_birth, "
        "CAST(month_of_birth AS BIGINT) AS month_of_birth, "
        "CAST(day_of_birth AS BIGINT) AS day_of_birth, "
        "birth_datetime, person_source_value "
        f"FROM {table(spec, 'person')} WHERE 1 = 1{persons_clause(spec, 'person_id')}"
    )


def observation_sql(spec: OmopSource) -> str:
    """First start and last end of observation per person."""
    return (
        "SELECT CAST(person_id AS BIGINT) AS person_id, "
        "MIN(observation_period_start_date) AS observation_start, "
        "MAX(observation_period_end_date) AS observation_end "
        f"FROM {table(spec, 'observation_period')} "
        f"WHERE 1 = 1{persons_clause(spec, 'person_id')} GROUP BY person_id"
    )


def death_sql(spec: OmopSource, kidney_causes: Sequence[int]) -> str:
    """Earliest death date per person and whether a kidney cause is recorded."""
    kidney = (
        f"MAX(CASE WHEN cause_concept_id IN ({_ids(kidney_causes)}) THEN 1 ELSE 0 END)"
        if kidney_causes
        else "0"
    )
    return (
        "SELECT CAST(person_id AS BIGINT) AS person_id, MIN(death_date) AS death_date, "
        f"CAST({kidney} AS BIGINT) AS kidney_cause "
        f"FROM {table(spec, 'death')} WHERE 1 = 1{persons_clause(spec, 'person_id')} "
        "GROUP BY person_id"
    )


def cohort_sql(spec: OmopSource) -> str:
    """Cohort entries of the configured cohort definitions."""
    assert spec.cohort is not None
    schema = quote_identifier(spec.cohort.table_schema or spec.cdm_schema)
    return (
        "SELECT CAST(subject_id AS BIGINT) AS person_id, "
        "CAST(cohort_definition_id AS BIGINT) AS cohort_definition_id, cohort_start_date "
        f"FROM {schema}.{quote_identifier(spec.cohort.table)} "
        f"WHERE cohort_definition_id IN ({_ids(spec.cohort.groups)})"
    )


def event_sql(spec: OmopSource, name: str, concepts: Iterable[int]) -> str:
    """Records of ``concepts`` in event table ``name`` (procedure or condition)."""
    id_col, concept_col, start_col, end_col = EVENT_TABLES[name]
    return (
        f"SELECT CAST({id_col} AS BIGINT) AS record_id, CAST(person_id AS BIGINT) AS person_id, "
        f"CAST({concept_col} AS BIGINT) AS concept_id, {start_col} AS start_date, "
        f"{end_col} AS end_date FROM {table(spec, name)} "
        f"WHERE {concept_col} IN ({_ids(concepts)})"
        f"{date_clause(spec, start_col)}{persons_clause(spec, 'person_id')}"
    )
