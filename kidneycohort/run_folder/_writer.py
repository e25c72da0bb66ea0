"""Writing tables into a run folder reproducibly.

The same inputs give byte-identical Parquet and CSV files: per-patient tables are sorted
by their columns before writing, Parquet statistics are off, and the workbook carries a
fixed date.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import polars as pl

from kidneycohort.run_folder._layout import FILES, RunFile, check_layout

__all__ = [
    "XLSX_OPTIONS",
    "canonical_order",
    "csv_safe",
    "markdown_table",
    "write_csv",
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
    cols = _sortable(df)
    return df.sort(cols, nulls_last=False, maintain_order=True) if cols else df


def markdown_table(df: pl.DataFrame) -> str:
    """A GitHub-style pipe table of ``df`` (numbers as polars prints them as text)."""
    if df.width == 0:
        return ""
    header = "| " + " | ".join(df.columns) + " |"
    rule = "|" + "|".join(" --- " for _ in df.columns) + "|"
    text = df.select(
        pl.col(c).cast(pl.String).fill_null("").str.replace_all(r"\|", r"\|") for c in df.columns
    )
    rows = text.select(pl.concat_str(pl.all(), separator=" | ").alias("row"))["row"]
    body = ["| " + r + " |" for r in rows.to_list()]
    return "\n".join([header, rule, *body]) + "\n"


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
        canonical_order(table).write_parquet(run_dir / paths[0], statistics=False)
    elif entry.kind == "rejected_rows":
        write_csv(canonical_order(table), run_dir / paths[0])
    elif entry.kind == "analysis_dataset":  # the dataset's own order (parameter, subject)
        write_csv(table, run_dir / paths[0])
        table.write_parquet(run_dir / paths[1], statistics=False)
    elif entry.kind == "model":
        table.write_parquet(run_dir / paths[0], statistics=False)
    else:  # shared tables: the builder's row order is the reading order; keep it
        write_csv(table, run_dir / paths[0])
        (run_dir / paths[1]).write_text(markdown_table(table), encoding="utf-8")
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
        for sheet, table in sorted(sheets.items()):
            # Excel limits sheet names to 31 characters
            table.write_excel(workbook, worksheet=sheet[:31], autofit=True)
    return "tables/tables.xlsx"
