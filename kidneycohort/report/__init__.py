"""The self-contained HTML report of a run folder (``report.html``)."""

from kidneycohort.report.build import (
    SECTIONS,
    build_report_context,
    methods_from_config,
    render_report,
    write_report,
)

__all__ = [
    "SECTIONS",
    "build_report_context",
    "methods_from_config",
    "render_report",
    "write_report",
]
