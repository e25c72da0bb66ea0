"""Our own minimal OMOP CDM v5.4 table definitions: the tables and columns we use.

Column names, order, types and nullability follow the OMOP CDM v5.4 specification for
PostgreSQL (read in its field-level table and DDL); only the tables kidneycohort reads or
the synthetic writer fills are defined, with every one of their columns. For DuckDB,
``NUMERIC`` is declared ``DOUBLE``: DuckDB reads a bare ``NUMERIC`` as
``DECIMAL(18,3)``, which would round lab values to three decimals.
"""

from __future__ import annotations

from typing import Final, Literal

__all__ = ["CDM_TABLES", "create_table_sql", "index_sql"]

Column = tuple[str, str, bool]  # name, PostgreSQL type, NOT NULL

CDM_TABLES: Final[dict[str, tuple[Column, ...]]] = {
    "person": (
        ("person_id", "integer", True),
        ("gender_concept_id", "integer", True),
        ("year_of_birth", "integer", True),
        ("month_of_birth", "integer", False),
        ("day_of_birth", "integer", False),
        ("birth_datetime", "timestamp", False),
        ("race_concept_id", "integer", True),
        ("ethnicity_concept_id", "integer", True),
        ("location_id", "integer", False),
        ("provider_id", "integer", False),
        ("care_site_id", "integer", False),
        ("person_source_value", "varchar(50)", False),
        ("gender_source_value", "varchar(50)", False),
        ("gender_source_concept_id", "integer", False),
        ("race_source_value", "varchar(50)", False),
        ("race_source_concept_id", "integer", False),
        ("ethnicity_source_value", "varchar(50)", False),
        ("ethnicity_source_concept_id", "integer", False),
    ),
    "observation_period": (
        ("observation_period_id", "integer", True),
        ("person_id", "integer", True),
        ("observation_period_start_date", "date", True),
        ("observation_period_end_date", "date", True),
        ("period_type_concept_id", "integer", True),
    ),
    "visit_occurrence": (
        ("visit_occurrence_id", "integer", True),
        ("person_id", "integer", True),
        ("visit_concept_id", "integer", True),
        ("visit_start_date", "date", True),
        ("visit_start_datetime", "timestamp", False),
        ("visit_end_date", "date", True),
        ("visit_end_datetime", "timestamp", False),
        ("visit_type_concept_id", "integer", True),
        ("provider_id", "integer", False),
        ("care_site_id", "integer", False),
        ("visit_source_value", "varchar(50)", False),
        ("visit_source_concept_id", "integer", False),
        ("admitted_from_concept_id", "integer", False),
        ("admitted_from_source_value", "varchar(50)", False),
        ("discharged_to_concept_id", "integer", False),
        ("discharged_to_source_value", "varchar(50)", False),
        ("preceding_visit_occurrence_id", "integer", False),
    ),
    "condition_occurrence": (
        ("condition_occurrence_id", "integer", True),
        ("person_id", "integer", True),
        ("condition_concept_id", "integer", True),
        ("condition_start_date", "date", True),
        ("condition_start_datetime", "timestamp", False),
        ("condition_end_date", "date", False),
        ("condition_end_datetime", "timestamp", False),
        ("condition_type_concept_id", "integer", True),
        ("condition_status_concept_id", "integer", False),
        ("stop_reason", "varchar(20)", False),
        ("provider_id", "integer", False),
        ("visit_occurrence_id", "integer", False),
        ("visit_detail_id", "integer", False),
        ("condition_source_value", "varchar(50)", False),
        ("condition_source_concept_id", "integer", False),
        ("condition_status_source_value", "varchar(50)", False),
    ),
    "procedure_occurrence": (
        ("procedure_occurrence_id", "integer", True),
        ("person_id", "integer", True),
        ("procedure_concept_id", "integer", True),
        ("procedure_date", "date", True),
        ("procedure_datetime", "timestamp", False),
        ("procedure_end_date", "date", False),
        ("procedure_end_datetime", "timestamp", False),
        ("procedure_type_concept_id", "integer", True),
        ("modifier_concept_id", "integer", False),
        ("quantity", "integer", False),
        ("provider_id", "integer", False),
        ("visit_occurrence_id", "integer", False),
        ("visit_detail_id", "integer", False),
        ("procedure_source_value", "varchar(50)", False),
        ("procedure_source_concept_id", "integer", False),
        ("modifier_source_value", "varchar(50)", False),
    ),
    "measurement": (
        ("measurement_id", "integer", True),
        ("person_id", "integer", True),
        ("measurement_concept_id", "integer", True),
        ("measurement_date", "date", True),
        ("measurement_datetime", "timestamp", False),
        ("measurement_time", "varchar(10)", False),
        ("measurement_type_concept_id", "integer", True),
        ("operator_concept_id", "integer", False),
        ("value_as_number", "numeric", False),
        ("value_as_concept_id", "integer", False),
        ("unit_concept_id", "integer", False),
        ("range_low", "numeric", False),
        ("range_high", "numeric", False),
        ("provider_id", "integer", False),
        ("visit_occurrence_id", "integer", False),
        ("visit_detail_id", "integer", False),
        ("measurement_source_value", "varchar(50)", False),
        ("measurement_source_concept_id", "integer", False),
        ("unit_source_value", "varchar(50)", False),
        ("unit_source_concept_id", "integer", False),
        ("value_source_value", "varchar(50)", False),
        ("measurement_event_id", "integer", False),
        ("meas_event_field_concept_id", "integer", False),
    ),
    "death": (
        ("person_id", "integer", True),
        ("death_date", "date", True),
        ("death_datetime", "timestamp", False),
        ("death_type_concept_id", "integer", False),
        ("cause_concept_id", "integer", False),
        ("cause_source_value", "varchar(50)", False),
        ("cause_source_concept_id", "integer", False),
    ),
    "cdm_source": (
        ("cdm_source_name", "varchar(255)", True),
        ("cdm_source_abbreviation", "varchar(25)", True),
        ("cdm_holder", "varchar(255)", True),
        ("source_description", "text", False),
        ("source_documentation_reference", "varchar(255)", False),
        ("cdm_etl_reference", "varchar(255)", False),
        ("source_release_date", "date", True),
        ("cdm_release_date", "date", True),
        ("cdm_version", "varchar(10)", False),
        ("cdm_version_concept_id", "integer", True),
        ("vocabulary_version", "varchar(20)", True),
    ),
    "concept": (
        ("concept_id", "integer", True),
        ("concept_name", "varchar(255)", True),
        ("domain_id", "varchar(20)", True),
        ("vocabulary_id", "varchar(20)", True),
        ("concept_class_id", "varchar(20)", True),
        ("standard_concept", "varchar(1)", False),
        ("concept_code", "varchar(50)", True),
        ("valid_start_date", "date", True),
        ("valid_end_date", "date", True),
        ("invalid_reason", "varchar(1)", False),
    ),
    "cohort": (
        ("cohort_definition_id", "integer", True),
        ("subject_id", "integer", True),
        ("cohort_start_date", "date", True),
        ("cohort_end_date", "date", True),
    ),
    "cohort_definition": (
        ("cohort_definition_id", "integer", True),
        ("cohort_definition_name", "varchar(255)", True),
        ("cohort_definition_description", "text", False),
        ("definition_type_concept_id", "integer", True),
        ("cohort_definition_syntax", "text", False),
        ("subject_concept_id", "integer", True),
        ("cohort_initiation_date", "date", False),
    ),
}

# Indexes an OMOP deployment keeps (OMOP CDM v5.4 indices file: person_id and concept
# columns); the reader's selection relies on the measurement concept index.
INDEXES: Final[dict[str, tuple[str, ...]]] = {
    "measurement": ("measurement_concept_id", "person_id"),
    "person": ("person_id",),
    "concept": ("concept_code",),
    "procedure_occurrence": ("procedure_concept_id",),
    "condition_occurrence": ("condition_concept_id",),
    "visit_occurrence": ("visit_occurrence_id",),
}


def _type(sql_type: str, dialect: str) -> str:
    if dialect == "duckdb" and sql_type == "numeric":
        return "DOUBLE"
    return sql_type.upper()


def create_table_sql(
    table: str, schema: str, dialect: Literal["postgresql", "duckdb"] = "postgresql"
) -> str:
    """``CREATE TABLE schema.table (...)`` for one of :data:`CDM_TABLES`."""
    columns = ",\n  ".join(
        f"{name} {_type(kind, dialect)}{' NOT NULL' if not_null else ''}"
        for name, kind, not_null in CDM_TABLES[table]
    )
    return f"CREATE TABLE {schema}.{table} (\n  {columns}\n);"


def index_sql(table: str, schema: str) -> list[str]:
    """``CREATE INDEX`` statements of :data:`INDEXES` for ``table``."""
    return [
        f"CREATE INDEX idx_{table}_{column} ON {schema}.{table} ({column});"
        for column in INDEXES.get(table, ())
    ]
