"""A study config with ``data.source`` (OMOP CDM or SDTM) runs the trial recipe end to end."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import pytest

from kidneycohort.errors import ConfigError
from kidneycohort.pipeline import load_config, run_pipeline
from kidneycohort.pipeline.demo import demo_config_path
from kidneycohort.synthetic import write_cohort


@pytest.fixture(scope="module")
def written(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("standard_sources")
    for fmt in ("omop", "sdtm"):
        write_cohort("synthetic/trial_two_arm.yaml", out, patients=160, seed=21, fmt=fmt)
    return out


def config(data: dict[str, Any]) -> dict[str, Any]:
    """The demo trial config with its data section replaced."""
    import yaml

    raw = yaml.safe_load(demo_config_path().read_text(encoding="utf-8"))
    raw["data"] = data
    raw.pop("output", None)
    return raw


def run(tmp_path: Path, data: dict[str, Any], name: str) -> Path:
    study = load_config(raw=config(data), base_dir=tmp_path)
    recipe_steps = [s for s in study.recipe.steps if s not in ("figures", "report")]
    study.steps = [s for s in study.steps if s.name in recipe_steps]
    return run_pipeline(study, out_dir=tmp_path / name).run_dir


def test_sdtm_and_omop_sources_give_the_same_endpoints(written: Path, tmp_path: Path) -> None:
    sdtm_run = run(
        tmp_path,
        {
            "source": {
                "kind": "sdtm",
                "folder": str(written / "sdtm" / "xpt"),
                "lab_setting": "outpatient",
            }
        },
        "sdtm",
    )
    omop_run = run(
        tmp_path,
        {
            "source": {
                "kind": "omop",
                "database": "duckdb",
                "path": str(written / "omop" / "omop_cdm.duckdb"),
                "cohort": {"groups": {1: "placebo", 2: "active"}},
                "patient_id": "person_source_value",
                "results_schema": "kidneycohort_results",
            }
        },
        "omop",
    )
    endpoints = [
        pl.read_parquet(r / "endpoints.parquet").sort("patient_id", "endpoint")
        for r in (sdtm_run, omop_run)
    ]
    assert endpoints[0].equals(endpoints[1])
    manifest = json.loads((omop_run / "manifest.json").read_text(encoding="utf-8"))
    source = next(i for i in manifest["inputs"] if i["table"] == "omop")
    assert source["database"] == "duckdb" and source["raw_labs"] > 1000
    sdtm_inputs = json.loads((sdtm_run / "manifest.json").read_text(encoding="utf-8"))["inputs"]
    assert {"sdtm.dm", "sdtm.lb"} <= {i["table"] for i in sdtm_inputs}
    assert (sdtm_run / "adam" / "adsl.xpt").is_file()
    # the OMOP run wrote its patient-level outputs back, tagged with the manifest's run id
    with duckdb.connect(str(written / "omop" / "omop_cdm.duckdb"), read_only=True) as con:
        ids = con.execute(
            "SELECT DISTINCT run_id FROM kidneycohort_results.kc_endpoints"
        ).fetchall()
        count = con.execute("SELECT count(*) FROM kidneycohort_results.kc_endpoints").fetchone()
    assert ids == [(manifest["run_id"],)]
    assert count is not None and count[0] == endpoints[1].height


def test_source_and_files_together_are_refused(tmp_path: Path) -> None:
    data = {"source": {"kind": "sdtm", "folder": "x"}, "patients": {"path": "p.csv"}}
    with pytest.raises(ConfigError, match=r"give either source or the patients/labs/events files"):
        load_config(raw=config(data), base_dir=tmp_path)
    with pytest.raises(
        ConfigError, match=r"data\.source: unknown key 'cdm_shema' \(did you mean 'cdm_schema'"
    ):
        load_config(
            raw=config({"source": {"kind": "omop", "connection_env": "X", "cdm_shema": "c"}}),
            base_dir=tmp_path,
        )
