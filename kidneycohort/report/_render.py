"""Rendering the report template, and writing ``report.html``."""

from __future__ import annotations

import logging
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import jinja2

from kidneycohort.report._context import build_report_context
from kidneycohort.run_folder import RunFolder

logger = logging.getLogger(__name__)

__all__ = ["render_report", "write_report"]


def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.PackageLoader("kidneycohort.report", "templates"),
        autoescape=jinja2.select_autoescape(["html", "j2"], default=True),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render_report(context: Mapping[str, Any]) -> str:
    """Render the report template with ``context`` (from :func:`build_report_context`)."""
    return _environment().get_template("report.html.j2").render(**context)


def write_report(run_dir: str | Path | RunFolder, *, output: str | Path | None = None) -> Path:
    """Render ``report.html`` for a run folder (figures embedded, CSS inline, offline).

    The page receives aggregates only (counts, estimates, formatted shared tables), so
    no patient identifier or individual date can reach it. Call
    :func:`kidneycohort.plots.write_figures` first so the figures exist; a report
    without figures says where each figure would be.

    Parameters
    ----------
    run_dir
        The run folder (a path, or a :class:`~kidneycohort.run_folder.RunFolder`).
    output
        Where to write (default ``run_dir/report.html``).

    Returns
    -------
    Path
        The written file.
    """
    run = run_dir if isinstance(run_dir, RunFolder) else RunFolder(run_dir)
    html = render_report(build_report_context(run))
    path = Path(output) if output is not None else run.path / "report.html"
    path.write_text(html, encoding="utf-8")
    logger.info("wrote %s (%d kB)", path, len(html) // 1024)
    return path
