"""The report as PDF: ``report.html`` printed by headless Chromium.

The HTML is self-contained (figures embedded, CSS inline, print styles in the CSS), so
printing it needs no server and no network; the browser runs with a throwaway profile
and with its background network features off.
"""

from __future__ import annotations

import logging
import os
import shutil
import subprocess
import tempfile
from pathlib import Path
from typing import Final

from kidneycohort.errors import BrowserNotFoundError, InputDataError

logger = logging.getLogger(__name__)

__all__ = ["BROWSER_NAMES", "find_browser", "print_pdf", "require_browser"]

BROWSER_NAMES: Final = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
"""Executables tried in turn on PATH (after ``KIDNEYCOHORT_CHROMIUM``)."""
BROWSER_ENV: Final = "KIDNEYCOHORT_CHROMIUM"
_FLAGS: Final = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--no-pdf-header-footer",
)


def find_browser() -> str | None:
    """The headless browser to print with: ``$KIDNEYCOHORT_CHROMIUM``, else the first of
    :data:`BROWSER_NAMES` on PATH; None when there is none."""
    configured = os.environ.get(BROWSER_ENV)
    if configured:
        return shutil.which(configured) or (configured if Path(configured).is_file() else None)
    return next((p for p in map(shutil.which, BROWSER_NAMES) if p), None)


def require_browser() -> str:
    """The browser of :func:`find_browser`.

    Returns
    -------
    str
        Path of the executable.

    Raises
    ------
    BrowserNotFoundError
        With one line naming what was tried and what to do.
    """
    found = find_browser()
    if found is None:
        raise BrowserNotFoundError(
            "report --pdf: no Chromium or Chrome found (tried "
            f"{', '.join(BROWSER_NAMES)}); install one (Debian: apt-get install chromium) "
            f"or set {BROWSER_ENV} to its path"
        )
    return found


def print_pdf(
    html: str | Path,
    pdf: str | Path | None = None,
    *,
    browser: str | None = None,
    timeout: float = 300.0,
) -> Path:
    """Print a report page to PDF with headless Chromium.

    Parameters
    ----------
    html : str or Path
        The report page (``report.html``).
    pdf : str or Path, optional
        Where to write (default: beside the page, ``.pdf``).
    browser : str, optional
        The browser executable (default: :func:`find_browser`).
    timeout : float, default 300
        Seconds before the browser is stopped.

    Returns
    -------
    Path
        The written PDF.

    Raises
    ------
    BrowserNotFoundError
        When no Chromium or Chrome is installed.
    InputDataError
        When the page is missing or the browser wrote no PDF.
    """
    page = Path(html).resolve()
    if not page.is_file():
        raise InputDataError(f"report: '{page.name}' not found; render the report first")
    target = Path(pdf) if pdf is not None else page.with_suffix(".pdf")
    executable = browser or require_browser()
    target.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="kidneycohort-browser-") as profile:
        command = [
            executable,
            *_FLAGS,
            f"--user-data-dir={profile}",
            f"--print-to-pdf={target.resolve()}",
            page.as_uri(),
        ]
        try:
            done = subprocess.run(
                command, capture_output=True, text=True, timeout=timeout, check=False
            )
        except subprocess.TimeoutExpired:
            raise InputDataError(
                f"report --pdf: the browser did not finish within {timeout:g} s"
            ) from None
    if not target.is_file() or not target.read_bytes()[:5] == b"%PDF-":
        last = (done.stderr or "").strip().splitlines()[-1:] or ["no message"]
        raise InputDataError(
            f"report --pdf: the browser wrote no PDF (exit {done.returncode}: {last[0]})"
        )
    logger.info("wrote %s (%d kB)", target, target.stat().st_size // 1024)
    return target
