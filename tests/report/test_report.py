"""report.html: sections, self-containment, aggregates only, methods from the config.

External references: the CKD-EPI 2021 publication (Inker et al., N Engl J Med
2021;385:1737-1749, doi:10.1056/NEJMoa2102953; validated in adults, 18 years and over)
for the equations section; Pillow decodes every embedded image; the standard library's
HTML parser reads the page structure.
"""

from __future__ import annotations

import base64
import io
import json
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import polars as pl
import pytest
from PIL import Image

from kidneycohort import plots
from kidneycohort.cautions import CAUTIONS
from kidneycohort.errors import InputDataError
from kidneycohort.report import SECTIONS, build_report_context, methods_from_config, write_report
from tests._fixtures.run_folder import build_run_folder


class Page(HTMLParser):
    """Collects headings, resource references, images and visible text."""

    def __init__(self) -> None:
        super().__init__()
        self.h2: list[str] = []
        self.references: list[str] = []
        self.images: list[str] = []
        self.text: list[str] = []
        self.tags: list[str] = []
        self._in_h2 = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        values = dict(attrs)
        if tag == "h2" and "section-heading" in (values.get("class") or ""):
            self._in_h2 = True
            self.h2.append("")
        for key in ("src", "href", "srcset", "data"):
            if values.get(key):
                self.references.append(str(values[key]))
        if tag == "img":
            self.images.append(str(values.get("src")))

    def handle_endtag(self, tag: str) -> None:
        if tag == "h2":
            self._in_h2 = False

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._in_h2:
            self.h2[-1] += data


@pytest.fixture(scope="module")
def full(tmp_path_factory: pytest.TempPathFactory) -> dict:
    run = tmp_path_factory.mktemp("report_run")
    info = build_run_folder(run, n_patients=120, seed=5)
    plots.write_figures(run, formats=("png",), dpi=60)
    info["html_path"] = write_report(run)
    info["html"] = info["html_path"].read_text(encoding="utf-8")
    page = Page()
    page.feed(info["html"])
    info["page"] = page
    return info


def test_all_sections_in_order(full: dict) -> None:
    expected = [f"{i + 1}. {title}" for i, (_, title) in enumerate(SECTIONS)]
    assert full["page"].h2 == expected
    assert len(SECTIONS) == 11
    # macro output is markup, never escaped text
    assert "&lt;h2" not in full["html"] and "&lt;figure" not in full["html"]


def test_self_contained_no_external_requests(full: dict) -> None:
    page: Page = full["page"]
    assert "link" not in page.tags and "script" not in page.tags and "iframe" not in page.tags
    assert "<style>" in full["html"] and "@media print" in full["html"]
    for ref in page.references:
        # data URIs, in-page anchors and relative links to the run folder's own files
        assert ref.startswith(("data:image/png;base64,", "#", "tables/")), ref
    assert not re.search(r"url\(\s*['\"]?(https?:|//)", full["html"])
    assert "@import" not in full["html"]


def test_every_embedded_image_decodes(full: dict) -> None:
    images = full["page"].images
    written = sorted((full["run"] / "figures").glob("*.png"))
    assert len(images) == len(written) >= 8
    for uri in images:
        data = base64.b64decode(uri.removeprefix("data:image/png;base64,"), validate=True)
        with Image.open(io.BytesIO(data)) as image:
            image.load()
            assert image.format == "PNG" and image.width > 100


def test_no_patient_identifiers_or_individual_dates(full: dict) -> None:
    html = full["html"]
    run = full["run"]
    ids: set[str] = set()
    for name in (
        "labs.parquet",
        "egfr.parquet",
        "baseline.parquet",
        "slopes.parquet",
        "endpoints.parquet",
    ):
        ids |= set(pl.read_parquet(run / name, columns=["patient_id"])["patient_id"].to_list())
    ids |= set(pl.read_csv(run / "rejected_rows.csv")["patient_id"].to_list())
    assert len(ids) >= 120
    assert [i for i in ids if i in html] == []
    dates: set[str] = set()
    for column in ("sample_date",):
        dates |= {
            str(d) for d in pl.read_parquet(run / "egfr.parquet", columns=[column])[column].unique()
        }
    endpoints = pl.read_parquet(run / "endpoints.parquet", columns=["start_date", "end_date"])
    dates |= {str(d) for c in endpoints.columns for d in endpoints[c].unique()}
    assert [d for d in dates if d in html] == []
    # a manifest warning that names a date is printed with the date removed
    assert "labs: a sample on [date removed] is before index" in html
    # nothing is redacted by text replacement: ids never reach the page
    assert "[id removed]" not in html


def test_small_cells_are_protected(full: dict) -> None:
    html = full["html"]
    assert "&lt;11" in html
    assert "Counts of people from 1 to 10 are shown as &#39;&lt;11&#39;" in html
    endpoint_table = pl.read_csv(full["run"] / "tables/endpoint_table.csv", infer_schema=False)
    for value in endpoint_table["events"].to_list():
        assert f"<td>{value.replace('<', '&lt;')}</td>" in html


def test_equations_section_uses_the_registry(full: dict) -> None:
    context = build_report_context(full["run"])
    first = context["equations"][0]
    assert first["id"] == "ckd_epi_2021_cr"
    assert first["in_registry"]
    assert first["doi"] == "10.1056/NEJMoa2102953"  # Inker 2021 NEJM
    assert first["ages"] == "18 years and over"  # adult equation
    assert "Inker" in first["reference"]
    html = full["html"]
    assert "doi:10.1056/NEJMoa2102953" in html
    assert "CKD-EPI creatinine-cystatin C 2021" in html


def test_methods_and_cautions_in_plain_language(full: dict) -> None:
    html = full["html"]
    assert "linear spline with a knot at 0.25 years" in html
    assert "repeat value at least 28 days later confirms it" in html
    assert (
        "Rapid decline: an eGFR fall faster than 5 mL/min/1.73 m² per year (slope below -5)."
        in html
    )
    for caution in CAUTIONS:
        assert caution in html


def test_methods_tolerate_missing_and_unknown_keys() -> None:
    assert methods_from_config({}) == []
    out = methods_from_config(
        {
            "data": {"labs": {"path": "x.csv"}},
            "aki": {"exclude_aki_days": 7, "use_inpatient": False},
            "egfr": {"equations": ["ckd_epi_2021_cr", "made_up_eq"]},
            "study": {"name": "S", "recipe": "cohort"},
        },
        {"ckd_epi_2021_cr": "CKD-EPI creatinine 2021 (race-free)"},
    )
    sections = {m["section"]: m["sentences"] for m in out}
    assert "Data" not in sections  # file locations belong to provenance
    assert sections["Aki"] == ["Exclude aki days: 7.", "Use inpatient: no."]
    assert sections["EGFR"] == ["Equations: CKD-EPI creatinine 2021 (race-free), made_up_eq."]
    assert sections["Study"] == ["Recipe: cohort."]


def test_absent_files_leave_sections_that_say_so(tmp_path: Path, full: dict) -> None:
    run = tmp_path / "cohort"
    shutil.copytree(full["run"], run)
    shutil.rmtree(run / "figures")
    for name in (
        "models/kdigo_grid.parquet",
        "models/transition_counts.parquet",
        "tables/kdigo_grid.csv",
        "tables/transition_matrix.csv",
    ):
        (run / name).unlink()
    plots.write_figures(run, formats=("png",), dpi=50)
    html = write_report(run).read_text(encoding="utf-8")
    page = Page()
    page.feed(html)
    assert len(page.h2) == len(SECTIONS)
    assert "This run has no KDIGO grid or category transitions." in html


def test_minimal_folder_renders(tmp_path: Path) -> None:
    (tmp_path / "manifest.json").write_text(
        json.dumps({"study": {"name": "Bare"}}), encoding="utf-8"
    )
    html = write_report(tmp_path).read_text(encoding="utf-8")
    page = Page()
    page.feed(html)
    assert len(page.h2) == len(SECTIONS)
    assert "The manifest records no configuration." in html
    assert "The run records no eGFR equations." in html
    empty = tmp_path / "no_manifest"
    empty.mkdir()
    assert "no_manifest" in write_report(empty).read_text(encoding="utf-8")


def test_identifier_tables_and_unknown_equations(tmp_path: Path) -> None:
    (tmp_path / "tables").mkdir()
    # an undeclared file is never read; a declared table with an identifier column is
    # listed but not printed
    pl.DataFrame({"patient_id": ["Z-8"]}).write_csv(tmp_path / "tables/listing.csv")
    pl.DataFrame({"patient_id": ["Z-9"], "egfr": [40.0]}).write_csv(
        tmp_path / "tables/endpoint_table.csv"
    )
    manifest = {
        "study": {"name": "T", "equations": ["made_up_eq"], "primary_equation": "made_up_eq"}
    }
    (tmp_path / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    html = write_report(tmp_path).read_text(encoding="utf-8")
    assert "Z-9" not in html and "Z-8" not in html
    assert "Not printed: it has the column &#39;patient_id&#39;." in html
    assert "not in the kidneycohort registry" in html


def test_bad_run_folder(tmp_path: Path) -> None:
    with pytest.raises(InputDataError, match="is not a folder"):
        write_report(tmp_path / "nowhere")
    (tmp_path / "manifest.json").write_text("[1, 2", encoding="utf-8")
    with pytest.raises(InputDataError, match=r"manifest\.json: not valid JSON"):
        write_report(tmp_path)


def test_methods_say_how_death_before_a_laboratory_endpoint_was_handled() -> None:
    for rule, phrase in (
        ("competing", "a competing event at the death date"),
        ("censor_at_last_assessment", "censored at the last eGFR assessment"),
    ):
        config = {"endpoints": {"rule": {"death_before_event": rule}}}
        text = " ".join(s for m in methods_from_config(config) for s in m["sentences"])
        assert phrase in text
