"""The self-contained HTML report of a run folder (``report.html``).

The page is rendered with Jinja2 from ``templates/report.html.j2``. Figures are embedded
as base64 PNG data URIs and the CSS is inline, so the file opens offline with no server
and fetches nothing. It is built from aggregates only (:func:`build_report_context`): no
patient identifier or individual date is ever handed to the template.

Sections, in this order: summary, data and attrition, eGFR equations, baseline
characteristics, trajectories and slopes, KDIGO categories (and transitions),
endpoints and survival, tables, methods, cautions, provenance. Summary, data, methods,
cautions and provenance are always there; every other section appears only when the
run made its figures or tables (a run without transition tables has no "transitions"
in its KDIGO heading; a run without KDIGO data has no KDIGO section).
"""

from __future__ import annotations

from kidneycohort.report._context import SECTIONS, build_report_context
from kidneycohort.report._methods import methods_from_config
from kidneycohort.report._pdf import find_browser, print_pdf, require_browser
from kidneycohort.report._render import render_report, write_report
from kidneycohort.report._rule import ReportRule

__all__ = [
    "SECTIONS",
    "ReportRule",
    "build_report_context",
    "find_browser",
    "methods_from_config",
    "print_pdf",
    "render_report",
    "require_browser",
    "write_report",
]
