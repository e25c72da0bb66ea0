"""Source tables Spark reads itself: Parquet dataset folders, never collected on the driver.

The driver reads only the files' footers and schemas: per source (one folder), the
files in path order with their row counts, so each row's ``source_row`` is the same
number the polars reader gives it (the rows before its file, plus its position in the
file, which Spark reports as ``_metadata.row_index``), and the formats of text date
columns, fixed once from the whole source. Every partition then gives its share of the
raw rows to the reader's own :func:`~kidneycohort.io.readers.normalise_source`.
"""

from __future__ import annotations

import urllib.parse
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

import polars as pl

from kidneycohort.io.maps import FileSource, TableKind
from kidneycohort.io.readers import (
    SCHEMAS,
    dataset_files,
    date_formats,
    normalise_source,
    scan_source,
)

if TYPE_CHECKING:
    from pyspark.sql import DataFrame, SparkSession

__all__ = [
    "FILE",
    "FILE_ROW",
    "DatasetSource",
    "concat_sources",
    "dataset_sources",
    "normalised",
    "raw_schema",
    "spark_rows",
]

FILE = "_kc_file"
FILE_ROW = "_kc_file_row"


@dataclass(frozen=True)
class DatasetSource:
    """One Parquet dataset folder of a source table, as the partitions need it.

    Attributes
    ----------
    spec : FileSource
        The configured source.
    kind : str
        ``labs``, ``patients`` or ``events``.
    schema : dict
        The columns :func:`~kidneycohort.io.readers.scan_source` gives, with their types.
    offsets : dict
        File path -> rows in the files before it (in path order).
    formats : dict
        Text date column -> its format for the whole source.
    key : str
        The source's own name of the column mapped to ``patient_id``.
    """

    spec: FileSource
    kind: str
    schema: dict[str, pl.DataType]
    offsets: dict[str, int]
    formats: dict[str, str]
    key: str


def dataset_sources(specs: list[FileSource], kind: str) -> list[DatasetSource]:
    """Footers and schemas of each folder of a source table (no rows are read)."""
    import pyarrow.parquet as pq

    table_kind = cast(TableKind, kind)

    out = []
    for spec in specs:
        scan = scan_source(spec)
        offsets, before = {}, 0
        for path in dataset_files(spec.path):
            offsets[str(path.resolve())] = before
            before += pq.read_metadata(path).num_rows
        renamed = scan.rename(spec.columns)
        formats = date_formats(
            renamed, SCHEMAS[table_kind], name=str(spec.path), date_format=spec.date_format
        )
        key = next((src for src, dst in spec.columns.items() if dst == "patient_id"), "patient_id")
        out.append(DatasetSource(spec, kind, dict(scan.collect_schema()), offsets, formats, key))
    return out


def spark_rows(spark: SparkSession, source: DatasetSource) -> DataFrame:
    """The folder's rows as Spark reads them, with each row's file and place in it."""
    from pyspark.sql import functions as F

    folder = Path(source.spec.path).resolve()
    files = [str(p.resolve()) for p in dataset_files(folder)]
    frame = spark.read.option("basePath", str(folder)).parquet(*files)
    raw = [F.col(f"`{c}`") for c in frame.columns]
    return frame.select(
        *raw,
        F.col("_metadata.file_path").alias(FILE),
        F.col("_metadata.row_index").alias(FILE_ROW),
    )


def _local_path(uri: str) -> str:
    parsed = urllib.parse.urlparse(uri)
    return str(Path(urllib.parse.unquote(parsed.path)).resolve())


def raw_schema(source: DatasetSource) -> dict[str, pl.DataType]:
    """The columns of a folder's rows as a partition receives them."""
    schema = {c: t for c, t in source.schema.items() if c != "source_row"}
    return {**schema, FILE: pl.String(), FILE_ROW: pl.Int64()}


def normalised(rows: pl.DataFrame, source: DatasetSource) -> pl.DataFrame:
    """A partition's raw rows of one folder -> the reader's canonical table for them,
    in the folder's row order."""
    files = rows[FILE].cast(pl.String).unique().to_list()
    # (replace_strict with nothing to replace keeps the text type: no files, no rows)
    before = (
        pl.col(FILE)
        .cast(pl.String)
        .replace_strict(files, [source.offsets[_local_path(f)] for f in files])
        .cast(pl.Int64)
        if files
        else pl.lit(None, pl.Int64)
    )
    numbered = rows.with_columns((before + pl.col(FILE_ROW).cast(pl.Int64) + 1).alias("source_row"))
    raw = numbered.select(pl.col(c).cast(t) for c, t in source.schema.items()).sort("source_row")
    kind: Any = source.kind
    return normalise_source(raw.lazy(), source.spec, kind, formats=source.formats).collect()


def concat_sources(parts: list[pl.DataFrame], schema: Mapping[str, pl.DataType]) -> pl.DataFrame:
    """The sources of one table as the polars reader concatenates them."""
    table = parts[0] if len(parts) == 1 else pl.concat(parts, how="diagonal_relaxed")
    return table.select(pl.col(c).cast(t) for c, t in schema.items())
