"""The report's content on real pipeline runs of the synthetic demos: the headline block,
methods prose written from the resolved config, provenance without machine paths."""

from __future__ import annotations

import re
from pathlib import Path

import polars as pl
import pytest

from kidneycohort.pipeline.demo import run_demo
from kidneycohort.report import ReportRule, build_report_context, render_report
from kidneycohort.run_folder import RunFolder

PATIENTS = 150


@pytest.fixture(scope="module")
def trial(tmp_path_factory: pytest.TempPathFactory) -> Path:
    base = tmp_path_factory.mktemp("report_trial")
    result, _ = run_demo(
        base / "run",
        patients=PATIENTS,
        overrides=[
            "figures.formats=[png]",
            "figures.dpi=50",
            "tables.small_cell_threshold=10",
            "report.labels={active: Active drug, placebo: Placebo}",
        ],
    )
    return result.run_dir


def _headline_html(html: str) -> str:
    start = html.index('<div class="headline"')
    return html[start : html.index("Further results", start)]


def test_headline_leads_with_the_first_endpoint_and_the_chronic_slope(trial: Path) -> None:
    """The headline prints the endpoint table's and the slope table's own texts (the
    protected shared tables), for the first endpoint definition of the config."""
    run = RunFolder(trial)
    context = build_report_context(run)
    endpoint, slope = context["headline"]["endpoint"], context["headline"]["slope"]
    first = run.manifest.section("endpoints")["definitions"][0]["name"]
    assert endpoint["code"] == first
    table = run.table("tables/endpoint_table").filter(
        (pl.col("endpoint") == first) & (pl.col("group") != "Overall")
    )
    printed = {(r["events"].split(" (")[0], r["n_patients"]) for r in table.to_dicts()}
    assert {(g["events"], g["patients"]) for g in endpoint["groups"]} == printed
    assert {g["group"] for g in endpoint["groups"]} == {"Active drug", "Placebo"}
    assert slope["code"] == "chronic_slope"
    slopes = run.table("tables/slope_table").filter(
        (pl.col("quantity") == "chronic_slope") & pl.col("contrast").str.contains(" - ")
    )
    assert slope["effects"][0]["estimate"] == slopes["estimate"][0]
    assert slope["effects"][0]["interval"] == slopes["ci_95"][0]
    html = _headline_html(render_report(context))
    assert html.index("Primary endpoint") < html.index("Primary slope contrast")
    assert "Active drug vs Placebo" in html and "95% CI" in html


def test_headline_counts_stay_hidden_when_the_table_hides_them(trial: Path) -> None:
    """Kidney failure is rare in 150 patients: the endpoint table hides its event counts
    ('<11' or '*'), and the headline shows that text, never the count from endpoints."""
    run = RunFolder(trial)
    context = build_report_context(run, rule=ReportRule(primary_endpoint="kidney_failure"))
    groups = context["headline"]["endpoint"]["groups"]
    table = run.table("tables/endpoint_table").filter(
        (pl.col("endpoint") == "kidney_failure") & (pl.col("group") != "Overall")
    )
    assert [g["events"] for g in groups] == [e.split(" (")[0] for e in table["events"]]
    hidden = [g["events"] for g in groups if not g["events"].isdigit()]
    assert hidden, "the demo should have a hidden kidney-failure count at this size"
    assert all(h in {"<11", "*"} for h in hidden)
    raw = (
        run.table("endpoints")
        .filter(pl.col("endpoint") == "kidney_failure")
        .group_by("group")
        .agg(pl.col("event").sum())
    )
    html = _headline_html(render_report(context))
    for n in raw["event"].to_list():
        if 0 < n <= 10:  # a hidden count must not appear as "n / patients"
            assert not re.search(rf">{n} / ", html)


def _methods_text(config: dict) -> str:
    from kidneycohort.report import methods_from_config

    return " ".join(" ".join(m["sentences"]) for m in methods_from_config(config))


def test_methods_prose_follows_the_config_that_produced_it(trial: Path) -> None:
    """Methods are written from the run's resolved config: the report says what the
    config says, and a changed rule changes its sentence (and nothing is a key dump)."""
    run = RunFolder(trial)
    config = run.manifest.config
    html = render_report(build_report_context(run))
    methods = html[html.index('id="methods"') : html.index('id="cautions"')]
    rule = config["endpoints"]["rule"]
    assert f"at least {rule['confirm_after_days']} days later also qualified" in methods
    assert "Exclude aki: yes" not in methods and "Equation: None" not in methods
    assert "Rules: not set" not in methods
    assert "doi:10.1056/NEJMoa2102953" in methods  # CKD-EPI 2021 from the registry
    assert f"knot at {config['slope_model']['knot_years']:g} years" in methods
    assert "restricted maximum likelihood" in methods
    assert f"kidneycohort {run.manifest.kidneycohort_version}" in methods

    import copy

    changed = copy.deepcopy(config)
    changed["endpoints"]["rule"]["confirm_after_days"] = 91
    changed["endpoints"]["rule"]["confirmation"] = "sustained_to_end"
    changed["value_filter"]["exclude_aki"] = False
    changed["slope_model"]["knot_years"] = 0.5
    changed["baseline"] = {**changed["baseline"], "method": "median_in_window"}
    before, after = _methods_text(config), _methods_text(changed)
    assert "every later eligible value also qualified, at least one of them 91 days" in after
    assert "every later eligible value" not in before
    assert "acute kidney injury were not excluded" in after
    assert "KDIGO 2012 creatinine criteria" in before
    assert "knot at 0.5 years" in after and "knot at 0.5 years" not in before
    assert "Baseline eGFR was the median of the eGFR values" in after


def test_methods_carry_the_competing_risks_text_once() -> None:
    """The competing-risks analysis writes its own methods text per endpoint; the report
    writes one wording once, naming the endpoints."""
    from kidneycohort.report import methods_from_config

    text = "Competing risks: {e} was analysed with death as competing event; incidence of {e}."
    facts = {
        "competing_methods": [
            ("a_end", text.format(e="a_end")),
            ("b_end", text.format(e="b_end")),
        ]
    }
    out = methods_from_config({"survival": {"confidence": 0.95}}, {"a_end": "A"}, facts=facts)
    survival = next(m for m in out if m["section"] == "Survival analysis")["sentences"]
    written = [s for s in survival if s.startswith("Competing risks")]
    assert written == [
        "Competing risks: each endpoint (A and b_end) was analysed with death as competing "
        "event; incidence of the endpoint."
    ]


def test_provenance_prints_override_paths_relative_to_the_run_folder(trial: Path) -> None:
    """The demo passes its input files as absolute-path overrides; the report prints
    them relative to the run folder and no absolute path of this machine."""
    run = RunFolder(trial)
    absolute = [o for o in run.manifest.overrides if "=/" in o]
    assert absolute, "the demo records its input paths as overrides"
    html = render_report(build_report_context(run))
    provenance = html[html.index('id="provenance"') :]
    assert "data.labs.path=../run_inputs/labs.parquet" in provenance
    assert str(trial.parent) not in html
    assert str(Path.home()) not in html or str(Path.home()) == "/"
