"""Column maps, value maps and per-source defaults.

A :class:`FileSource` says where one table comes from and how its columns and codes
translate to kidneycohort's canonical tables (see ``kidneycohort.schemas``). Its field
names are the keys a study config uses under a source entry.

The default code lists below are common practice (the spellings sites use most); a
study adds its own codes in :class:`FileSource.values` or in the harmonise rules.
"""

from __future__ import annotations

import codecs
from pathlib import Path
from typing import Final, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

from kidneycohort.errors import ConfigError
from kidneycohort.vocabulary import SEX_CODES

__all__ = [
    "DEFAULT_ANALYTE_NAMES",
    "DEFAULT_EVENT_CODES",
    "DEFAULT_SEX_CODES",
    "FileSource",
    "TableKind",
]

TableKind = Literal["labs", "patients", "events"]

# Site analyte names after folding (lower case, runs of space/_/- -> one space).
DEFAULT_ANALYTE_NAMES: Final[dict[str, str]] = {
    "creatinine": "creatinine",
    "creat": "creatinine",
    "crea": "creatinine",
    "scr": "creatinine",
    "serum creatinine": "creatinine",
    "s creatinine": "creatinine",
    "p creatinine": "creatinine",
    "plasma creatinine": "creatinine",
    "creatinine serum": "creatinine",
    "cystatin c": "cystatin_c",
    "cystatin": "cystatin_c",
    "cysc": "cystatin_c",
    "cys c": "cystatin_c",
    "serum cystatin c": "cystatin_c",
    "s cystatin c": "cystatin_c",
    "uacr": "uacr",
    "acr": "uacr",
    "u acr": "uacr",
    "albumin/creatinine ratio": "uacr",
    "albumin creatinine ratio": "uacr",
    "urine albumin/creatinine ratio": "uacr",
    "urine albumin creatinine ratio": "uacr",
    "microalbumin/creatinine ratio": "uacr",
    "u albumin/creatinine": "uacr",
}

DEFAULT_SEX_CODES: Final[dict[str, str]] = SEX_CODES

DEFAULT_EVENT_CODES: Final[dict[str, str]] = {
    "dialysis": "dialysis",
    "haemodialysis": "dialysis",
    "hemodialysis": "dialysis",
    "peritoneal dialysis": "dialysis",
    "transplant": "transplant",
    "kidney transplant": "transplant",
    "renal transplant": "transplant",
    "death": "death",
    "died": "death",
    "kidney death": "kidney_death",
    "renal death": "kidney_death",
}


_FORMATS: Final = {
    ".csv": "csv",
    ".tsv": "csv",
    ".txt": "csv",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".duckdb": "duckdb",
    ".db": "duckdb",
}


class FileSource(BaseModel):
    """Where one input table comes from and how it maps to the canonical table.

    Examples
    --------
    >>> spec = FileSource(path="site_b_labs.csv", delimiter=";",
    ...                   columns={"PID": "patient_id", "RESULT": "value"},
    ...                   defaults={"unit": "umol/L"})
    >>> spec.resolved_format(), spec.source_name()
    ('csv', 'site_b_labs')
    """

    model_config = ConfigDict(extra="forbid")

    path: str = Field(
        description="File to read: .csv/.tsv/.txt, .parquet, or a DuckDB file; or a folder "
        "of Parquet files (a dataset, optionally in hive `key=value` folders)."
    )
    name: str | None = Field(
        default=None,
        description="Label written to the `source` column; defaults to the file name stem.",
    )
    format: Literal["csv", "parquet", "duckdb"] | None = Field(
        default=None, description="File format; inferred from the file suffix when omitted."
    )
    table: str | None = Field(default=None, description="DuckDB only: the table (or view) to read.")
    query: str | None = Field(
        default=None, description="DuckDB only: a SQL query to read instead of a table."
    )
    delimiter: str = Field(default=",", description="CSV field separator (one character).")
    encoding: str = Field(
        default="utf-8",
        description="CSV text encoding; UTF-8 with or without a byte-order mark is read "
        "lazily, any other Python codec (e.g. 'latin-1', 'cp1252') is decoded in memory.",
    )
    date_format: str | None = Field(
        default=None,
        description="strftime format of every date column (e.g. '%d/%m/%Y'); inferred "
        "when omitted, and an error when day/month order is ambiguous.",
    )
    columns: dict[str, str] = Field(
        default_factory=dict, description="Source column name -> canonical column name."
    )
    values: dict[str, dict[str, str]] = Field(
        default_factory=dict,
        description="Canonical column -> {site value: canonical value}, e.g. "
        "{'sex': {'1': 'male', '2': 'female'}}; values not listed are kept as read.",
    )
    defaults: dict[str, str] = Field(
        default_factory=dict,
        description="Canonical column -> value used where the source leaves it empty "
        "(e.g. {'unit': 'umol/L'} for a source documented in umol/L). Every use is "
        "recorded in the `assumption` column and counted by harmonise.",
    )

    @field_validator("delimiter")
    @classmethod
    def _one_char(cls, value: str) -> str:
        if len(value) != 1:
            raise ValueError(f"delimiter must be one character, got {value!r}")
        return value

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, value: str) -> str:
        try:
            codecs.lookup(value)
        except LookupError:
            raise ValueError(
                f"unknown encoding {value!r}; use a Python codec name such as 'utf-8', "
                "'latin-1' or 'cp1252'"
            ) from None
        return value

    @field_validator("columns")
    @classmethod
    def _one_source_per_name(cls, value: dict[str, str]) -> dict[str, str]:
        seen: dict[str, str] = {}
        for source, target in value.items():
            if target in seen:
                raise ValueError(
                    f"source columns '{seen[target]}' and '{source}' both map to "
                    f"'{target}'; map one of them"
                )
            seen[target] = source
        return value

    def resolved_format(self) -> str:
        """The file format, from ``format`` or the file suffix."""
        if self.format is not None:
            return self.format
        if Path(self.path).is_dir():
            return "parquet"  # a folder is a Parquet dataset
        suffix = Path(self.path).suffix.lower()
        if suffix not in _FORMATS:
            raise ConfigError(
                f"source {self.path}: cannot tell the format from suffix {suffix!r}; "
                "set format to 'csv', 'parquet' or 'duckdb'"
            )
        return _FORMATS[suffix]

    def source_name(self) -> str:
        """The label written to the ``source`` column."""
        return self.name if self.name is not None else Path(self.path).stem
