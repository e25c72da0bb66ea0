"""CDISC dataset files: SAS transport (XPORT v5) and Dataset-JSON v1.1, read and written.

Writing XPT uses ``pyreadstat`` (the ReadStat C library), which writes SAS transport
version 5 with variable labels and formats; pandas reads XPT but cannot write it.
Dataset-JSON follows the CDISC Dataset-JSON v1.1 specification: top-level attributes
in the specified order, one ``columns`` entry per variable (``itemOID``, ``name``,
``label``, ``dataType``, ``length`` for text, ``keySequence`` for keys), ``rows`` as arrays,
missing values as ``null``; dates as ISO 8601 text with ``dataType`` "date" and, for
ADaM numeric dates, ``targetDataType`` "integer" and ``displayFormat`` "DATE9.".

References
----------
.. [1] SAS Institute. TS-140: The record layout of a data set in SAS transport (XPORT)
   format.
.. [2] CDISC Data Exchange Standards Team. Dataset-JSON v1.1 specification (2024).
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Final, Protocol

import polars as pl

from kidneycohort.errors import InputDataError

__all__ = [
    "DATASET_JSON_VERSION",
    "VariableLike",
    "dataset_json_columns",
    "read_dataset_json",
    "read_xpt",
    "sas_date",
    "write_dataset_json",
    "write_xpt",
]

DATASET_JSON_VERSION: Final = "1.1.0"
_SAS_EPOCH: Final = dt.date(1960, 1, 1)
_CHUNK: Final = 20_000


class VariableLike(Protocol):
    """What the writers need to know of a variable."""

    @property
    def name(self) -> str: ...
    @property
    def label(self) -> str: ...
    @property
    def kind(self) -> str:  # "text", "integer", "float" or "date"
        ...


def write_xpt(
    frame: pl.DataFrame, path: Path, *, name: str, label: str, variables: Sequence[VariableLike]
) -> Path:
    """Write ``frame`` as a SAS transport v5 file (one member named ``name``).

    Text nulls become blanks (SAS has no null text); integers and dates are SAS numbers,
    dates with the ``DATE9.`` format.
    """
    import pyreadstat

    formats = {v.name: "DATE9." for v in variables if v.kind == "date"}
    text = [v.name for v in variables if v.kind == "text"]
    out = frame.with_columns(pl.col(c).fill_null("") for c in text)
    pyreadstat.write_xport(
        out,
        str(path),
        file_label=label,
        column_labels=[v.label for v in variables],
        table_name=name,
        file_format_version=5,
        variable_format=formats,
    )
    return path


def read_xpt(path: Path) -> pl.DataFrame:
    """Read a SAS transport file with pandas (text as text, blanks as null)."""
    import pandas as pd

    try:
        data = pd.read_sas(path, format="xport", encoding="utf-8")
    except (ValueError, OSError) as exc:
        raise InputDataError(f"{path}: not a readable SAS transport file ({exc})") from None
    frame = pl.from_pandas(data)
    return frame.with_columns(
        pl.when(pl.col(c).str.strip_chars() != "").then(pl.col(c))
        for c, t in frame.schema.items()
        if t == pl.String
    )


def _json_type(kind: str) -> dict[str, Any]:
    if kind == "text":
        return {"dataType": "string"}
    if kind == "integer":
        return {"dataType": "integer"}
    if kind == "float":
        return {"dataType": "double"}
    return {"dataType": "date", "targetDataType": "integer", "displayFormat": "DATE9."}


def dataset_json_columns(
    frame: pl.DataFrame, name: str, variables: Sequence[VariableLike], keys: Sequence[str]
) -> list[dict[str, Any]]:
    """The ``columns`` metadata of a Dataset-JSON file (v1.1 attribute order)."""
    columns = []
    for v in variables:
        column: dict[str, Any] = {
            "itemOID": f"IT.{name}.{v.name}",
            "name": v.name,
            "label": v.label,
        }
        column |= _json_type(v.kind)
        if v.kind == "text":
            longest = frame.select(pl.col(v.name).str.len_bytes().max()).item()
            column["length"] = max(1, int(longest or 1))
        if v.name in keys:
            column["keySequence"] = list(keys).index(v.name) + 1
        columns.append(column)
    return columns


def _json_rows(frame: pl.DataFrame, variables: Sequence[VariableLike]) -> pl.DataFrame:
    return frame.select(
        pl.col(v.name).dt.strftime("%Y-%m-%d") if v.kind == "date" else pl.col(v.name)
        for v in variables
    )


def _clean(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def write_dataset_json(
    frame: pl.DataFrame,
    path: Path,
    *,
    name: str,
    label: str,
    variables: Sequence[VariableLike],
    keys: Sequence[str] = (),
    study_oid: str = "",
    created: dt.datetime | None = None,
    originator: str = "kidneycohort",
    source_version: str = "",
) -> Path:
    """Write ``frame`` as CDISC Dataset-JSON v1.1, rows streamed in chunks."""
    when = (created or dt.datetime.now(dt.UTC)).strftime("%Y-%m-%dT%H:%M:%S")
    header: dict[str, Any] = {
        "datasetJSONCreationDateTime": when,
        "datasetJSONVersion": DATASET_JSON_VERSION,
        "fileOID": f"{study_oid or 'kidneycohort'}.{name}",
        "originator": originator,
        "sourceSystem": {"name": "kidneycohort", "version": source_version or "unknown"},
    }
    if study_oid:
        header["studyOID"] = study_oid
    header |= {
        "itemGroupOID": f"IG.{name}",
        "records": frame.height,
        "name": name,
        "label": label,
        "columns": dataset_json_columns(frame, name, variables, keys),
    }
    text = _json_rows(frame, variables)
    with Path(path).open("w", encoding="utf-8") as handle:
        handle.write(json.dumps(header, ensure_ascii=False)[:-1])
        handle.write(', "rows": [')
        first = True
        for start in range(0, text.height, _CHUNK):
            for row in text.slice(start, _CHUNK).iter_rows():
                handle.write(("" if first else ", ") + json.dumps([_clean(v) for v in row]))
                first = False
        handle.write("]}\n")
    return Path(path)


_JSON_TYPES: Final = {
    "string": pl.String,
    "integer": pl.Int64,
    "decimal": pl.Float64,
    "float": pl.Float64,
    "double": pl.Float64,
    "boolean": pl.Boolean,
    "URI": pl.String,
}


def read_dataset_json(path: Path) -> tuple[pl.DataFrame, dict[str, Any]]:
    """Read a Dataset-JSON v1.1 file: the rows (dates as polars dates) and its metadata."""
    try:
        document = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise InputDataError(f"{path}: not a readable Dataset-JSON file ({exc})") from None
    if not isinstance(document, dict) or "columns" not in document:
        raise InputDataError(f"{path}: not a Dataset-JSON file (no 'columns')")
    columns = document["columns"]
    names = [c["name"] for c in columns]
    rows = document.get("rows") or []
    schema: dict[str, pl.DataType] = {}
    for c in columns:
        kind = c.get("dataType", "string")
        schema[c["name"]] = _JSON_TYPES.get(kind, pl.String)()  # dates read as text first
    data = pl.DataFrame(
        [
            pl.Series(n, [r[i] for r in rows], dtype=schema[n], strict=False)
            for i, n in enumerate(names)
        ]
    )
    data = data.with_columns(
        pl.col(c["name"]).str.to_date("%Y-%m-%d", strict=False)
        for c in columns
        if c.get("dataType") == "date" and c.get("targetDataType") == "integer"
    )
    meta = {k: v for k, v in document.items() if k != "rows"}
    return data, meta


def sas_date(values: pl.Expr) -> pl.Expr:
    """SAS date numbers (days since 1960-01-01) as polars dates."""
    return (pl.lit(_SAS_EPOCH) + pl.duration(days=values.round(0).cast(pl.Int64))).cast(pl.Date)
