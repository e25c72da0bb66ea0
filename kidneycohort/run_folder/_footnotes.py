"""Footnotes of the shared tables: what their columns and marks mean, written once and
printed under the Markdown table, under each workbook sheet, on the workbook's
``footnotes`` sheet and in the report."""

from __future__ import annotations

import re
from typing import Final

import polars as pl

from kidneycohort._frames import as_int
from kidneycohort.disclosure import HIDDEN, disclosure_footnote

__all__ = ["COLUMN_NOTES", "table_footnotes"]

COLUMN_NOTES: Final[dict[str, str]] = {
    "n_patients": "n_patients: patients in the row's analysis.",
    "events": "events: patients with the event (with the percentage of n_patients where shown).",
    "person_years": "person_years: follow-up summed over the patients, in years.",
    "rate_per_100py": "rate_per_100py: events per 100 person-years (95% CI).",
    "hazard_ratio": "hazard_ratio: Cox model hazard ratio against the reference group "
    "(95% CI); 'reference' marks the reference group.",
    "rate_ratio": "rate_ratio: incidence rate ratio against the reference group (95% CI).",
    "rate_difference_per_100py": "rate_difference_per_100py: difference in events per 100 "
    "person-years against the reference group (95% CI).",
    "ci_95": "ci_95: 95% confidence interval.",
    "se": "se: standard error.",
    "subdistribution_hr": "subdistribution_hr: Fine–Gray subdistribution hazard ratio (95% CI).",
    "cause_specific_hr": "cause_specific_hr: cause-specific Cox hazard ratio (95% CI).",
    "gray_test_p": "gray_test_p: Gray's test of equal cumulative incidence across groups.",
    "n_display": "n_display: the count as printed; n is empty where the printed count is hidden.",
}
"""What a column holds, for every shared table that has it."""

_SMALL = re.compile(r"^<(\d+)$")


def table_footnotes(name: str, table: pl.DataFrame) -> list[str]:
    """The footnotes of shared table ``name``: its columns, then the marks its cells use
    (not estimable, dashes, p values below 0.001), then small-cell protection when a
    count is hidden.

    Parameters
    ----------
    name : str
        The table's name (``endpoint_table``, ``kdigo_grid`` ...).
    table : polars.DataFrame
        The table as written (cells as text or numbers).

    Returns
    -------
    list of str
        One sentence each, in reading order; empty for a table without any.
    """
    notes = [COLUMN_NOTES[c] for c in table.columns if c in COLUMN_NOTES]
    if table.width == 0 or table.height == 0:
        return notes
    text = table.select(pl.all().cast(pl.String))
    cells = pl.concat([text[c] for c in text.columns]).drop_nulls()
    first = cells.str.split(" ").list.first()
    if name == "kdigo_grid" and cells.is_in(["all"]).any():
        notes.append("'all' rows and columns are totals; 'missing': no category at baseline.")
    if (first == "NE").any():
        notes.append(
            "NE: not estimable"
            + ("; the note column gives the reason." if "note" in table.columns else ".")
        )
    if cells.str.contains(r"^<0\.0+1$").any():
        notes.append("p values below 0.001 are shown as <0.001.")
    if cells.is_in(["–"]).any():
        notes.append("–: not applicable or not available.")
    # a hidden count prints as "<threshold+1>" (an integer) or "*"
    small = first.str.extract(_SMALL.pattern, 1).drop_nulls().cast(pl.Int64)
    if small.len() or (first == HIDDEN).any():
        label = as_int(small.max(), "small-cell label") if small.len() else 11
        notes.append(disclosure_footnote(label - 1))
    return notes
