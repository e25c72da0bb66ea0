"""Readers for CSV, Parquet and DuckDB sources, handing back polars LazyFrames.

Every reader returns the canonical columns of its table kind (``labs``, ``patients``,
``events``; see ``kidneycohort.schemas``) plus two bookkeeping columns:

* ``source`` — the source label (:meth:`FileSource.source_name`),
* ``source_row`` — the 1-based data row number in the file (header not counted), so a
  rejected row can be found again in the extract.

Date columns are parsed with one format per column (given, or inferred from the
first values); a value that does not fit becomes null and its text is kept in a
companion ``<column>_as_read`` column, so the harmonise stage can reject that row
with reason ``unparseable_date`` instead of losing it. Defaults applied from the
source spec are recorded per row in an ``assumption`` column.

CSV and Parquet are scanned lazily (nothing is read until the harmonise stage
collects). DuckDB results are fetched once through Arrow.
"""

from __future__ import annotations

import codecs
import logging
from collections.abc import Mapping
from pathlib import Path
from typing import Any, Final

import polars as pl

from kidneycohort import schemas
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.io._csv_shape import check_csv_shape, delimiter_hint
from kidneycohort.io._csv_shape import utf8_error_line as utf8_error_line
from kidneycohort.io.maps import FileSource, TableKind

__all__ = [
    "AS_READ_SUFFIX",
    "CANDIDATE_DATE_FORMATS",
    "ISO",
    "REQUIRED",
    "SCHEMAS",
    "dataset_files",
    "date_formats",
    "infer_date_format",
    "normalise_source",
    "parse_date_columns",
    "read_events",
    "read_labs",
    "read_many",
    "read_patients",
    "read_source",
    "scan_source",
    "suggest_column",
]

logger = logging.getLogger(__name__)

AS_READ_SUFFIX: Final = "_as_read"

SCHEMAS: Final[dict[str, dict[str, pl.DataType]]] = {
    "labs": schemas.RAW_LABS,
    "patients": schemas.PATIENTS,
    "events": schemas.EVENTS,
}
REQUIRED: Final[dict[str, tuple[str, ...]]] = {
    "labs": schemas.RAW_LABS_REQUIRED,
    "patients": schemas.PATIENTS_REQUIRED,
    "events": schemas.EVENTS_REQUIRED,
}

# Formats tried, in order, when a date column has no stated format. "iso" accepts ISO
# 8601 dates with or without a time part in one column.
ISO: Final = "iso"
_ISO_PARTS: Final = (
    "%Y-%m-%dT%H:%M:%S%.f",
    "%Y-%m-%d %H:%M:%S%.f",
    "%Y-%m-%dT%H:%M",
    "%Y-%m-%d %H:%M",
    "%Y-%m-%d",
)
CANDIDATE_DATE_FORMATS: Final = (
    ISO,
    "%d/%m/%Y",
    "%m/%d/%Y",
    "%d/%m/%Y %H:%M",
    "%m/%d/%Y %H:%M",
    "%d.%m.%Y",
    "%d.%m.%Y %H:%M",
    "%d-%m-%Y",
    "%Y/%m/%d",
    "%Y%m%d",
    "%d%b%Y",
    "%d-%b-%Y",
)
_DAY_MONTH_PAIRS: Final = (("%d/%m/%Y", "%m/%d/%Y"), ("%d/%m/%Y %H:%M", "%m/%d/%Y %H:%M"))
_INFER_SAMPLE: Final = 5000


def suggest_column(name: str, choices: list[str]) -> str:
    """``did_you_mean``, first trying a match that differs only in letter case."""
    same = [c for c in choices if c.lower() == name.lower()]
    return f" (did you mean '{same[0]}'?)" if same else did_you_mean(name, choices)


def _parse_with(expr: pl.Expr, fmt: str) -> pl.Expr:
    text = expr.cast(pl.String).str.strip_chars()
    if fmt == ISO:
        return pl.coalesce(
            [text.str.to_datetime(f, strict=False, time_unit="us") for f in _ISO_PARTS]
        )
    return text.str.to_datetime(fmt, strict=False, time_unit="us")


def infer_date_format(values: pl.Series, *, name: str, column: str) -> str:
    """Pick the candidate format that parses the most of ``values``.

    The winner must parse at least half of the non-empty values (the rest become
    row-level ``unparseable_date`` rejections downstream) and must not tie with the
    opposite day/month order.

    Raises
    ------
    InputDataError
        When no candidate parses half of the values, or when day-first and month-first
        orders parse equally many (e.g. only dates like ``03/04/2020``), naming ``name``
        and ``column``.
    """
    text = values.cast(pl.String).str.strip_chars()
    text = text.filter(text.is_not_null() & (text != ""))
    if text.len() == 0:
        return ISO
    frame = text.to_frame("v")
    counts = frame.select(
        _parse_with(pl.col("v"), fmt).is_not_null().sum().alias(str(i))
        for i, fmt in enumerate(CANDIDATE_DATE_FORMATS)
    ).row(0)
    parsed = dict(zip(CANDIDATE_DATE_FORMATS, counts, strict=True))
    best = max(CANDIDATE_DATE_FORMATS, key=lambda fmt: parsed[fmt])
    if 2 * parsed[best] < text.len():
        failed = frame.filter(_parse_with(pl.col("v"), best).is_null())["v"][0]
        raise InputDataError(
            f"{name}: date column '{column}' cannot be parsed (got {failed!r}); set "
            "date_format to its strftime format, e.g. '%d/%m/%Y'"
        )
    for day_first, month_first in _DAY_MONTH_PAIRS:
        if parsed[best] == parsed[day_first] == parsed[month_first]:
            raise InputDataError(
                f"{name}: date column '{column}' is ambiguous (e.g. {text[0]!r} reads as "
                f"{day_first} and as {month_first}); set date_format"
            )
    return best


def _text_date_columns(
    schema: Mapping[str, pl.DataType], targets: Mapping[str, pl.DataType]
) -> list[str]:
    return [
        column
        for column, dtype in targets.items()
        if column in schema
        and dtype.is_temporal()
        and not schema[column].is_temporal()
        and schema[column] != pl.Null
    ]


def _column_format(frame: pl.LazyFrame, column: str, name: str) -> str:
    """The format a text date column is read with, inferred from its first values."""
    sample = (
        frame.select(pl.col(column).cast(pl.String).str.strip_chars())
        .filter(pl.col(column).is_not_null() & (pl.col(column) != ""))
        .head(_INFER_SAMPLE)
        .collect()
        .to_series()
    )
    fmt = infer_date_format(sample, name=name, column=column)
    logger.info("%s: date column '%s' read with format %s", name, column, fmt)
    return fmt


def date_formats(
    frame: pl.LazyFrame,
    targets: Mapping[str, pl.DataType],
    *,
    name: str,
    date_format: str | None = None,
) -> dict[str, str]:
    """The format :func:`parse_date_columns` reads each text date column with.

    Fixing them once (from the whole source) lets parts of the source be parsed
    separately with the same formats.
    """
    columns = _text_date_columns(frame.collect_schema(), targets)
    if date_format is not None:
        return dict.fromkeys(columns, date_format)
    return {column: _column_format(frame, column, name) for column in columns}


def parse_date_columns(
    frame: pl.LazyFrame,
    targets: Mapping[str, pl.DataType],
    *,
    name: str,
    date_format: str | None = None,
    formats: Mapping[str, str] | None = None,
) -> pl.LazyFrame:
    """Parse the text date columns of ``frame`` named in ``targets`` (column -> type).

    Columns already of a temporal type are cast; text columns are parsed with
    ``formats[column]``, else ``date_format``, else an inferred format
    (:func:`infer_date_format` on the first values). Text that does not parse becomes
    null and is kept in ``<column>_as_read``.
    """
    schema = frame.collect_schema()
    text_columns = _text_date_columns(schema, targets)
    exprs: list[pl.Expr] = []
    for column, dtype in targets.items():
        if column not in schema or not dtype.is_temporal():
            continue
        if column not in text_columns:
            exprs.append(pl.col(column).cast(dtype))
            continue
        fmt = (formats or {}).get(column) or date_format or _column_format(frame, column, name)
        parsed = _parse_with(pl.col(column), fmt)
        raw = pl.col(column).cast(pl.String).str.strip_chars()
        exprs.append(parsed.cast(dtype).alias(column))
        exprs.append(
            pl.when(parsed.is_null() & raw.is_not_null() & (raw != ""))
            .then(raw)
            .otherwise(None)
            .alias(column + AS_READ_SUFFIX)
        )
    return frame.with_columns(exprs) if exprs else frame


def _check_utf8_head(path: Path, name: str) -> None:
    decoder = codecs.getincrementaldecoder("utf-8")()
    with path.open("rb") as handle:
        chunk = handle.read(1 << 20)
    try:
        decoder.decode(chunk, final=False)
    except UnicodeDecodeError as exc:
        raise InputDataError(
            f"{name}: not readable as UTF-8 (byte {exc.start}); set encoding, e.g. "
            "'latin-1' or 'cp1252'"
        ) from None


def _scan_csv(spec: FileSource, path: Path, name: str) -> pl.LazyFrame:
    options: dict[str, Any] = {
        "separator": spec.delimiter,
        "infer_schema": False,  # every column as text; the stage casts by contract
        "row_index_name": "source_row",
        "row_index_offset": 1,
    }
    encoding = codecs.lookup(spec.encoding).name
    if encoding in ("utf-8", "utf-8-sig"):
        _check_utf8_head(path, name)
        check_csv_shape(path, spec.delimiter, name)
        return pl.scan_csv(path, **options)
    try:
        text = path.read_bytes().decode(spec.encoding)
    except UnicodeDecodeError as exc:
        raise InputDataError(
            f"{name}: not readable as {spec.encoding} (byte {exc.start}); check encoding"
        ) from None
    logger.info("%s: decoded from %s in memory", name, spec.encoding)
    data = text.encode("utf-8")
    check_csv_shape(data, spec.delimiter, name)
    return pl.scan_csv(data, **options)


def _read_duckdb(spec: FileSource, path: Path, name: str) -> pl.LazyFrame:
    import duckdb

    if (spec.table is None) == (spec.query is None):
        raise InputDataError(f"{name}: a DuckDB source needs exactly one of table or query")
    try:
        con = duckdb.connect(str(path), read_only=True)
    except duckdb.Error as exc:
        raise InputDataError(f"{name}: cannot open as a DuckDB database ({exc})") from None
    try:
        if spec.table is not None:
            tables = [row[0] for row in con.sql("SHOW TABLES").fetchall()]
            if spec.table not in tables:
                raise InputDataError(
                    f"{name}: no table '{spec.table}'{did_you_mean(spec.table, tables)}; "
                    f"tables: {', '.join(tables) or 'none'}"
                )
            relation = con.table(spec.table)
        else:
            relation = con.sql(spec.query)  # type: ignore[arg-type]
        frame = relation.pl()
    except duckdb.Error as exc:
        raise InputDataError(f"{name}: query failed ({str(exc).splitlines()[0]})") from None
    finally:
        con.close()
    return (
        frame.with_row_index("source_row", offset=1)
        .with_columns(pl.col("source_row").cast(pl.Int64))
        .lazy()
    )


def dataset_files(folder: str | Path) -> list[Path]:
    """The Parquet files of a dataset folder, at any depth (hive ``key=value`` folders
    included), in path order; hidden and ``_``-prefixed entries are not data."""
    root = Path(folder)
    return sorted(
        p
        for p in root.rglob("*.parquet")
        if p.is_file()
        and not any(part.startswith((".", "_")) for part in p.relative_to(root).parts)
    )


def scan_source(spec: FileSource) -> pl.LazyFrame:
    """Open ``spec``'s file as a LazyFrame with its own column names (no mapping).

    A folder is a Parquet dataset: its files in path order, hive ``key=value`` folder
    names as columns, ``source_row`` counting through the files in that order.
    """
    path = Path(spec.path)
    name = str(spec.path)
    if not path.exists():
        raise InputDataError(f"{name}: file not found")
    fmt = spec.resolved_format()
    if fmt == "csv":
        frame = _scan_csv(spec, path, name)
    elif fmt == "parquet":
        files: Any = path
        if path.is_dir():
            files = dataset_files(path)
            if not files:
                raise InputDataError(f"{name}: folder holds no .parquet files")
        try:
            frame = pl.scan_parquet(
                files,
                row_index_name="source_row",
                row_index_offset=1,
                hive_partitioning=path.is_dir(),
            )
            frame.collect_schema()
        except (pl.exceptions.ComputeError, OSError) as exc:
            raise InputDataError(f"{name}: not a readable Parquet file ({exc})") from None
    else:
        frame = _read_duckdb(spec, path, name)
    return frame.with_columns(pl.col("source_row").cast(pl.Int64))


def read_source(
    spec: FileSource | str | Path, kind: TableKind = "labs", **fields: Any
) -> pl.LazyFrame:
    """Read one source as the canonical ``kind`` table (lazily where the format allows).

    Parameters
    ----------
    spec
        A :class:`FileSource`, or a path (then ``fields`` are FileSource fields).
    kind
        ``"labs"`` (raw lab results), ``"patients"`` or ``"events"``.

    Returns
    -------
    polars.LazyFrame
        Canonical columns present in the source (types of ``schemas.RAW_LABS``,
        ``PATIENTS`` or ``EVENTS`` for dates; other columns kept as read), every other
        source column unchanged, plus ``source``, ``source_row``, ``assumption`` and a
        ``<date column>_as_read`` column per text date column.

    Raises
    ------
    InputDataError
        File not found, unreadable encoding or format, a required column missing after
        the column map (with a "did you mean"), a date column that cannot be parsed.
    """
    if not isinstance(spec, FileSource):
        spec = FileSource(path=str(spec), **fields)
    elif fields:
        spec = spec.model_copy(update=fields)
    if kind not in SCHEMAS:
        raise InputDataError(f"unknown table kind {kind!r}{did_you_mean(kind, SCHEMAS)}")
    return normalise_source(scan_source(spec), spec, kind)


def normalise_source(
    frame: pl.LazyFrame,
    spec: FileSource,
    kind: TableKind = "labs",
    *,
    formats: Mapping[str, str] | None = None,
) -> pl.LazyFrame:
    """The canonical ``kind`` table from rows of ``spec`` as :func:`scan_source` opens
    them (any subset of them, given the date ``formats`` of the whole source from
    :func:`date_formats`): column map, defaults, value maps, dates."""
    name = str(spec.path)
    have = _mapped_columns(frame, spec, kind, name)
    frame = frame.rename(spec.columns).with_columns(_defaults(spec, have))
    value_maps = {
        column: mapping
        for column, mapping in spec.values.items()
        if column in frame.collect_schema()
    }
    if value_maps:
        frame = frame.with_columns(
            pl.col(c).cast(pl.String).str.strip_chars().replace(m) for c, m in value_maps.items()
        )
    return parse_date_columns(
        frame, SCHEMAS[kind], name=name, date_format=spec.date_format, formats=formats
    )


def _mapped_columns(frame: pl.LazyFrame, spec: FileSource, kind: str, name: str) -> list[str]:
    """The columns after the column map; the map and the required columns checked."""
    have = [c for c in frame.collect_schema().names() if c != "source_row"]
    for source_column in spec.columns:
        if source_column not in have:
            raise InputDataError(
                f"{name}: column map names '{source_column}', not in the file"
                f"{suggest_column(source_column, have)}; the file's columns: "
                f"{_listed(have)}{delimiter_hint(have, spec.delimiter)}"
            )
    renamed = [spec.columns.get(c, c) for c in have]
    for column in set(renamed):
        if renamed.count(column) > 1:
            sources = [c for c in have if spec.columns.get(c, c) == column]
            raise InputDataError(
                f"{name}: columns {' and '.join(repr(c) for c in sources)} would both be "
                f"'{column}' after the column map; map or rename one of them"
            )
    have = renamed
    for column in REQUIRED[kind]:
        if column not in have and column not in spec.defaults:
            raise InputDataError(
                f"{name}: missing required column '{column}'"
                f"{suggest_column(column, have)}; map it in columns"
            )
    return have


def _listed(names: list[str], limit: int = 12) -> str:
    shown = ", ".join(names[:limit])
    return shown + (f" (+{len(names) - limit} more)" if len(names) > limit else "")


def _defaults(spec: FileSource, have: list[str]) -> list[pl.Expr]:
    """``source``, the source's defaults where a value is empty, and the ``assumption``
    that records each default used."""
    exprs: list[pl.Expr] = [pl.lit(spec.source_name(), pl.String).alias("source")]
    assumptions: list[pl.Expr] = []
    for column, default in spec.defaults.items():
        if column in have:
            empty = pl.col(column).is_null() | (
                pl.col(column).cast(pl.String).str.strip_chars() == ""
            )
            exprs.append(
                pl.when(empty).then(pl.lit(default)).otherwise(pl.col(column)).alias(column)
            )
        else:
            empty = pl.lit(True)
            exprs.append(pl.lit(default).alias(column))
        assumptions.append(
            pl.when(empty).then(pl.lit(f"{column} '{default}' from source defaults"))
        )
    if assumptions:
        joined = pl.concat_str(assumptions, separator="; ", ignore_nulls=True)
        exprs.append(pl.when(joined != "").then(joined).alias("assumption"))
    else:
        exprs.append(pl.lit(None, pl.String).alias("assumption"))
    return exprs


def read_labs(spec: FileSource | str | Path, **fields: Any) -> pl.LazyFrame:
    """:func:`read_source` for raw lab results (``kind="labs"``)."""
    return read_source(spec, "labs", **fields)


def read_patients(spec: FileSource | str | Path, **fields: Any) -> pl.LazyFrame:
    """:func:`read_source` for the patients table (``kind="patients"``)."""
    return read_source(spec, "patients", **fields)


def read_events(spec: FileSource | str | Path, **fields: Any) -> pl.LazyFrame:
    """:func:`read_source` for the events table (``kind="events"``)."""
    return read_source(spec, "events", **fields)


def read_many(specs: list[FileSource], kind: TableKind = "labs") -> pl.LazyFrame:
    """Read several sources of one kind and stack them (columns aligned by name)."""
    if not specs:
        raise InputDataError(f"{kind}: no sources given")
    return pl.concat([read_source(s, kind) for s in specs], how="diagonal_relaxed")
