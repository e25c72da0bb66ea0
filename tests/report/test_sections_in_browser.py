"""Each report section as a reader sees it: headless Chromium at report width, one
screenshot per section, with what each section must show.

Every section's screenshot must not be blank and the section must fit the page (no
horizontal overflow, every figure drawn no wider than the text column); then each section
is checked for what a reader needs from it (the headline numbers, the patient flow, the
KDIGO colours, the survival figures, the footnotes ...). Skips outside CI when Chromium is
absent, with the reason; with ``CI=true`` it must run.
"""

from __future__ import annotations

import base64
import io
import json
import tempfile
from pathlib import Path
from typing import Any

import pytest
from PIL import Image

from kidneycohort.cautions import CAUTIONS
from kidneycohort.plots import KDIGO_RISK_COLOURS, write_figures
from kidneycohort.report import write_report
from tests._fixtures.run_folder import build_run_folder
from tests.report.test_browser import CHROMIUM, IN_CI, PipeBrowser

pytestmark = pytest.mark.browser

WIDTH = 1024  # the page's text column is 62rem (992 px) at most: the report's own width

_PROBE = """JSON.stringify(Array.from(document.querySelectorAll('section.report-section')).map(s => {
  const r = s.getBoundingClientRect();
  return {
    id: (s.querySelector('h2.section-heading') || {}).id || '',
    heading: (s.querySelector('h2.section-heading') || {}).textContent || '',
    text: s.innerText,
    x: r.left + window.scrollX, y: r.top + window.scrollY, width: r.width, height: r.height,
    overflow: s.scrollWidth - s.clientWidth,
    images: Array.from(s.querySelectorAll('img')).map(i => ({
      alt: i.alt, complete: i.complete, natural: i.naturalWidth,
      shown: i.getBoundingClientRect().width})),
    tables: s.querySelectorAll('table').length,
    footnotes: s.querySelectorAll('ul.footnotes li').length,
  };
}))"""


def _capture(html: Path, executable: str) -> list[dict[str, Any]]:
    with tempfile.TemporaryDirectory(prefix="kc-sections-") as profile:
        browser = PipeBrowser(executable, Path(profile))
        try:
            target = browser.send("Target.createTarget", {"url": "about:blank"})["targetId"]
            session = browser.send("Target.attachToTarget", {"targetId": target, "flatten": True})[
                "sessionId"
            ]
            browser.send("Page.enable", session=session)
            browser.send(
                "Emulation.setDeviceMetricsOverride",
                {"width": WIDTH, "height": 900, "deviceScaleFactor": 1, "mobile": False},
                session=session,
            )
            browser.send("Page.navigate", {"url": html.resolve().as_uri()}, session=session)
            browser.wait_for("Page.loadEventFired", timeout=60)
            probe = browser.send(
                "Runtime.evaluate", {"expression": _PROBE, "returnByValue": True}, session=session
            )
            sections = json.loads(probe["result"]["value"])
            for section in sections:
                shot = browser.send(
                    "Page.captureScreenshot",
                    {
                        "format": "png",
                        "captureBeyondViewport": True,
                        # the full row at report width (the section sits centred in it)
                        "clip": {
                            "x": 0,
                            "y": section["y"],
                            "width": WIDTH,
                            "height": min(section["height"], 12000),
                            "scale": 1,
                        },
                    },
                    session=session,
                    timeout=60,
                )
                section["png"] = base64.b64decode(shot["data"])
        finally:
            browser.close()
    return sections


@pytest.fixture(scope="module")
def sections(tmp_path_factory: pytest.TempPathFactory) -> dict[str, dict[str, Any]]:
    if CHROMIUM is None:
        if IN_CI:
            pytest.fail("CI=true but chromium is not installed; .ci/run must install it")
        pytest.skip("chromium not installed (apt-get install chromium); browser check skipped")
    run = tmp_path_factory.mktemp("sections_run")
    build_run_folder(run, n_patients=120, seed=11)
    write_figures(run, formats=("png",), dpi=110)
    captured = _capture(write_report(run), CHROMIUM)
    for section in captured:  # kept beside the run for a reader to look at
        (run / f"section_{section['id']}.png").write_bytes(section["png"])
    return {s["id"]: s for s in captured}


def _image(section: dict[str, Any]) -> Image.Image:
    return Image.open(io.BytesIO(section["png"])).convert("RGB")


def _has_colour(image: Image.Image, hex_colour: str, tolerance: int = 12) -> bool:
    target = tuple(int(hex_colour[i : i + 2], 16) for i in (1, 3, 5))
    colours = image.getcolors(maxcolors=1 << 22) or []
    return any(
        all(abs(c - t) <= tolerance for c, t in zip(rgb, target, strict=True)) for _, rgb in colours
    )


def test_every_section_is_drawn_and_fits_the_page(sections: dict[str, dict[str, Any]]) -> None:
    assert list(sections)[:2] == ["summary", "data"]
    for key, section in sections.items():
        image = _image(section)
        grey = image.convert("L").histogram()
        inked = sum(grey[:200]) / (image.width * image.height)
        assert inked > 0.005, f"{key}: the screenshot is blank"
        assert image.width <= WIDTH
        assert section["overflow"] <= 1, f"{key}: wider than the page by {section['overflow']} px"
        for img in section["images"]:
            assert img["complete"] and img["natural"] > 0, f"{key}: {img['alt']} did not decode"
            assert img["shown"] <= section["width"] + 1, f"{key}: {img['alt']} overflows"


def test_summary_leads_with_the_primary_results(sections: dict[str, dict[str, Any]]) -> None:
    text = sections["summary"]["text"]
    assert "Primary results" in text
    assert "Primary slope contrast:" in text and "95% CI" in text
    assert text.index("Primary results") < text.index("Further results")


def test_data_section_shows_the_patient_flow_by_group(sections: dict[str, dict[str, Any]]) -> None:
    section = sections["data"]
    assert [i["alt"] for i in section["images"]] == ["Patient flow by group"]
    flow = section["images"][0]
    # drawn at its own size or smaller: readable at report width, not squeezed to a strip
    assert flow["shown"] >= 0.6 * section["width"]
    assert _has_colour(_image(section), "#E8F1F8", tolerance=4)  # the flow's step boxes
    assert "rows read" in section["text"] and "Patients by group" in section["text"]


def test_kdigo_section_colours_and_headings(sections: dict[str, dict[str, Any]]) -> None:
    section = sections["kdigo"]
    assert section["heading"].endswith("KDIGO categories and transitions")
    image = _image(section)
    for level in ("low", "very_high"):
        assert _has_colour(image, KDIGO_RISK_COLOURS[level]), level
    assert {i["alt"] for i in section["images"]} >= {
        "Patients by KDIGO GFR and albuminuria category",
        "KDIGO category transitions",
    }


def test_endpoint_section_has_curves_forest_and_footnotes(
    sections: dict[str, dict[str, Any]],
) -> None:
    section = sections["endpoints"]
    alts = [i["alt"] for i in section["images"]]
    assert sum(a.startswith("Time to ") for a in alts) >= 2
    assert "Hazard ratios by endpoint" in alts
    assert section["tables"] >= 2 and section["footnotes"] >= 3
    assert "events: patients with the event" in section["text"]
    assert "egfr_decline_40pct ·" not in section["text"]  # display labels, not codes


def test_other_sections_say_what_they_must(sections: dict[str, dict[str, Any]]) -> None:
    assert "Validated ages" in sections["equations"]["text"]
    assert sections["baseline"]["tables"] == 1
    assert "placebo" in sections["baseline"]["text"] and "active" in sections["baseline"]["text"]
    assert len(sections["slopes"]["images"]) >= 2
    assert "tables/tables.xlsx" in sections["tables"]["text"]
    methods = sections["methods"]["text"]
    assert "Estimated GFR" in methods and "Small-cell protection" in methods
    assert all(c in sections["cautions"]["text"] for c in CAUTIONS)
    assert "SHA-256" in sections["provenance"]["text"]
