"""Writing tables: CSV files, one XLSX workbook, and Markdown for the report."""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from pathlib import Path

import polars as pl

from kidneycohort._frames import FrameLike, to_polars
from kidneycohort.errors import InputDataError, did_you_mean
from kidneycohort.run_folder import XLSX_OPTIONS, write_csv, write_sheets
from kidneycohort.tables._format import _DASH, _format_fixed

__all__ = ["to_markdown", "write_tables"]

logger = logging.getLogger(__name__)


_SHEET_FORBIDDEN = set("[]:*?/\\")


def write_tables(
    tables: Mapping[str, pl.DataFrame],
    folder: str | Path,
    *,
    notes: Mapping[str, Sequence[str]] | None = None,
    workbook_name: str = "tables.xlsx",
) -> dict[str, Path]:
    """Write each table as ``<name>.csv`` and all of them into one XLSX workbook with a
    sheet per table, formatted as the run's ``tables.xlsx``
    (:func:`kidneycohort.run_folder.write_sheets`); notes (footnotes) go under each
    sheet's table, onto a ``footnotes`` sheet and into ``<name>.notes.txt`` beside the
    CSV.

    Returns
    -------
    dict
        Table name (and ``"workbook"``) -> path written.
    """
    import xlsxwriter

    target = Path(folder)
    target.mkdir(parents=True, exist_ok=True)
    notes = notes or {}
    written: dict[str, Path] = {}
    for name in tables:
        if not name or len(name) > 31 or set(name) & _SHEET_FORBIDDEN:
            raise InputDataError(
                f"write_tables: table name {name!r} cannot name a sheet; use 1-31 characters "
                "without []:*?/\\"
            )
    for name in notes:
        if name not in tables:
            raise InputDataError(
                f"write_tables: notes for unknown table '{name}'{did_you_mean(name, tables)}"
            )
    workbook_path = target / workbook_name
    frames = {name: to_polars(table, name) for name, table in tables.items()}
    for name, frame in frames.items():
        csv_path = target / f"{name}.csv"
        write_csv(frame, csv_path)
        written[name] = csv_path
        lines = list(notes.get(name, ()))
        if lines:
            (target / f"{name}.notes.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
    with xlsxwriter.Workbook(str(workbook_path), XLSX_OPTIONS) as workbook:
        write_sheets(workbook, frames, notes)
    written["workbook"] = workbook_path
    logger.info("wrote %d tables to %s", len(tables), target)
    return written


def to_markdown(table: FrameLike, *, notes: Sequence[str] = (), float_decimals: int = 2) -> str:
    """Render a table as a Markdown pipe table (floats to ``float_decimals``), notes below."""
    frame = to_polars(table, "table")
    shown = frame.with_columns(
        _format_fixed(pl.col(c), float_decimals).alias(c)
        for c, t in frame.schema.items()
        if t.is_float()
    ).with_columns(
        pl.all().cast(pl.String).fill_null(_DASH).str.replace_all("|", r"\|", literal=True)
    )
    header = "| " + " | ".join(c.replace("|", r"\|") for c in shown.columns) + " |"
    rule = "| " + " | ".join("---" for _ in shown.columns) + " |"
    body_rows = shown.select(
        pl.concat_str([pl.lit("| "), pl.concat_str(pl.all(), separator=" | "), pl.lit(" |")]).alias(
            "line"
        )
    )["line"].to_list()
    lines = [header, rule, *body_rows]
    if notes:
        lines.append("")
        lines.extend(f"{note}" for note in notes)
    return "\n".join(lines) + "\n"
