"""The run folder: which table goes to which file, written reproducibly.

Table names map to files as the run-folder contract of DESIGN.md says:

* ``labs``, ``egfr``, ``baseline``, ``slopes``, ``stages``, ``transitions``,
  ``endpoints``, ``baseline_categories``, ``kfre`` -> ``<name>.parquet``
* ``rejected_rows`` -> ``rejected_rows.csv``
* ``adam_tte`` -> ``adam_tte.csv`` and ``adam_tte.parquet`` (CDISC ADaM time-to-event)
* ``tables/<name>`` -> ``tables/<name>.csv`` and ``tables/<name>.md`` (and one sheet of
  ``tables/tables.xlsx``)
* ``models/<name>`` -> ``models/<name>.parquet``

Any other table name stays in memory (inputs, fitted model objects). The same inputs
give byte-identical Parquet and CSV files: per-patient tables are sorted by their
columns before writing, and nothing time-dependent goes into them.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import polars as pl

from kidneycohort.errors import ConfigError

TOP_LEVEL_PARQUET = (
    "labs",
    "egfr",
    "baseline",
    "slopes",
    "stages",
    "transitions",
    "endpoints",
    "baseline_categories",
    "kfre",
)
REJECTED_ROWS = "rejected_rows"
# analysis datasets in a standard layout: CSV for exchange and Parquet, in the
# dataset's own row order (ADaM: parameter, then subject)
ANALYSIS_DATASETS = ("adam_tte",)
# A fixed workbook date keeps tables.xlsx identical between runs of the same inputs.
_XLSX_DATE = dt.datetime(2000, 1, 1, tzinfo=dt.UTC)


def file_for(name: str) -> list[str]:
    """Run-folder files (relative paths) that table ``name`` is written to; [] if none."""
    if name in TOP_LEVEL_PARQUET:
        return [f"{name}.parquet"]
    if name == REJECTED_ROWS:
        return [f"{name}.csv"]
    if name in ANALYSIS_DATASETS:
        return [f"{name}.csv", f"{name}.parquet"]
    if name.startswith("tables/") and name.count("/") == 1:
        return [f"{name}.csv", f"{name}.md"]
    if name.startswith("models/") and name.count("/") == 1:
        return [f"{name}.parquet"]
    return []


def is_written(name: str) -> bool:
    """Whether table ``name`` is a run-folder file."""
    return bool(file_for(name))


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
    header = "| " + " | ".join(df.columns) + " |"
    rule = "|" + "|".join(" --- " for _ in df.columns) + "|"
    if df.width == 0:
        return ""
    text = df.select(
        pl.col(c).cast(pl.String).fill_null("").str.replace_all(r"\|", r"\|") for c in df.columns
    )
    rows = text.select(pl.concat_str(pl.all(), separator=" | ").alias("row"))["row"]
    body = ["| " + r + " |" for r in rows.to_list()]
    return "\n".join([header, rule, *body]) + "\n"


def write_table(run_dir: Path, name: str, table: Any) -> list[str]:
    """Write one table to its run-folder file(s); returns the relative paths written."""
    files = file_for(name)
    if not files:
        return []
    if not isinstance(table, pl.DataFrame):
        raise TypeError(f"table '{name}' must be a polars DataFrame, got {type(table).__name__}")
    for rel in files:
        (run_dir / rel).parent.mkdir(parents=True, exist_ok=True)
    if name in TOP_LEVEL_PARQUET:
        canonical_order(table).write_parquet(run_dir / files[0], statistics=False)
    elif name == REJECTED_ROWS:
        canonical_order(table).write_csv(run_dir / files[0])
    elif name in ANALYSIS_DATASETS:
        table.write_csv(run_dir / files[0])
        table.write_parquet(run_dir / files[1], statistics=False)
    elif name.startswith("models/"):
        table.write_parquet(run_dir / files[0], statistics=False)
    else:  # tables/: the builder's row order is the reading order; keep it
        table.write_csv(run_dir / files[0])
        (run_dir / files[1]).write_text(markdown_table(table), encoding="utf-8")
    return files


def write_workbook(run_dir: Path, tables: Mapping[str, pl.DataFrame]) -> str | None:
    """Write ``tables/tables.xlsx`` with one sheet per ``tables/<name>`` table."""
    sheets = {n.split("/", 1)[1]: t for n, t in tables.items() if n.startswith("tables/")}
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


# ---- atomic placement -------------------------------------------------------------------
def failed_dir(out_dir: Path) -> Path:
    """Where a failed run's folder goes: ``<name>.failed`` beside the intended folder."""
    return out_dir.with_name(out_dir.name + ".failed")


def prepare(out_dir: Path, force: bool) -> Path:
    """Create and return the temporary folder a run writes into.

    The temporary folder is a hidden sibling of ``out_dir`` (same file system, so the
    final move is a rename). An existing ``out_dir`` is an error unless ``force``.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not force:
        raise ConfigError(
            f"output.dir: run folder '{out_dir}' already exists; choose another --out "
            "or pass --force to replace it"
        )
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_dir.with_name(f".{out_dir.name}.partial-{os.getpid()}")
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    return tmp


def commit(tmp: Path, out_dir: Path) -> Path:
    """Move a finished run into place, replacing an old one (``--force``) only now."""
    if out_dir.exists():
        old = out_dir.with_name(f".{out_dir.name}.replaced-{os.getpid()}")
        out_dir.rename(old)
        tmp.rename(out_dir)
        shutil.rmtree(old)
    else:
        tmp.rename(out_dir)
    stale = failed_dir(out_dir)
    if stale.exists():
        shutil.rmtree(stale)
    return out_dir


def abandon(tmp: Path, out_dir: Path) -> Path:
    """Rename a failed run's temporary folder to ``<name>.failed`` (log kept inside)."""
    target = failed_dir(out_dir)
    if target.exists():
        shutil.rmtree(target)
    tmp.rename(target)
    return target
