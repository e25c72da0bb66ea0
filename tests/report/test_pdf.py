"""``kidneycohort report RUN --pdf``: the report printed by headless Chromium, read back
with poppler (pdfinfo, pdftotext, pdfimages), and the one-line refusal without a browser.

Outside CI the PDF checks skip with a stated reason when Chromium or poppler-utils is not
installed; with ``CI=true`` they fail instead (``.ci/run`` installs both).
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest
from click.testing import CliRunner

from kidneycohort.cli import cli
from kidneycohort.plots import write_figures
from kidneycohort.report import find_browser
from tests._fixtures.run_folder import build_run_folder

IN_CI = os.environ.get("CI") == "true"
POPPLER = ("pdfinfo", "pdftotext", "pdfimages")


class Outline(HTMLParser):
    """Section headings (h2) and figure titles (img alt) of the report page."""

    def __init__(self) -> None:
        super().__init__()
        self.headings: list[str] = []
        self.figures: list[str] = []
        self._in_h2 = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        values = dict(attrs)
        if tag == "h2" and "section-heading" in (values.get("class") or ""):
            self._in_h2 = True
            self.headings.append("")
        if tag == "img":
            self.figures.append(str(values.get("alt")))

    def handle_endtag(self, tag: str) -> None:
        if tag == "h2":
            self._in_h2 = False

    def handle_data(self, data: str) -> None:
        if self._in_h2:
            self.headings[-1] += data


def _need_tools() -> None:
    missing = [t for t in POPPLER if shutil.which(t) is None]
    if find_browser() is None:
        missing.insert(0, "chromium")
    if missing:
        if IN_CI:
            pytest.fail(f"CI=true but {', '.join(missing)} not installed; .ci/run installs them")
        pytest.skip(f"{', '.join(missing)} not installed (apt-get install chromium poppler-utils)")


@pytest.fixture(scope="module")
def printed(tmp_path_factory: pytest.TempPathFactory) -> dict:
    _need_tools()
    run = tmp_path_factory.mktemp("pdf_run")
    build_run_folder(run, n_patients=120, seed=11)
    write_figures(run, formats=("png",), dpi=80)
    result = CliRunner().invoke(cli, ["report", str(run), "--pdf"])
    assert result.exit_code == 0, result.output
    outline = Outline()
    outline.feed((run / "report.html").read_text(encoding="utf-8"))
    pdf = run / "report.pdf"
    text = subprocess.run(
        ["pdftotext", "-layout", str(pdf), "-"], capture_output=True, text=True, check=True
    ).stdout
    return {"run": run, "pdf": pdf, "text": text, "outline": outline, "output": result.output}


def test_pdf_has_pages_and_says_where_it_is(printed: dict) -> None:
    info = subprocess.run(
        ["pdfinfo", str(printed["pdf"])], capture_output=True, text=True, check=True
    ).stdout
    pages = int(re.search(r"^Pages:\s+(\d+)", info, re.MULTILINE)[1])
    assert pages > 0
    assert "pdf: " in printed["output"] and "report.pdf" in printed["output"]


def test_pdf_has_every_section_heading(printed: dict) -> None:
    headings = printed["outline"].headings
    assert len(headings) >= 8
    flat = re.sub(r"\s+", " ", printed["text"])
    missing = [h for h in headings if h not in flat]
    assert missing == []


def test_pdf_has_every_figure(printed: dict) -> None:
    """Every figure of the page is in the PDF: its caption title in the text, and one
    embedded image per figure (pdfimages lists the PDF's images)."""
    figures = printed["outline"].figures
    assert len(figures) >= 6
    flat = re.sub(r"\s+", " ", printed["text"])
    assert [f for f in figures if f"{f}." not in flat] == []
    listed = subprocess.run(
        ["pdfimages", "-list", str(printed["pdf"])], capture_output=True, text=True, check=True
    ).stdout.splitlines()[2:]
    images = [line for line in listed if line.split()[2] == "image"]
    assert len(images) >= len(figures)


def test_pdf_without_a_browser_is_refused_in_one_line(tmp_path: Path) -> None:
    run = tmp_path / "run"
    build_run_folder(run, n_patients=40, seed=3)
    empty = tmp_path / "empty_path"
    empty.mkdir()
    result = CliRunner().invoke(
        cli,
        ["report", str(run), "--pdf"],
        env={"PATH": str(empty), "KIDNEYCOHORT_CHROMIUM": ""},
    )
    assert result.exit_code == 2
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and "no Chromium or Chrome found" in lines[0]
    assert not (run / "report.pdf").exists()
