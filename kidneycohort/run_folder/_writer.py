"""Writing tables into a run folder reproducibly.

The same inputs give byte-identical Parquet and CSV files: per-patient tables are sorted
by their columns before writing, Parquet statistics are off, and the workbook carries a
fixed date.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import polars as pl

from kidneycohort._batches import BATCH_ROWS, patient_range_parts
from kidneycohort.run_folder._footnotes import table_footnotes
from kidneycohort.run_folder._layout import FILES, RunFile, check_layout

__all__ = [
    "XLSX_OPTIONS",
    "canonical_order",
    "csv_safe",
    "markdown_table",
    "write_csv",
    "write_sheets",
    "write_sorted_parquet",
    "write_table",
    "write_workbook",
]

# A fixed workbook date keeps tables.xlsx identical between runs of the same inputs.
_XLSX_DATE = dt.datetime(2000, 1, 1, tzinfo=dt.UTC)


# Text cells are written as text: xlsxwriter would otherwise turn "=..." into a formula.
XLSX_OPTIONS: dict[str, Any] = {"strings_to_formulas": False}

# A text cell a spreadsheet would read as a formula (OWASP, CSV injection) ...
_FORMULA_LEAD = r"^[=+\-@\t\r]"
# ... unless it is a number, alone or with an interval ("-3.2", "-1.2 (-2.0 to -0.4)").
_NUMBER_TEXT = (
    r"^[+-]?(?:\d[\d,]*\.?\d*|\.\d+)(?:[eE][+-]?\d+)?%?"
    r"(?:\s*[(\[][\d.,\s%;:+\-\u2013\u2212]*(?:to[\d.,\s%+\-\u2013\u2212]*)?[)\]])?$"
)


def csv_safe(df: pl.DataFrame) -> pl.DataFrame:
    """``df`` with every text cell that starts like a formula (``=``, ``+``, ``-``, ``@``,
    tab, carriage return) prefixed with a single quote, as OWASP's CSV-injection guidance
    recommends; numbers (also number text such as ``-3.2``) are left as they are."""
    text = [c for c, t in df.schema.items() if t in (pl.String, pl.Categorical, pl.Enum)]
    if not text:
        return df
    exprs = []
    for column in text:
        value = pl.col(column).cast(pl.String)
        risky = value.str.contains(_FORMULA_LEAD) & ~(
            value.str.contains(_NUMBER_TEXT) | value.is_in(["-", "+"])
        )
        exprs.append(pl.when(risky).then(pl.lit("'") + value).otherwise(value).alias(column))
    return df.with_columns(exprs)


def write_csv(df: pl.DataFrame, path: Path) -> None:
    """Write ``df`` as CSV with formula-leading text neutralised (:func:`csv_safe`)."""
    csv_safe(df).write_csv(path)


def _sortable(df: pl.DataFrame) -> list[str]:
    return [
        c
        for c, t in df.schema.items()
        if not isinstance(t, pl.List | pl.Struct | pl.Array | pl.Object)
    ]


def canonical_order(df: pl.DataFrame) -> pl.DataFrame:
    """Sort a per-patient table by all its columns (in column order), nulls first.

    A stable order makes files byte-identical between runs whatever order a group-by
    produced the rows in; it does not change any value.
    """
    return pl.concat(list(_canonical_parts(df)))


def _canonical_parts(df: pl.DataFrame) -> Iterator[pl.DataFrame]:
    """The rows of :func:`canonical_order`, in consecutive sorted parts, one at a time.

    With a text patient id first and more than :data:`BATCH_ROWS` rows, each part is one
    range of patient ids sorted on its own (consecutive id ranges, each sorted, are the
    sorted table), so the sort's working memory (all columns encoded) is a range's.
    """
    cols = _sortable(df)
    if not cols:
        yield df
    elif (
        cols[0] == "patient_id" and df.schema["patient_id"] == pl.String and df.height > BATCH_ROWS
    ):
        for part in patient_range_parts(df, BATCH_ROWS):
            yield part.sort(cols, nulls_last=False, maintain_order=True)
    else:
        yield df.sort(cols, nulls_last=False, maintain_order=True)


def write_sorted_parquet(df: pl.DataFrame, path: Path) -> None:
    """Write :func:`canonical_order` of ``df`` to ``path`` one sorted part at a time.

    The parts are appended to one Parquet file as they are sorted (pyarrow's
    ``ParquetWriter``; zstd, no statistics), so no sorted copy of the whole table is
    held: writing a million patients' eGFR rows (27 M rows) took 3.8 GB beyond the table
    as one sorted copy written at once, 1.4 GB part by part.
    """
    import pyarrow.parquet as pq

    writer: pq.ParquetWriter | None = None
    try:
        for part in _canonical_parts(df):
            arrow = part.to_arrow()
            if writer is None:
                writer = pq.ParquetWriter(
                    path, arrow.schema, compression="zstd", write_statistics=False
                )
            writer.write_table(arrow)
            del arrow, part
    finally:
        if writer is not None:
            writer.close()


def markdown_table(df: pl.DataFrame, notes: Sequence[str] = ()) -> str:
    """A GitHub-style pipe table of ``df`` (numbers as polars prints them as text), with
    its footnotes as a list under it."""
    if df.width == 0:
        return ""
    header = "| " + " | ".join(df.columns) + " |"
    rule = "|" + "|".join(" --- " for _ in df.columns) + "|"
    text = df.select(
        pl.col(c).cast(pl.String).fill_null("").str.replace_all(r"\|", r"\|") for c in df.columns
    )
    rows = text.select(pl.concat_str(pl.all(), separator=" | ").alias("row"))["row"]
    body = ["| " + r + " |" for r in rows.to_list()]
    footer = ["", "Notes:", "", *(f"- {note}" for note in notes)] if notes else []
    return "\n".join([header, rule, *body, *footer]) + "\n"


def write_table(
    run_dir: Path, name: str, table: Any, files: Mapping[str, RunFile] = FILES
) -> list[str]:
    """Write one table to its run-folder file(s); returns the relative paths written.

    A name that is not declared in ``files`` (default the contract,
    :data:`~kidneycohort.run_folder.FILES`) stays in memory (nothing is written). A
    declared table must match its contract.
    """
    entry = files.get(name)
    if entry is None:
        return []
    if not isinstance(table, pl.DataFrame):
        raise TypeError(f"table '{name}' must be a polars DataFrame, got {type(table).__name__}")
    check_layout(entry, table)
    paths = entry.files
    for rel in paths:
        (run_dir / rel).parent.mkdir(parents=True, exist_ok=True)
    if entry.kind == "per_patient":
        write_sorted_parquet(table, run_dir / paths[0])
    elif entry.kind == "rejected_rows":
        write_csv(canonical_order(table), run_dir / paths[0])
    elif entry.kind == "analysis_dataset":  # the dataset's own order (parameter, subject)
        write_csv(table, run_dir / paths[0])
        table.write_parquet(run_dir / paths[1], statistics=False)
    elif entry.kind == "model":
        table.write_parquet(run_dir / paths[0], statistics=False)
    else:  # shared tables: the builder's row order is the reading order; keep it
        write_csv(table, run_dir / paths[0])
        short = name.split("/", 1)[-1]
        (run_dir / paths[1]).write_text(
            markdown_table(table, table_footnotes(short, table)), encoding="utf-8"
        )
    return list(paths)


def write_workbook(
    run_dir: Path, tables: Mapping[str, pl.DataFrame], files: Mapping[str, RunFile] = FILES
) -> str | None:
    """Write ``tables/tables.xlsx`` with one sheet per shared table."""
    sheets = {
        n.split("/", 1)[1]: t
        for n, t in tables.items()
        if n in files and files[n].kind == "shared_table"
    }
    if not sheets:
        return None
    import xlsxwriter

    path = run_dir / "tables" / "tables.xlsx"
    path.parent.mkdir(parents=True, exist_ok=True)
    with xlsxwriter.Workbook(str(path), XLSX_OPTIONS) as workbook:
        workbook.set_properties({"created": _XLSX_DATE})
        ordered = dict(sorted(sheets.items()))
        write_sheets(workbook, ordered, {n: table_footnotes(n, t) for n, t in ordered.items()})
    return "tables/tables.xlsx"


def write_sheets(
    workbook: Any, tables: Mapping[str, pl.DataFrame], notes: Mapping[str, Sequence[str]]
) -> None:
    """Each table on its own sheet of an open xlsxwriter ``workbook`` (a frozen, styled
    header row; numbers as numbers with the printed decimals; columns as wide as their
    text; its footnotes under it), then a ``footnotes`` sheet listing every footnote by
    table when there are any.

    Parameters
    ----------
    workbook : xlsxwriter.Workbook
        Open, created with :data:`XLSX_OPTIONS`.
    tables : mapping
        ``{sheet name: table}`` in sheet order (names of at most 31 characters).
    notes : mapping
        ``{sheet name: footnotes}``.
    """
    styles = _Styles(workbook)
    listed: list[tuple[str, str]] = []
    for name, table in tables.items():
        lines = list(notes.get(name, ()))
        _write_sheet(workbook.add_worksheet(name[:31]), table, lines, styles)
        listed += [(name, line) for line in lines]
    if listed:
        _write_sheet(
            workbook.add_worksheet("footnotes"),
            pl.DataFrame(listed, schema=["table", "footnote"], orient="row"),
            [],
            styles,
        )


class _Styles:
    """The workbook's cell formats: header, footnote, and one number format per
    number of decimals."""

    def __init__(self, workbook: Any) -> None:
        self._workbook = workbook
        self.header = workbook.add_format(
            {"bold": True, "bg_color": "#DDE6F0", "bottom": 1, "text_wrap": True, "valign": "top"}
        )
        self.note = workbook.add_format({"italic": True, "font_color": "#444444"})
        self._numbers: dict[int | None, Any] = {None: None}

    def number(self, decimals: int | None) -> Any:
        """``0`` for counts, ``0.00`` for two decimals ...; None: General."""
        if decimals not in self._numbers:
            pattern = "0" if not decimals else "0." + "0" * decimals
            self._numbers[decimals] = self._workbook.add_format({"num_format": pattern})
        return self._numbers[decimals]


_INTEGER = r"^-?\d+$"
_DECIMAL = r"^-?\d+\.(\d+)$"


def column_cells(column: pl.Series) -> tuple[list[Any], int | None]:
    """A shared table's column as workbook cells: numbers where the printed text is a
    plain number (so a spreadsheet can compute with it), text otherwise; and the
    number of decimals that prints every number as the CSV does (0 for counts, None
    when the column mixes decimals, so Excel's General format shows them as typed)."""
    text = column.cast(pl.String)
    integer = text.str.contains(_INTEGER).fill_null(False)
    places = text.str.extract(_DECIMAL, 1).str.len_chars()
    number = integer | places.is_not_null()
    distinct = pl.concat(
        [places.drop_nulls(), pl.Series([0] * int(integer.sum()), dtype=places.dtype)]
    )
    decimals = int(distinct[0]) if distinct.n_unique() == 1 else None
    values = text.cast(pl.Float64, strict=False)
    # one cell each: the tables of this folder are aggregates (a few hundred rows at most)
    cells = [
        (int(v) if whole else v) if is_number else t
        for t, v, is_number, whole in zip(
            text.to_list(), values.to_list(), number.to_list(), integer.to_list(), strict=True
        )
    ]
    return cells, decimals


def _write_sheet(sheet: Any, table: pl.DataFrame, notes: Sequence[str], styles: _Styles) -> None:
    """One table on its sheet: a frozen, styled header row, numbers as numbers with the
    table's decimals, columns as wide as their text, the footnotes under the table."""
    sheet.freeze_panes(1, 0)
    for index, name in enumerate(table.columns):
        cells, decimals = column_cells(table[name])
        sheet.write_string(0, index, name, styles.header)
        sheet.write_column(
            1, index, ["" if c is None else c for c in cells], styles.number(decimals)
        )
        longest = max([len(name), *(len(str(c)) for c in cells if c is not None)])
        sheet.set_column(index, index, min(max(longest + 2, 8), 60))
    for offset, note in enumerate(notes):
        sheet.write_string(table.height + 2 + offset, 0, note, styles.note)
