"""What an OMOP CDM source is: connection, schemas, concept sets and reading rules.

:class:`OmopSource` is the one option model of the OMOP reader; its field names are the
keys of a study config's ``data.source`` entry with ``kind: omop``. No concept id appears
in it: measurements, units, events, sexes and care settings are named by vocabulary
codes (LOINC, UCUM, SNOMED, the OMOP ``Gender`` and ``Visit`` vocabularies) and resolved
to concept ids through the database's own CONCEPT table.

The connection secret is never a field: ``connection_env`` names an environment
variable that holds a libpq connection string or URI, or ``service`` names an entry of
the PostgreSQL connection service file (``pg_service.conf``); passwords may also come
from ``~/.pgpass``. Nothing here is written to the manifest but the variable's or the
service's name.

References
----------
.. [1] OHDSI. OMOP Common Data Model v5.4, table and field specifications
   (ohdsi.github.io/CommonDataModel/cdm54.html).
"""

from __future__ import annotations

import datetime as dt
import re
from typing import Final, Literal

from pydantic import Field, field_validator, model_validator

from kidneycohort._rules import RuleModel
from kidneycohort.errors import ConfigError

__all__ = [
    "DEFAULT_EVENTS",
    "IDENTIFIER",
    "OPERATOR_QUALIFIERS",
    "CodeSet",
    "CohortGroups",
    "EventConcepts",
    "OmopSource",
    "check_source",
]

# Identifiers we accept from a config (schema, table names): a plain SQL identifier.
IDENTIFIER: Final = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,62}$")

# LOINC codes read by default, per analyte (a subset of kidneycohort.io.loinc; each code
# must be in the database's CONCEPT table, else the read stops naming it).
DEFAULT_LAB_CODES: Final[dict[Literal["creatinine", "cystatin_c", "uacr"], list[str]]] = {
    "creatinine": ["2160-0", "14682-9"],
    "cystatin_c": ["33863-2"],
    "uacr": ["9318-7", "14959-1"],
}
# UCUM codes of the units of those analytes (kidneycohort.units knows each).
DEFAULT_UNIT_CODES: Final = ["mg/dL", "umol/L", "mg/L", "mg/g", "mg/mmol"]
# OMOP "Visit" vocabulary codes (inpatient, emergency room, emergency room and inpatient,
# outpatient; OMOP CDM v5.4 conventions, from memory) -> canonical setting.
DEFAULT_VISIT_SETTINGS: Final = {
    "IP": "inpatient",
    "ERIP": "inpatient",
    "ER": "emergency",
    "OP": "outpatient",
}
# OMOP "Gender" vocabulary codes (from memory).
DEFAULT_SEX_CODES: Final = {"F": "female", "M": "male"}
# "Meas Value Operator" vocabulary codes (OMOP CDM v5.4 MEASUREMENT.operator_concept_id:
# <, <=, =, >=, >) -> the qualifier harmonise understands.
OPERATOR_QUALIFIERS: Final = {"<": "<", "<=": "<", "=": None, ">=": ">", ">": ">"}


class EventConcepts(RuleModel):
    """One concept set of kidney-failure events, found in a CDM event table.

    Examples
    --------
    >>> EventConcepts(event="dialysis", vocabulary="SNOMED", codes=["108241001"]).table
    'procedure_occurrence'
    """

    event: Literal["dialysis", "transplant", "kidney_failure"] = Field(
        description="What the concepts mean: 'dialysis' and 'transplant' become events; "
        "'kidney_failure' (a diagnosis such as end-stage kidney disease) gives the "
        "patient's kfrt_date (the earliest)."
    )
    table: Literal["procedure_occurrence", "condition_occurrence"] = Field(
        "procedure_occurrence", description="The CDM table holding the records."
    )
    vocabulary: str = Field(description="vocabulary_id of the codes, e.g. 'SNOMED', 'ICD10CM'.")
    codes: list[str] = Field(min_length=1, description="concept_code values of the set.")


DEFAULT_EVENTS: Final = (
    # SNOMED CT codes, from memory: 108241001 dialysis procedure, 70536003 kidney
    # transplant, 46177005 end-stage renal disease
    EventConcepts(event="dialysis", vocabulary="SNOMED", codes=["108241001"]),
    EventConcepts(event="transplant", vocabulary="SNOMED", codes=["70536003"]),
    EventConcepts(
        event="kidney_failure",
        table="condition_occurrence",
        vocabulary="SNOMED",
        codes=["46177005"],
    ),
)


class CodeSet(RuleModel):
    """Codes of one vocabulary (e.g. causes of death counted as kidney death)."""

    vocabulary: str = Field(description="vocabulary_id of the codes.")
    codes: list[str] = Field(min_length=1, description="concept_code values.")


class CohortGroups(RuleModel):
    """Index date and group from an OMOP COHORT table (cohort_definition_id -> group)."""

    table_schema: str | None = Field(
        None, description="Schema of the cohort table; default the CDM schema."
    )
    table: str = Field("cohort", description="The cohort table (OMOP CDM v5.4 COHORT layout).")
    groups: dict[int, str] = Field(
        min_length=1,
        description="cohort_definition_id -> group label; a person in several cohorts "
        "takes the earliest entry (then the lowest id).",
    )


class OmopSource(RuleModel):
    """An OMOP CDM v5.4 database as the study's source (config ``data.source``).

    Examples
    --------
    >>> spec = OmopSource(database="duckdb", path="omop_cdm.duckdb", cdm_schema="main")
    >>> spec.vocabulary_schema_name, spec.labs["uacr"]
    ('main', ['9318-7', '14959-1'])
    """

    kind: Literal["omop"] = Field("omop", description="Source kind: an OMOP CDM database.")
    name: str = Field("omop", description="Label written to the `source` column of every row.")
    database: Literal["postgresql", "duckdb"] = Field(
        "postgresql", description="Database engine: PostgreSQL, or a DuckDB file."
    )
    connection_env: str | None = Field(
        None,
        description="PostgreSQL: name of the environment variable holding the libpq "
        "connection string or URI (the secret itself is never in the config).",
    )
    service: str | None = Field(
        None, description="PostgreSQL: a service name of the connection service file."
    )
    path: str | None = Field(None, description="DuckDB: the database file.")
    cdm_schema: str = Field("cdm", description="Schema of the CDM tables.")
    vocabulary_schema: str | None = Field(
        None, description="Schema of CONCEPT; default the CDM schema."
    )
    labs: dict[Literal["creatinine", "cystatin_c", "uacr"], list[str]] = Field(
        default_factory=lambda: {k: list(v) for k, v in DEFAULT_LAB_CODES.items()},
        description="Analyte -> LOINC codes of its measurement concepts.",
    )
    units: list[str] = Field(
        default_factory=lambda: list(DEFAULT_UNIT_CODES),
        description="UCUM codes of the units the lab results may carry; each must be in "
        "CONCEPT (vocabulary UCUM). A result whose unit concept is not among them is "
        "read with its unit_source_value and the assumption recorded.",
    )
    events: list[EventConcepts] = Field(
        default_factory=lambda: list(DEFAULT_EVENTS),
        description="Dialysis, transplant and kidney-failure concept sets.",
    )
    kidney_death_causes: CodeSet | None = Field(
        None, description="DEATH.cause concepts that make a death a kidney death."
    )
    visit_settings: dict[str, str] = Field(
        default_factory=lambda: dict(DEFAULT_VISIT_SETTINGS),
        description="OMOP Visit vocabulary code -> setting (inpatient / emergency / "
        "outpatient), read through the measurement's VISIT_OCCURRENCE.",
    )
    read_settings: bool = Field(
        True,
        description="Read each result's care setting from VISIT_OCCURRENCE (needed by "
        "value_filter.exclude_settings and the AKI filter).",
    )
    sex_codes: dict[str, str] = Field(
        default_factory=lambda: dict(DEFAULT_SEX_CODES),
        description="OMOP Gender vocabulary code -> female / male.",
    )
    cohort: CohortGroups | None = Field(
        None,
        description="Index date and group from a COHORT table (only its persons are "
        "read); without it every person is read and the index date is the start of "
        "the first observation period.",
    )
    patient_id: Literal["person_id", "person_source_value"] = Field(
        "person_id", description="Which PERSON column becomes patient_id."
    )
    birth_date_rule: Literal["middle", "first"] = Field(
        "middle",
        description="Birth date when PERSON has no birth_datetime and no day or month: "
        "'middle' takes 1 July / the 15th, 'first' 1 January / the 1st; recorded as an "
        "assumption.",
    )
    first_date: dt.date | None = Field(None, description="Read records on or after this day.")
    last_date: dt.date | None = Field(None, description="Read records on or before this day.")
    results_schema: str | None = Field(
        None,
        description="Optional: after a successful run, write its eGFR, baseline, slopes and "
        "endpoints to this schema of the same database (replacing the study's previous rows "
        "in one transaction).",
    )
    batch_rows: int = Field(
        250_000, ge=1_000, description="Rows per Arrow batch streamed from the database."
    )

    @field_validator("cdm_schema", "vocabulary_schema", "results_schema")
    @classmethod
    def _identifier(cls, value: str | None) -> str | None:
        if value is not None and not IDENTIFIER.match(value):
            raise ValueError(f"'{value}' is not a plain SQL identifier (letters, digits, '_')")
        return value

    @model_validator(mode="after")
    def _where(self) -> OmopSource:
        if self.database == "duckdb" and not self.path:
            raise ValueError("a DuckDB source needs path")
        if self.database == "postgresql" and (self.connection_env is None) == (
            self.service is None
        ):
            raise ValueError("a PostgreSQL source needs exactly one of connection_env or service")
        if self.cohort is not None:
            for value in (self.cohort.table_schema, self.cohort.table):
                if value is not None and not IDENTIFIER.match(value):
                    raise ValueError(f"cohort: '{value}' is not a plain SQL identifier")
        for setting in self.visit_settings.values():
            if setting not in ("inpatient", "emergency", "outpatient"):
                raise ValueError(
                    f"visit_settings: '{setting}' is not inpatient, emergency or outpatient"
                )
        return self

    @property
    def vocabulary_schema_name(self) -> str:
        """The schema of CONCEPT."""
        return self.vocabulary_schema or self.cdm_schema

    def where(self) -> str:
        """How the database is named in messages (never a secret)."""
        if self.database == "duckdb":
            return f"OMOP DuckDB file {self.path}"
        if self.connection_env is not None:
            return f"OMOP PostgreSQL (connection from ${self.connection_env})"
        return f"OMOP PostgreSQL (service '{self.service}')"


def check_source(spec: OmopSource) -> None:
    """Raise :class:`ConfigError` for reading rules that cannot work together."""
    if spec.first_date and spec.last_date and spec.first_date > spec.last_date:
        raise ConfigError(
            f"data.source.first_date {spec.first_date} is after last_date {spec.last_date}"
        )
