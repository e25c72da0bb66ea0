"""Reading cohort data: CSV / Parquet / DuckDB readers, column and value maps, LOINC."""

from kidneycohort.io.loinc import LOINC_CODES, LOINC_TO_ANALYTE, loinc_table
from kidneycohort.io.maps import (
    DEFAULT_ANALYTE_NAMES,
    DEFAULT_EVENT_CODES,
    DEFAULT_SEX_CODES,
    FileSource,
)
from kidneycohort.io.readers import (
    infer_date_format,
    parse_date_columns,
    read_events,
    read_labs,
    read_many,
    read_patients,
    read_source,
)

__all__ = [
    "DEFAULT_ANALYTE_NAMES",
    "DEFAULT_EVENT_CODES",
    "DEFAULT_SEX_CODES",
    "LOINC_CODES",
    "LOINC_TO_ANALYTE",
    "FileSource",
    "infer_date_format",
    "loinc_table",
    "parse_date_columns",
    "read_events",
    "read_labs",
    "read_many",
    "read_patients",
    "read_source",
]
