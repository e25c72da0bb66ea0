"""End to end on the synthetic trial: the demo's run folder, accounting, reproducibility,
parity with calling the stage functions directly, and an interrupted run."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import polars as pl
import pytest
import yaml
from polars.testing import assert_frame_equal

from kidneycohort.pipeline import load_config, run_pipeline
from kidneycohort.pipeline.demo import demo_config_path, run_demo
from kidneycohort.run_folder import canonical_order
from tests._fixtures import REPO_ROOT

PATIENTS = 150  # small: the mixed model and figures dominate the time


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, dict]:
    base = tmp_path_factory.mktemp("demo")
    # PNG only at low resolution keeps the figures step short; SVG is checked on one
    result, inputs = run_demo(
        base / "run", patients=PATIENTS, overrides=["figures.formats=[png]", "figures.dpi=50"]
    )
    return result.run_dir, inputs, result.tables


def _overrides(inputs: Path, *extra: str) -> list[str]:
    return [
        f"data.patients.path={(inputs / 'patients.parquet').as_posix()}",
        f"data.labs.path={(inputs / 'labs.parquet').as_posix()}",
        f"data.events.path={(inputs / 'events.parquet').as_posix()}",
        *extra,
    ]


def _recipe_without(folder: Path, drop: set[str]) -> Path:
    source = REPO_ROOT / "pipelines" / "trial_endpoints.yaml"
    recipe = yaml.safe_load(source.read_text(encoding="utf-8"))
    recipe["steps"] = [s for s in recipe["steps"] if s not in drop]
    path = folder / "trial_no_figures.yaml"
    path.write_text(yaml.safe_dump(recipe), encoding="utf-8")
    return path


def test_demo_writes_every_file_of_the_trial_recipe(demo) -> None:
    run, _, _ = demo
    expected = [
        "labs.parquet",
        "rejected_rows.csv",
        "egfr.parquet",
        "baseline.parquet",
        "slopes.parquet",
        "endpoints.parquet",
        "models/survival_curves.parquet",
        "models/at_risk.parquet",
        "models/hazard_ratios.parquet",
        "models/trajectories.parquet",
        "models/slope_summary.parquet",
        "manifest.json",
        "run.log",
        "warnings.txt",
        "figures/attrition.png",
        "figures/model_trajectories.png",
        "figures/forest_hazard_ratios.png",
        "figures/kdigo_grid.png",
        "baseline_categories.parquet",
        "models/kdigo_grid.parquet",
        "tables/kdigo_grid.csv",
        "tables/endpoint_table.csv",
        "tables/slope_table.csv",
        "tables/baseline_characteristics.csv",
        "tables/tables.xlsx",
        "adam_tte.csv",
        "adam_tte.parquet",
        "report.html",
    ]
    missing = [rel for rel in expected if not (run / rel).is_file()]
    assert not missing
    # a trial recipe makes no KDIGO stage files; readers rely on their absence
    assert not (run / "stages.parquet").exists()
    assert not list(run.parent.glob(".*partial*"))


def test_manifest_contents_and_accounting(demo) -> None:
    run, inputs, _ = demo
    manifest = json.loads((run / "manifest.json").read_text())
    for key in (
        "schema_version",
        "kidneycohort_version",
        "created_utc",
        "run_id",
        "config",
        "overrides",
        "inputs",
        "packages",
        "seed",
        "accounting",
        "accounting_by_reason",
        "steps",
        "warnings",
        "study",
    ):
        assert key in manifest
    assert manifest["study"]["primary_equation"] == "ckd_epi_2021_cr"
    assert manifest["seed"] == 20240117
    for row in manifest["accounting"]:
        assert row["rows_read"] == row["rows_used"] + row["rows_rejected"] + row["rows_merged"]
    labs = next(r for r in manifest["accounting"] if r["table"] == "labs")
    assert labs["rows_read"] == pl.read_parquet(inputs / "labs.parquet").height
    # reasons add up to the rejected rows, and rejected_rows.csv holds every unused row
    listed = sum(r["rows"] for r in manifest["accounting_by_reason"] if r["table"] == "labs")
    merged = sum(r["rows"] for r in manifest["merged_by_reason"] if r["table"] == "labs")
    assert listed == labs["rows_rejected"] and merged == labs["rows_merged"]
    unused = pl.read_csv(run / "rejected_rows.csv").filter(pl.col("table") == "labs")
    assert unused.height == labs["rows_rejected"] + labs["rows_merged"]
    assert pl.read_parquet(run / "labs.parquet").height == labs["rows_used"]
    assert manifest["steps"][0]["name"] == "read"


def test_same_inputs_give_byte_identical_tables(demo, tmp_path: Path) -> None:
    _, inputs, _ = demo
    recipe = _recipe_without(tmp_path, {"figures"})
    runs = []
    for name in ("a", "b"):
        config = load_config(
            demo_config_path(), overrides=_overrides(inputs, f"study.recipe={recipe.as_posix()}")
        )
        runs.append(run_pipeline(config, out_dir=tmp_path / name).run_dir)
    files = sorted(
        p.relative_to(runs[0]).as_posix()
        for p in runs[0].rglob("*")
        if p.suffix in (".parquet", ".csv")
    )
    assert len(files) >= 10
    for rel in files:
        assert (runs[0] / rel).read_bytes() == (runs[1] / rel).read_bytes(), rel
    a = json.loads((runs[0] / "manifest.json").read_text())
    b = json.loads((runs[1] / "manifest.json").read_text())
    for key in ("created_utc", "run_id", "steps"):  # timestamps, run ids and timings
        a.pop(key), b.pop(key)
    # the report carries its creation time; data outputs carry rows and hashes
    for m in (a, b):
        m["outputs"] = [o for o in m["outputs"] if "sha256" in o]
    assert a["outputs"] and a == b


def test_tables_equal_the_stage_functions_called_directly(demo) -> None:
    from kidneycohort.baseline import BaselineRule, egfr_baseline
    from kidneycohort.egfr import EgfrRule, compute_egfr
    from kidneycohort.harmonize import HarmonizeRule, harmonize_tables
    from kidneycohort.io import read_events, read_labs, read_patients
    from kidneycohort.slopes import SlopeRule, egfr_slopes
    from kidneycohort.value_filter import ValueFilterRule

    run, inputs, _ = demo
    cfg = json.loads((run / "manifest.json").read_text())["config"]
    labs_spec = {**cfg["data"]["labs"], "path": str(inputs / "labs.parquet")}
    h = harmonize_tables(
        read_labs(labs_spec.pop("path"), **labs_spec).collect(),
        read_patients(inputs / "patients.parquet").collect(),
        read_events(inputs / "events.parquet").collect(),
        rule=HarmonizeRule(**cfg["harmonize"]),
    )
    egfr = compute_egfr(h.labs, h.patients, rule=EgfrRule(**cfg["egfr"]))
    vf = ValueFilterRule(**cfg["value_filter"])
    expected = {
        "labs": h.labs,
        "egfr": egfr,
        "baseline": egfr_baseline(egfr, rule=BaselineRule(**cfg["baseline"]), value_filter=vf),
        "slopes": egfr_slopes(egfr, rule=SlopeRule(**cfg["slopes"]), value_filter=vf),
    }
    for name, want in expected.items():
        got = pl.read_parquet(run / f"{name}.parquet")
        got = got.drop("group") if "group" in got.columns and "group" not in want.columns else got
        assert_frame_equal(got, canonical_order(want), check_dtypes=True)


def test_interrupted_run_leaves_no_complete_looking_folder(demo, tmp_path: Path) -> None:
    _, inputs, _ = demo
    # a step that raises: the Cox step asked to adjust for a covariate that is not there
    recipe = _recipe_without(tmp_path, {"figures"})
    config = load_config(
        demo_config_path(),
        overrides=_overrides(
            inputs, "survival.covariates=[no_such_column]", f"study.recipe={recipe.as_posix()}"
        ),
    )
    with pytest.raises(Exception, match="no_such_column") as info:
        run_pipeline(config, out_dir=tmp_path / "run")
    assert not (tmp_path / "run").exists()
    failed = tmp_path / "run.failed"
    assert (failed / "run.log").is_file() and not (failed / "manifest.json").exists()
    assert info.value.log_path.endswith("run.log")  # type: ignore[attr-defined]


def test_manifest_lists_every_output_with_rows_and_hashes(demo) -> None:
    import hashlib

    run, _, _ = demo
    manifest = json.loads((run / "manifest.json").read_text())
    listed = {o["file"]: o for o in manifest["outputs"]}
    on_disk = {
        p.relative_to(run).as_posix()
        for p in run.rglob("*")
        if p.is_file() and p.name not in ("manifest.json", "run.log")
    }
    assert set(listed) == on_disk
    for rel in ("egfr.parquet", "adam_tte.csv", "tables/kdigo_grid.csv"):
        # hashes and row counts re-computed here with hashlib and polars
        assert listed[rel]["sha256"] == hashlib.sha256((run / rel).read_bytes()).hexdigest()
        read = pl.read_parquet if rel.endswith(".parquet") else pl.read_csv
        assert listed[rel]["rows"] == read(run / rel).height
    assert listed["report.html"]["sha256"] is None and listed["report.html"]["bytes"] > 0
    assert [s["name"] for s in manifest["steps"]][-2:] == ["figures", "report"]
    assert manifest["config"]["recipe_steps"][-1] == "report"


def test_report_is_self_contained_and_shows_the_kdigo_grid(demo) -> None:
    run, _, _ = demo
    html = (run / "report.html").read_text(encoding="utf-8")
    assert html.lstrip().lower().startswith("<!doctype html")
    assert "Harbour Kidney Outcomes Trial" in html
    assert "KDIGO GFR x albuminuria grid" in html
    assert "data:image/png;base64," in html  # figures embedded, nothing fetched
    assert 'src="http' not in html and 'figures/attrition.png"' not in html
    assert "tables/tables.xlsx" in html  # the workbook exists before the report step
    assert (run / "tables" / "tables.xlsx").is_file()


def test_kdigo_grid_counts_patients_by_baseline_categories(demo) -> None:
    import numpy as np
    import pandas as pd

    run, _, tables = demo
    cfg = json.loads((run / "manifest.json").read_text())["config"]
    categories = pl.read_parquet(run / "baseline_categories.parquet")
    base = pl.read_parquet(run / "baseline.parquet").filter(pl.col("equation") == "ckd_epi_2021_cr")
    # one row per patient; every patient of the baseline table is there
    assert categories["patient_id"].is_unique().all()
    assert set(base["patient_id"].to_list()) <= set(categories["patient_id"].to_list())

    # G from the primary equation's baseline eGFR on the KDIGO 2012 cut points
    # (Table 5), recomputed here with numpy.digitize
    joined = categories.join(base.select("patient_id", "baseline_egfr"), on="patient_id")
    values = joined["baseline_egfr_right"].to_numpy()
    known = ~np.isnan(values)
    g_labels = np.array(["G5", "G4", "G3b", "G3a", "G2", "G1"], dtype=object)
    expected_g = g_labels[np.digitize(values[known], [15, 30, 45, 60, 90])]
    assert joined["g_category"].to_numpy()[known].tolist() == expected_g.tolist()

    # baseline UACR: geometric mean of the outpatient UACR results (mg/g) in days
    # -42..0 from index (the recipe's rule), recomputed here with pandas and numpy
    assert cfg["kdigo_grid"]["uacr_baseline"]["window_start_days"] == -42
    labs = pl.read_parquet(run / "labs.parquet").to_pandas()
    index = tables["cohort"].select("patient_id", "index_date").to_pandas()
    uacr = labs[(labs["analyte"] == "uacr") & ~labs["setting"].isin(["inpatient", "emergency"])]
    uacr = uacr.merge(index, on="patient_id")
    days = (pd.to_datetime(uacr["sample_date"]) - pd.to_datetime(uacr["index_date"])).dt.days
    window = uacr[(days >= -42) & (days <= 0) & (uacr["value"] > 0)]
    geo = window.groupby("patient_id")["value"].apply(lambda v: float(np.exp(np.log(v).mean())))
    got = categories.drop_nulls("baseline_uacr_mg_g").to_pandas().set_index("patient_id")
    assert len(geo) == len(got) > 0
    np.testing.assert_allclose(got.loc[geo.index, "baseline_uacr_mg_g"], geo.values, rtol=1e-9)
    # A on the KDIGO 2012 mg/g thresholds (Table 6): < 30, 30-300, > 300
    u = got["baseline_uacr_mg_g"].to_numpy()
    expected_a = np.where(u < 30, "A1", np.where(u <= 300, "A2", "A3"))
    assert got["a_category"].tolist() == expected_a.tolist()

    # the grid model: 18 cells, counts equal a pandas crosstab of the categories
    grid = pl.read_parquet(run / "models/kdigo_grid.parquet")
    assert grid.height == 18
    both = categories.drop_nulls(["g_category", "a_category"]).to_pandas()
    crosstab = pd.crosstab(both["g_category"], both["a_category"])
    for g, a, n in grid.select("g_category", "a_category", "n").rows():
        want = int(crosstab.loc[g, a]) if g in crosstab.index and a in crosstab.columns else 0
        assert n == want, (g, a)
    assert int(grid["n"].sum()) == len(both)
    # the printed table (no suppression in the trial recipe) equals the model counts
    # cell by cell and adds the margins
    table = pl.read_csv(run / "tables/kdigo_grid.csv", infer_schema=False)
    cells = table.filter((pl.col("g_category") != "all") & (pl.col("a_category") != "all"))
    printed = dict(
        zip(zip(cells["g_category"], cells["a_category"], strict=True), cells["n"], strict=True)
    )
    for g, a, n in grid.select("g_category", "a_category", "n").rows():
        assert printed[(g, a)] == str(n), (g, a)
    total = table.filter((pl.col("g_category") == "all") & (pl.col("a_category") == "all"))
    assert int(total["n"][0]) == int(cells["n"].cast(pl.Int64).sum())


def test_adam_dataset_equals_the_export_of_the_endpoints(demo) -> None:
    from kidneycohort.adam import to_adam_tte
    from kidneycohort.pipeline.steps import EndpointsSection

    run, _, _ = demo
    cfg = json.loads((run / "manifest.json").read_text())["config"]
    endpoints = pl.read_parquet(run / "endpoints.parquet")
    subjects = (
        endpoints.select("patient_id", "group")
        .unique()
        .join(
            pl.read_parquet(run / "endpoints.parquet")
            .group_by("patient_id")
            .agg(pl.col("start_date").first().alias("index_date")),
            on="patient_id",
        )
    )
    definitions = EndpointsSection(**cfg["endpoints"]).definitions
    reference = cfg["survival"]["reference_group"]
    arms = [reference, *sorted(set(subjects["group"].drop_nulls()) - {reference})]
    want = to_adam_tte(
        endpoints.drop("group"),
        definitions,
        subjects=subjects,
        arm_order=arms,
        study_id=cfg["study"]["name"],
    )
    got = pl.read_parquet(run / "adam_tte.parquet")
    # the run also points eGFR-dated rows at their ADEGFR record (SRCSEQ)
    assert_frame_equal(
        got.drop("SRCSEQ").sort("PARAMCD", "USUBJID"),
        want.drop("SRCSEQ").sort("PARAMCD", "USUBJID"),
    )
    from_egfr = got.filter(pl.col("SRCDOM") == "ADEGFR")
    assert from_egfr.height and from_egfr["SRCSEQ"].null_count() == 0
    csv = pl.read_csv(run / "adam_tte.csv", try_parse_dates=True)
    assert csv.height == got.height and csv.columns == got.columns
    # every randomised subject in every parameter (not-evaluable ones censored at the
    # origin); CNSR is 0 for an event (ADaM BDS-TTE)
    randomised = endpoints.filter(pl.col("start_date").is_not_null())
    assert got.height == randomised.height
    per_param = got.group_by("PARAMCD").len()["len"].unique().to_list()
    assert per_param == [randomised["patient_id"].n_unique()]
    assert int((got["CNSR"] == 0).sum()) == int(endpoints["event"].fill_null(0).sum())
    assert got["STUDYID"].unique().to_list() == ["Harbour Kidney Outcomes Trial (synthetic demo)"]
    assert set(got["TRTP"].unique().to_list()) == {"placebo", "active"}
    assert got.filter(pl.col("TRTP") == "placebo")["TRTPN"].unique().to_list() == [1]
    # AVAL in days counts the origin day: ADT - STARTDT + 1
    days = (got["ADT"] - got["STARTDT"]).dt.total_days() + 1
    assert (got["AVAL"] == days.cast(pl.Float64)).all()


def test_adam_files_in_the_run_folder(demo) -> None:
    from kidneycohort.io.cdisc_files import read_dataset_json

    run = demo[0]
    names = {p.name for p in (run / "adam").iterdir()}
    assert names == {f"{d}.{x}" for d in ("adsl", "adegfr", "adtte") for x in ("xpt", "json")} | {
        "spec.csv"
    }
    adsl, meta = read_dataset_json(run / "adam" / "adsl.json")
    endpoints = pl.read_parquet(run / "endpoints.parquet")
    assert adsl.height == endpoints["patient_id"].n_unique()
    assert meta["name"] == "ADSL" and meta["records"] == adsl.height
    spec = pl.read_csv(run / "adam" / "spec.csv")
    assert set(spec["dataset"].unique()) == {"ADSL", "ADEGFR", "ADTTE"}
    assert (spec["variable"].str.len_chars() <= 8).all()
    assert (spec["label"].str.len_chars() <= 40).all()
    adtte = pl.read_parquet(run / "adam_tte.parquet")
    back = pd.read_sas(run / "adam" / "adtte.xpt", format="xport", encoding="utf-8")
    assert len(back) == adtte.height


def test_trial_tables_print_exact_counts(demo) -> None:
    # the trial recipe turns small-cell suppression off (its tables are not a public
    # release); the shared rate table then prints the exact counts of models/
    run = demo[0]
    manifest = json.loads((run / "manifest.json").read_text())
    assert manifest["config"]["tables"]["small_cell_threshold"] == 0
    rates = pl.read_csv(run / "tables" / "incidence_rates.csv", infer_schema=False)
    assert {"rate_ratio", "rate_difference_per_100py"} <= set(rates.columns)
    exact = pl.read_parquet(run / "models" / "incidence_rates.parquet")
    joined = rates.join(
        exact.select("endpoint", "group", pl.col("events").cast(pl.String).alias("exact")),
        on=["endpoint", "group"],
    )
    assert joined.height == rates.height
    assert (joined["events"] == joined["exact"]).all()
    assert joined["exact"].cast(pl.Int64).is_between(1, 10).any()  # rare endpoints shown


def test_the_slope_analysis_under_dropout_is_reported(demo) -> None:
    """The joint model beside the mixed model alone, the tipping point and the stated
    value at kidney failure: model tables, the shared table and the report's methods."""
    run, _, _ = demo
    slopes = pl.read_parquet(run / "models" / "dropout_slopes.parquet")
    assert set(slopes["model"]) == {"joint", "mixed"}
    # the mixed model alone (ML) and the slope model (REML) estimate the same chronic
    # slope difference; ML and REML differ by far less than one standard error here
    mixed = slopes.filter(
        (pl.col("model") == "mixed")
        & (pl.col("quantity") == "chronic_slope")
        & pl.col("contrast").str.contains(" - ")
    )
    reml = pl.read_parquet(run / "models" / "slope_summary.parquet").filter(
        (pl.col("quantity") == "chronic_slope") & pl.col("contrast").str.contains(" - ")
    )
    assert abs(mixed["estimate"][0] - reml["estimate"][0]) < 0.2 * reml["se"][0]
    sensitivity = pl.read_parquet(run / "models" / "dropout_sensitivity.parquet")
    assert set(sensitivity["analysis"]) == {"delta_adjusted", "stated_value_at_kidney_failure"}
    shared = (run / "tables" / "dropout_analysis.md").read_text(encoding="utf-8")
    assert "Joint model of eGFR and dropout" in shared
    report = (run / "report.html").read_text(encoding="utf-8")
    assert "eGFR slopes under informative dropout" in report
    assert "Slopes under informative dropout" in report and "Rubin" in report
