"""tables.xlsx and the Markdown tables as a reader opens them: a frozen, styled header,
numbers as numbers with the printed decimals, columns wide enough, and the footnotes
under every table and on their own sheet. Read back with openpyxl (a reference reader
of the format, independent of the writer, xlsxwriter).
"""

from __future__ import annotations

from pathlib import Path

import openpyxl
import polars as pl

from kidneycohort.run_folder import markdown_table, table_footnotes, write_workbook

ENDPOINTS = pl.DataFrame(
    {
        "endpoint": ["kidney_failure", "kidney_failure", "death"],
        "group": ["placebo", "active", "active"],
        "n_patients": ["250", "248", "248"],
        "events": ["12 (4.8%)", "<11", "0 (0.0%)"],
        "person_years": ["701.2", "699.8", "702.0"],
        "hazard_ratio": ["reference", "0.41 (0.18 to 0.95)", "NE"],
        "p": ["", "<0.001", ""],
        "note": ["", "", "NE: no events in the compared patients"],
    }
)
GRID = pl.DataFrame(
    {
        "g_category": ["G1", "G2", "all"],
        "a_category": ["A1", "A1", "all"],
        "n": [40, 55, 95],
        "n_display": ["40", "55", "95"],
    }
)


def _workbook(tmp_path: Path) -> openpyxl.Workbook:
    write_workbook(tmp_path, {"tables/endpoint_table": ENDPOINTS, "tables/kdigo_grid": GRID})
    return openpyxl.load_workbook(tmp_path / "tables" / "tables.xlsx")


def test_header_row_is_frozen_and_styled(tmp_path: Path) -> None:
    book = _workbook(tmp_path)
    sheet = book["endpoint_table"]
    assert sheet.freeze_panes == "A2"
    header = [c.value for c in sheet[1]]
    assert header == ENDPOINTS.columns
    assert all(c.font.bold for c in sheet[1])
    # every column at least as wide as its longest printed text
    for index, column in enumerate(ENDPOINTS.columns, start=1):
        letter = openpyxl.utils.get_column_letter(index)
        longest = max(len(column), *(len(v) for v in ENDPOINTS[column].to_list()))
        assert sheet.column_dimensions[letter].width >= longest


def test_counts_are_integers_and_decimals_keep_their_places(tmp_path: Path) -> None:
    sheet = _workbook(tmp_path)["endpoint_table"]
    columns = {c.value: i for i, c in enumerate(sheet[1])}
    n = [row[columns["n_patients"]] for row in sheet.iter_rows(min_row=2, max_row=4)]
    assert [c.value for c in n] == [250, 248, 248]
    assert {c.number_format for c in n} == {"0"}
    years = [row[columns["person_years"]] for row in sheet.iter_rows(min_row=2, max_row=4)]
    assert [c.value for c in years] == [701.2, 699.8, 702.0]
    assert {c.number_format for c in years} == {"0.0"}  # as printed: 702.0, not 702
    p = sheet.cell(row=3, column=columns["p"] + 1)
    assert p.value == "<0.001" and p.data_type == "s"  # shown as < 0.001, not as 0
    events = sheet.cell(row=2, column=columns["events"] + 1)
    assert events.value == "12 (4.8%)"  # a count with its percentage stays text
    grid = _workbook(tmp_path)["kdigo_grid"]
    assert [c.value for c in grid["C"][1:4]] == [40, 55, 95]


def test_footnotes_under_each_table_and_on_their_own_sheet(tmp_path: Path) -> None:
    book = _workbook(tmp_path)
    notes = table_footnotes("endpoint_table", ENDPOINTS)
    sheet = book["endpoint_table"]
    under = [sheet.cell(row=ENDPOINTS.height + 3 + i, column=1).value for i in range(len(notes))]
    assert under == notes
    listed = [(r[0].value, r[1].value) for r in book["footnotes"].iter_rows(min_row=2)]
    assert ("endpoint_table", notes[0]) in listed
    assert {t for t, _ in listed} == {"endpoint_table", "kdigo_grid"}
    assert book["footnotes"]["A1"].value == "table"


def test_footnotes_say_what_the_marks_mean() -> None:
    notes = table_footnotes("endpoint_table", ENDPOINTS)
    text = " ".join(notes)
    assert "hazard_ratio: Cox model hazard ratio" in text
    assert "NE: not estimable; the note column gives the reason." in notes
    assert "p values below 0.001 are shown as <0.001." in notes
    # the small-cell footnote names the threshold the table was printed with
    assert any("from 1 to 10 are shown as '<11'" in n for n in notes)
    five = ENDPOINTS.with_columns(events=pl.Series(["12 (4.8%)", "<6", "0 (0.0%)"]))
    assert any("from 1 to 5 are shown as '<6'" in n for n in table_footnotes("x", five))
    plain = ENDPOINTS.with_columns(events=pl.lit("20"), p=pl.lit("0.04"))
    assert not [n for n in table_footnotes("x", plain) if "shown as '<" in n or "<0.001" in n]


def test_markdown_table_carries_the_footnotes() -> None:
    notes = table_footnotes("kdigo_grid", GRID)
    text = markdown_table(GRID, notes)
    table, _, footer = text.partition("\n\nNotes:\n\n")
    assert table.count("\n") == GRID.height + 1  # header, rule and the rows
    assert footer.splitlines() == [f"- {n}" for n in notes]
    assert "'all' rows and columns are totals" in footer
