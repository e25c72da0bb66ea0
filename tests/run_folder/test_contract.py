"""The run-folder contract: every file declared once, written and read through it."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest

from kidneycohort import schemas
from kidneycohort.errors import InputDataError
from kidneycohort.pipeline.registry import default_registry
from kidneycohort.run_folder import (
    FILES,
    Manifest,
    RunFolder,
    check_layout,
    read_manifest,
    write_manifest,
    write_table,
)
from kidneycohort.slopes import SlopeRule


def _folder(tmp_path: Path, config: dict) -> RunFolder:
    write_manifest(tmp_path, Manifest(config=config))
    return RunFolder(tmp_path)


def test_every_file_a_step_makes_is_declared() -> None:
    # a step's table is either a declared run-folder file or an in-memory table (no "/")
    for step in default_registry():
        for name in step.makes:
            assert name in FILES or "/" not in name, (step.name, name)


def test_declared_files_and_paths() -> None:
    assert FILES["egfr"].files == ("egfr.parquet",)
    assert FILES["rejected_rows"].files == ("rejected_rows.csv",)
    assert FILES["adam_tte"].files == ("adam_tte.csv", "adam_tte.parquet")
    assert FILES["tables/endpoint_table"].files == (
        "tables/endpoint_table.csv",
        "tables/endpoint_table.md",
    )
    assert FILES["models/hazard_ratios"].schema == schemas.HAZARD_RATIOS


def test_a_table_off_its_contract_is_refused(tmp_path: Path) -> None:
    good = pl.DataFrame(schema=schemas.AT_RISK)
    check_layout("models/at_risk", good)
    with pytest.raises(TypeError, match="does not match its contract"):
        check_layout("models/at_risk", good.drop("n_at_risk"))
    with pytest.raises(TypeError, match="does not match its contract"):
        check_layout("models/at_risk", good.with_columns(pl.col("years").cast(pl.String)))
    # optional trailing columns only where declared (group on per-patient tables)
    baseline = pl.DataFrame(schema={**schemas.BASELINE, "group": pl.String})
    check_layout("baseline", baseline)
    with pytest.raises(TypeError):
        check_layout("models/at_risk", good.with_columns(group2=pl.lit("a")))
    assert write_table(tmp_path, "in_memory_only", good) == []


def test_reader_opens_tables_by_name(tmp_path: Path) -> None:
    table = pl.DataFrame(
        {"endpoint": ["a"], "group": ["x"], "years": [1.0], "n_at_risk": [3]},
        schema=schemas.AT_RISK,
    )
    write_table(tmp_path, "models/at_risk", table)
    run = RunFolder(tmp_path)
    assert run.has("models/at_risk") and not run.has("egfr")
    assert run.table("models/at_risk").equals(table)
    assert run.table_or_none("egfr") is None
    with pytest.raises(InputDataError, match="did you mean 'models/at_risk'"):
        run.table("models/at_rsk")
    with pytest.raises(InputDataError, match="not a folder"):
        RunFolder(tmp_path / "absent")


def test_settings_come_from_the_resolved_config(tmp_path: Path) -> None:
    # KDIGO 2012: rapid progression is a sustained fall of more than 5 mL/min/1.73 m2/yr;
    # the config states a rate of fall, the figures mark a negative slope
    assert _folder(tmp_path, {"slopes": {"rapid_decline_per_year": 5}}).rapid_decline_slope == -5
    assert _folder(tmp_path, {"slopes": {"rapid_decline_per_year": 4.0}}).rapid_decline_slope == -4
    default = _folder(tmp_path, {})
    assert default.rapid_decline_slope == -SlopeRule().rapid_decline_per_year
    assert default.small_cell_threshold == 10 and default.knot_years is None
    run = _folder(tmp_path, {"tables": {"small_cell_threshold": 5}, "slope_model": {}})
    assert run.small_cell_threshold == 5
    assert run.knot_years == 0.25  # the slope model's default knot (3 months)


def test_manifest_round_trip_and_bad_manifest(tmp_path: Path) -> None:
    written = Manifest(seed=7, config={"study": {"name": "x"}}, overrides=["a=1"])
    write_manifest(tmp_path, written)
    assert read_manifest(tmp_path) == written
    (tmp_path / "manifest.json").write_text("{not json", encoding="utf-8")
    with pytest.raises(InputDataError, match="not valid JSON"):
        read_manifest(tmp_path)
    (tmp_path / "manifest.json").write_text(json.dumps({"seed": "many"}), encoding="utf-8")
    with pytest.raises(InputDataError, match=r"not a kidneycohort manifest .*seed"):
        read_manifest(tmp_path)
    assert read_manifest(tmp_path / "nothing") is None
