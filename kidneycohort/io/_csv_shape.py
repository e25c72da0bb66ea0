"""The shape of a CSV file, checked before its rows are read.

Polars pads a row with too few fields with nulls and stops at a row with too many or at
an unbalanced quote with a message that names no line. These checks find such a row
first and name the file and the line, in one vectorised pass over the raw lines:

* an empty file (0 bytes) or a header only of empty names,
* a duplicated column name in the header (``value,value``),
* a quote that is opened and never closed,
* a row whose number of fields differs from the header's ("ragged"),
* a header of one field that holds another common delimiter (a wrong ``delimiter``).
"""

from __future__ import annotations

import codecs
import csv
import io
from pathlib import Path

import polars as pl

from kidneycohort.errors import InputDataError

__all__ = ["check_csv_shape", "delimiter_hint", "header_fields", "utf8_error_line"]

_OTHER_DELIMITERS = (";", "\t", "|", ",")
_QUOTED = r'"[^"]*"'


def header_fields(first_line: str, delimiter: str) -> list[str]:
    """The column names of a header line, as the CSV reader splits them."""
    return next(csv.reader(io.StringIO(first_line), delimiter=delimiter), [])


def delimiter_hint(fields: list[str], delimiter: str) -> str:
    if len(fields) != 1:
        return ""
    for other in _OTHER_DELIMITERS:
        if other != delimiter and other in fields[0]:
            shown = "\\t" if other == "\t" else other
            return f"; the header has one field containing '{shown}': set delimiter: '{shown}'"
    return ""


def check_header(first_line: str, delimiter: str, name: str) -> list[str]:
    """The header's names; a duplicated or empty header is an error naming the file."""
    fields = header_fields(first_line.rstrip("\r\n"), delimiter)
    if not any(f.strip() for f in fields):
        raise InputDataError(f"{name}: the first line is empty; expected a header row")
    seen: set[str] = set()
    for field in fields:
        if field in seen:
            raise InputDataError(
                f"{name}: column '{field}' appears twice in the header; rename one of them"
            )
        seen.add(field)
    return fields


def _raw_lines(source: Path | bytes, name: str) -> pl.DataFrame:
    data = source if isinstance(source, bytes) else str(source)
    try:
        return _read_lines(data)
    except pl.exceptions.ComputeError as exc:
        if "utf-8" not in str(exc).lower() or isinstance(source, bytes):
            raise
        found = utf8_error_line(Path(source))
        at = f" at line {found[0]} (byte {found[1]})" if found else ""
        raise InputDataError(
            f"{name}: not readable as UTF-8{at}; set encoding, e.g. 'latin-1' or 'cp1252'"
        ) from None


def _read_lines(data: str | bytes) -> pl.DataFrame:
    return pl.read_csv(
        data,
        has_header=False,
        separator="\x1f",
        quote_char=None,
        new_columns=["line"],
        infer_schema=False,
        row_index_name="n",
        row_index_offset=1,
        truncate_ragged_lines=True,
    ).filter(pl.col("line").is_not_null())


def _quote_state(quoted: pl.DataFrame, name: str) -> pl.DataFrame:
    """Lines with quotes: whether each has an odd number, and whether it starts inside
    a field opened on an earlier line; an opened quote never closed is an error."""
    odd = pl.col("line").str.count_matches('"', literal=True) % 2 == 1
    quoted = quoted.with_columns(odd.alias("odd")).with_columns(
        (pl.col("odd").cast(pl.Int64).cum_sum() % 2).alias("after")
    )
    quoted = quoted.with_columns(
        (pl.col("after") - pl.col("odd").cast(pl.Int64)).abs().alias("before")
    )
    if quoted["after"][-1] == 1:
        opened = quoted.filter((pl.col("before") == 0) & pl.col("odd"))["n"][-1]
        raise InputDataError(
            f'{name}: line {opened}: a quote (") opens a field that is never closed; '
            "fix the quoting of that row"
        )
    return quoted


def check_csv_shape(source: Path | bytes, delimiter: str, name: str) -> None:
    """Raise :class:`InputDataError` naming ``name`` and the line when the file is empty,
    its header repeats a name, a quote is never closed, or a row is ragged."""
    raw = source if isinstance(source, bytes) else Path(source).read_bytes()[: 1 << 16]
    if not raw.strip():
        raise InputDataError(
            f"{name}: the file is empty (0 data bytes); expected a header row and data rows"
        )
    first = raw.split(b"\n", 1)[0].decode("utf-8", errors="replace")
    header = check_header(first, delimiter, name)
    lines = _raw_lines(source, name)
    quoted = lines.filter(pl.col("line").str.contains('"', literal=True))
    skip: pl.Series | None = None
    if quoted.height:
        quoted = _quote_state(quoted, name)
        skip = quoted.filter((pl.col("before") == 1) | pl.col("odd"))["n"]
    plain = pl.col("line").str.count_matches(delimiter, literal=True)
    inside = pl.col("line").str.replace_all(_QUOTED, "").str.count_matches(delimiter, literal=True)
    fields = (
        pl.when(pl.col("line").str.contains('"', literal=True)).then(inside).otherwise(plain)
    ).cast(pl.Int64) + 1
    lines = lines.filter(pl.col("n") > 1).with_columns(fields.alias("fields"))
    ragged = lines.filter(pl.col("fields") != len(header))
    if skip is not None and skip.len():
        ragged = ragged.filter(~pl.col("n").is_in(skip.implode()))
    if ragged.height:
        line, count = ragged.row(0, named=True)["n"], ragged.row(0, named=True)["fields"]
        more = f" (and {ragged.height - 1} more such rows)" if ragged.height > 1 else ""
        raise InputDataError(
            f"{name}: line {line} has {count} fields where the header has {len(header)}"
            f"{more}{delimiter_hint(header, delimiter)}; fix or remove the row"
        )


def utf8_error_line(path: Path) -> tuple[int, int] | None:
    """The (line, byte offset) of the first byte that is not UTF-8, streaming the file;
    None when the whole file is UTF-8."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    line, offset = 1, 0
    with path.open("rb") as handle:
        while chunk := handle.read(1 << 20):
            try:
                decoder.decode(chunk)
            except UnicodeDecodeError as exc:
                return line + chunk[: exc.start].count(b"\n"), offset + exc.start
            line += chunk.count(b"\n")
            offset += len(chunk)
    return None
