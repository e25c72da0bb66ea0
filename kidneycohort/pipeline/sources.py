"""Reading the configured sources, checking them before a run, hashing them after."""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import polars as pl

from kidneycohort.errors import InputDataError
from kidneycohort.io import FileSource, read_source
from kidneycohort.io.readers import dataset_files, utf8_error_line
from kidneycohort.pipeline.config import StudyConfig
from kidneycohort.pipeline.standard_sources import check_source
from kidneycohort.pipeline.standard_sources import input_records as standard_input_records
from kidneycohort.pipeline.standard_sources import read_source as read_standard_source
from kidneycohort.run_folder import sha256_of

__all__ = [
    "SOURCE_TABLES",
    "check_inputs",
    "dataset_sha256",
    "input_records",
    "read_sources",
    "spark_datasets",
]

# config table -> (run table name, reader kind)
SOURCE_TABLES = {
    "patients": ("patients", "patients"),
    "labs": ("raw_labs", "labs"),
    "events": ("events", "events"),
}


def _where(table: str, specs: list[FileSource], i: int) -> str:
    return f"data.{table}[{i}]" if len(specs) > 1 else f"data.{table}"


def _lazy(config: StudyConfig, table: str) -> pl.LazyFrame | None:
    specs = config.data.specs(table)
    if not specs:
        return None
    _, kind = SOURCE_TABLES[table]
    frames = []
    for i, spec in enumerate(specs):
        try:
            frames.append(read_source(spec, kind))  # type: ignore[arg-type]
        except InputDataError as exc:
            raise InputDataError(f"{_where(table, specs, i)}: {exc}") from None
    return frames[0] if len(frames) == 1 else pl.concat(frames, how="diagonal_relaxed")


def check_inputs(config: StudyConfig) -> dict[str, list[str]]:
    """Check every configured file exists and its column map fits, reading only headers.

    Returns table -> the columns the reader will hand over. Raises
    :class:`~kidneycohort.errors.InputDataError` naming the config field (``data.labs``),
    the file and the column.
    """
    if config.data.source is not None:
        return check_source(config.data.source)
    out: dict[str, list[str]] = {}
    for table in SOURCE_TABLES:
        specs = config.data.specs(table)
        for i, spec in enumerate(specs):
            if not Path(spec.path).is_file() and not Path(spec.path).is_dir():
                raise InputDataError(
                    f"{_where(table, specs, i)}.path: file '{spec.path}' not found; paths "
                    "are relative to the config file"
                )
        frame = _lazy(config, table)
        if frame is not None:
            out[table] = frame.collect_schema().names()
    return out


def _collect(frame: pl.LazyFrame, spec: FileSource, where: str) -> pl.DataFrame:
    """Collect one source; a failure while reading its rows names the file (and line)."""
    try:
        return frame.collect()
    except pl.exceptions.PolarsError as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        path = Path(spec.path)
        if "utf-8" in first.lower() or "utf8" in first.lower():
            found = utf8_error_line(path) if path.is_file() else None
            at = f" at line {found[0]} (byte {found[1]})" if found else ""
            raise InputDataError(
                f"{where}: {spec.path}: not readable as UTF-8{at}; set encoding, e.g. "
                "'latin-1' or 'cp1252'"
            ) from None
        raise InputDataError(f"{where}: {spec.path}: cannot be read ({first})") from None


def spark_datasets(config: StudyConfig) -> list[str]:
    """Source tables the spark engine reads itself: every source of them is a folder
    (a Parquet dataset). Other tables are read on the driver."""
    if config.execution.engine != "spark" or config.data.source is not None:
        return []
    return [
        table
        for table in SOURCE_TABLES
        if config.data.specs(table)
        and all(Path(spec.path).is_dir() for spec in config.data.specs(table))
    ]


def read_sources(config: StudyConfig) -> Mapping[str, pl.DataFrame | pl.LazyFrame]:
    """Read the configured sources into ``patients``, ``raw_labs`` (and ``events``).

    A table the spark engine reads itself (:func:`spark_datasets`) is left as the
    LazyFrame of its sources: its schema, not its rows, on the driver.
    """
    if config.data.source is not None:
        return read_standard_source(config.data.source)
    check_inputs(config)
    out: dict[str, pl.DataFrame | pl.LazyFrame] = {}
    datasets = spark_datasets(config)
    for table, (name, kind) in SOURCE_TABLES.items():
        specs = config.data.specs(table)
        if table in datasets:
            lazy = _lazy(config, table)
            assert lazy is not None
            out[name] = lazy
            continue
        frames = []
        for i, spec in enumerate(specs):
            where = _where(table, specs, i)
            try:
                lazy = read_source(spec, kind)  # type: ignore[arg-type]
            except InputDataError as exc:
                raise InputDataError(f"{where}: {exc}") from None
            frames.append(_collect(lazy, spec, where))
        if frames:
            out[name] = frames[0] if len(frames) == 1 else pl.concat(frames, how="diagonal_relaxed")
    return out


def input_records(config: StudyConfig, tables: dict[str, Any]) -> list[dict[str, Any]]:
    """Manifest ``inputs``: path, SHA-256 and data rows of every source file."""
    if config.data.source is not None:
        return standard_input_records(config.data.source, tables)
    records = []
    for table, (name, _) in SOURCE_TABLES.items():
        read = tables.get(name)
        for spec in config.data.specs(table):
            path = Path(spec.path)
            rows = None
            if path.is_dir():
                import pyarrow.parquet as pq

                rows = sum(pq.read_metadata(f).num_rows for f in dataset_files(path))
            elif isinstance(read, pl.DataFrame) and "source" in read.columns:
                rows = int(read.filter(pl.col("source") == spec.source_name()).height)
            records.append(
                {
                    "table": table,
                    "path": _display_path(path, config),
                    "sha256": dataset_sha256(path) if path.is_dir() else sha256_of(path),
                    "rows": rows,
                }
            )
    return records


def dataset_sha256(folder: Path) -> str:
    """SHA-256 of a Parquet dataset: over each file's path in the folder and its hash."""
    digest = hashlib.sha256()
    for path in dataset_files(folder):
        digest.update(f"{path.relative_to(folder).as_posix()}\0{sha256_of(path)}\n".encode())
    return digest.hexdigest()


def _display_path(path: Path, config: StudyConfig) -> str:
    """The input path relative to the config folder when inside it (portable manifests)."""
    if config.config_path is not None:
        try:
            return path.resolve().relative_to(config.config_path.parent).as_posix()
        except ValueError:
            pass
    return path.as_posix()
