"""End to end on a small synthetic health-record cohort: the cohort recipe's run folder,
row accounting, KDIGO stages and grid, KFRE at baseline and its summary, the report."""

from __future__ import annotations

import itertools
import json
import re
from html import unescape
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from click.testing import CliRunner

from kidneycohort.cli import cli
from kidneycohort.pipeline.demo import demo_config_path, demo_scenario_path
from kidneycohort.synthetic import write_cohort
from tests._fixtures.disclosure import disclosed_counts, printed_count

PATIENTS = 2000
PRIMARY = "ckd_epi_2021_cr"


@pytest.fixture(scope="module")
def cohort_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    base = tmp_path_factory.mktemp("cohort")
    inputs = base / "inputs"
    write_cohort(demo_scenario_path("cohort"), inputs, patients=PATIENTS, fmt="parquet")
    args = ["run", str(demo_config_path("cohort")), "--out", str(base / "run"), "-q"]
    for item in (
        f"data.patients.path={(inputs / 'patients.parquet').as_posix()}",
        f"data.labs.path={(inputs / 'labs.parquet').as_posix()}",
        f"data.events.path={(inputs / 'events.parquet').as_posix()}",
        # PNG only at low resolution keeps the figures step short
        "figures.formats=[png]",
        "figures.dpi=50",
    ):
        args += ["--set", item]
    result = CliRunner().invoke(cli, args, catch_exceptions=False)
    assert result.exit_code == 0, result.output
    return base / "run", inputs


COHORT_FILES = [
    "labs.parquet",
    "rejected_rows.csv",
    "egfr.parquet",
    "baseline.parquet",
    "slopes.parquet",
    "stages.parquet",
    "transitions.parquet",
    "baseline_categories.parquet",
    "kfre.parquet",
    "endpoints.parquet",
    "models/survival_curves.parquet",
    "models/at_risk.parquet",
    "models/hazard_ratios.parquet",
    "models/transition_counts.parquet",
    "models/kdigo_grid.parquet",
    # the mean eGFR slope by exposure group (exact mixed-model engine)
    "models/trajectories.parquet",
    "models/slope_summary.parquet",
    "models/slope_model_fit.parquet",
    "model_slopes.parquet",
    *[
        f"tables/{name}.{ext}"
        for name in (
            "endpoint_table",
            "baseline_characteristics",
            "incidence_rates",
            "transition_matrix",
            "kdigo_grid",
            "kfre_summary",
            "slope_table",
        )
        for ext in ("csv", "md")
    ],
    "tables/tables.xlsx",
    "figures/attrition.png",
    "figures/kdigo_grid.png",
    "figures/transition_matrix.png",
    "figures/survival_kidney_progression.png",
    "report.html",
    "manifest.json",
    "run.log",
    "warnings.txt",
]


def test_every_file_of_the_cohort_recipe(cohort_run) -> None:
    run, _ = cohort_run
    missing = [rel for rel in COHORT_FILES if not (run / rel).is_file()]
    assert not missing
    # trial-only outputs are absent
    assert not (run / "adam_tte.csv").exists()
    manifest = json.loads((run / "manifest.json").read_text())
    assert manifest["study"]["recipe"] == "cohort_progression"
    assert [s["name"] for s in manifest["steps"]][1:] == manifest["config"]["recipe_steps"]
    if Path("/proc/self/status").exists():  # each step's peak memory beside its time
        assert all(s["peak_rss_mib"] > 0 for s in manifest["steps"])


def test_cohort_slope_model_equals_a_direct_fit(cohort_run) -> None:
    # the mean slope by exposure group: one slope per patient (no knot), the exact engine;
    # the same model fitted directly on the run's eGFR, with the run's value filter (the
    # values the per-patient slopes use), gives the same contrasts
    from kidneycohort.models.mixed import SlopeModel
    from kidneycohort.value_filter import ValueFilterRule

    run, _ = cohort_run
    fit = pl.read_parquet(run / "models/slope_model_fit.parquet").row(0, named=True)
    assert (fit["model"], fit["engine"], fit["converged"]) == ("one_slope", "exact", True)
    egfr = pl.read_parquet(run / "egfr.parquet")
    groups = pl.read_parquet(run / "baseline.parquet").select("patient_id", "group").unique()
    manifest = json.loads((run / "manifest.json").read_text())
    rule = manifest["config"]["slope_model"]
    direct = SlopeModel(**{**rule, "equation": manifest["study"]["primary_equation"]}).fit(
        egfr, groups, value_filter=ValueFilterRule(**manifest["config"]["value_filter"])
    )
    reasons = set(direct.excluded_["reason"].to_list())
    assert "setting_inpatient" in reasons  # the recipe's filter left these out
    written = pl.read_parquet(run / "models/slope_summary.parquet").drop("model")
    assert written["estimate"].to_list() == pytest.approx(direct.summary()["estimate"].to_list())
    slopes = pl.read_parquet(run / "model_slopes.parquet")
    assert slopes.height == direct.n_patients_ and slopes["se"].min() > 0


def test_accounting_adds_up(cohort_run) -> None:
    run, inputs = cohort_run
    manifest = json.loads((run / "manifest.json").read_text())
    read = {r["table"]: r for r in manifest["accounting"]}
    assert set(read) == {"labs", "patients", "events"}
    for row in read.values():
        assert row["rows_read"] == row["rows_used"] + row["rows_rejected"] + row["rows_merged"]
    for table in ("patients", "labs", "events"):
        assert read[table]["rows_read"] == pl.read_parquet(inputs / f"{table}.parquet").height
    assert read["patients"]["rows_read"] == PATIENTS
    labs = read["labs"]
    rejected = sum(r["rows"] for r in manifest["accounting_by_reason"] if r["table"] == "labs")
    merged = sum(r["rows"] for r in manifest["merged_by_reason"] if r["table"] == "labs")
    assert (rejected, merged) == (labs["rows_rejected"], labs["rows_merged"])
    assert pl.read_parquet(run / "labs.parquet").height == labs["rows_used"]
    unused = pl.read_csv(run / "rejected_rows.csv").filter(pl.col("table") == "labs")
    assert unused.height == labs["rows_rejected"] + labs["rows_merged"]
    # each input's hash and rows are recorded
    assert {i["table"] for i in manifest["inputs"]} == {"patients", "labs", "events"}
    assert all(len(i["sha256"]) == 64 and i["rows"] is not None for i in manifest["inputs"])


def test_every_patient_reaches_the_per_patient_tables(cohort_run) -> None:
    run, inputs = cohort_run
    ids = set(pl.read_parquet(inputs / "patients.parquet")["patient_id"].to_list())
    for name in ("baseline_categories", "kfre"):
        table = pl.read_parquet(run / f"{name}.parquet")
        assert table["patient_id"].is_unique().all()
        assert set(table["patient_id"].to_list()) == ids, name
    endpoints = pl.read_parquet(run / "endpoints.parquet")
    per_endpoint = endpoints.group_by("endpoint").agg(pl.col("patient_id").n_unique())
    assert (per_endpoint["patient_id"] == PATIENTS).all()


def test_transition_counts_match_the_transitions(cohort_run) -> None:
    run, _ = cohort_run
    transitions = pl.read_parquet(run / "transitions.parquet")
    counts = pl.read_parquet(run / "models/transition_counts.parquet")
    g = transitions.filter((pl.col("axis") == "G") & (pl.col("equation") == PRIMARY))
    assert int(counts.filter(pl.col("axis") == "G")["n"].sum()) == g.height > 0
    a = transitions.filter(pl.col("axis") == "A")
    assert int(counts.filter(pl.col("axis") == "A")["n"].sum()) == a.height
    stages = pl.read_parquet(run / "stages.parquet")
    assert set(stages["axis"].unique().to_list()) == {"G", "A"}


# Tangri et al. JAMA 2011 4-variable KFRE, re-typed here from the published equation
# (from memory; Tangri 2016 North American baseline survivals 0.9750 at 2 and 0.9240 at
# 5 years, also from memory).
def _kfre_by_hand(age: np.ndarray, male: np.ndarray, egfr: np.ndarray, acr: np.ndarray):
    eta = (
        -0.2201 * (age / 10 - 7.036)
        + 0.2467 * (male - 0.5642)
        - 0.5567 * (egfr / 5 - 7.222)
        + 0.4510 * (np.log(acr) - 5.137)
    )
    return 1 - 0.9750 ** np.exp(eta), 1 - 0.9240 ** np.exp(eta)


def test_kfre_at_baseline_applicability_and_values(cohort_run) -> None:
    run, _ = cohort_run
    kfre = pl.read_parquet(run / "kfre.parquet")
    assert (kfre["kfre_applicable"] == kfre["kfre_reason"].is_null()).all()
    assert (kfre["equation"] == PRIMARY).all() and (kfre["kfre_region"] == "north_american").all()
    ok = kfre.filter(pl.col("kfre_applicable"))
    assert ok.height > 20
    # the population the equation is for: adults with eGFR < 60 and a UACR
    assert (ok["egfr"] < 60).all() and (ok["age_years"] >= 18).all() and (ok["uacr_mg_g"] > 0).all()
    # inputs from the look-back year before index
    assert ok["egfr_years"].is_between(-365 / 365.25 - 1e-9, 1e-9).all()
    assert ok["uacr_years"].is_between(-365 / 365.25 - 1e-9, 1e-9).all()
    two, five = _kfre_by_hand(
        ok["age_years"].to_numpy(),
        (ok["sex"] == "male").cast(pl.Float64).to_numpy(),
        ok["egfr"].to_numpy(),
        ok["uacr_mg_g"].to_numpy(),
    )
    np.testing.assert_allclose(ok["kfre_2y"].to_numpy(), two, rtol=1e-12)
    np.testing.assert_allclose(ok["kfre_5y"].to_numpy(), five, rtol=1e-12)
    no = kfre.filter(~pl.col("kfre_applicable"))
    assert no["kfre_2y"].is_null().all() and no["kfre_5y"].is_null().all()
    high = no.filter(pl.col("egfr") >= 60)
    assert high.height > 0 and (
        high["kfre_reason"].is_in(["egfr_not_below_60", "missing_input"]).all()
    )
    assert (no.filter(pl.col("uacr_mg_g").is_null())["kfre_reason"] == "missing_input").all()


def test_kfre_summary_counts_and_small_cells(cohort_run) -> None:
    run, inputs = cohort_run
    table = pl.read_csv(run / "tables/kfre_summary.csv", infer_schema=False)
    kfre = pl.read_parquet(run / "kfre.parquet")
    groups = pl.read_parquet(inputs / "patients.parquet")["group"].value_counts()
    assert table.columns == [
        "characteristic",
        "statistic",
        "level",
        *sorted(groups["group"]),
        "Overall",
    ]
    n_row = table.filter(pl.col("characteristic") == "N").row(0, named=True)
    for group, n in groups.rows():
        assert int(n_row[group]) == n
    assert int(n_row["Overall"]) == PATIENTS
    applicable = table.filter(pl.col("characteristic") == "KFRE applicable").row(0, named=True)
    n_ok = int(kfre["kfre_applicable"].sum())
    assert applicable["Overall"] == f"{n_ok} ({100 * n_ok / PATIENTS:.1f}%)"
    # median of the applicable patients' 2-year risk, in %, against numpy.median
    median = table.filter(pl.col("characteristic") == "2-year kidney failure risk, %")
    want = np.median(kfre.filter(pl.col("kfre_applicable"))["kfre_2y"].to_numpy()) * 100
    assert median["Overall"][0].startswith(f"{want:.1f} [")
    # no count from 1 to 10 is printed anywhere
    counts = table.filter(pl.col("statistic") != "median [Q1, Q3]")
    for column in counts.columns[3:]:
        numbers = counts[column].str.extract(r"^(\d+)", 1).cast(pl.Int64).drop_nulls()
        assert not numbers.is_between(1, 10).any(), column
    # applicable plus every reason make up N in the overall column
    block = table.filter(pl.col("characteristic").is_in(["KFRE applicable", "KFRE not applicable"]))
    visible = block["Overall"].str.extract(r"^(\d+)", 1).cast(pl.Int64)
    if visible.null_count() == 0:
        assert int(visible.sum()) == PATIENTS


def test_report_holds_the_cohort_sections(cohort_run) -> None:
    run, _ = cohort_run
    html = (run / "report.html").read_text(encoding="utf-8")
    assert "Lakeshore-Granite kidney cohort" in html
    for text in ("KDIGO GFR x albuminuria grid", "KDIGO category transitions", "data:image/png"):
        assert text in html
    manifest = json.loads((run / "manifest.json").read_text())
    listed = {o["file"] for o in manifest["outputs"]}
    assert {"report.html", "kfre.parquet", "tables/kfre_summary.csv"} <= listed


def test_no_hidden_count_of_people_can_be_recovered_across_the_run(cohort_run) -> None:
    # The acceptance test of disclosure control: an attacker who reads every shared table
    # and the report, knows how their counts add up (levels to N, groups to Overall, grid
    # rows and columns to their margins, grid margins equal the baseline table's G and A
    # rows, the rate table's events equal the endpoint table's) and that a hidden count is
    # a whole number (1..10 when printed "<11") solves linear programmes for every hidden
    # count (tests/_fixtures/disclosure.py) and pins down none of them.
    run = cohort_run[0]

    def read(name: str) -> pl.DataFrame:
        return pl.read_csv(run / "tables" / f"{name}.csv", infer_schema=False)

    printed: dict[tuple, str] = {}
    relations: list[tuple[list[tuple], tuple]] = []
    baseline = read("baseline_characteristics")
    columns = [c for c in baseline.columns if c not in ("characteristic", "statistic", "level")]
    groups = [c for c in columns if c != "Overall"]
    for row in baseline.iter_rows(named=True):
        if row["statistic"] in ("n", "n (%)"):
            for column in columns:
                printed[("b", row["characteristic"], row["level"] or "", column)] = row[column]
    blocks = baseline.filter(pl.col("statistic") == "n (%)").group_by("characteristic")
    for (characteristic,), block in blocks:
        levels = block["level"].to_list()
        if "recorded" in levels or len(levels) < 2:
            continue  # a missing-values row alone is one count, not a block
        for column in columns:
            members = [("b", characteristic, level, column) for level in levels]
            relations.append((members, ("b", "N", "", column)))
    for key in [k for k in printed if k[3] == "Overall"]:
        relations.append(([(*key[:3], g) for g in groups], key))

    grid = read("kdigo_grid")
    for g, a, text in grid.select("g_category", "a_category", "n_display").rows():
        printed[("g", g, a)] = text
    g_levels = [g for g in grid["g_category"].unique(maintain_order=True) if g != "all"]
    a_levels = [a for a in grid["a_category"].unique(maintain_order=True) if a != "all"]
    for g in [*g_levels, "all"]:
        relations.append(([("g", g, a) for a in a_levels], ("g", g, "all")))
    for a in a_levels:
        relations.append(([("g", g, a) for g in g_levels], ("g", "all", a)))
    for g in g_levels:
        if ("b", "KDIGO GFR category", g, "Overall") in printed and g != "missing":
            relations.append(([("g", g, "all")], ("b", "KDIGO GFR category", g, "Overall")))
    for a in a_levels:
        if ("b", "KDIGO albuminuria category", a, "Overall") in printed and a != "missing":
            relations.append(([("g", "all", a)], ("b", "KDIGO albuminuria category", a, "Overall")))

    endpoints = read("endpoint_table")
    rates = read("incidence_rates")
    for name, group, n, events in endpoints.select(
        "endpoint", "group", "n_patients", "events"
    ).rows():
        printed[("e", name, group, "n")] = n
        printed[("e", name, group, "events")] = events
    for name, group, events in rates.select("endpoint", "group", "events").rows():
        printed[("r", name, group)] = events
        relations.append(([("r", name, group)], ("e", name, group, "events")))
    for name in endpoints["endpoint"].unique().to_list():
        for what in ("n", "events"):
            relations.append(([("e", name, g, what) for g in groups], ("e", name, "Overall", what)))

    kfre = read("kfre_summary")
    block = kfre.filter(pl.col("characteristic").is_in(["KFRE applicable", "KFRE not applicable"]))
    for row in kfre.iter_rows(named=True):
        if row["statistic"].startswith("n"):
            for column in columns:
                printed[("k", row["characteristic"], row["level"] or "", column)] = row[column]
    for column in columns:
        members = [
            ("k", c, level or "", column)
            for c, level in block.select("characteristic", "level").rows()
        ]
        relations.append((members, ("k", "N", "", column)))
        relations.append(([("k", "N", "", column)], ("b", "N", "", column)))
    for key in [k for k in printed if k[0] == "k" and k[3] == "Overall"]:
        relations.append(([(*key[:3], g) for g in groups], key))

    assert any(printed_count(t) is None for t in printed.values()), "nothing was hidden"
    assert disclosed_counts(printed, relations) == {}

    # the report prints the same texts (no count it hides elsewhere) and its patient flow
    # gives no small number away by subtraction
    html = unescape((run / "report.html").read_text(encoding="utf-8"))
    flow = re.search(r"Patients: ([^<]*)\.", html)
    assert flow is not None
    steps = [part.rsplit(" ", 1)[1] for part in flow.group(1).split("; ")]
    shown = [printed_count(s) for s in steps]
    for before, after in itertools.pairwise(shown):
        if before is not None and after is not None:
            assert not 1 <= before - after <= 10, steps
    for name in endpoints["endpoint"].unique().to_list():
        overall = endpoints.filter((pl.col("endpoint") == name) & (pl.col("group") == "Overall"))
        events = overall["events"][0].split(" (")[0]
        assert f"{events} events among {overall['n_patients'][0]} patients" in html


def test_competing_risks_beside_the_cox_models(cohort_run) -> None:
    # survival.competing_risks in the cohort recipe: every endpoint death competes with is
    # analysed by Fine-Gray and cause-specific Cox side by side (Austin, Lee & Fine 2016).
    # The cause-specific hazard ratio of the endpoint is a Cox model with death censoring
    # follow-up: the cox step's lifelines fit of the same rows (Efron ties) must agree.
    run = cohort_run[0]
    hazards = pl.read_parquet(run / "models/competing_hazard_ratios.parquet")
    endpoints = pl.read_parquet(run / "endpoints.parquet")
    with_death = set(endpoints.filter(pl.col("competing") == 1)["endpoint"].unique())
    assert set(hazards["endpoint"].unique()) == with_death
    assert set(hazards["model"].unique()) == {"subdistribution", "cause_specific"}
    cox = pl.read_parquet(run / "models/hazard_ratios.parquet").filter(pl.col("subgroup").is_null())
    own = hazards.filter(
        (pl.col("model") == "cause_specific") & (pl.col("cause") == pl.col("endpoint"))
    ).join(cox, on=["endpoint", "term"], suffix="_cox")
    assert own.height > 0
    both = own.filter(pl.col("estimable") & pl.col("estimable_cox"))
    np.testing.assert_allclose(both["hr"], both["hr_cox"], rtol=1e-5)
    table = pl.read_csv(run / "tables/competing_risks.csv", infer_schema=False)
    assert {"subdistribution_hr", "cause_specific_hr", "gray_test_p"} <= set(table.columns)
    assert (
        table.height
        == hazards.filter(
            (pl.col("model") == "subdistribution") & (pl.col("cause") == pl.col("endpoint"))
        ).height
    )
    html = (run / "report.html").read_text(encoding="utf-8")
    assert "subdistribution (Fine–Gray) and cause-specific hazard ratios" in html
    assert "Subdistribution hazard ratios come from the Fine–Gray model" in html
