"""The run folder: one typed description of every file a run writes, and its reader.

A run (``kidneycohort run CONFIG``) writes one folder. :data:`FILES` declares each file
under the table name the steps use, with its path and column contract;
:class:`Manifest` is the typed ``manifest.json``; :class:`RunFolder` reads a folder
through both, for the figures, the report and your own analysis:

>>> from kidneycohort.run_folder import FILES
>>> FILES["egfr"].files, FILES["models/hazard_ratios"].files
(('egfr.parquet',), ('models/hazard_ratios.parquet',))
"""

from __future__ import annotations

from kidneycohort.run_folder._footnotes import table_footnotes
from kidneycohort.run_folder._layout import (
    FILES,
    RunFile,
    check_layout,
    declared,
    file_for,
    is_written,
)
from kidneycohort.run_folder._manifest import (
    RECORDED_PACKAGES,
    AccountingRecord,
    ExecutionRecord,
    InputRecord,
    Manifest,
    OutputRecord,
    ReasonCount,
    StepRecord,
    StudyFacts,
    output_records,
    package_versions,
    read_manifest,
    sha256_of,
    write_manifest,
)
from kidneycohort.run_folder._reader import RunFolder
from kidneycohort.run_folder._writer import (
    XLSX_OPTIONS,
    canonical_order,
    csv_safe,
    markdown_table,
    write_csv,
    write_sheets,
    write_table,
    write_workbook,
)

__all__ = [
    "FILES",
    "RECORDED_PACKAGES",
    "XLSX_OPTIONS",
    "AccountingRecord",
    "ExecutionRecord",
    "InputRecord",
    "Manifest",
    "OutputRecord",
    "ReasonCount",
    "RunFile",
    "RunFolder",
    "StepRecord",
    "StudyFacts",
    "canonical_order",
    "check_layout",
    "csv_safe",
    "declared",
    "file_for",
    "is_written",
    "markdown_table",
    "output_records",
    "package_versions",
    "read_manifest",
    "sha256_of",
    "table_footnotes",
    "write_csv",
    "write_manifest",
    "write_sheets",
    "write_table",
    "write_workbook",
]
