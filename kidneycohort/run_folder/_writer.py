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

__all__ = ["canonical_order", "markdown_table", "write_table", "write_workbook"]

# A fixed workbook date keeps tables.xlsx identical between runs of the same inputs.
_XLSX_DATE = dt.datetime(2000, 1, 1, tzinfo=dt.UTC)


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
        canonical_order(table).write_csv(run_dir / paths[0])
    elif entry.kind == "analysis_dataset":  # the dataset's own order (parameter, subject)
        table.write_csv(run_dir / paths[0])
        table.write_parquet(run_dir / paths[1], statistics=False)
    elif entry.kind == "model":
        table.write_parquet(run_dir / paths[0], statistics=False)
    else:  # shared tables: the builder's row order is the reading order; keep it
        table.write_csv(run_dir / paths[0])
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
    with xlsxwriter.Workbook(str(path)) as workbook:
        workbook.set_properties({"created": _XLSX_DATE})
        for sheet, table in sorted(sheets.items()):
            # Excel limits sheet names to 31 characters
            table.write_excel(workbook, worksheet=sheet[:31], autofit=True)
    return "tables/tables.xlsx"
