"""End to end on the synthetic trial: the demo's run folder, accounting, reproducibility,
parity with calling the stage functions directly, and an interrupted run."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest
import yaml
from polars.testing import assert_frame_equal

from kidneycohort.pipeline import load_config, run_pipeline
from kidneycohort.pipeline.demo import demo_config_path, run_demo
from kidneycohort.pipeline.run_folder import canonical_order

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
    source = Path(__file__).resolve().parents[1] / "pipelines" / "trial_endpoints.yaml"
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
    for key in ("created_utc", "steps"):  # timestamps and timings
        a.pop(key), b.pop(key)
    assert a == b


def test_tables_equal_the_stage_functions_called_directly(demo) -> None:
    from kidneycohort.aki import ValueFilter
    from kidneycohort.baseline import BaselineRule, baseline
    from kidneycohort.egfr import EgfrRules, compute_egfr
    from kidneycohort.harmonize import HarmonizeRules, harmonize
    from kidneycohort.io import read_events, read_labs, read_patients
    from kidneycohort.slopes import SlopeRule, egfr_slopes

    run, inputs, _ = demo
    cfg = json.loads((run / "manifest.json").read_text())["config"]
    labs_spec = {**cfg["data"]["labs"], "path": str(inputs / "labs.parquet")}
    h = harmonize(
        read_labs(labs_spec.pop("path"), **labs_spec).collect(),
        read_patients(inputs / "patients.parquet").collect(),
        read_events(inputs / "events.parquet").collect(),
        rules=HarmonizeRules(**cfg["harmonize"]),
    )
    egfr = compute_egfr(h.labs, h.patients, rules=EgfrRules(**cfg["egfr"]))
    vf = ValueFilter(**cfg["value_filter"])
    expected = {
        "labs": h.labs,
        "egfr": egfr,
        "baseline": baseline(egfr, rule=BaselineRule(**cfg["baseline"]), value_filter=vf),
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
